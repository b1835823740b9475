"""Small numerical helpers shared by the solver's rooms.

- :func:`by_modulus` and :func:`eigenvalues_by_modulus`: poles in the order every answer
  lists them, by descending modulus (a stable sort, so conjugate pairs keep LAPACK's order);
- :func:`pbh_matrix` and :func:`singular_value_rank`: the Popov-Belevitch-Hautus rank test
  (standard linear systems theory): a mode ``z`` of ``A`` is reachable from ``B`` exactly
  when ``[zI - A, B]`` has full row rank, and seen by ``C`` exactly when ``[zI - A; C]`` has
  full column rank; the rank counted by singular values above a relative tolerance;
- :func:`format_complex`: a pole or zero in a message;
- :func:`feedback_poles`: the eigenvalues of a state-feedback loop ``A - B K`` computed so
  that a long delay chain stays exactly nilpotent (see below);
- :func:`observable_basis`: the part of the state a gain ``K`` ever sees, ``(A, K)``
  observability by an orthogonal staircase with a relative rank tolerance;
- :func:`equilibrate` and :func:`equilibrated_rank`: rank decisions that do not depend on
  the units of the rows and columns (Ruiz scaling, then singular values above a relative
  tolerance);
- :func:`jacobi_scaled`: a symmetric positive-semidefinite matrix with unit diagonal, for
  definiteness and conditioning verdicts that do not depend on the units of the variables.

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
pairing had to reach.  As a safety net the hidden part must be invariant to rounding
(:data:`CROSS_CHECK`), else the plain eigenvalues are returned.  The tests hold the spectral radius against the closed loop's
characteristic polynomial in 80-digit arithmetic for dead times up to 300 samples.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg
import scipy.optimize
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "CROSS_CHECK",
    "RANK_TOLERANCE",
    "FeedbackPoles",
    "balance_states",
    "by_modulus",
    "eigenvalues_by_modulus",
    "equilibrate",
    "equilibrated_rank",
    "feedback_poles",
    "format_complex",
    "in_scaled_states",
    "is_real",
    "jacobi_scaled",
    "observable_basis",
    "pbh_matrix",
    "singular_value_rank",
    "unit_free_scaling",
]


def by_modulus(values: ArrayLike) -> NDArray[np.complex128]:
    """Return complex ``values``, shape ``(k,)``, sorted by descending modulus (stable)."""
    z: NDArray[np.complex128] = np.asarray(values)
    return z[np.argsort(-np.abs(z), kind="stable")]


def eigenvalues_by_modulus(matrix: ArrayLike) -> NDArray[np.complex128]:
    """Return the eigenvalues of a square ``matrix`` (``scipy.linalg.eigvals``) by descending modulus."""
    return by_modulus(scipy.linalg.eigvals(np.asarray(matrix), check_finite=False))


def is_real(z: complex) -> bool:
    """``z`` is real up to rounding: ``|Im z| <= 1e-12 max(1, |z|)`` (common practice)."""
    return abs(z.imag) <= 1e-12 * max(1.0, abs(z))


def pbh_matrix(
    a: NDArray[np.float64],
    z: complex,
    *,
    inputs: NDArray[np.float64] | None = None,
    outputs: NDArray[np.float64] | None = None,
) -> NDArray[Any]:
    """Return the PBH matrix of mode ``z``: ``[zI - A, B]`` (``inputs``) or ``[zI - A; C]`` (``outputs``).

    Parameters
    ----------
    a : ndarray, shape (n, n)
    z : complex
        An eigenvalue of ``a``; a real one (:func:`is_real`) gives a real matrix.
    inputs : ndarray, shape (n, m), keyword-only
        ``B``, for reachability (full row rank ``n`` unless ``z`` is unreachable).
    outputs : ndarray, shape (p, n), keyword-only
        ``C``, for observability (full column rank ``n`` unless ``z`` is unseen).
        Exactly one of ``inputs`` and ``outputs`` is given.
    """
    assert (inputs is None) != (outputs is None), "give inputs or outputs"
    n = a.shape[0]
    shift: complex | float = z.real if is_real(z) else z
    shifted = shift * np.eye(n) - a
    other = inputs if inputs is not None else outputs
    assert other is not None
    return np.hstack([shifted, other]) if inputs is not None else np.vstack([shifted, other])


def singular_value_rank(singular_values: NDArray[np.floating[Any]], tolerance: float) -> int:
    """Numerical rank: the singular values above ``tolerance`` times the largest.

    Parameters
    ----------
    singular_values : ndarray, shape (k,)
        In descending order (``numpy.linalg.svd``).
    tolerance : float
        Relative threshold, e.g. ``1e-9``.
    """
    if singular_values.size == 0:
        return 0
    threshold = tolerance * max(float(singular_values[0]), np.finfo(float).tiny)
    return int(np.count_nonzero(singular_values > threshold))


def format_complex(z: complex) -> str:
    """``"0.9"`` for a real number (``|Im z| < 1e-12``), ``"0.9+0.1j"`` otherwise (6 digits)."""
    return f"{z.real:.6g}" if abs(z.imag) < 1e-12 else f"{z.real:.6g}{z.imag:+.6g}j"


#: Relative size below which a new direction of the observability staircase counts as zero:
#: far above the ``~1e-15`` rounding of the staircase on a balanced problem, far below any
#: coupling that moves a pole visibly (common practice for rank decisions, a few orders
#: of magnitude above rounding).
RANK_TOLERANCE = 1e-10
#: Largest coupling ``||V' (A - B K) W||`` from the hidden part to the seen part, relative to
#: ``||A - B K||`` (Frobenius, balanced), for the decomposition to be used; it is zero in
#: exact arithmetic, so anything above rounding means a wrong rank decision.
CROSS_CHECK = 1e-9


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
        return FeedbackPoles(by_modulus(poles), float(np.abs(poles).max()), n, 0.0)
    b_s = b * (1.0 / scale)[:, None]
    closed_s = a_s - b_s @ k_s
    moved = scipy.linalg.eigvals(basis.T @ closed_s @ basis, check_finite=False) if seen else np.zeros(0, complex)
    complement = scipy.linalg.qr(basis, mode="full")[0][:, seen:] if seen else np.eye(n)
    coupling = float(np.linalg.norm(basis.T @ closed_s @ complement)) if seen else 0.0
    if coupling > CROSS_CHECK * max(float(np.linalg.norm(closed_s)), np.finfo(float).tiny):
        # the hidden part is not invariant after all (a rank decision the balancing could not
        # make safely): the plain eigenvalue problem of the whole matrix
        plain = scipy.linalg.eigvals(closed, check_finite=False)
        return FeedbackPoles(by_modulus(plain), float(np.abs(plain).max()), n, 0.0)
    open_loop = scipy.linalg.eigvals(a, check_finite=False)
    error = 0.0
    if seen:
        seen_open = scipy.linalg.eigvals(basis.T @ a_s @ basis, check_finite=False)
        distance = np.abs(seen_open[:, None] - open_loop[None, :])
        rows, cols = scipy.optimize.linear_sum_assignment(distance)
        error = float(distance[rows, cols].max(initial=0.0))
        open_loop = np.delete(open_loop, cols)
    poles = by_modulus(np.concatenate([moved, open_loop]))
    return FeedbackPoles(poles, float(np.abs(poles).max(initial=0.0)), seen, error)


def equilibrate(
    matrix: NDArray[np.float64] | NDArray[np.complex128], *, sweeps: int = 20
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return row and column scalings that give every nonzero row and column unit max-norm.

    Parameters
    ----------
    matrix : ndarray, shape (r, c)
    sweeps : int, keyword-only
        Ruiz iterations (each takes the square root of the remaining imbalance).

    Returns
    -------
    rows : ndarray, shape (r,)
    columns : ndarray, shape (c,)
        ``diag(rows) @ matrix @ diag(columns)`` is equilibrated; zero rows and columns keep
        scale 1.  Both are powers of two, so the scaling is exact.

    Notes
    -----
    D. Ruiz, "A scaling algorithm to equilibrate both rows and columns norms in matrices",
    Rutherford Appleton Laboratory report RAL-TR-2001-034 (2001).  A change of units of the
    rows or columns (``D1 M D2``) gives the same equilibrated matrix up to the iteration's
    convergence, so a rank counted on it does not depend on units.
    """
    r, c = matrix.shape
    rows, columns = np.ones(r), np.ones(c)
    work = np.abs(matrix).astype(float)
    for _ in range(sweeps):
        rn = work.max(axis=1, initial=0.0)
        cn = work.max(axis=0, initial=0.0)
        fr = np.where(rn > 0.0, np.exp2(np.round(-0.5 * np.log2(np.where(rn > 0.0, rn, 1.0)))), 1.0)
        fc = np.where(cn > 0.0, np.exp2(np.round(-0.5 * np.log2(np.where(cn > 0.0, cn, 1.0)))), 1.0)
        if np.all(fr == 1.0) and np.all(fc == 1.0):
            break
        rows *= fr
        columns *= fc
        work = work * fr[:, None] * fc[None, :]
    return rows, columns


