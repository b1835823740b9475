"""Plain-language tuning advice: what looks wrong with a design and what to change.

Each check returns a :class:`service.solver.design.closed_loop.Diagnostic` (a stable code and a
sentence a control engineer can act on) or nothing.  The checks and their definitions:

``ill_conditioned_hessian``
    The Hessian's condition number is above :data:`service.solver.design.closed_loop.ILL_CONDITIONED`.
    The advice states the condition number the same design would have with every move
    weight raised tenfold and with the control horizon halved (updated from the design's own
    Hessian and factor without a terminal weight or blocking, by designing again with them),
    so the user sees which change helps and by how much.  It carries the same code
    as the plain warning of :func:`service.solver.design.closed_loop.design_warnings` and replaces it
    in :func:`merge_warnings`.

``slow_pole``
    The slowest strictly stable closed-loop pole (the dominant mode; poles within
    :data:`service.solver.design.closed_loop.UNIT_CIRCLE_MARGIN` of the unit circle are reported by
    the design warnings instead) has a time constant ``tau = -1 / ln|lambda|`` samples
    longer than the prediction horizon: the controller plans over a window in which that
    mode does not settle (our definition; the horizon should cover the closed-loop response,
    common practice).  The advice says whose pole it is: an open-loop pole of the plant left
    unchanged by the controller (not reachable by the inputs, or seen by no weighted
    output), an estimator pole, or a pole the tuning put there.

``high_peak_sensitivity``
    ``max sigma_max(S) > 2`` (6 dB, the usual rule of thumb) at the plant input or output of a
    stable loop; ``Ms`` then guarantees only ``GM >= Ms/(Ms-1)`` and
    ``PM >= 2 arcsin(1/(2 Ms))``.

``non_minimum_phase_short_horizon``
    The plant has a transmission zero outside the unit circle and the prediction horizon
    is shorter than the inverse response.  Transmission zeros of a square plant are the
    invariant zeros of a minimal realization (:mod:`service.solver.models.zeros`: a Kalman
    decomposition by staircases, then the reduced or the Rosenbrock pencil); non-square plants
    generically have none and are not checked.  The inverse-response time of a zero ``z0``
    (our definition) is read off the step response along the zero's directions
    (``y0' S_k u0`` with ``u0`` and ``y0`` the input and output null directions of the
    system matrix at ``z0``; for a single loop, the plant's own step response): the number
    of samples until it has come back to the side of its final value for good, i.e. one
    more than the last step at which it is still on the wrong side.  Where that channel has
    no wrong-way part (complex zeros, zeros on the negative real axis that show as ringing)
    the zero's time constant ``ceil(1 / ln|z0|)`` samples is used instead.

``decoupling_zeros``
    A square plant's realization has decoupling zeros on or outside the unit circle: modes no
    input moves (input-decoupling) or no controlled output sees (output-decoupling), where the
    system matrix loses rank as at a zero although the transfer matrix has no zero.  They are
    named as such (Rosenbrock's terms), never as non-minimum-phase zeros.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from typing import Literal

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.errors import NumericalError
from service.solver.design.closed_loop import ILL_CONDITIONED, UNIT_CIRCLE_MARGIN, Diagnostic
from service.solver.design.controller import ControllerDesign, design_controller
from service.solver.design.spectrum import spectrum_ends
from service.solver.evaluation.frequency import FrequencyAnalysis, LoopSensitivity
from service.solver.models.zeros import PlantZeros, plant_zeros
from service.solver.numerics import format_complex

__all__ = [
    "PEAK_SENSITIVITY_LIMIT",
    "decoupling_zero_advice",
    "hessian_advice",
    "inverse_response_time",
    "merge_warnings",
    "non_minimum_phase_advice",
    "sensitivity_advice",
    "slow_pole_advice",
    "transmission_zeros",
    "tuning_advice",
]

#: Peak sensitivity above which a loop is called fragile (6 dB; the usual rule of thumb).
PEAK_SENSITIVITY_LIMIT = 2.0
#: Relative distance under which a closed-loop pole counts as an open-loop or estimator pole
#: (loose enough for the spread of a repeated eigenvalue; common practice).
_SAME_POLE = 1e-6
#: Longest step response used to find the side an output settles on (samples).
_LONGEST_STEP = 5000


def _seconds(samples: float, sample_time: float | None) -> str:
    return "" if sample_time is None else f" ({samples * sample_time:.4g} in the unit of the sample time)"


def _redesigned(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    design: ControllerDesign,
    *,
    move_weight: NDArray[np.float64] | None = None,
    control: int | None = None,
    blocking: Sequence[int] | Literal["same"] | None = "same",
    input_weight: NDArray[np.float64] | None = None,
) -> ControllerDesign:
    """The same design (weights, horizons, terminal weight, blocking, input weight) with the given changes.

    Raises :class:`service.errors.NumericalError` as :func:`design_controller` does.
    """
    pred = design.prediction
    return design_controller(
        a,
        b,
        c,
        output_weight=design.output_weight,
        move_weight=design.move_weight if move_weight is None else move_weight,
        prediction=pred.prediction,
        control=pred.control if control is None else control,
        first_penalized=pred.first_penalized,
        terminal="none" if design.terminal is None else "riccati",
        blocking=design.blocking if blocking == "same" else blocking,
        input_weight=design.input_weight if input_weight is None else input_weight,
    )


# --- ill-conditioned Hessian ---------------------------------------------------------------


def _condition_number(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    design: ControllerDesign,
    *,
    move_scale: float,
    control: int,
) -> float | None:
    """Condition number of the same design with scaled move weights or another ``Hu``; ``None`` if singular.

    Without a terminal weight or blocking no new design is needed: scaling every move weight
    by ``s`` adds ``(s - 1) blockdiag(R)`` to ``H``, and a shorter control horizon ``Hu'``
    keeps the first ``Hu'`` block columns of ``G`` (``G_ij = S_(i-j)`` does not depend on
    ``Hu``), so its Hessian is the leading ``Hu' m`` block of ``H``
    (:func:`_updated_condition_number`).
    """
    same_horizon = control == design.prediction.control
    if design.terminal is None and design.blocking is None and (design.input_penalty is None or same_horizon):
        # (the input-target term's blocks depend on Hu, so a shorter Hu with it is designed anew)
        return _updated_condition_number(design, move_scale=move_scale, control=control)
    blocking = None if design.blocking is None else [j for j in design.blocking if j < control]
    try:
        other = _redesigned(
            a, b, c, design, move_weight=move_scale * design.move_weight, control=control, blocking=blocking
        )
    except NumericalError:
        return None
    return other.hessian.scaled_condition_number


def _updated_condition_number(design: ControllerDesign, *, move_scale: float, control: int) -> float | None:
    """The condition number of a "what if" Hessian, Jacobi-scaled, from the design's own factor.

    The leading ``Hu' m`` block of ``H`` has the leading block of ``H``'s Cholesky factor
    as its own (``L11 L11' = H11``, Golub and Van Loan, *Matrix Computations*, 4th ed.,
    section 4.2), so a shorter control horizon needs no new factorization; scaling every move
    weight by ``s`` adds ``(s - 1) blockdiag(R)``, and the sum is factored once more.  The
    verdict is taken on the matrix with unit diagonal ``D^-1/2 H D^-1/2``
    (:func:`service.solver.numerics.jacobi_scaled`, the same in any units of the inputs),
    whose Cholesky factor is ``D^-1/2 L``.
    """
    m = design.move_weight.shape[0]
    size = control * m
    if size == design.hessian.matrix.shape[0] and move_scale == 1.0:
        scaled_condition = design.hessian.scaled_condition_number
        return None if not math.isfinite(scaled_condition) else scaled_condition
    h = design.hessian.matrix[:size, :size]
    triangle, lower = design.hessian.factor
    assert lower, "factor_hessian factors with lower=True"
    factor: tuple[NDArray[np.float64], bool] | None
    if move_scale == 1.0:
        # one contiguous copy of the leading block: a strided view would be copied by every
        # triangular solve of the Lanczos products
        factor = (np.asfortranarray(triangle[:size, :size]), True)
    else:
        h = h.copy()
        added = (move_scale - 1.0) * design.move_weight
        for j in range(control):  # + (s - 1) blockdiag(R), block by block
            h[j * m : (j + 1) * m, j * m : (j + 1) * m] += added
        try:
            factor = scipy.linalg.cho_factor(h, lower=True, check_finite=False, overwrite_a=False)
        except np.linalg.LinAlgError:
            factor = None
    ends = spectrum_ends(h, factor=factor, scaled=True)
    low, high = ends.low, ends.high
    return None if low <= size * np.finfo(float).eps * high else high / low


def hessian_advice(a: ArrayLike, b: ArrayLike, c: ArrayLike, design: ControllerDesign) -> Diagnostic | None:
    """Advise on an ill-conditioned Hessian, with the effect of the two usual fixes.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (p, n)
        The model of ``design``.
    design : ControllerDesign

    Returns
    -------
    Diagnostic or None
        ``ill_conditioned_hessian`` when the condition number of the Jacobi-scaled Hessian
        (unit diagonal; the same in any units of the inputs) exceeds ``ILL_CONDITIONED``.
    """
    cond = design.hessian.scaled_condition_number
    if cond <= ILL_CONDITIONED:
        return None
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    hu = design.prediction.control

    def effect(value: float | None) -> str:
        if value is None:
            return "would leave the Hessian singular"
        factor = cond / value
        how = f"about {factor:.3g} times smaller" if factor >= 1 else f"about {1 / factor:.3g} times larger"
        return f"changes it to {value:.3g} ({how})"

    heavier = _condition_number(a_, b_, c_, design, move_scale=10.0, control=hu)
    parts = [f"raising every move weight tenfold {effect(heavier)}"]
    if hu > 1:
        shorter = _condition_number(a_, b_, c_, design, move_scale=1.0, control=hu // 2)
        parts.append(f"halving the control horizon from {hu} to {hu // 2} {effect(shorter)}")
    digits = max(0, 16 - int(np.log10(cond)))
    return Diagnostic(
        "ill_conditioned_hessian",
        f"The Hessian is ill-conditioned (condition number {cond:.3g}, above {ILL_CONDITIONED:.0e}): "
        f"the gains keep only about {digits} significant digits. Raise the move weights or "
        f"shorten the control horizon: {'; '.join(parts)}.",
    )


# --- slow pole -----------------------------------------------------------------------------


def slow_pole_advice(
    a: ArrayLike,
    design: ControllerDesign,
    *,
    sample_time: float | None = None,
    estimator_poles: ArrayLike | None = None,
    keep_move_weights: bool = False,
    poles: ArrayLike | None = None,
    b: ArrayLike | None = None,
    c: ArrayLike | None = None,
) -> Diagnostic | None:
    """Advise when the dominant closed-loop pole is slower than the prediction horizon.

    Nothing when the loop is unstable (``unstable_closed_loop`` is the diagnosis then).  With
    ``keep_move_weights`` (the Hessian advice already asks to raise them) the fix for a pole
    the tuning put there leaves the move weights alone, so that no answer asks for opposite
    changes of one weight.

    Parameters
    ----------
    a : array_like, shape (n, n)
        The plant's state matrix (its eigenvalues are the open-loop poles).
    design : ControllerDesign
    sample_time : float, optional
        To state the time constant in time units as well as samples.
    estimator_poles : array_like of complex, optional
        Poles of the estimator (``Estimator.poles``); they join the loop's poles.
    poles : array_like of complex, optional
        The eigenvalues of ``a`` when the caller has them (they are computed otherwise).
    b, c : array_like, optional
        The plant's input and output matrices: with them and input targets, a slow mode the
        input weight sets (a spare direction of the inputs) is advised as such.

    Returns
    -------
    Diagnostic or None
        ``slow_pole``.
    """
    if poles is None:
        open_loop = scipy.linalg.eigvals(np.asarray(a, dtype=float), check_finite=False)
    else:
        open_loop = np.asarray(poles, dtype=complex)
    estimator = np.zeros(0, complex) if estimator_poles is None else np.asarray(estimator_poles, dtype=complex)
    candidates = [(complex(z), "controller") for z in design.loop.poles] + [
        (complex(z), "estimator") for z in estimator
    ]
    if design.loop.unstable:
        return None  # one diagnosis: the loop is unstable (unstable_closed_loop), not slow
    largest = max((abs(z) for z, _ in candidates), default=0.0)
    candidates = [(z, who) for z, who in candidates if 0.0 < abs(z) < 1.0 - UNIT_CIRCLE_MARGIN]
    if not candidates:
        return None
    pole, owner = max(candidates, key=lambda item: abs(item[0]))
    # "dominant" is the pole of largest modulus; one nearer the circle (marginal, named on its
    # own) makes this the slowest of the others.
    which = "dominant closed-loop pole" if abs(pole) >= largest else "slowest closed-loop pole off the unit circle"
    tau = -1.0 / math.log(abs(pole))
    hp = design.prediction.prediction
    if tau <= hp:
        return None
    if (
        owner == "controller"
        and open_loop.size
        and np.min(np.abs(open_loop - pole)) <= _SAME_POLE * max(1.0, abs(pole))
    ):
        whose = (
            "It is an open-loop pole of the plant that the controller leaves where it is: the "
            "inputs cannot move this mode, or no weighted controlled output sees it. Check the "
            "model, or give weight to an output that sees this mode; more tuning will not "
            "speed it up otherwise."
        )
    elif owner == "controller" and b is not None and c is not None and _input_target_mode(a, b, c, design, pole):
        whose = (
            "It is a mode of the spare inputs: along a direction of the inputs that moves no weighted "
            "output, only the input targets' weight (weights.input) pulls the inputs back, against "
            "their move weights. Raise weights.input of the inputs along it, or lower their move "
            "weights, to speed it up; heavier output weights slow it further."
        )
    elif owner == "estimator":
        whose = (
            "It is an estimator pole: the filter corrects its estimate slowly. Raise the "
            "disturbance (or process) noise or lower the measurement noise to speed it up."
        )
    else:
        whose = (
            "The tuning put it there: raise the output weights to speed it up, or lengthen the "
            "prediction horizon to cover it."
            if keep_move_weights
            else "The tuning put it there: lower the move weights or raise the output weights to "
            "speed it up, or lengthen the prediction horizon to cover it."
        )
    return Diagnostic(
        "slow_pole",
        f"The {which} {format_complex(pole)} has a time constant of {tau:.3g} samples"
        f"{_seconds(tau, sample_time)}, longer than the prediction horizon of {hp} samples, so "
        f"the controller plans over a window in which this mode does not settle. {whose}",
    )


def _input_target_mode(a: ArrayLike, b: ArrayLike, c: ArrayLike, design: ControllerDesign, pole: complex) -> bool:
    """Whether the slow closed-loop mode of ``pole`` is held back by the input targets' weight.

    The design is made again with the input weight ``S`` doubled, everything else equal: along
    a spare direction of the inputs (one that moves no weighted output) only ``S`` pulls the
    inputs, against their move weights, so the mode's distance from the unit circle grows with
    it (by half again at least, here), while heavier output weights would slow it.  A mode the
    outputs set hardly moves.  Both designs are the service's own, so the test is free of units.
    """
    if design.input_penalty is None:
        return False
    try:
        other = _redesigned(a, b, c, design, input_weight=2.0 * design.input_penalty.weight)
    except NumericalError:  # pragma: no cover - a heavier input weight keeps the Hessian definite
        return False
    moduli = np.abs(other.loop.poles)
    inside = moduli[(moduli > 0.0) & (moduli < 1.0 - UNIT_CIRCLE_MARGIN)]
    if inside.size == 0:  # pragma: no cover - the nominal design had one
        return False
    return bool(1.0 - inside.max() > 1.5 * (1.0 - abs(pole)))


# --- peak sensitivity ----------------------------------------------------------------------


def _judged_peak(
    loop: LoopSensitivity,
    grid: NDArray[np.float64],
    keep: NDArray[np.intp],
    sizes: NDArray[np.float64] | None,
) -> tuple[float, float]:
    """Grid maximum of ``sigma_max(N^-1 S N)`` over the signals ``keep``, and where.

    ``loop.sensitivity`` has shape (N, k, k) on ``grid`` (N,); ``sizes`` (k,) gives ``N``, the
    signals' natural sizes (``None``: ``N = I``).  ``N^-1 S N`` is ``S`` between signals
    divided by their sizes: a change of a signal's unit scales its size alike, so the
    judgment does not depend on units (``sigma_max`` of a multivariable ``S`` does).
    """
    s = loop.sensitivity[:, keep][:, :, keep]
    if sizes is not None:
        n = np.asarray(sizes, dtype=float)[keep]
        s = s * (n[None, None, :] / n[None, :, None])
    values = np.linalg.svd(s, compute_uv=False)[:, 0]
    i = int(np.argmax(values))
    return float(values[i]), float(grid[i])


def _equal(sizes: NDArray[np.float64] | None) -> bool:
    """Whether ``N = c I``: then ``N^-1 S N = S``."""
    return sizes is None or not np.size(sizes) or bool(np.all(sizes == np.asarray(sizes).reshape(-1)[0]))


def sensitivity_advice(
    analysis: FrequencyAnalysis,
    *,
    floating_outputs: Sequence[int] = (),
    output_labels: Sequence[str] | None = None,
    input_sizes: NDArray[np.float64] | None = None,
    output_sizes: NDArray[np.float64] | None = None,
) -> Diagnostic | None:
    """Advise when the peak sensitivity exceeds :data:`PEAK_SENSITIVITY_LIMIT` (6 dB).

    Parameters
    ----------
    analysis : FrequencyAnalysis
    floating_outputs : sequence of int, keyword-only
        Signals of the plant-output loop that the unconstrained gains leave floating (zone
        outputs, when the loop is broken at the controlled outputs).  Their rows and columns
        of ``S`` are left out of the judgment at the plant output: a floating output passes
        disturbances of the others to itself at steady state (an integrating level in a zone),
        a peak no move weight or estimator removes and no margin of the tracking loops.  The
        peak of the rest is judged instead (grid maximum).  Empty: the whole matrix.
    output_labels : sequence of str, optional, keyword-only
        Names of the plant-output loop's signals, for the message.
    input_sizes, output_sizes : ndarray, shape (m,) and (py,), optional, keyword-only
        Natural sizes of the signals at the two break points
        (:func:`service.solver.estimation.sizes.natural_sizes`; 1 for a signal with a span).
        Where they differ, the peak is judged on ``S`` between signals divided by their sizes
        (grid maximum), so that writing a signal in other units changes no verdict.

    Returns
    -------
    Diagnostic or None
        ``high_peak_sensitivity``; nothing for an unstable loop (its peaks mean nothing and
        the design warnings already say it is unstable).  A marginal loop (a pole on the
        circle that the loop's signals do not see, such as a zone output's integrator) keeps
        its advice, whichever side of 1 rounding puts that pole.
    """
    if analysis.unstable:
        return None
    grid = analysis.frequencies
    # sizes that are not one per signal of a break point (a full_state estimator's loop is
    # broken at the states, which have none) leave that point's S as it is
    if input_sizes is not None and np.size(input_sizes) != analysis.plant_input.sensitivity.shape[-1]:
        input_sizes = None
    if output_sizes is not None and np.size(output_sizes) != analysis.plant_output.sensitivity.shape[-1]:
        output_sizes = None
    figures = []
    sized = " (signals divided by their natural sizes, as no span is given for some)"
    at_input = analysis.plant_input
    if _equal(input_sizes):
        figures.append((at_input, at_input.peak_sensitivity, at_input.peak_sensitivity_frequency, ""))
    else:
        every = np.arange(at_input.sensitivity.shape[-1])
        figures.append((at_input, *_judged_peak(at_input, grid, every, input_sizes), sized))
    output = analysis.plant_output
    k = output.sensitivity.shape[-1]
    floating = sorted({int(j) for j in floating_outputs if 0 <= int(j) < k})
    keep = np.setdiff1d(np.arange(k), np.asarray(floating, dtype=int))
    note = ""
    if floating:
        names = ", ".join(f"'{output_labels[j]}'" if output_labels is not None else f"output {j + 1}" for j in floating)
        note = f" without the zone output(s) {names}, which float in the unconstrained gains"
    if keep.size and (floating or not _equal(output_sizes)):
        sizes = None if _equal(output_sizes) else output_sizes
        figures.append((output, *_judged_peak(output, grid, keep, sizes), note + ("" if sizes is None else sized)))
    elif keep.size:
        figures.append((output, output.peak_sensitivity, output.peak_sensitivity_frequency, ""))
    high = [f for f in figures if f[1] > PEAK_SENSITIVITY_LIMIT]
    if not high:
        return None
    where = "; ".join(
        f"at the plant {loop.location}{note} {peak:.3g} ({20.0 * math.log10(peak):.3g} dB) at {w:.3g} rad per time unit"
        for loop, peak, w, note in high
    )
    ms = max(peak for _, peak, _, _ in high)
    gm = ms / (ms - 1.0)
    pm = math.degrees(2.0 * math.asin(1.0 / (2.0 * ms)))
    return Diagnostic(
        "high_peak_sensitivity",
        f"The loop is fragile: the peak sensitivity is {where}, above {PEAK_SENSITIVITY_LIMIT:g} "
        f"(6 dB, the usual rule of thumb). The Nyquist curve passes within {1.0 / ms:.3g} of the "
        f"critical point, which guarantees only a gain margin of {gm:.3g} and a phase margin of "
        f"{pm:.3g} degrees, so a modest model error can destabilize the loop. Raise the move "
        f"weights to detune the controller, or slow the estimator (more measurement noise).",
    )


# --- non-minimum-phase plant with a short horizon -----------------------------------------


def transmission_zeros(a: ArrayLike, b: ArrayLike, c: ArrayLike) -> NDArray[np.complex128]:
    """Return the finite transmission zeros of a square plant ``(A, B, C)`` (no feed-through).

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (m, n)

    Returns
    -------
    ndarray of complex
        By descending modulus; empty for a non-square plant (see the module notes).

    Notes
    -----
    The invariant zeros of a minimal realization
    (:func:`service.solver.models.zeros.plant_zeros`): an uncontrollable or unobservable mode
    of a non-minimal model is a decoupling zero, never returned here.
    """
    return plant_zeros(a, b, c).transmission


def _null_directions(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], z0: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Input and output null directions ``u0``, ``y0`` of the system matrix at a real zero.

    By inverse iteration with one LU factorization of the (numerically singular) system matrix
    and its transpose (Golub and Van Loan, *Matrix Computations*, 4th ed., section 8.2.2): each
    solve multiplies the null direction by about ``1 / sigma_min``, so three solves from a
    fixed start give it to rounding, for the cost of one factorization instead of a full SVD.
    Falls back to the SVD when the factorization breaks down.
    """
    n, m = b.shape
    system = np.block([[a - z0 * np.eye(n), b], [c, np.zeros((m, m))]])
    start = np.random.default_rng(20261202).standard_normal(n + m)
    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            factor = scipy.linalg.lu_factor(system, check_finite=False)
            right, left = start.copy(), start.copy()
            for _ in range(3):
                right = scipy.linalg.lu_solve(factor, right, check_finite=False)
                right /= np.linalg.norm(right)
                left = scipy.linalg.lu_solve(factor, left, trans=1, check_finite=False)
                left /= np.linalg.norm(left)
        if np.all(np.isfinite(right)) and np.all(np.isfinite(left)):
            return right[n:], left[n:]
    except (np.linalg.LinAlgError, ValueError):
        pass
    u, _, vt = np.linalg.svd(system)
    return vt[-1, n:], u[n:, -1]


