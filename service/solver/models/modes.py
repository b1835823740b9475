"""Plant modes that no manipulated input can move (PBH controllability test).

An eigenvalue ``lambda`` of ``A`` is an uncontrollable mode of ``x(k+1) = A x(k) + B u(k)``
when some left eigenvector ``w`` (``w' A = lambda w'``) is blind to the inputs, ``w' B = 0``;
equivalently (the Popov-Belevitch-Hautus test, standard linear systems theory) ::

    rank [A - lambda I, B] < n

and ``n - rank`` independent such ``w`` exist.  Then ``w' x(k) = lambda^k w' x(0)`` whatever
the inputs, so with any state feedback, the predictive law ``du = Kr r - Kx x - Ku u(k-1)``
included, ``[w; 0]`` is a left eigenvector of the closed loop on ``[x; u(k-1)]`` (its
``B``-columns vanish): ``lambda`` appears unchanged among the closed-loop poles.  Inside the
unit circle that is harmless (the mode decays by itself); on or outside it no tuning can make
the loop stable.  Typical causes are a realization with a separate integrator for a
disturbance path (a level integrating both a valve and a measured inflow modelled as two
integrators), or a genuine disturbance mode (a drifting load the inputs can only offset).

Numerical rank
--------------
The rank is counted by the singular values of ``[A - lambda I, B]``: those above
``tolerance`` times the largest one (default ``1e-9``, common practice).  Input units are
arbitrary, so each nonzero column of ``B`` is first scaled to the 1-norm of ``A`` (to 1 when
``A`` is zero; a scale, so the cheapest norm does); this changes no rank in exact arithmetic
and keeps a small-unit input from looking uncontrollable.  Eigenvalues closer than ``1e-6``
(relative) are treated as one repeated eigenvalue, tested at each computed copy, with the
largest rank drop kept (at most the number of copies).

The count is geometric: ``n - rank`` at ``lambda`` is the number of independent Jordan chains
of ``lambda`` in the uncontrollable part.  It equals ``n - rank [B, AB, ..., A^(n-1) B]`` (the
Kalman rank test) whenever that part has no Jordan block longer than one.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.design.closed_loop import UNIT_CIRCLE_MARGIN, Diagnostic
from service.solver.numerics import by_modulus, equilibrate, is_real, pbh_matrix, singular_value_rank

__all__ = [
    "LOOP_POLE_MATCH",
    "RANK_TOLERANCE",
    "uncontrollable_mode_warnings",
    "uncontrollable_modes",
]

#: Relative singular-value threshold of the PBH rank (common practice).
RANK_TOLERANCE = 1e-9
#: Eigenvalues this close (relative to ``max(1, |lambda|)``) count as one repeated eigenvalue.
_SAME_EIGENVALUE = 1e-6
#: A state is named in a warning when its weight in the blind direction is at least this
#: fraction of the largest.
_NAMED_SHARE = 0.1
#: At most this many states are named per mode.
_NAMED_MOST = 3


#: An eigenvalue of A within this distance (relative) of a closed-loop pole may be a mode
#: the feedback did not move; eigenvalues of uncontrollable modes are computed twice, from
#: A and from the closed loop, so they agree to rounding (far inside this).
LOOP_POLE_MATCH = 1e-6


def _scaled_inputs(a: NDArray[np.float64], b: NDArray[np.float64]) -> NDArray[np.float64]:
    """``B`` with each nonzero column scaled to ``||A||_1`` (or 1)."""
    scale = float(np.linalg.norm(a, 1)) if a.size else 0.0
    scale = scale if scale > 0.0 else 1.0
    norms = np.linalg.norm(b, axis=0)
    factors = np.divide(scale, norms, out=np.zeros_like(norms), where=norms > 0.0)
    result: NDArray[np.float64] = b * factors
    return result


def _blind_directions(
    a: NDArray[np.float64], b: NDArray[np.float64], z: complex, tolerance: float
) -> NDArray[np.complex128]:
    """Orthonormal ``w`` (columns, shape (n, n - rank)) with ``w^H [A - z I, B] ~ 0``."""
    n = a.shape[0]
    pbh = pbh_matrix(a, z, inputs=b)  # real arithmetic for a real eigenvalue
    # rows and columns equilibrated: the rank does not depend on the units of states or inputs
    rows, columns = equilibrate(pbh)
    pbh = pbh * rows[:, None] * columns[None, :]
    s = np.linalg.svd(pbh, compute_uv=False)  # n values: pbh is n x (n+m), m >= 0
    rank = singular_value_rank(s, tolerance)
    if rank == n:
        return np.zeros((n, 0), dtype=complex)
    u = np.linalg.svd(pbh, full_matrices=False)[0]  # only on a rank drop: the costly part
    w = u[:, rank:] * rows[:, None]  # w_s' Dr pbh Dc = 0: w = Dr w_s
    return np.linalg.qr(w)[0].astype(complex)


def _clusters(eigenvalues: NDArray[np.complex128]) -> list[list[complex]]:
    """Group eigenvalues closer than :data:`_SAME_EIGENVALUE` (relative)."""
    groups: list[list[complex]] = []
    for z in eigenvalues:
        for group in groups:
            if abs(z - group[0]) <= _SAME_EIGENVALUE * max(1.0, abs(group[0])):
                group.append(complex(z))
                break
        else:
            groups.append([complex(z)])
    return groups


def _modes(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    tolerance: float,
    smallest_modulus: float,
    loop_poles: NDArray[np.complex128] | None = None,
    poles: NDArray[np.complex128] | None = None,
) -> list[tuple[complex, NDArray[np.complex128]]]:
    """Each uncontrollable eigenvalue (of modulus at least ``smallest_modulus``, and among
    ``loop_poles`` when given) with its orthonormal blind directions; ``poles`` are the
    eigenvalues of ``a`` when the caller has them."""
    n = a.shape[0]
    if n == 0:
        return []
    b_scaled = _scaled_inputs(a, b)
    eigenvalues = scipy.linalg.eigvals(a, check_finite=False) if poles is None else poles
    eigenvalues = eigenvalues[np.abs(eigenvalues) >= smallest_modulus]
    if loop_poles is not None and eigenvalues.size:
        poles = np.asarray(loop_poles, dtype=complex)
        gap = (
            np.abs(eigenvalues[:, None] - poles[None, :]).min(axis=1, initial=np.inf)
            if poles.size
            else np.full(eigenvalues.size, np.inf)
        )
        eigenvalues = eigenvalues[gap <= LOOP_POLE_MATCH * np.maximum(1.0, np.abs(eigenvalues))]
    found = []
    for group in _clusters(eigenvalues):
        z, w = group[0], np.zeros((n, 0), dtype=complex)
        for candidate in group:  # the largest rank drop over the copies, at most their number
            directions = _blind_directions(a, b_scaled, candidate, tolerance)
            if directions.shape[1] > w.shape[1]:
                z, w = candidate, directions
            if w.shape[1] >= len(group):
                break
        if w.shape[1]:
            found.append((z, w[:, : len(group)]))
    return found


def uncontrollable_modes(
    a: ArrayLike,
    b: ArrayLike,
    *,
    tolerance: float = RANK_TOLERANCE,
    smallest_modulus: float = 0.0,
    poles: NDArray[np.complex128] | None = None,
) -> NDArray[np.complex128]:
    """Return the eigenvalues of ``A`` that no input reaches (PBH test).

    Parameters
    ----------
    a : array_like, shape (n, n)
        Discrete (or continuous: the test is the same) state matrix.
    b : array_like, shape (n, m)
        Input matrix of the manipulated variables (``m = 0`` allowed: every mode is then
        uncontrollable).
    tolerance : float, keyword-only
        Relative singular-value threshold of the rank (see the module notes).
    smallest_modulus : float, keyword-only
        Test only the eigenvalues of at least this modulus (default 0: all).  Each test is
        one SVD of an ``n x (n+m)`` matrix, so on a large model (long dead-time registers)
        testing only the modes near or outside the unit circle is much cheaper.
    poles : ndarray of complex, optional
        The eigenvalues of ``a`` when the caller has them (those of ``a'`` are the same).

    Returns
    -------
    ndarray of complex, shape (k,)
        Each uncontrollable eigenvalue ``n - rank [A - lambda I, B]`` times, by descending
        modulus; empty when ``(A, B)`` is controllable.  Complex modes of a real model come
        in conjugate pairs.

    Notes
    -----
    Popov-Belevitch-Hautus rank test at every eigenvalue (standard linear systems theory);
    the rank by singular values, module notes.  Cost: one ``scipy.linalg.eigvals`` and one
    SVD per tested eigenvalue.
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    n = a_.shape[0]
    assert a_.shape == (n, n) and b_.ndim == 2 and b_.shape[0] == n, (a_.shape, b_.shape)
    assert tolerance > 0.0, tolerance
    modes = [z for z, w in _modes(a_, b_, tolerance, smallest_modulus, poles=poles) for _ in range(w.shape[1])]
    values = np.array(modes, dtype=complex)
    return by_modulus(values)


def _named_states(w: NDArray[np.complex128], labels: Sequence[str]) -> list[str]:
    """The states that carry most of the blind directions (row norms of the orthonormal basis)."""
    weight = np.linalg.norm(w, axis=1)
    order = np.argsort(-weight, kind="stable")
    keep = [int(i) for i in order if weight[i] >= _NAMED_SHARE * weight[order[0]]]
    return [labels[i] for i in keep[:_NAMED_MOST]]


def uncontrollable_mode_warnings(
    a: ArrayLike,
    b: ArrayLike,
    *,
    labels: Sequence[str] | None = None,
    tolerance: float = RANK_TOLERANCE,
    loop_poles: ArrayLike | None = None,
    poles: ArrayLike | None = None,
) -> list[Diagnostic]:
    """Warn about plant modes on or outside the unit circle that no input can move.

    Parameters
    ----------
    a : array_like, shape (n, n)
        Discrete state matrix.
    b : array_like, shape (n, m)
        Input matrix of the manipulated variables.
    labels : sequence of n str, keyword-only, optional
        State names used in the message (default ``x1 .. xn``).
    tolerance : float, keyword-only
        As for :func:`uncontrollable_modes`.
    loop_poles : array_like of complex, keyword-only, optional
        Closed-loop poles of some state feedback on this plant (e.g. the design's).  A mode
        that no input can move stays a pole under every feedback, so only eigenvalues of ``A``
        within :data:`LOOP_POLE_MATCH` (relative) of one of these are tested: the PBH test
        then runs only where it can fail, which keeps large models cheap.
    poles : array_like of complex, keyword-only, optional
        The eigenvalues of ``a`` (``scipy.linalg.eigvals``) when the caller has them.

    Returns
    -------
    list of Diagnostic
        Empty, or one ``uncontrollable_mode`` naming every such pole (a conjugate pair
        once), the states that carry it, and why no tuning can fix it.  A mode counts as
        on the unit circle when ``|lambda| >= 1 - UNIT_CIRCLE_MARGIN`` (the margin of
        :func:`service.solver.design.closed_loop.design_warnings`).
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    n = a_.shape[0]
    assert a_.shape == (n, n) and b_.ndim == 2 and b_.shape[0] == n, (a_.shape, b_.shape)
    names = list(labels) if labels is not None else [f"x{i + 1}" for i in range(n)]
    assert len(names) == n, (len(names), n)
    parts, total = [], 0
    loop = None if loop_poles is None else np.asarray(loop_poles, dtype=complex)
    known = None if poles is None else np.asarray(poles, dtype=complex)
    for z, w in _modes(a_, b_, tolerance, 1.0 - UNIT_CIRCLE_MARGIN, loop, known):
        if not is_real(z) and z.imag < 0.0:
            continue  # the second of a conjugate pair
        where = f"z = {z.real:.6g}" if is_real(z) else f"the pair z = {z.real:.6g} +/- {abs(z.imag):.6g}j"
        count = f" ({w.shape[1]} independent modes)" if w.shape[1] > 1 else ""
        states = ", ".join(repr(s) for s in _named_states(w, names))
        parts.append(f"{where}{count}, carried by {states}")
        total += w.shape[1] * (1 if is_real(z) else 2)
    if not parts:
        return []
    one = total == 1
    return [
        Diagnostic(
            "uncontrollable_mode",
            f"The plant has {'a mode' if one else f'{total} modes'} on or outside the unit circle "
            f"that no manipulated input can move (PBH test, rank [A - zI, B] < n): "
            f"{'; '.join(parts)}. {'It appears' if one else 'They appear'} unchanged among the "
            f"closed-loop poles, and no tuning can fix {'it' if one else 'them'}. Either the model needs a "
            f"different realization (for example one integrator per output rather than one "
            f"per disturbance path), or the mode belongs to a disturbance that the controller "
            f"can only compensate, not remove.",
        )
    ]