def unit_free_scaling(
    matrix: NDArray[np.float64], *, sweeps: int = 200, tolerance: float = 1e-13
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return row and column scalings whose scaled matrix is the same whatever the matrix's units.

    Parameters
    ----------
    matrix : ndarray, shape (r, c)
        Real, finite.
    sweeps : int, keyword-only
        Most iterations of the second stage.
    tolerance : float, keyword-only
        The second stage stops when every row and column max-norm is within this of 1 (in
        logarithms).

    Returns
    -------
    rows : ndarray, shape (r,)
    columns : ndarray, shape (c,)
        Positive; ``diag(rows) @ matrix @ diag(columns)`` equals, up to rounding, the same
        product for ``D1 @ matrix @ D2`` with any positive diagonal ``D1``, ``D2`` (any change
        of units of the rows and columns).  Zero rows and columns keep scale 1.

    Notes
    -----
    Two stages, each covariant with a diagonal scaling, so their result is not a function of the
    units (:func:`equilibrate` rounds to powers of two and stops at a fixed point that depends on
    where it starts: its scaled matrix, and a condition number taken on it, move with the units
    by tens of per cent):

    1. ``log |m_ij| = a_i + b_j + e_ij`` fitted by least squares over the nonzero entries
       (``numpy.linalg.lstsq``); the residuals ``e_ij`` of a least-squares fit are unique even
       where ``a`` and ``b`` are not, and a change of units shifts ``a`` and ``b`` only, so
       ``m_ij exp(-a_i - b_j)`` is the same in any units (two-way analysis of the logarithms,
       common practice);
    2. max-norm equilibration of that matrix by square-root sweeps without rounding (the sweeps
       of :func:`equilibrate`), a continuous function of a matrix that no longer depends on units.
    """
    r, c = matrix.shape
    rows, columns = np.ones(r), np.ones(c)
    nonzero = np.argwhere(matrix != 0.0)
    if nonzero.size == 0:
        return rows, columns
    incidence = np.zeros((nonzero.shape[0], r + c))
    incidence[np.arange(nonzero.shape[0]), nonzero[:, 0]] = 1.0
    incidence[np.arange(nonzero.shape[0]), r + nonzero[:, 1]] = 1.0
    logs = np.log(np.abs(matrix[nonzero[:, 0], nonzero[:, 1]]))
    fit = np.linalg.lstsq(incidence, logs, rcond=None)[0]
    seen_rows = np.isin(np.arange(r), nonzero[:, 0])
    seen_columns = np.isin(np.arange(c), nonzero[:, 1])
    rows[seen_rows] = np.exp(-fit[:r][seen_rows])
    columns[seen_columns] = np.exp(-fit[r:][seen_columns])
    work = np.abs(matrix) * rows[:, None] * columns[None, :]
    for _ in range(sweeps):
        rn = np.where(seen_rows, work.max(axis=1, initial=0.0), 1.0)
        cn = np.where(seen_columns, work.max(axis=0, initial=0.0), 1.0)
        if max(np.abs(np.log(rn)).max(initial=0.0), np.abs(np.log(cn)).max(initial=0.0)) <= tolerance:
            break
        fr, fc = 1.0 / np.sqrt(rn), 1.0 / np.sqrt(cn)
        rows *= fr
        columns *= fc
        work = work * fr[:, None] * fc[None, :]
    return rows, columns


def equilibrated_rank(
    matrix: NDArray[np.float64] | NDArray[np.complex128], tolerance: float
) -> tuple[int, NDArray[np.float64] | NDArray[np.complex128]]:
    """Numerical rank of the equilibrated matrix, and a null vector in the original coordinates.

    Parameters
    ----------
    matrix : ndarray, shape (r, c)
    tolerance : float
        Relative threshold: singular values of the equilibrated matrix above ``tolerance``
        times the largest count.

    Returns
    -------
    rank : int
    null : ndarray, shape (c,)
        A unit vector ``v`` with ``matrix @ v`` as small as the rank test allows (the last
        right singular vector, mapped back through the column scaling).
    """
    if matrix.size == 0:
        return 0, np.zeros(matrix.shape[1])
    rows, columns = equilibrate(matrix)
    scaled = matrix * rows[:, None] * columns[None, :]
    _, s, vh = np.linalg.svd(scaled)
    rank = int(np.count_nonzero(s > tolerance * max(float(s[0]), np.finfo(float).tiny)))
    null = columns * vh[-1].conj()
    return rank, null / np.linalg.norm(null)


def jacobi_scaled(matrix: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return ``D^-1/2 M D^-1/2`` with ``D = diag(M)`` (zero diagonal entries left unscaled).

    Parameters
    ----------
    matrix : ndarray, shape (k, k)
        Symmetric positive semidefinite.

    Notes
    -----
    Of all diagonal scalings this one brings the condition number within a factor ``k`` of
    the smallest possible (van der Sluis, "Condition numbers and equilibration of matrices",
    Numer. Math. 14, 1969), and it is the same matrix whatever the units of the variables.
    """
    d = np.diag(matrix).copy()
    root = np.sqrt(np.where(d > 0.0, d, 1.0))
    return matrix / root[:, None] / root[None, :]


def in_scaled_states(
    scales: NDArray[np.float64], a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return ``(D^-1 A D, D^-1 B, C D)``: the system in the states ``x_b = D^-1 x``, ``D = diag(scales)``.

    Shapes (n, n), (n, m), (p, n); with the powers of two of :func:`balance_states` the change
    of coordinates is exact.
    """
    return a / scales[:, None] * scales[None, :], b / scales[:, None], c * scales[None, :]


def balance_states(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], *, sweeps: int = 30
) -> NDArray[np.float64]:
    """Return state scales ``d`` (powers of two) balancing ``(D^-1 A D, D^-1 B, C D)``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)

    Returns
    -------
    ndarray, shape (n,)

    Notes
    -----
    The balancing of Parlett and Reinsch ("Balancing a matrix for calculation of eigenvalues
    and eigenvectors", Numer. Math. 13, 1969) on the system matrix ``[[A, B], [C, 0]]`` with
    the state rows and columns tied: each state's scale makes the max-norm of what it feeds
    (its column of ``A`` without the diagonal, and of ``C``) equal that of what feeds it (its
    row of ``A`` and of ``B``).  Unlike balancing ``A`` alone it also balances a state that
    only an input reaches or only an output sees, so rank decisions on the result do not
    depend on the states' units.
    """
    n = a.shape[0]
    d = np.ones(n)
    inverse = np.ones(n)  # 1 / d, kept beside d
    off = np.abs(a) * (1.0 - np.eye(n))
    columns = np.ascontiguousarray(off.T)  # columns[i] = off[:, i]
    # The largest entry of |B|'s row i and of |C|'s column i, then scaled by d[i]: rounding
    # is monotonic, so scaling after the maximum gives the maximum of the scaled entries,
    # to the bit (and likewise for off[:, i] / d[j] * d[i] and off[i, :] * d[j] / d[i]).
    b_rows = np.abs(b).max(axis=1, initial=0.0) if b.shape[1] else np.zeros(n)
    c_columns = np.abs(c).max(axis=0, initial=0.0) if c.shape[0] else np.zeros(n)
    for _ in range(sweeps):
        changed = False
        for i in range(n):
            di = float(d[i])
            col = max(float((columns[i] * inverse).max(initial=0.0)) * di, float(c_columns[i]) * di)
            row = max(float((off[i] * d).max(initial=0.0)) / di, float(b_rows[i]) / di)
            if col == 0.0 or row == 0.0:
                continue
            f = float(np.exp2(np.round(0.5 * np.log2(row / col))))
            if f != 1.0:
                d[i] *= f
                inverse[i] = 1.0 / d[i]
                changed = True
        if not changed:
            break
    return d