def _inverse_response_times(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    zeros: Sequence[complex],
    *,
    poles: NDArray[np.complex128] | None = None,
) -> list[int]:
    """:func:`inverse_response_time` of several zeros, sharing the poles and the step response."""
    fallbacks = [max(1, math.ceil(1.0 / math.log(abs(z)))) for z in zeros]
    real = [i for i, z in enumerate(zeros) if not (abs(complex(z).imag) > 1e-9 * abs(z) or complex(z).real < 0)]
    times = list(fallbacks)
    if not real:
        return times
    inputs, outputs = [], []
    for i in real:
        u0, y0 = _null_directions(a, b, c, complex(zeros[i]).real)
        inputs.append(u0)
        outputs.append(y0)
    all_poles = scipy.linalg.eigvals(a, check_finite=False) if poles is None else poles
    moduli = np.abs(all_poles)
    stable = moduli[(moduli > 0) & (moduli < 1.0)]
    slowest = float((-1.0 / np.log(stable)).max(initial=1.0))
    steps = int(min(_LONGEST_STEP, max(50, math.ceil(10.0 * slowest))))
    # y0' S_k u0 for k = 1..steps, every zero at once: S_k u0 = sum_{l<k} C A^l (B u0).
    state = b @ np.array(inputs).T  # (n, zeros): A^l B u0
    seen = c.T @ np.array(outputs).T  # (n, zeros): C' y0
    channels = np.empty((steps, len(real)))
    total = np.zeros(len(real))
    for k in range(steps):
        total = total + np.einsum("ij,ij->j", seen, state)
        channels[k] = total
        state = a @ state
    for column, i in enumerate(real):
        channel = channels[:, column]
        final = channel[-1]
        size = float(np.abs(channel).max(initial=0.0))
        if size == 0.0 or abs(final) <= 1e-9 * size:
            continue
        wrong = np.nonzero((channel * np.sign(final) < 0) & (np.abs(channel) > 1e-12 * size))[0]
        if wrong.size:
            times[i] = int(wrong[-1]) + 2  # channel[k] is step k + 1; one more than the last wrong step
    return times


