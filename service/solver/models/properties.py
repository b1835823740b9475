"""Open-loop properties of a discrete plant: steady-state gain, relative gain array, poles.

For ``x(k+1) = A x(k) + B u(k)``, ``y(k) = C x(k) + D u(k)`` a held unit input settles at ::

    G = C (I - A)^-1 B + D                      (final value theorem at z = 1)

which exists only where no pole at ``z = 1`` reaches the output.  An integrating plant (a
level, an inventory) has such a pole, and then only some input/output pairs lack a finite
gain.  This module reports, per pair, the **integration order** (0: settles; 1: ramps; 2:
parabola, ...) and for order-0 pairs the finite gain; an order-1 pair gets its **ramp rate**
``lim_{z->1} (z - 1) G_ij(z)``, the change of the output per sample per unit input held.

Splitting off the integrating modes
-----------------------------------
``A`` is brought to complex Schur form with the eigenvalues within a tolerance of 1 first,
``A = Z [[T11, T12], [0, T22]] Z^H``, and the Sylvester equation ``T11 X - X T22 = -T12``
decouples the two blocks (``scipy.linalg.solve_sylvester``).  In those coordinates the
transfer matrix is ``C1 (zI - T11)^-1 B1 + C2 (zI - T22)^-1 B2 + D`` with ::

    B1 = (Z^H B)_1 - X (Z^H B)_2,   B2 = (Z^H B)_2,   C1 = (C Z)_1,   C2 = (C Z)_2 + C1 X

Taking the eigenvalues of ``T11`` as exactly 1, ``T11 = I + N`` with ``N`` strictly upper
triangular (nilpotent), and ``C1 (zI - T11)^-1 B1 = sum_l C1 N^l B1 / (z - 1)^(l+1)``: pair
``(i, j)`` integrates ``r`` times when the last nonzero term is ``l = r - 1``.  Pairs that
do not integrate have the finite gain ``C2 (I - T22)^-1 B2 + D``.

The relative gain array of a square nonsingular gain is ``Lambda = G .* (G^-1)^T``
(Bristol 1966, "On a new measure of interaction for multivariable process control",
IEEE Trans. Automatic Control 11:133, doi:10.1109/TAC.1966.1098266); its rows and columns
each sum to one and it does not change when inputs or outputs are rescaled.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.design.closed_loop import Diagnostic
from service.solver.memo import plant_cache
from service.solver.numerics import balance_states, eigenvalues_by_modulus, unit_free_scaling

__all__ = [
    "INPUT_GAIN_ERROR",
    "INTEGRATING_SEARCH",
    "INTEGRATING_TOLERANCE",
    "LARGE_RELATIVE_GAIN",
    "NEAR_SINGULAR_GAIN",
    "PlantProperties",
    "SteadyStateGain",
    "balanced_condition_number",
    "gain_condition_number",
    "input_gain_error_magnification",
    "integrating_poles",
    "open_loop_poles",
    "plant_properties",
    "plant_warnings",
    "relative_gain_array",
    "relative_gain_warning",
    "steady_state_gain",
]

#: A pole counts as integrating when it is ``z = 1`` up to rounding: a group of the poles
#: nearest 1 whose mean lies within this distance of 1, i.e. a time constant longer than
#: ``1e9`` sample times (``1 - z = Ts / tau`` to first order).  The mean of a group of
#: eigenvalues is well conditioned even when the group is a defective cluster that rounding
#: splits by ``eps^(1/k)`` (Kato, *Perturbation Theory for Linear Operators*, 1966, II.5), so
#: a double integrator is found and a 200 s lag sampled at 1 ms (``1 - z = 5e-6``) is a lag.
INTEGRATING_TOLERANCE = 1e-9
#: Poles farther than this from 1 are never part of an integrating group.
INTEGRATING_SEARCH = 1e-3
#: Condition number of the steady-state gain above which the plant is called near-singular:
#: some output direction then needs input moves a thousand times larger than another
#: (common practice; meaningful only on scaled signals).
NEAR_SINGULAR_GAIN = 1e3
#: Largest magnitude of an element of the relative gain array above which a plant is called
#: sensitive to independent gain errors on its inputs (common practice: elements of 10 and more
#: make a controller that decouples the outputs fragile to such errors; a relative gain does
#: not change with the units of any signal).
LARGE_RELATIVE_GAIN = 10.0
#: The error on each input's gain quoted by the ``large_relative_gains`` warning (20 %, the
#: usual first question of input gain error, common practice).
INPUT_GAIN_ERROR = 0.2


@dataclass(frozen=True)
class SteadyStateGain:
    """Steady-state behaviour of each input/output pair.

    Attributes
    ----------
    gain : ndarray, shape (p, m)
        Final output change per unit input held; ``nan`` for integrating pairs.
    integration_order : ndarray of int, shape (p, m)
        0 where the pair settles, ``r >= 1`` where it integrates ``r`` times.
    ramp_rate : ndarray, shape (p, m)
        Output change per sample per unit input held, once the ramp is established:
        the ramp slope for order-1 pairs, 0 for order 0, ``nan`` for order 2 and above.
    """

    gain: NDArray[np.float64]
    integration_order: NDArray[np.int_]
    ramp_rate: NDArray[np.float64]

    @property
    def integrating(self) -> NDArray[np.bool_]:
        """``integration_order > 0``."""
        return self.integration_order > 0

    @property
    def finite(self) -> bool:
        """Every pair settles, so ``gain`` has no ``nan``."""
        return not bool(self.integrating.any())


@dataclass(frozen=True)
class PlantProperties:
    """What :func:`plant_properties` reports about an open-loop plant.

    Attributes
    ----------
    steady_state : SteadyStateGain
    relative_gain : ndarray, shape (p, p), or None
        Bristol's relative gain array; ``None`` unless the gain is square, finite and
        numerically nonsingular.
    condition_number : float or None
        2-norm condition number of the gain (``inf`` when singular); ``None`` when some pair
        integrates.
    poles : ndarray of complex, shape (n,)
        Eigenvalues of ``A``, by descending modulus.
    balanced_condition_number : float or None
        Condition number of the gain with its rows and columns scaled free of units
        (:func:`balanced_condition_number`): the same in any units, and the one the
        ``near_singular_gain`` verdict uses.
    """

    steady_state: SteadyStateGain
    relative_gain: NDArray[np.float64] | None
    condition_number: float | None
    poles: NDArray[np.complex128]
    balanced_condition_number: float | None = None


def integrating_poles(
    a: NDArray[np.float64], *, tolerance: float = INTEGRATING_TOLERANCE, poles: ArrayLike | None = None
) -> int:
    """Return how many poles of ``a`` are at ``z = 1`` (integrators), judged relative to the sample time.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    tolerance : float, keyword-only
        Largest ``|mean - 1|`` of the group (:data:`INTEGRATING_TOLERANCE`).
    poles : array_like of complex, optional
        The eigenvalues of ``a`` (:func:`open_loop_poles`), when the caller has them.  When
        none lies within :data:`INTEGRATING_SEARCH` of 1 plus the rounding between them and
        the eigenvalues of the balanced ``a``, the answer is 0 without another eigenvalue
        problem (the same test as :func:`steady_state_gain` makes).

    Returns
    -------
    int
        The largest ``k`` such that the ``k`` poles nearest 1 have their mean within
        ``tolerance / k`` of 1 (so a lag with ``1 - z > tolerance`` never joins) and lie within ``10 (k eps ||A||)^(1/k)`` of it (the spread
        rounding gives a Jordan block of size ``k``; Wilkinson 1965, ch. 2).
    """
    if a.shape[0] == 0:
        return 0
    a = _balanced(a)[0]
    if poles is not None and _none_near_one(poles, a):
        return 0
    values = scipy.linalg.eigvals(a, check_finite=False)
    distance = np.abs(values - 1.0)
    order = np.argsort(distance, kind="stable")
    near = values[order][distance[order] <= INTEGRATING_SEARCH]
    size = max(1.0, float(np.linalg.norm(a, 1)))
    found = 0
    for k in range(1, near.size + 1):
        group = near[:k]
        spread = 10.0 * (k * np.finfo(float).eps * size) ** (1.0 / k)
        if abs(group.mean() - 1.0) <= tolerance / k and np.abs(group - 1.0).max() <= max(spread, tolerance):
            found = k
    return found


def _none_near_one(poles: ArrayLike, balanced: NDArray[np.float64]) -> bool:
    """Whether no pole lies within :data:`INTEGRATING_SEARCH` of 1, with a margin for rounding.

    ``poles`` are the eigenvalues of a matrix similar to ``balanced``; the two computed sets
    differ by rounding: of order ``eps |A|`` for simple poles, ``(eps |A|)^(1/k)`` for a
    Jordan block of size ``k`` (Wilkinson 1965, ch. 2), well inside ``INTEGRATING_SEARCH``
    plus ``sqrt(eps) |A_b|_1`` for blocks up to size 3 at any scale of ``|A|``.
    """
    margin = INTEGRATING_SEARCH + np.sqrt(np.finfo(float).eps) * float(np.linalg.norm(balanced, 1))
    return bool(np.all(np.abs(np.asarray(poles, dtype=complex) - 1.0) > margin))


def _balanced(a: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """``D^-1 A D`` balanced by LAPACK's ``gebal`` (no permutation), and ``D`` as a vector."""
    _, (scale, _) = scipy.linalg.matrix_balance(a, permute=False, separate=True)
    return a / scale[:, None] * scale[None, :], scale


