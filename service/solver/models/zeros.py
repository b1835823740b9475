"""Zeros of a plant: transmission zeros of its minimal part, and the decoupling zeros of its realization.

A state-space model ``(A, B, C)`` need not be minimal: a mode no input moves (uncontrollable)
or no output sees (unobservable) is a pole of the realization that the transfer matrix
``G(z) = C (zI - A)^-1 B`` does not have.  At such a mode the Rosenbrock system matrix ::

    P(z) = [[zI - A, -B], [C, 0]]

loses rank just as it does at a zero, so a zero computation on the whole realization reports
it as a zero (an *invariant* zero).  It is not one: ``G`` has no zero there and a step shows no
inverse response.  Rosenbrock's names (*State-space and Multivariable Theory*, 1970, ch. 3):

- *input-decoupling zeros*: the ``z`` where ``[zI - A, B]`` loses rank, the uncontrollable modes;
- *output-decoupling zeros*: the ``z`` where ``[zI - A; C]`` loses rank, the unobservable modes;
- *transmission zeros*: the zeros of ``G`` itself, which are the invariant zeros of a minimal
  realization.

:func:`plant_zeros` separates them by a Kalman decomposition in two orthogonal staircases (Van
Dooren, "The generalized eigenstructure problem in linear system theory", IEEE TAC 26(1), 1981,
doi:10.1109/TAC.1981.1102559): the controllable subspace ``R`` of ``(A, B)`` is ``A``-invariant,
so in an orthonormal basis ``[V, W]`` with ``range V = R`` ::

    [V, W]' A [V, W] = [[Ac, *], [0, W' A W]],   [V, W]' B = [[Bc], [0]]

and the input-decoupling zeros are ``eig(W' A W)``; the same on ``(Ac, Cc)`` with the
observable subspace gives the output-decoupling zeros (those of the controllable part; a mode
that is both uncontrollable and unobservable is counted once, as input-decoupling) and the
minimal realization ``(Am, Bm, Cm)``, whose invariant zeros are the transmission zeros.

Rank decisions are relative: each input column and output row is scaled to unit max-norm, then
the states are balanced together with ``B`` and ``C`` (LAPACK's ``gebal`` on the padded system
matrix; powers of two, so exact), and a new direction of the staircase
(:func:`service.solver.numerics.observable_basis`) counts when its singular value exceeds
:data:`service.solver.numerics.RANK_TOLERANCE` times ``||B||`` (first step) or ``||A||`` (later
steps).  A change of units of inputs, outputs or states therefore changes no decision.

Pure functions on arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.memo import plant_cache
from service.solver.numerics import RANK_TOLERANCE, by_modulus, observable_basis

__all__ = ["MinimalRealization", "PlantZeros", "minimal_realization", "plant_zeros", "system_zeros"]

#: Largest condition number of ``CB`` for which the zeros come from the reduced matrix.
_REDUCED_CB_CONDITION = 1e6
#: A generalized eigenvalue beyond this modulus is an infinite zero (common practice).
_INFINITE = 1e8


@dataclass(frozen=True)
class MinimalRealization:
    """A minimal realization of ``(A, B, C)`` and the modes the decomposition removed.

    Attributes
    ----------
    a : ndarray, shape (q, q)
    b : ndarray, shape (q, m)
    c : ndarray, shape (p, q)
        The minimal part, in orthogonal coordinates of the balanced states (the balanced
        model itself when it is minimal); the same transfer matrix as the model (the same
        input and output units).
    input_decoupling : ndarray of complex
        The uncontrollable modes, by descending modulus.
    output_decoupling : ndarray of complex
        The unobservable modes of the controllable part, by descending modulus.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    input_decoupling: NDArray[np.complex128]
    output_decoupling: NDArray[np.complex128]

    @property
    def states(self) -> int:
        """``q``, the order of the transfer matrix (McMillan degree)."""
        return int(self.a.shape[0])


