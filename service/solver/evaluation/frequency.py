"""Robustness in frequency: sensitivities of the loop broken at the plant input and output.

With the plant ``P(z)`` (u -> y) and the controller ``K(z)`` (y -> u, the sign of negative
feedback inside it, so ``u = K y``) the loop transfers, in the negative-feedback convention
of the classical tools, are ::

    at the plant input:   L_i = -K P      (m x m)
    at the plant output:  L_o = -P K      (py x py)

(with a measured feed-through ``D_m`` the plant is ``C_m (zI - A)^-1 B + D_m`` and ``K``
reads ``y - D_m u`` of its own command, :func:`service.solver.estimation.realization.with_feedthrough_correction`),
and at each point ``S = (I + L)^-1`` (sensitivity) and ``T = L (I + L)^-1`` (complementary
sensitivity), so ``S + T = I`` (common practice).  They are evaluated on the unit circle
``z = e^(j w Ts)`` over a log-spaced grid of ``points`` frequencies ending at the Nyquist
frequency ``pi / Ts`` and starting ``decades`` decades below it.  Frequencies are in rad per
unit of the sample time (rad/s for a sample time in seconds).

Reported per break point:

- the singular values of ``S`` and ``T`` on the grid;
- the peaks ``max_w sigma_max(S)`` and ``max_w sigma_max(T)`` and where they occur (the grid
  maximum refined by ``scipy.optimize.minimize_scalar`` between its neighbours);
- the closed-loop bandwidth: the lowest frequency at which ``sigma_max(S)`` first crosses
  ``1/sqrt(2)`` (-3 dB) from below (common practice), refined by ``scipy.optimize.brentq``;
  ``None`` when it never does on the grid (for instance already above at the lowest
  frequency, as a loop without integral action can be);
- for a single loop (``L`` scalar) the classical margins: the gain margin ``1/|L|`` at a phase
  crossover (``L`` real and negative) and the phase margin ``180 deg + arg L`` at a gain
  crossover (``|L| = 1``), each at the crossover nearest to instability (smallest
  ``|log GM|``, smallest ``|PM|``), crossovers refined by ``scipy.optimize.brentq``.  Zero
  frequency (``z = 1``, where ``L`` is real) is a phase crossover when ``L(1) < 0``.  The
  margins speak about robustness only when the closed loop is stable; check ``stable``.

The grid reaches a decade below the slowest pole of the plant, the controller and the
closed loop (:func:`loop_decades`, the corner frequency ``|ln z| / Ts`` of the continuous
equivalent), at least four and at most twelve decades below Nyquist.

A peak sensitivity ``Ms`` bounds the classical margins from below (the Nyquist curve stays
``1/Ms`` away from -1): ``GM >= Ms/(Ms - 1)`` and ``PM >= 2 arcsin(1/(2 Ms))`` (common
practice).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import scipy.linalg
import scipy.optimize
from numpy.typing import NDArray

from service.errors import NumericalError
from service.solver.design.controller import ControllerDesign
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.realization import (
    StateSpace,
    closed_loop_poles,
    controller_system,
    plant_system,
)

__all__ = [
    "ANALYSIS_FIELD",
    "BANDWIDTH_LEVEL",
    "DEFAULT_DECADES",
    "DEFAULT_POINTS",
    "FrequencyAnalysis",
    "LoopMargins",
    "LoopSensitivity",
    "design_frequency_analysis",
    "frequency_analysis",
    "frequency_grid",
    "loop_decades",
    "loop_margins",
]

Location = Literal["input", "output"]

#: ``sigma_max(S)`` crossing this level from below marks the closed-loop bandwidth (-3 dB).
BANDWIDTH_LEVEL = 1.0 / np.sqrt(2.0)
#: Default number of grid frequencies.
DEFAULT_POINTS = 200
#: Default span of the grid below the Nyquist frequency, in decades.
DEFAULT_DECADES = 4.0
#: The key of the request field a failure of the analysis names.
ANALYSIS_FIELD = ("analysis",)
#: Relative tolerance of the refinements on ``w`` (``brentq`` xtol / ``minimize_scalar`` xatol).
_FREQUENCY_TOLERANCE = 1e-12


@dataclass(frozen=True)
class LoopMargins:
    """Classical margins of a single loop.

    Attributes
    ----------
    gain_margin : float
        Factor by which the loop gain may change before the Nyquist curve passes through -1
        (``inf`` without a phase crossover; below 1 means a gain *decrease* destabilizes).
    gain_margin_db : float
        ``20 log10(gain_margin)``.
    phase_crossover_frequency : float or None
        Where ``L`` is real and negative (rad per time unit).
    phase_margin : float
        Degrees, in (-180, 180] (``inf`` without a gain crossover).
    gain_crossover_frequency : float or None
        Where ``|L| = 1``.
    """

    gain_margin: float
    gain_margin_db: float
    phase_crossover_frequency: float | None
    phase_margin: float
    gain_crossover_frequency: float | None


@dataclass(frozen=True)
class LoopSensitivity:
    """Sensitivities of the loop broken at one point.

    Attributes
    ----------
    location : {"input", "output"}
        Plant input (``k = m``) or plant output (``k = py``).
    loop : ndarray of complex, shape (N, k, k)
        ``L`` on the grid.
    sensitivity, complementary : ndarray of complex, shape (N, k, k)
        ``S`` and ``T``.
    sensitivity_singular_values, complementary_singular_values : ndarray, shape (N, k)
        Descending.
    peak_sensitivity, peak_sensitivity_frequency : float
        ``max sigma_max(S)`` and where.
    peak_complementary, peak_complementary_frequency : float
        ``max sigma_max(T)`` and where.
    bandwidth : float or None
        See the module notes.
    margins : LoopMargins or None
        For a single loop (``k = 1``) only.
    """

    location: Location
    loop: NDArray[np.complex128]
    sensitivity: NDArray[np.complex128]
    complementary: NDArray[np.complex128]
    sensitivity_singular_values: NDArray[np.float64]
    complementary_singular_values: NDArray[np.float64]
    peak_sensitivity: float
    peak_sensitivity_frequency: float
    peak_complementary: float
    peak_complementary_frequency: float
    bandwidth: float | None
    margins: LoopMargins | None

    @property
    def peak_sensitivity_db(self) -> float:
        return float(20.0 * np.log10(self.peak_sensitivity))


@dataclass(frozen=True)
class FrequencyAnalysis:
    """Frequency analysis of a loop at the plant input and output.

    Attributes
    ----------
    frequencies : ndarray, shape (N,)
        The grid (rad per time unit), ascending, last entry ``pi / Ts``.
    sample_time : float
    plant_input, plant_output : LoopSensitivity
    closed_loop_poles : ndarray of complex
        Poles of plant and controller together, by descending modulus.
    stable : bool
        Every closed-loop pole below ``1 - MARGINAL_TOLERANCE`` in modulus, the verdict of
        ``closed_loop.stable`` and of the other loops (:mod:`service.solver.design.marginal`): a
        pole on the circle to rounding (a zone output's integrator) is marginal, whichever
        side of 1 rounding puts it.
    """

    frequencies: NDArray[np.float64]
    sample_time: float
    plant_input: LoopSensitivity
    plant_output: LoopSensitivity
    closed_loop_poles: NDArray[np.complex128]
    stable: bool

    @property
    def nyquist_frequency(self) -> float:
        return float(np.pi / self.sample_time)

    @property
    def unstable(self) -> bool:
        """A closed-loop pole above ``1 + MARGINAL_TOLERANCE`` in modulus."""
        return bool(np.abs(self.closed_loop_poles).max(initial=0.0) > 1.0 + MARGINAL_TOLERANCE)


def frequency_grid(
    sample_time: float, *, points: int = DEFAULT_POINTS, decades: float = DEFAULT_DECADES
) -> NDArray[np.float64]:
    """Return ``points`` log-spaced frequencies from ``10^-decades pi/Ts`` to ``pi/Ts``.

    Parameters
    ----------
    sample_time : float
        ``Ts > 0``.
    points : int
        ``>= 2``.
    decades : float
        ``> 0``.

    Returns
    -------
    ndarray, shape (points,)
        Rad per time unit; the last entry is exactly ``pi / Ts``.
    """
    assert sample_time > 0 and points >= 2 and decades > 0, (sample_time, points, decades)
    nyquist = np.pi / sample_time
    grid = nyquist * np.logspace(-decades, 0.0, points)
    grid[-1] = nyquist
    return grid


#: Most decades below the Nyquist frequency the grid reaches for slow poles.
MAX_DECADES = 12.0


def loop_decades(poles: NDArray[np.complex128], *, sample_time: float, decades: float = DEFAULT_DECADES) -> float:
    """Return the grid span, in decades below Nyquist, that reaches a decade below the slowest pole.

    Parameters
    ----------
    poles : ndarray of complex
        Poles of the plant, the controller and the closed loop (``z``).
    sample_time : float
    decades : float, keyword-only
        The least span (default :data:`DEFAULT_DECADES`).

    Returns
    -------
    float
        ``max(decades, log10(pi/Ts / (w_slow / 10)))`` capped at :data:`MAX_DECADES`, with
        ``w_slow = min |ln z| / Ts`` over the poles that are neither at ``z = 0`` nor at
        ``z = 1`` (within ``MARGINAL_TOLERANCE``) (the continuous-time equivalent ``s = ln(z) / Ts``; a mode's corner
        frequency is ``|s|``).  Crossovers and peaks sit near the corners of the loop's own
        poles, so the grid then covers them however slow the loop is.
    """
    z = np.asarray(poles, dtype=complex)
    # A pole at 1 (an integrator, a zone output's or a free direction's pole) sits there
    # to rounding, and its rounding moves with the signals' units: every pole within the
    # verdicts' tolerance of 1 is at 1, so the grid is the same in any units.
    z = z[(np.abs(z) > 1e-300) & (np.abs(z - 1.0) > MARGINAL_TOLERANCE)]
    if z.size == 0:
        return float(decades)
    corner = float(np.abs(np.log(z)).min()) / sample_time
    if corner <= 0.0:
        return float(decades)
    needed = float(np.log10((np.pi / sample_time) / (corner / 10.0)))
    return float(min(max(decades, needed), MAX_DECADES))


def _loop_function(
    plant: StateSpace, controller: StateSpace, location: Location, sample_time: float
) -> Callable[[NDArray[np.float64]], NDArray[np.complex128]]:
    """``w -> L(e^(j w Ts))`` at one break point, shape (N, k, k)."""

    def loop(w: NDArray[np.float64]) -> NDArray[np.complex128]:
        z = np.exp(1j * np.asarray(w, dtype=float).reshape(-1) * sample_time)
        p, k = plant.evaluate(z), controller.evaluate(z)
        return -(k @ p) if location == "input" else -(p @ k)

    return loop


def _sensitivities(loop: NDArray[np.complex128]) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
    """``S = (I + L)^-1`` by a linear solve and ``T = L S``."""
    eye = np.eye(loop.shape[-1])
    s: NDArray[Any] = np.linalg.solve(eye + loop, np.broadcast_to(eye, loop.shape).astype(complex))
    t: NDArray[np.complex128] = loop @ s
    return s, t


def _largest(matrices: NDArray[np.complex128]) -> NDArray[np.float64]:
    values: NDArray[Any] = np.linalg.svd(matrices, compute_uv=False)[..., 0]
    return values


def _peak(
    grid: NDArray[np.float64], values: NDArray[np.float64], level: Callable[[float], float]
) -> tuple[float, float]:
    """Grid maximum refined between its neighbours (bounded Brent on ``-level``)."""
    i = int(np.argmax(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    best_w, best = float(grid[i]), float(values[i])
    if hi > lo:
        found = scipy.optimize.minimize_scalar(
            lambda w: -level(w), bounds=(lo, hi), method="bounded", options={"xatol": _FREQUENCY_TOLERANCE * hi}
        )
        if found.success and -found.fun > best:
            best_w, best = float(found.x), float(-found.fun)
    return best, best_w


def _root(f: Callable[[float], float], lo: float, hi: float) -> float:
    return float(scipy.optimize.brentq(f, lo, hi, xtol=_FREQUENCY_TOLERANCE * hi, rtol=4 * np.finfo(float).eps))


def _bandwidth(
    grid: NDArray[np.float64], largest_s: NDArray[np.float64], level: Callable[[float], float]
) -> float | None:
    above = largest_s >= BANDWIDTH_LEVEL
    if above[0] or not above.any():
        return None
    i = int(np.argmax(above))  # first grid point at or above the level
    return _root(lambda w: level(w) - BANDWIDTH_LEVEL, float(grid[i - 1]), float(grid[i]))


def loop_margins(
    loop: Callable[[NDArray[np.float64]], NDArray[np.complex128]], grid: NDArray[np.float64]
) -> LoopMargins:
    """Return the classical gain and phase margins of a single loop.

    Parameters
    ----------
    loop : callable
        ``w -> L(e^(j w Ts))`` of shape (N, 1, 1).
    grid : ndarray, shape (N,)
        Ascending frequencies; the crossovers are searched between neighbouring points and
        at the last point (where a real system's ``L`` is real if it is the Nyquist frequency).

    Returns
    -------
    LoopMargins
        See the module notes for the choice among several crossovers.
    """

    def scalar(w: float) -> complex:
        return complex(loop(np.array([w]))[0, 0, 0])

    values = loop(grid)[:, 0, 0]
    # Phase crossovers: Im L changes sign (refined) where Re L < 0, or the Nyquist end.
    phase: list[tuple[float, complex]] = []
    imag = values.imag
    for i in np.nonzero(np.sign(imag[:-1]) * np.sign(imag[1:]) < 0)[0]:
        w = _root(lambda x: scalar(x).imag, float(grid[i]), float(grid[i + 1]))
        phase.append((w, scalar(w)))
    scale = max(1.0, float(np.abs(values[-1])))
    if abs(values[-1].imag) <= 1e-9 * scale:
        phase.append((float(grid[-1]), complex(values[-1].real, 0.0)))
    # z = 1 (zero frequency): L is real there, a crossover when it is negative (a loop without
    # integral action whose phase starts at -180 degrees)
    with np.errstate(all="ignore"):
        try:
            dc = complex(loop(np.array([0.0]))[0, 0, 0])
        except np.linalg.LinAlgError:  # a pole at z = 1: |L| is infinite there
            dc = complex("nan")
    if np.isfinite(dc.real) and abs(dc.imag) <= 1e-9 * max(1.0, abs(dc)):
        phase.append((0.0, complex(dc.real, 0.0)))
    phase = [(w, v) for w, v in phase if v.real < 0 and np.isfinite(abs(v)) and abs(v) > 0]
    gm, gm_w = float("inf"), None
    if phase:
        w, v = min(phase, key=lambda item: abs(np.log(abs(item[1]))))
        gm, gm_w = 1.0 / abs(v), w
    # Gain crossovers: |L| - 1 changes sign.
    with np.errstate(divide="ignore"):
        magnitude = np.log(np.abs(values))
    pm, pm_w = float("inf"), None
    crossings = np.nonzero(np.sign(magnitude[:-1]) * np.sign(magnitude[1:]) <= 0)[0]
    margins: list[tuple[float, float]] = []
    for i in crossings:
        lo, hi = float(grid[i]), float(grid[i + 1])
        if magnitude[i] == 0.0:
            w = lo
        elif magnitude[i + 1] == 0.0:
            w = hi
        else:
            w = _root(lambda x: float(np.log(abs(scalar(x)))), lo, hi)
        angle = float(np.degrees(np.angle(scalar(w))))
        margin = 180.0 + angle
        margin = margin - 360.0 if margin > 180.0 else margin
        margins.append((w, margin))
    if margins:
        pm_w, pm = min(margins, key=lambda item: abs(item[1]))
    return LoopMargins(
        gain_margin=gm,
        gain_margin_db=float(20.0 * np.log10(gm)) if np.isfinite(gm) else float("inf"),
        phase_crossover_frequency=gm_w,
        phase_margin=pm,
        gain_crossover_frequency=pm_w,
    )


def _loop_sensitivity(
    plant: StateSpace, controller: StateSpace, location: Location, grid: NDArray[np.float64], sample_time: float
) -> LoopSensitivity:
    loop_fn = _loop_function(plant, controller, location, sample_time)

    def largest(kind: int) -> Callable[[float], float]:
        def level(w: float) -> float:
            return float(_largest(_sensitivities(loop_fn(np.array([w])))[kind])[0])

        return level

    loop = loop_fn(grid)
    s, t = _sensitivities(loop)
    sv_s: NDArray[Any] = np.linalg.svd(s, compute_uv=False)
    sv_t: NDArray[Any] = np.linalg.svd(t, compute_uv=False)
    peak_s, peak_s_w = _peak(grid, sv_s[:, 0], largest(0))
    peak_t, peak_t_w = _peak(grid, sv_t[:, 0], largest(1))
    return LoopSensitivity(
        location=location,
        loop=loop,
        sensitivity=s,
        complementary=t,
        sensitivity_singular_values=sv_s,
        complementary_singular_values=sv_t,
        peak_sensitivity=peak_s,
        peak_sensitivity_frequency=peak_s_w,
        peak_complementary=peak_t,
        peak_complementary_frequency=peak_t_w,
        bandwidth=_bandwidth(grid, sv_s[:, 0], largest(0)),
        margins=loop_margins(loop_fn, grid) if loop.shape[-1] == 1 else None,
    )


def frequency_analysis(
    plant: StateSpace,
    controller: StateSpace,
    *,
    sample_time: float,
    points: int = DEFAULT_POINTS,
    decades: float = DEFAULT_DECADES,
) -> FrequencyAnalysis:
    """Analyse the loop ``u = K y`` around ``y = P u`` at the plant input and output.

    Parameters
    ----------
    plant : StateSpace
        m inputs, py outputs; strictly proper but for a measured feed-through ``D_m``.
    controller : StateSpace
        py inputs, m outputs (:mod:`service.solver.estimation.realization`).
    sample_time : float
        ``Ts``; frequencies come out in rad per its time unit.
    points : int, optional
        Grid size (default 200).
    decades : float, optional
        Grid span below the Nyquist frequency (default 4).

    Returns
    -------
    FrequencyAnalysis

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/analysis``, when a pole of the plant, the controller or the closed loop
        lies on the unit circle exactly at a grid frequency (the responses are infinite
        there; the Nyquist end ``z = -1`` is always on the grid).
    """
    assert plant.inputs == controller.outputs and plant.outputs == controller.inputs, (
        plant.d.shape,
        controller.d.shape,
    )
    poles = closed_loop_poles(plant, controller)
    decades = loop_decades(
        np.concatenate([scipy.linalg.eigvals(plant.a), scipy.linalg.eigvals(controller.a), poles]),
        sample_time=sample_time,
        decades=decades,
    )
    grid = frequency_grid(sample_time, points=points, decades=decades)
    try:
        with np.errstate(all="ignore"):
            at_input = _loop_sensitivity(plant, controller, "input", grid, sample_time)
            at_output = _loop_sensitivity(plant, controller, "output", grid, sample_time)
    except np.linalg.LinAlgError as exc:
        raise NumericalError(
            "The frequency analysis cannot evaluate the loop: a pole of the plant, the "
            "controller or the closed loop lies on the unit circle at a frequency of the grid "
            f"({exc}). Change the number of points, or move that pole off the unit circle.",
            field=ANALYSIS_FIELD,
        ) from exc
    return FrequencyAnalysis(
        frequencies=grid,
        sample_time=float(sample_time),
        plant_input=at_input,
        plant_output=at_output,
        closed_loop_poles=poles,
        stable=bool(np.abs(poles).max(initial=0.0) < 1.0 - MARGINAL_TOLERANCE),
    )


def design_frequency_analysis(
    design: ControllerDesign,
    estimator: Estimator,
    *,
    sample_time: float,
    points: int = DEFAULT_POINTS,
    decades: float = DEFAULT_DECADES,
) -> FrequencyAnalysis:
    """Analyse a design with its estimator (``full_state``: the state is the measurement).

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator
        Of the same plant; its model gives ``P`` with the measured outputs ``Cy`` (``y = x``
        for ``full_state``).
    sample_time, points, decades
        As for :func:`frequency_analysis`.

    Returns
    -------
    FrequencyAnalysis
    """
    n = estimator.state_size
    feedthrough = None if estimator.full_state else estimator.feedthrough  # y = x for full_state
    plant = plant_system(estimator.model_a, estimator.model_b, estimator.c_measured[:, :n], feedthrough)
    try:
        controller = controller_system(design, estimator)
    except np.linalg.LinAlgError as exc:  # I + Dc D_m singular: the command is not determined
        raise NumericalError(
            "The controller's command is not determined by the measurements: through the measured feed-through "
            "d_measured the estimator reads back a command that cancels its own effect (I + Dc D_m is singular). "
            "Change d_measured or the estimator's tuning",
            field=("model", "d_measured"),
        ) from exc
    return frequency_analysis(plant, controller, sample_time=sample_time, points=points, decades=decades)