def _sorted_schur(
    a: NDArray[np.float64], tolerance: float
) -> tuple[NDArray[np.complex128], NDArray[np.complex128], int]:
    """Complex Schur form with the integrating poles (:func:`integrating_poles`) leading."""
    k = integrating_poles(a, tolerance=tolerance)
    if k == 0:
        return np.zeros((0, 0), complex), np.zeros((0, 0), complex), 0
    distance = np.sort(np.abs(scipy.linalg.eigvals(a, check_finite=False) - 1.0))
    radius = distance[k - 1] if k == distance.size else 0.5 * (distance[k - 1] + distance[k])
    t, z, count = scipy.linalg.schur(
        a.astype(complex),
        output="complex",
        sort=lambda v: abs(v - 1.0) <= radius,
        check_finite=False,
    )
    return t, z, int(count)


def steady_state_gain(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    d: ArrayLike | None = None,
    *,
    integrating_tolerance: float = INTEGRATING_TOLERANCE,
    poles: ArrayLike | None = None,
) -> SteadyStateGain:
    """Return the steady-state gain of a discrete model, pair by pair.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (p, n)
    d : array_like, shape (p, m), optional
        Feed-through (default zero).
    integrating_tolerance : float, keyword-only
        Passed to :func:`integrating_poles`: how close to 1, relative to the sample time,
        a group of poles must be to count as integrating.
    poles : array_like of complex, optional
        The eigenvalues of ``A`` (``scipy.linalg.eigvals``), when the caller has them.  When
        none lies within :data:`INTEGRATING_SEARCH` (plus rounding) of 1, no group of poles
        can be integrating and the answer is one solve, without another eigenvalue problem.

    Returns
    -------
    SteadyStateGain

    Notes
    -----
    See the module docstring.  Without poles near 1 this is one solve of ``(I - A) X = B``.
    A Markov term ``C1 N^l B1`` counts as nonzero above ``sqrt(eps) |C| |B| |A|^l``
    (2-norms; ``|B1|`` for ``|B|`` when larger), well above the rounding of the Schur form.
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    n, m = b_.shape
    p = c_.shape[0]
    d_ = np.zeros((p, m)) if d is None else np.asarray(d, dtype=float)
    order = np.zeros((p, m), dtype=int)
    ramp = np.zeros((p, m))
    if n == 0:
        return SteadyStateGain(gain=d_.copy(), integration_order=order, ramp_rate=ramp)
    # state units: a diagonal similarity changes neither the gain nor the poles; balanced with
    # B and C so that a state only inputs and outputs reach is balanced too
    scale = balance_states(a_, b_, c_)
    a_ = a_ / scale[:, None] * scale[None, :]
    b_, c_ = b_ / scale[:, None], c_ * scale[None, :]
    if poles is not None and _none_near_one(poles, a_):
        # The caller's eigenvalues and those of the balanced A differ by rounding only; the
        # margin keeps any pole that integrating_poles could look at.
        gain = c_ @ np.linalg.solve(np.eye(n) - a_, b_) + d_
        return SteadyStateGain(gain=gain, integration_order=order, ramp_rate=ramp)
    t, z, k = _sorted_schur(a_, integrating_tolerance)
    if k == 0:
        gain = c_ @ np.linalg.solve(np.eye(n) - a_, b_) + d_
        return SteadyStateGain(gain=gain, integration_order=order, ramp_rate=ramp)

    bz, cz = z.conj().T @ b_, c_ @ z
    if k < n:
        x = scipy.linalg.solve_sylvester(t[:k, :k], -t[k:, k:], -t[:k, k:])
    else:
        x = np.zeros((k, 0))
    b1, b2 = bz[:k] - x @ bz[k:], bz[k:]
    c1 = cz[:, :k]
    c2 = cz[:, k:] + c1 @ x
    nil = np.triu(t[:k, :k], 1)  # T11 - I with its eigenvalues taken as exactly 1
    # Rounding in the Schur form is of order eps |A|, in N^l of order eps |A|^l.
    # per pair (row i of C, column j of B), so that a change of units of one signal scales the
    # term and its threshold alike: sqrt(eps) of the term's own factors on the integrating
    # block, and never below 1000 eps of the rounding the Schur form leaves from the whole row
    # and column
    eps = np.finfo(float).eps
    own = np.sqrt(eps) * np.outer(np.linalg.norm(c1, axis=1), np.linalg.norm(b1, axis=0))
    rounding = 1e3 * eps * np.outer(np.linalg.norm(c_, axis=1), np.linalg.norm(b_, axis=0))
    scale = np.maximum(own, rounding)
    growth = max(1.0, float(np.linalg.norm(a_, 2)))
    power = np.eye(k, dtype=complex)
    markov0 = c1 @ b1
    for level in range(k):
        if not power.any():
            break
        term = c1 @ power @ b1
        order[np.abs(term) > scale * growth**level] = level + 1
        power = power @ nil
    gain = np.full((p, m), np.nan)
    settles = order == 0
    if k < n:
        finite = (c2 @ np.linalg.solve(np.eye(n - k) - t[k:, k:], b2)).real + d_
    else:
        finite = d_
    gain[settles] = finite[settles]
    ramp = np.where(order == 1, markov0.real, np.where(settles, 0.0, np.nan))
    return SteadyStateGain(gain=gain, integration_order=order, ramp_rate=ramp)


def relative_gain_array(gain: ArrayLike) -> NDArray[np.float64]:
    """Return Bristol's relative gain array ``G .* (G^-1)^T`` of a square nonsingular gain.

    Parameters
    ----------
    gain : array_like, shape (p, p)
        Finite steady-state gain, nonsingular (asserted by ``numpy.linalg.solve``).

    Returns
    -------
    ndarray, shape (p, p)
        ``lambda_ij`` = the gain of pair ``(i, j)`` with all other loops open, divided by
        its gain with all other outputs held by perfect control (Bristol 1966).

    Examples
    --------
    For 2 x 2, ``lambda_11 = 1 / (1 - g12 g21 / (g11 g22))``:

    >>> rga = relative_gain_array([[2.0, 1.0], [1.0, 2.0]])
    >>> bool(np.isclose(rga[0, 0], 1 / (1 - 1 / 4)))
    True
    """
    g = np.asarray(gain, dtype=float)
    assert g.ndim == 2 and g.shape[0] == g.shape[1], g.shape
    # (G^-1)^T = (G^T)^-1, by one LU solve rather than an explicit inverse.
    return g * np.linalg.solve(g.T, np.eye(g.shape[0]))


def balanced_condition_number(gain: ArrayLike) -> float:
    """Return the condition number of a gain after scaling its rows and columns free of units.

    Parameters
    ----------
    gain : array_like, shape (p, m)
        Finite.

    Notes
    -----
    Rows and columns scaled by :func:`service.solver.numerics.unit_free_scaling` (the
    logarithms' row and column effects removed by least squares, then max-norm
    equilibration): a change of units of any input or output leaves it unchanged up to
    rounding, and it lies at or a little above the minimized condition number over all
    diagonal scalings, the unit-free measure of how hard a plant is to control (S. Skogestad
    and I. Postlethwaite, *Multivariable Feedback Control*, 2nd ed., 2005, sec. 3.3.4).
    """
    g = np.asarray(gain, dtype=float)
    rows, columns = unit_free_scaling(g)
    return gain_condition_number(g * rows[:, None] * columns[None, :])


def gain_condition_number(gain: ArrayLike) -> float:
    """Return the 2-norm condition number ``s_max / s_min`` of a gain (``inf`` if singular).

    Parameters
    ----------
    gain : array_like, shape (p, m)
        Finite; for a non-square gain, the ratio over its ``min(p, m)`` singular values.
    """
    s = scipy.linalg.svdvals(np.asarray(gain, dtype=float), check_finite=False)
    if s.size == 0 or s[-1] == 0.0:
        return float("inf")
    return float(s[0] / s[-1])


@plant_cache
def open_loop_poles(a: ArrayLike) -> NDArray[np.complex128]:
    """Return the eigenvalues of ``A`` by descending modulus (``scipy.linalg.eigvals``), read-only.

    Balancing in LAPACK isolates the exact zero poles of shift-register (dead-time) states.
    Kept per plant (:func:`service.solver.memo.plant_cache`): the plant's properties and the
    estimator's integrator test both read them.
    """
    return eigenvalues_by_modulus(np.asarray(a, dtype=float))


@plant_cache
def plant_properties(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    d: ArrayLike | None = None,
    *,
    integrating_tolerance: float = INTEGRATING_TOLERANCE,
) -> PlantProperties:
    """Return the steady-state gain, its RGA and condition number, and the open-loop poles.

    Parameters are as for :func:`steady_state_gain`.  The RGA is left out (``None``) for a
    non-square gain, one with an integrating pair, or one whose condition number exceeds
    ``1 / eps`` (numerically singular); the condition number is ``None`` with integrating
    pairs (their gain is not finite).
    """
    poles = open_loop_poles(a)
    steady = steady_state_gain(a, b, c, d, integrating_tolerance=integrating_tolerance, poles=poles)
    condition = gain_condition_number(steady.gain) if steady.finite else None
    balanced = balanced_condition_number(steady.gain) if steady.finite else None
    square = steady.gain.shape[0] == steady.gain.shape[1]
    rga = None
    if square and balanced is not None and balanced < 1.0 / np.finfo(float).eps:
        rga = relative_gain_array(steady.gain)
    return PlantProperties(
        steady_state=steady,
        relative_gain=rga,
        condition_number=condition,
        poles=poles,
        balanced_condition_number=balanced,
    )


def input_gain_error_magnification(relative_gain: ArrayLike, error: float = INPUT_GAIN_ERROR) -> NDArray[np.float64]:
    """Return, per output, the worst diagonal entry of ``G E G^-1`` over input gain errors ``|e_j| <= error``.

    Parameters
    ----------
    relative_gain : array_like, shape (p, p)
        The relative gain array ``Lambda = G .* (G^-1)^T`` of a square nonsingular gain ``G``.
    error : float
        Largest relative error of each input's gain (0.2: 20 %).

    Returns
    -------
    ndarray, shape (p,)
        ``error * sum_j |lambda_ij|``.

    Notes
    -----
    A true plant ``G (I + E)`` with ``E = diag(e)`` (each input's gain in error on its own) is the
    model with the output error ``G E G^-1`` at steady state, whose diagonal is
    ``(G E G^-1)_ii = sum_j g_ij e_j (G^-1)_ji = sum_j lambda_ij e_j`` (the definition of the
    relative gain array); its largest magnitude over ``|e_j| <= error`` takes ``e_j = error
    sign(lambda_ij)``.  A controller that inverts the model (tight, decoupling tuning) meets
    that output error in full.
    """
    lam = np.asarray(relative_gain, dtype=float)
    return np.asarray(error * np.abs(lam).sum(axis=1), dtype=float)


def relative_gain_warning(
    properties: PlantProperties,
    *,
    output_labels: Sequence[str] | None = None,
    threshold: float = LARGE_RELATIVE_GAIN,
    error: float = INPUT_GAIN_ERROR,
) -> Diagnostic | None:
    """Return ``large_relative_gains`` when an element of the relative gain array reaches ``threshold``.

    Parameters
    ----------
    properties : PlantProperties
        With its relative gain array (``None``: no warning).
    output_labels : sequence of str, optional
        The controlled outputs' names, for the message.
    threshold : float, keyword-only
        :data:`LARGE_RELATIVE_GAIN`.
    error : float, keyword-only
        The input gain error the message quotes (:data:`INPUT_GAIN_ERROR`).
    """
    lam = properties.relative_gain
    if lam is None or not np.all(np.isfinite(lam)):
        return None
    largest = float(np.abs(lam).max())
    if largest < threshold:
        return None
    worst = input_gain_error_magnification(lam, error)
    i = int(np.argmax(worst))
    name = output_labels[i] if output_labels is not None else f"output {i + 1}"
    return Diagnostic(
        "large_relative_gains",
        f"The relative gain array has elements up to {largest:.3g} in magnitude (at or above {threshold:g}): "
        f"the outputs strongly interact, and a gain error on each input of its own is magnified on the "
        f"outputs. An error of {100 * error:g} % on each input's gain, in the worst directions, acts on "
        f"{name} like an error of up to {100 * worst[i]:.4g} % of its gain (the diagonal of G E G^-1, "
        f"sum_j lambda_ij e_j). A tight tuning that decouples the outputs (small move weights) then "
        f"responds far from its nominal response, though nominal margins and uniform gain factors "
        f"(analysis.model_error) look fine. Preview the loop on a true_plant whose input gains differ "
        f"by {100 * error:g} % in opposite directions, and raise the move weights (detune) if it degrades.",
    )


def plant_warnings(
    properties: PlantProperties,
    *,
    near_singular: float = NEAR_SINGULAR_GAIN,
    balanced: bool = False,
    output_labels: Sequence[str] | None = None,
) -> list[Diagnostic]:
    """Return the warnings about a plant: ``near_singular_gain`` and ``large_relative_gains``.

    Parameters
    ----------
    properties : PlantProperties
    near_singular : float, keyword-only
        Condition-number threshold (default :data:`NEAR_SINGULAR_GAIN`).
    balanced : bool, keyword-only
        Judge the equilibrated gain (:func:`balanced_condition_number`), for signals in
        arbitrary units; default ``False``: the gain as given, meaningful on signals scaled
        by their spans.
    output_labels : sequence of str, keyword-only, optional
        For :func:`relative_gain_warning` (the relative gains need no scaling: they are the
        same in any units).

    Returns
    -------
    list of Diagnostic
    """
    found: list[Diagnostic] = []
    cond = properties.balanced_condition_number if balanced else properties.condition_number
    if cond is not None and cond > near_singular:
        found.append(
            Diagnostic(
                "near_singular_gain",
                f"The steady-state gain matrix is near-singular (condition number {cond:.3g} above "
                f"{near_singular:g}, {'with its rows and columns equilibrated' if balanced else 'on the signals as scaled'}): "
                f"some combinations of outputs need "
                f"far larger input moves than others, and the controller will be sensitive to "
                f"model error there. Check the gains, the scaling, or control fewer outputs.",
            )
        )
    interaction = relative_gain_warning(properties, output_labels=output_labels)
    if interaction is not None:
        found.append(interaction)
    return found
