"""How much model error a tuning tolerates: the loop on plants with scaled gains and longer dead times.

The controller and its estimator are designed on the model ``(A, B, C)``.  The plant they run on
is taken to be the model with every element's gain multiplied by one factor ``f`` and every dead
time lengthened by ``d`` samples, i.e. the transfer matrix ::

    P_true(z) = f z^-d P(z),        P(z) = C (zI - A)^-1 B  [+ D_m]

(a uniform gain error and a uniform extra delay, the usual first questions of robustness to
model error, common practice; and, without extra delay, ``P(z) diag(f)``, each input's gain
in error on its own, which a plant with large relative gains is sensitive to), with ``C`` the measured outputs the estimator reads (the
sensors, when the model has measured outputs of its own: the true plant's sensors see the
true plant; a measured feed-through ``D_m`` is scaled and delayed with the rest, while the
estimator still subtracts the model's ``D_m u(k)``).  It is realized with ``B`` (and ``D_m``)
scaled by ``f`` and a shift register of
``d`` samples on the inputs (``d m`` states) or on the measured outputs (``d py`` states), whichever is
shorter; both realize the same ``P_true`` because a scalar delay commutes with ``P``.  The loop
of controller, estimator and that plant is
:func:`service.solver.estimation.loop.true_loop`, the same matrix /simulate analyses for a
``true_plant``; its spectral radius decides the verdict with the tolerance of every
stable/unstable verdict (:data:`service.solver.design.marginal.MARGINAL_TOLERANCE`).

A design may leave poles on the unit circle by construction: the integrator of a zone output
(no gain sees it; the move QP holds the output in its zone) or a direction of the inputs that
moves no weighted output.  A uniform gain error or a longer dead time leaves such a pole where
it is, so every case would read ``marginal`` and say nothing about the rest of the loop.  Each
case therefore also gives the verdict on the poles other than those staying at the model's own
loop's poles on the circle (:func:`set_aside_nominal_circle`), and the stable ranges are those
of that verdict; a loop without such poles has the same verdict twice.

Accuracy: the eigenvalues come from LAPACK's nonsymmetric solver on the whole loop matrix,
backward stable; a dead time's register makes a defective eigenvalue at zero whose copies
scatter by about ``(eps ||M||)^(1/k)`` for a block of size ``k`` (Wilkinson), which moves the
spectral radius only when the loop's slowest pole is that close to zero.

Pure functions on arrays.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.estimation.loop import ControlLoop, true_loop

__all__ = [
    "ModelErrorCase",
    "ModelErrorInputCase",
    "ModelErrorStudy",
    "model_error_study",
    "perturbed_plant",
    "perturbed_plant_with_feedthrough",
    "set_aside_nominal_circle",
    "stable_factor_range",
]

Verdict = Literal["stable", "marginal", "unstable"]


@dataclass(frozen=True)
class ModelErrorInputCase:
    """The loop on the model with each input's gains multiplied by its own factor (``P diag(f)``).

    Attributes
    ----------
    input_gain_factors : tuple of float
        ``f``, one per input.
    spectral_radius, verdict, nominal_circle_poles, rest_spectral_radius, rest_verdict
        As in :class:`ModelErrorCase`.
    """

    input_gain_factors: tuple[float, ...]
    spectral_radius: float
    verdict: Verdict
    nominal_circle_poles: int
    rest_spectral_radius: float
    rest_verdict: Verdict


@dataclass(frozen=True)
class ModelErrorCase:
    """The loop on one perturbed plant.

    Attributes
    ----------
    gain_factor : float
        ``f``.
    extra_dead_time : int
        ``d``, samples.
    spectral_radius : float
    verdict : {"stable", "marginal", "unstable"}
        Radius below ``1 - MARGINAL_TOLERANCE``, within it of 1, or above ``1 + MARGINAL_TOLERANCE``.
    nominal_circle_poles : int
        Poles of this loop set aside as the model's own loop's poles on the unit circle (see
        :func:`set_aside_nominal_circle`); 0 when that loop has none.
    rest_spectral_radius : float
        Largest modulus of the other poles.
    rest_verdict : {"stable", "marginal", "unstable"}
        The verdict on the other poles: whether the model error moves a pole beyond those the
        design leaves on the circle (a zone output's integrator, a free input direction).
    """

    gain_factor: float
    extra_dead_time: int
    spectral_radius: float
    verdict: Verdict
    nominal_circle_poles: int
    rest_spectral_radius: float
    rest_verdict: Verdict


@dataclass(frozen=True)
class ModelErrorStudy:
    """Every case, in the order factors within dead times, and the stable range per dead time.

    Attributes
    ----------
    cases : list of ModelErrorCase
    stable_ranges : list of tuple
        Per extra dead time (in the order given): ``(d, lowest, highest)``, the smallest and
        largest factor of the run of consecutive factors (sorted) whose ``rest_verdict`` is
        stable that holds the factor nearest 1 (by ``|log f|``); ``lowest`` and ``highest``
        are ``None`` when that factor's is not.
    input_cases : list of ModelErrorInputCase
        One per vector of input gain factors, in the order given.
    """

    cases: list[ModelErrorCase]
    stable_ranges: list[tuple[int, float | None, float | None]]
    input_cases: list[ModelErrorInputCase] = field(default_factory=list)


def perturbed_plant(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    gain_factor: float,
    extra_dead_time: int,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return a realization of ``f z^-d C (zI - A)^-1 B`` (:func:`perturbed_plant_with_feedthrough`, ``D = 0``)."""
    a_t, b_t, c_t, _ = perturbed_plant_with_feedthrough(
        a, b, c, None, gain_factor=gain_factor, extra_dead_time=extra_dead_time
    )
    return a_t, b_t, c_t


def perturbed_plant_with_feedthrough(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    d: NDArray[np.float64] | None,
    *,
    gain_factor: float | NDArray[np.float64],
    extra_dead_time: int,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return a realization of ``f z^-d (C (zI - A)^-1 B + D)``, or of ``z^-d P(z) diag(f)``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    d : ndarray, shape (p, m), or None
        The feed-through (a measured output's ``D_m``); ``None``: zero.
    gain_factor : float or ndarray of shape (m,), keyword-only
        ``f``: one factor for every element, or one per input (each column of ``B`` and ``D``
        multiplied by its own; a scalar delay commutes with ``diag(f)``, so either register holds).
    extra_dead_time : int, keyword-only
        ``d >= 0`` samples.

    Returns
    -------
    a_t, b_t, c_t, d_t : ndarray
        With ``n + d min(m, p)`` states: the model's states first, then the register (oldest
        sample last).  ``d_t = f D`` without extra dead time, zero with it (the delayed
        feed-through comes out of the register).
    """
    n, m = b.shape
    p = c.shape[0]
    delay = int(extra_dead_time)
    feed = np.zeros((p, m)) if d is None else np.asarray(d, dtype=float)
    factor = np.asarray(gain_factor, dtype=float)  # () or (m,): broadcast along the columns
    scaled_b, scaled_d = b * factor, feed * factor
    if delay == 0:
        return a.copy(), scaled_b, c.copy(), scaled_d
    if m <= p:  # u(k) enters the register; x(k+1) = A x(k) + f B w_d(k), y = C x + f D w_d
        r = delay * m
        a_t = np.zeros((n + r, n + r))
        a_t[:n, :n] = a
        a_t[:n, n + r - m :] = scaled_b
        a_t[n + m :, n : n + r - m] = np.eye(r - m)
        b_t = np.zeros((n + r, m))
        b_t[n : n + m] = np.eye(m)
        c_t = np.hstack([c, np.zeros((p, r))])
        c_t[:, n + r - m :] = scaled_d
        return a_t, b_t, c_t, np.zeros((p, m))
    r = delay * p  # C x(k) + f D u(k) enters the register; y(k) = w_d(k)
    a_t = np.zeros((n + r, n + r))
    a_t[:n, :n] = a
    a_t[n : n + p, :n] = c
    a_t[n + p :, n : n + r - p] = np.eye(r - p)
    b_t = np.vstack([scaled_b, np.zeros((r, m))])
    b_t[n : n + p] = scaled_d
    c_t = np.hstack([np.zeros((p, n + r - p)), np.eye(p)])
    return a_t, b_t, c_t, np.zeros((p, m))


def set_aside_nominal_circle(
    poles: NDArray[np.complex128], nominal: NDArray[np.complex128], *, tolerance: float = MARGINAL_TOLERANCE
) -> tuple[int, float]:
    """Set aside the poles that stay where the model's own loop has poles on the unit circle.

    Parameters
    ----------
    poles : ndarray of complex, shape (k,)
        One perturbed loop's poles.
    nominal : ndarray of complex, shape (q,)
        The model's own loop's poles within ``tolerance`` of the circle (``||z| - 1| <=
        tolerance``): those a design leaves there by construction, such as the integrator of a
        zone output, which no gain sees, or a direction of the inputs that moves no weighted
        output.  A gain error or a longer dead time leaves such a pole where it is.
    tolerance : float, keyword-only
        A pole of ``poles`` is set aside for a nominal one when it lies within this distance of
        it and within this of the circle; each nominal pole takes at most one (the nearest).

    Returns
    -------
    count : int
        Poles set aside (at most ``q``).
    rest_radius : float
        Largest modulus of the others (0 when none is left).

    Notes
    -----
    A nominal pole that the perturbation moves off the circle (by more than ``tolerance``)
    takes no partner, so the moved pole decides the verdict as any other: the setting aside
    never hides an instability the perturbation causes.
    """
    left = np.ones(poles.size, dtype=bool)
    on_circle = np.abs(np.abs(poles) - 1.0) <= tolerance
    for z in nominal:
        distance = np.where(left & on_circle, np.abs(poles - z), np.inf)
        nearest = int(np.argmin(distance)) if distance.size else 0
        if distance.size and distance[nearest] <= tolerance:
            left[nearest] = False
    rest = np.abs(poles[left])
    return int(poles.size - np.count_nonzero(left)), float(rest.max(initial=0.0))


def _verdict(radius: float) -> Verdict:
    if radius < 1.0 - MARGINAL_TOLERANCE:
        return "stable"
    if radius > 1.0 + MARGINAL_TOLERANCE:
        return "unstable"
    return "marginal"


def stable_factor_range(cases: Sequence[ModelErrorCase]) -> tuple[float | None, float | None]:
    """Lowest and highest factor of the stable run around the factor nearest 1 (see :class:`ModelErrorStudy`).

    Parameters
    ----------
    cases : sequence of ModelErrorCase
        Of one extra dead time.
    """
    ordered = sorted(cases, key=lambda case: case.gain_factor)
    if not ordered:
        return None, None
    centre = min(range(len(ordered)), key=lambda i: abs(np.log(ordered[i].gain_factor)))
    if ordered[centre].rest_verdict != "stable":
        return None, None
    low = high = centre
    while low > 0 and ordered[low - 1].rest_verdict == "stable":
        low -= 1
    while high < len(ordered) - 1 and ordered[high + 1].rest_verdict == "stable":
        high += 1
    return ordered[low].gain_factor, ordered[high].gain_factor


def model_error_study(
    loop: ControlLoop,
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    feedthrough: NDArray[np.float64] | None = None,
    gain_factors: Sequence[float],
    extra_dead_times: Sequence[int],
    input_gain_factors: Sequence[Sequence[float]] = (),
) -> ModelErrorStudy:
    """Return the loop's spectral radius on the model perturbed by every factor and extra dead time.

    Parameters
    ----------
    loop : ControlLoop
        Controller and estimator designed on ``(A, B, C)``.
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (py, n)
        The model's measured outputs, what the estimator reads (the controlled outputs unless
        the model has measured outputs of its own), in the loop's signals (scaled like the design).
    feedthrough : ndarray, shape (py, m), optional, keyword-only
        Their feed-through ``D_m`` (scaled like ``c``), scaled by each factor and delayed with
        the rest of the plant (:func:`service.solver.estimation.loop.true_loop` takes the
        difference to the ``D_m`` the estimator subtracts).
    gain_factors : sequence of float, keyword-only
        Positive factors ``f``.
    extra_dead_times : sequence of int, keyword-only
        Samples ``d >= 0`` (``0`` only for a ``full_state`` estimator, which reads the model's
        states).
    input_gain_factors : sequence of sequence of float, keyword-only
        Each one positive factor per input (``P diag(f)``, no extra dead time); default none.

    Returns
    -------
    ModelErrorStudy
    """

    def loop_poles(f: float | NDArray[np.float64], d: int) -> NDArray[np.complex128]:
        a_t, b_t, c_t, d_t = perturbed_plant_with_feedthrough(a, b, c, feedthrough, gain_factor=f, extra_dead_time=d)
        return true_loop(loop, a_t, b_t, c_t, d_t if feedthrough is not None else None).poles

    found = {(float(f), int(d)): loop_poles(float(f), int(d)) for d in extra_dead_times for f in gain_factors}
    own = found[(1.0, 0)] if (1.0, 0) in found else loop_poles(1.0, 0)  # the model's own loop
    nominal = own[np.abs(np.abs(own) - 1.0) <= MARGINAL_TOLERANCE]
    cases: list[ModelErrorCase] = []
    ranges: list[tuple[int, float | None, float | None]] = []
    for d in extra_dead_times:
        row = []
        for f in gain_factors:
            poles = found[(float(f), int(d))]
            radius = float(np.abs(poles).max(initial=0.0))
            aside, rest = set_aside_nominal_circle(poles, nominal) if nominal.size else (0, radius)
            row.append(ModelErrorCase(float(f), int(d), radius, _verdict(radius), aside, rest, _verdict(rest)))
        cases += row
        ranges.append((int(d), *stable_factor_range(row)))
    input_cases: list[ModelErrorInputCase] = []
    for factors in input_gain_factors:
        vector = np.asarray(factors, dtype=float)
        assert vector.shape == (b.shape[1],), vector.shape
        poles = loop_poles(vector, 0)
        radius = float(np.abs(poles).max(initial=0.0))
        aside, rest = set_aside_nominal_circle(poles, nominal) if nominal.size else (0, radius)
        input_cases.append(
            ModelErrorInputCase(tuple(float(v) for v in vector), radius, _verdict(radius), aside, rest, _verdict(rest))
        )
    return ModelErrorStudy(cases=cases, stable_ranges=ranges, input_cases=input_cases)