def inverse_response_time(a: ArrayLike, b: ArrayLike, c: ArrayLike, zero: complex) -> int:
    """Return the inverse-response time (samples) of a zero outside the unit circle.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (m, n)
    zero : complex
        A transmission zero with ``|zero| > 1``.

    Returns
    -------
    int
        See the module notes.
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    return _inverse_response_times(a_, b_, c_, [zero])[0]


def non_minimum_phase_advice(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    prediction: int,
    sample_time: float | None = None,
    poles: ArrayLike | None = None,
    computed: PlantZeros | None = None,
) -> Diagnostic | None:
    """Advise when a non-minimum-phase plant meets a prediction horizon shorter than its inverse response.

    Parameters
    ----------
    a, b, c : array_like
        The plant (controlled outputs).
    prediction : int
        ``Hp``.
    sample_time : float, optional
        To state times in time units as well.
    poles : array_like of complex, optional
        The eigenvalues of ``A`` when the caller has them (they are computed otherwise).
    computed : PlantZeros, optional
        The plant's zeros when the caller has them.

    Returns
    -------
    Diagnostic or None
        ``non_minimum_phase_short_horizon``.
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    found = plant_zeros(a_, b_, c_) if computed is None else computed
    zeros = [complex(z) for z in found.transmission if abs(z) > 1.0 + 1e-9]
    if not zeros:
        return None
    known = None if poles is None else np.asarray(poles, dtype=complex)
    timed = list(zip(zeros, _inverse_response_times(a_, b_, c_, zeros, poles=known), strict=True))
    _zero, needed = max(timed, key=lambda item: item[1])
    if prediction >= needed:
        return None
    names = ", ".join(format_complex(z) for z in zeros)
    return Diagnostic(
        "non_minimum_phase_short_horizon",
        f"The plant is non-minimum-phase (transmission zero(s) outside the unit circle: {names}). "
        f"Its inverse response lasts about {needed} samples{_seconds(needed, sample_time)} (the "
        f"output first moves the wrong way and comes back past its start only then), but the "
        f"prediction horizon is {prediction} samples: the controller sees mostly the wrong-way "
        f"part of its moves and may push the wrong way. Lengthen the prediction horizon to at "
        f"least {needed} samples (well beyond is better), or raise the move weights.",
    )


