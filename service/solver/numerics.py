"""Small numerical helpers shared by the solver's rooms.

- :func:`feedback_poles`: the eigenvalues of a state-feedback loop ``A - B K`` computed so
  that a long delay chain stays exactly nilpotent (see below);
- :func:`observable_basis`: the part of the state a gain ``K`` ever sees, ``(A, K)``
  observability by an orthogonal staircase with a relative rank tolerance.

Pure functions on arrays; nothing here knows a request.

Poles of a loop with long dead times
------------------------------------
A dead time of ``d`` samples is a shift register of ``d`` states.  In the exact closed loop
of a predictive controller those states are poles at ``z = 0`` forming Jordan blocks of size
up to ``d`` (the controller predicts through the delay; standard for predictor-based control).
A defective eigenvalue of multiplicity ``d`` moves by ``(eps ||M||)^(1/d)`` under a
perturbation ``eps`` of the matrix (Wilkinson, *The Algebraic Eigenvalue Problem*, 1965,
ch. 2), and both the rounding of the gains and a backward-stable eigenvalue solver perturb by
about ``1e-16``: for ``d = 100`` the cluster becomes a ring of radius about ``0.7`` that hides
the true spectral radius.

:func:`feedback_poles` keeps the delay states out of the eigenvalue problem.  The states that
``K`` never sees, however long one waits, span the unobservable subspace ``U`` of ``(A, K)``;
``U`` is ``A``-invariant and ``K U = 0``, so in an orthonormal basis ``[V, W]`` with
``range W = U`` both ``A`` and ``A - B K`` are block triangular and ::

    eig(A - B K) = eig(V' (A - B K) V)  +  (eig(A) - eig(V' A V))

(multisets; the second term is the part of the open loop the gain leaves alone; standard
Kalman decomposition, e.g. Antsaklis & Michel, *Linear Systems*, 2006, sec. 3.4).  The small
dense block ``V' (A - B K) V`` holds the poles the controller moves; the rest are open-loop
eigenvalues, which for a delay register are exact zeros because the open-loop matrix is
triangular up to a permutation (LAPACK's balancing isolates them, ``gebal``).  The pairing of
``eig(V' A V)`` with ``eig(A)`` is an optimal assignment on distances.

Accuracy: the poles returned are the exact eigenvalues of a loop within ``RANK_TOLERANCE``
(relative to ``||A||`` and ``||K||`` after diagonal balancing) of the given one, plus the
eigenvalue solver's own rounding on the small block; ``pairing_error`` reports how far the
pairing had to reach.  The tests hold the spectral radius against the closed loop's
characteristic polynomial in 80-digit arithmetic for dead times up to 300 samples.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
from numpy.typing import NDArray

__all__ = [
    "RANK_TOLERANCE",
    "FeedbackPoles",
    "feedback_poles",
    "observable_basis",
]

#: Relative size below which a new direction of the observability staircase counts as zero:
#: far above the ``~1e-15`` rounding of the staircase on a balanced problem, far below any
#: coupling that moves a pole visibly (common practice for rank decisions, a few orders
#: of magnitude above rounding).
RANK_TOLERANCE = 1e-10


def _sorted(poles: NDArray[np.complex128]) -> NDArray[np.complex128]:
    return poles[np.argsort(-np.abs(poles), kind="stable")]


def observable_basis(
    a: NDArray[np.float64], k: NDArray[np.float64], *, tolerance: float = RANK_TOLERANCE
) -> NDArray[np.float64]:
    """Return an orthonormal basis of the part of the state that ``K`` sees through ``A``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    k : ndarray, shape (r, n)
    tolerance : float, keyword-only
        A new direction counts when its singular value exceeds ``tolerance`` times
        ``||K||`` (first block) or ``||A||`` (later blocks), Frobenius norms.

    Returns
    -------
    ndarray, shape (n, q)
        Orthonormal columns spanning the row space of the observability matrix
        ``[K; K A; K A^2; ...]`` (``q = n`` when every state is seen).

    Notes
    -----
    The observability staircase (the dual of the controllability staircase of Van Dooren,
    "The generalized eigenstructure problem in linear system theory", IEEE TAC 26, 1981):
    each step maps the newest directions by ``A'``, removes what the basis already holds
    (Gram-Schmidt twice) and keeps the new singular directions above the tolerance.  The
    work is about ``n^2 q`` flops.
    """
    n = a.shape[0]
    basis = np.zeros((n, 0))
    k_norm = float(np.linalg.norm(k))
    a_norm = float(np.linalg.norm(a))
    if k_norm == 0.0 or n == 0:
        return basis
    new = k.T
    reference = k_norm
    while basis.shape[1] < n:
        if basis.shape[1]:
            new = new - basis @ (basis.T @ new)
            new = new - basis @ (basis.T @ new)
        u, s, _ = np.linalg.svd(new, full_matrices=False)
        rank = int(np.count_nonzero(s > tolerance * reference))
        if rank == 0:
            break
        u = u[:, : min(rank, n - basis.shape[1])]
        basis = np.hstack([basis, u])
        new = a.T @ u
        reference = max(a_norm, np.finfo(float).tiny)
    return basis


@dataclass(frozen=True)
class FeedbackPoles:
    """Eigenvalues of ``A - B K`` and how they were found.

    Attributes
    ----------
    poles : ndarray of complex, shape (n,)
        By descending modulus.
    spectral_radius : float
    seen : int
        ``q``: the dimension of the part of the state the gain sees (``n``: a plain
        eigenvalue problem of the whole matrix).
    pairing_error : float
        Largest distance between an eigenvalue of ``V' A V`` and the open-loop eigenvalue it
        was paired with (0 when ``q = n``); a measure of the decomposition's accuracy.
    """

    poles: NDArray[np.complex128]
    spectral_radius: float
    seen: int
    pairing_error: float


def feedback_poles(a: NDArray[np.float64], b: NDArray[np.float64], k: NDArray[np.float64]) -> FeedbackPoles:
    """Return the eigenvalues of ``A - B K``, exact zeros kept exact for delay chains.

    Parameters
    ----------
    a : ndarray, shape (n, n)
        Open-loop matrix (in a predictive controller, on ``[x; u(k-1)]``).
    b : ndarray, shape (n, m)
    k : ndarray, shape (m, n)

    Returns
    -------
    FeedbackPoles

    Notes
    -----
    The module docstring derives the decomposition.  The problem is first balanced by the
    diagonal similarity that LAPACK's ``gebal`` picks for ``A - B K``
    (``scipy.linalg.matrix_balance``, powers of two, so exact), which makes the rank
    decisions independent of the states' units.
    """
    n = a.shape[0]
    closed = a - b @ k
    if n == 0:
        return FeedbackPoles(np.zeros(0, dtype=complex), 0.0, 0, 0.0)
    _, (scale, _) = scipy.linalg.matrix_balance(closed, permute=False, separate=True)
    a_s = a * (1.0 / scale)[:, None] * scale[None, :]
    k_s = k * scale[None, :]
    basis = observable_basis(a_s, k_s)
    seen = basis.shape[1]
    if seen == n:
        poles = scipy.linalg.eigvals(closed, check_finite=False)
        return FeedbackPoles(_sorted(poles), float(np.abs(poles).max()), n, 0.0)
    b_s = b * (1.0 / scale)[:, None]
    closed_s = a_s - b_s @ k_s
    moved = scipy.linalg.eigvals(basis.T @ closed_s @ basis, check_finite=False) if seen else np.zeros(0, complex)
    open_loop = scipy.linalg.eigvals(a, check_finite=False)
    error = 0.0
    if seen:
        seen_open = scipy.linalg.eigvals(basis.T @ a_s @ basis, check_finite=False)
        distance = np.abs(seen_open[:, None] - open_loop[None, :])
        rows, cols = scipy.optimize.linear_sum_assignment(distance)
        error = float(distance[rows, cols].max(initial=0.0))
        open_loop = np.delete(open_loop, cols)
    poles = _sorted(np.concatenate([moved, open_loop]))
    return FeedbackPoles(poles, float(np.abs(poles).max(initial=0.0)), seen, error)