@dataclass(frozen=True)
class PlantZeros:
    """The zeros of a square plant, separated by kind.

    Attributes
    ----------
    transmission : ndarray of complex
        The finite transmission zeros, by descending modulus.
    input_decoupling, output_decoupling : ndarray of complex
        As :class:`MinimalRealization`.
    minimal_states : int
        Order of the minimal realization.
    """

    transmission: NDArray[np.complex128]
    input_decoupling: NDArray[np.complex128]
    output_decoupling: NDArray[np.complex128]
    minimal_states: int


def _power_of_two(x: NDArray[np.float64]) -> NDArray[np.float64]:
    safe = np.where(x > 0.0, x, 1.0)
    return np.exp2(np.round(np.log2(safe)))


def _balanced(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """``(D^-1 A D, D^-1 B / su, C D / sy, su, sy)``: inputs and outputs to unit max-norm, states balanced with them."""
    n, m = b.shape
    p = c.shape[0]
    su = _power_of_two(np.abs(b).max(axis=0, initial=0.0))
    sy = _power_of_two(np.abs(c).max(axis=1, initial=0.0))
    b = b / su[None, :]
    c = c / sy[:, None]
    size = n + m + p
    padded = np.zeros((size, size))
    padded[:n, :n] = a - np.diag(np.diag(a))  # the diagonal is invariant; newer gebal would count it
    padded[:n, n : n + m] = b
    padded[n + m :, :n] = c
    # The input rows and output columns are zero, so gebal leaves their scales at one and
    # balances each state's row (A and B) against its column (A and C), off the diagonal.
    _, (scale, _) = scipy.linalg.matrix_balance(padded, permute=False, separate=True)
    d = scale[:n]
    return a * (1.0 / d)[:, None] * d[None, :], b * (1.0 / d)[:, None], c * d[None, :], su, sy


def _split(a: NDArray[np.float64], basis: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.complex128]]:
    """``V' A V`` and ``eig(W' A W)`` for an invariant subspace ``range V`` (``W`` its complement)."""
    n, q = basis.shape
    full = scipy.linalg.qr(basis, mode="full")[0] if q else np.eye(n)
    complement = full[:, q:]
    removed = scipy.linalg.eigvals(complement.T @ a @ complement, check_finite=False)
    return basis.T @ a @ basis, removed