def _decoupling_names(zeros: Sequence[complex], kind: str) -> list[str]:
    return [f"{format_complex(z)} ({kind})" for z in zeros]


def decoupling_zero_advice(
    a: ArrayLike, b: ArrayLike, c: ArrayLike, *, computed: PlantZeros | None = None
) -> Diagnostic | None:
    """Name the decoupling zeros of a square plant's realization that lie on or outside the unit circle.

    Parameters
    ----------
    a, b, c : array_like
        The plant (controlled outputs).
    computed : PlantZeros, optional
        The plant's zeros when the caller has them.

    Returns
    -------
    Diagnostic or None
        ``decoupling_zeros``: each such zero with its kind, input-decoupling (a mode no input
        moves) or output-decoupling (a mode no controlled output sees); the system matrix loses
        rank there as at a zero, but the transfer matrix has no zero there and no inverse
        response follows.  ``None`` for a non-square plant or when every decoupling zero lies
        inside the unit circle (a mode that decays by itself).
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    if b_.shape[1] != c_.shape[0]:
        return None
    found = plant_zeros(a_, b_, c_) if computed is None else computed
    edge = 1.0 - UNIT_CIRCLE_MARGIN
    inputs = [complex(z) for z in found.input_decoupling if abs(z) >= edge]
    outputs = [complex(z) for z in found.output_decoupling if abs(z) >= edge]
    if not inputs and not outputs:
        return None
    names = ", ".join(
        _decoupling_names(inputs, "input-decoupling: a mode no input moves")
        + _decoupling_names(outputs, "output-decoupling: a mode no controlled output sees")
    )
    count = len(inputs) + len(outputs)
    after = []
    if inputs:
        after.append("A mode no input moves is reported as uncontrollable_mode as well.")
    if outputs:
        after.append(
            "A mode no controlled output sees grows unseen: remove it from the model if it is an artefact of "
            "the realization, or measure it."
        )
    return Diagnostic(
        "decoupling_zeros",
        f"The state-space model is not minimal: {names} {'is a decoupling zero' if count == 1 else 'are decoupling zeros'} "
        f"of the realization, not a transmission zero: the system matrix loses rank there as at a zero, but the "
        f"transfer matrix from the inputs to the controlled outputs has no zero there (it needs only "
        f"{found.minimal_states} of the model's {a_.shape[0]} states), so there is no inverse response and no "
        f"limit on the prediction horizon from it. " + " ".join(after),
    )


# --- all together --------------------------------------------------------------------------


def tuning_advice(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    design: ControllerDesign,
    *,
    sample_time: float | None = None,
    analysis: FrequencyAnalysis | None = None,
    estimator_poles: ArrayLike | None = None,
    poles: ArrayLike | None = None,
    floating_outputs: Sequence[int] = (),
    output_labels: Sequence[str] | None = None,
    loop_sizes: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None,
) -> list[Diagnostic]:
    """Return every piece of advice that applies, in a fixed order.

    Parameters
    ----------
    a, b, c : array_like
        The model of ``design`` (controlled outputs).
    design : ControllerDesign
    sample_time : float, optional
    analysis : FrequencyAnalysis, optional
        Needed for the peak-sensitivity check.
    estimator_poles : array_like of complex, optional
    poles : array_like of complex, optional
        The open-loop poles (eigenvalues of ``a``) when the caller has them.
    floating_outputs, output_labels : optional
        Of the plant-output loop, for :func:`sensitivity_advice`.
    loop_sizes : tuple of ndarray, optional
        The natural sizes of the inputs and of the measured outputs, for :func:`sensitivity_advice`.

    Returns
    -------
    list of Diagnostic
        ``ill_conditioned_hessian``, ``slow_pole``, ``high_peak_sensitivity``,
        ``non_minimum_phase_short_horizon``, ``decoupling_zeros`` (square plants), each at most
        once.
    """
    square = np.shape(b)[1] == np.shape(c)[0]
    zeros = plant_zeros(a, b, c) if square else None
    hessian = hessian_advice(a, b, c, design)
    found = [
        hessian,
        slow_pole_advice(
            a,
            design,
            sample_time=sample_time,
            estimator_poles=estimator_poles,
            poles=poles,
            keep_move_weights=hessian is not None or design.hessian.condition_number > ILL_CONDITIONED,
            b=b,
            c=c,
        ),
        None
        if analysis is None
        else sensitivity_advice(
            analysis,
            floating_outputs=floating_outputs,
            output_labels=output_labels,
            input_sizes=None if loop_sizes is None else loop_sizes[0],
            output_sizes=None if loop_sizes is None else loop_sizes[1],
        ),
        non_minimum_phase_advice(
            a, b, c, prediction=design.prediction.prediction, sample_time=sample_time, poles=poles, computed=zeros
        ),
        None if zeros is None else decoupling_zero_advice(a, b, c, computed=zeros),
    ]
    return [d for d in found if d is not None]


def merge_warnings(warnings: Sequence[Diagnostic], advice: Sequence[Diagnostic]) -> list[Diagnostic]:
    """Return the warnings with each advice of the same code in its place, then the other advice.

    Parameters
    ----------
    warnings : sequence of Diagnostic
        From :func:`service.solver.design.closed_loop.design_warnings`.
    advice : sequence of Diagnostic
        From :func:`tuning_advice`.

    Returns
    -------
    list of Diagnostic
        One entry per code.
    """
    by_code = {d.code: d for d in advice}
    merged = [by_code.pop(d.code, d) for d in warnings]
    return merged + [d for d in advice if d.code in by_code]