def minimal_realization(
    a: ArrayLike, b: ArrayLike, c: ArrayLike, *, tolerance: float = RANK_TOLERANCE
) -> MinimalRealization:
    """Return a minimal realization of ``(A, B, C)`` and its decoupling zeros.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (p, n)
    tolerance : float, keyword-only
        Relative rank tolerance of the staircases (see the module notes).

    Returns
    -------
    MinimalRealization

    Notes
    -----
    The Kalman decomposition by two staircases (module notes); the work is about
    ``n^2 (n + m + p)`` flops, plus one eigenvalue problem per removed part.
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    a_, b_, c_, su, sy = _balanced(a_, b_, c_)
    # The reachable subspace of (A, B) is the part of the state B' sees through A'.
    reach = observable_basis(a_.T, b_.T, tolerance=tolerance)
    if reach.shape[1] == a_.shape[0]:  # all reachable: keep the coordinates
        ac, bc, cc, input_decoupling = a_, b_, c_, np.zeros(0, dtype=complex)
    else:
        ac, input_decoupling = _split(a_, reach)
        bc, cc = reach.T @ b_, c_ @ reach
    # The observable subspace of (Ac, Cc) is invariant under Ac'; its complement, the
    # unobservable subspace, under Ac.
    seen = observable_basis(ac, cc, tolerance=tolerance)
    if seen.shape[1] == ac.shape[0]:
        am, bm, cm, output_decoupling = ac, bc, cc, np.zeros(0, dtype=complex)
    else:
        am_t, output_decoupling = _split(ac.T, seen)
        am, bm, cm = am_t.T, seen.T @ bc, cc @ seen
    return MinimalRealization(
        a=am,
        b=bm * su[None, :],
        c=cm * sy[:, None],
        input_decoupling=by_modulus(input_decoupling),
        output_decoupling=by_modulus(output_decoupling),
    )


def system_zeros(a: ArrayLike, b: ArrayLike, c: ArrayLike) -> NDArray[np.complex128]:
    """Return the finite invariant zeros of a square realization ``(A, B, C)`` (no feed-through).

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (m, n)

    Returns
    -------
    ndarray of complex
        By descending modulus; empty for a non-square plant.  On a minimal realization these
        are the transmission zeros; otherwise the decoupling zeros are among them.

    Notes
    -----
    When ``CB`` is well conditioned the zeros are the eigenvalues of the ``(n-m)``-square
    matrix ``N' (I - B (CB)^-1 C) A N``, ``N`` an orthonormal basis of the null space of
    ``C``: a zero needs ``(A - z I) x + B u = 0`` with ``C x = 0``, so ``x = N xi``,
    ``u = -(CB)^-1 C A N xi`` and ``N' (I - B (CB)^-1 C) A N xi = z xi`` (the reduced pencil
    of Emami-Naeini and Van Dooren, "Computation of zeros of linear multivariable systems",
    Automatica 18(4), 1982, doi:10.1016/0005-1098(82)90070-X, after one step).  There are then
    exactly ``n - m`` finite zeros.  Otherwise: the generalized eigenvalues ``alpha / beta`` of
    the Rosenbrock pencil ``([[A, B], [C, 0]], [[I, 0], [0, 0]])`` from ``scipy.linalg.eig`` in
    homogeneous form; pairs with ``|beta|`` at rounding level are the infinite zeros and are
    dropped.  Either way a zero beyond ``1e8`` in modulus is taken as infinite (common practice).
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    n, m = b_.shape
    if c_.shape[0] != m:
        return np.zeros(0, dtype=complex)
    zeros = _reduced_zeros(a_, b_, c_)
    if zeros is None:
        system = np.block([[a_, b_], [c_, np.zeros((m, m))]])
        mass = scipy.linalg.block_diag(np.eye(n), np.zeros((m, m)))
        pairs = scipy.linalg.eig(system, mass, right=False, homogeneous_eigvals=True)
        alpha, beta = pairs[0], pairs[1]
        # QZ returns |beta| of order one for a finite zero; an infinite zero has |beta| at
        # rounding level.
        finite = (np.abs(beta) > np.abs(alpha) / _INFINITE) & (np.abs(beta) > 1e3 * np.finfo(float).eps)
        zeros = alpha[finite] / beta[finite]
    return by_modulus(np.asarray(zeros, dtype=complex))


def _reduced_zeros(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64]
) -> NDArray[np.complex128] | None:
    """The zeros from ``N' (I - B (CB)^-1 C) A N`` (see :func:`system_zeros`); ``None`` if ``CB`` is ill-conditioned."""
    n, m = b.shape
    if m == 0 or m > n:
        return None
    cb = c @ b
    singular = scipy.linalg.svdvals(cb, check_finite=False)
    if singular[-1] <= singular[0] / _REDUCED_CB_CONDITION or singular[0] == 0.0:
        return None
    if m == n:
        return np.zeros(0, dtype=complex)
    q, _ = scipy.linalg.qr(c.T, check_finite=False)  # C' = Q R: the last n - m columns span null(C)
    null = q[:, m:]
    an = a @ null
    coupling = scipy.linalg.solve(cb, c @ an, check_finite=False)  # (CB)^-1 C A N
    reduced = null.T @ an - (null.T @ b) @ coupling
    zeros: NDArray[np.complex128] = scipy.linalg.eigvals(reduced, check_finite=False)
    return zeros[np.abs(zeros) < _INFINITE]


@plant_cache
def plant_zeros(a: ArrayLike, b: ArrayLike, c: ArrayLike) -> PlantZeros:
    """Return the transmission zeros of a square plant and the decoupling zeros of its realization.

    Parameters
    ----------
    a : array_like, shape (n, n)
    b : array_like, shape (n, m)
    c : array_like, shape (m, n)

    Returns
    -------
    PlantZeros
        For a non-square plant the transmission zeros are empty (they generically do not
        exist); the decoupling zeros are found for every shape.
    """
    minimal = minimal_realization(a, b, c)
    return PlantZeros(
        transmission=system_zeros(minimal.a, minimal.b, minimal.c),
        input_decoupling=minimal.input_decoupling,
        output_decoupling=minimal.output_decoupling,
        minimal_states=minimal.states,
    )
