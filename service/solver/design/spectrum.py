"""Extreme eigenvalues of a symmetric positive-definite matrix, for the exact 2-norm condition number.

The condition number the service reports is the exact 2-norm one, ``l_max / l_min`` (not
LAPACK's 1-norm estimate).  Two routes give it:

- up to :data:`DENSE_UP_TO` rows, LAPACK's dense symmetric eigensolver
  (``scipy.linalg.eigvalsh``), whose cost there is a few milliseconds;
- above, when the Cholesky factor is at hand, the Lanczos method (ARPACK through
  ``scipy.sparse.linalg.eigsh``) on ``H^-1``, applied by two triangular solves with the
  factor, for ``1 / l_min``, then on ``H`` for ``l_max``.  Each run stops when the Ritz
  residual is below ``1e-12 |theta|``, so the value is within that residual of an
  eigenvalue of the matrix (Parlett, *The Symmetric Eigenvalue Problem*, SIAM 1998,
  theorem 4.5.1): below the ``k eps |H|`` error bound of the dense route itself (LAPACK
  Users' Guide, 3rd ed., section 4.7).  Each run starts from a Lanczos basis of
  :data:`_BASIS` vectors and builds at most :data:`_RESTARTS` (ARPACK's implicit restarts):
  an end apart from the rest, as in a design Hessian, converges in the first one.  When the
  end sought is a tight cluster (long control horizons put many eigenvalues just above the
  move weight) it does not converge, and the dense route answers instead, having lost
  those products (at 1000 rows about a quarter of the dense route's own time).  A
  value outside the Rayleigh-quotient bounds ``l_min <= min H_ii``, ``l_max >= max H_ii``
  also sends the matrix to the dense route.  The start vector is fixed, so the same matrix
  always gives the same numbers.

The unit-free verdicts are taken on the Jacobi-scaled matrix ``D^-1/2 H D^-1/2``
(:func:`spectrum_ends` with ``scaled=True``): its Lanczos products scale vectors around products with ``H``
and its factor, so neither the scaled matrix nor its factor is formed (each would be one more
pass over a 1000 x 1000 matrix, several milliseconds where memory bandwidth is scarce).

For a 1000 x 1000 Hessian with separated ends the Lanczos route takes about an eighth of the
dense one's time (the large benchmark design's Hessian: 8.1 ms against 62 ms, measured side
by side; with ``solve_triangular`` and general products it had taken 18 ms against 82 ms in
a slower hour, and with one basis of 40 vectors and no restart 32 ms).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg
import scipy.linalg.blas
import scipy.sparse.linalg
from numpy.typing import NDArray

from service.solver.numerics import jacobi_scaled

__all__ = ["DENSE_UP_TO", "SpectrumEnds", "extreme_eigenvalues", "spectrum_ends"]

#: Largest size solved by the dense eigensolver; larger matrices use Lanczos.
DENSE_UP_TO = 400
#: Seed of the fixed Lanczos start vector.
_START_SEED = 20261201
#: Lanczos basis size (ARPACK's ``ncv``): the products before a run's first convergence check.
_BASIS = 16
#: Relative Ritz residual at which a run stops (ARPACK's ``tol``).
_TOLERANCE = 1e-12
#: Bases a run builds at most (ARPACK's ``maxiter``), then the dense route answers.
_RESTARTS = 5


@dataclass(frozen=True)
class SpectrumEnds:
    """The smallest and largest eigenvalue and the route that found them.

    Attributes
    ----------
    low, high : float
    method : {"dense", "lanczos"}
        ``"dense"``: LAPACK's symmetric eigensolver; ``"lanczos"``: ARPACK with the factor.
    """

    low: float
    high: float
    method: Literal["dense", "lanczos"]


def _dense(matrix: NDArray[np.float64]) -> SpectrumEnds:
    values = scipy.linalg.eigvalsh(matrix, check_finite=False)
    return SpectrumEnds(float(values[0]), float(values[-1]), "dense")


def _largest(operator: scipy.sparse.linalg.LinearOperator | NDArray[np.float64], size: int) -> float:
    start = np.random.default_rng(_START_SEED).standard_normal(size)
    value = scipy.sparse.linalg.eigsh(
        operator,
        k=1,
        which="LA",
        v0=start,
        ncv=min(size, _BASIS),
        tol=_TOLERANCE,
        maxiter=_RESTARTS,
        return_eigenvectors=False,
    )
    return float(value[0])


def extreme_eigenvalues(
    matrix: NDArray[np.float64],
    *,
    factor: tuple[NDArray[np.float64], bool] | None = None,
    dense_up_to: int = DENSE_UP_TO,
) -> tuple[float, float]:
    """Return ``(l_min, l_max)`` of a symmetric matrix (:func:`spectrum_ends` without the route)."""
    ends = spectrum_ends(matrix, factor=factor, dense_up_to=dense_up_to)
    return ends.low, ends.high


def spectrum_ends(
    matrix: NDArray[np.float64],
    *,
    factor: tuple[NDArray[np.float64], bool] | None = None,
    dense_up_to: int = DENSE_UP_TO,
    scaled: bool = False,
) -> SpectrumEnds:
    """Return the smallest and largest eigenvalue of a symmetric matrix, and the route taken.

    Parameters
    ----------
    matrix : ndarray, shape (k, k)
        Symmetric (both triangles equal).
    factor : tuple (ndarray, bool), optional
        ``scipy.linalg.cho_factor(matrix)``; without it (or with ``k <= dense_up_to``) the
        dense eigensolver answers, which also serves matrices that are not positive definite.
        With ``scaled`` it is still the factor of ``matrix`` itself.
    dense_up_to : int, keyword-only
        Largest size solved densely (default :data:`DENSE_UP_TO`).
    scaled : bool, keyword-only
        The ends of the Jacobi-scaled matrix ``D^-1/2 M D^-1/2`` (``D = diag(M)``,
        :func:`service.solver.numerics.jacobi_scaled`) instead of ``M``'s.

    Returns
    -------
    SpectrumEnds

    Notes
    -----
    See the module docstring for the two routes and their accuracy.  With ``scaled`` the
    Lanczos route never forms the scaled matrix: its products are ``s * (M @ (s * x))``
    with ``s = D^-1/2``, and those with its inverse ``D^1/2 M^-1 D^1/2 x`` use the factor
    of ``M`` (two passes over ``M`` or its factor per product, as for ``M`` itself).  The
    dense route, and every fallback to it, forms the scaled matrix.
    """
    size = matrix.shape[0]

    def dense_matrix() -> NDArray[np.float64]:
        return jacobi_scaled(matrix) if scaled else matrix

    if factor is None or size <= dense_up_to:
        return _dense(dense_matrix())
    scale = 1.0 / np.sqrt(np.diag(matrix)) if scaled else None
    return _lanczos_ends(matrix, factor, scale, dense_matrix)


def _lanczos_ends(
    matrix: NDArray[np.float64],
    factor: tuple[NDArray[np.float64], bool],
    scale: NDArray[np.float64] | None,
    dense_matrix: Callable[[], NDArray[np.float64]],
) -> SpectrumEnds:
    """Lanczos on ``S M S`` (``S = diag(scale)``, identity when ``None``) and its inverse, by the factor of ``M``."""
    size = matrix.shape[0]
    triangle, lower = factor
    # BLAS level 2 on Fortran-ordered arrays (a C-ordered symmetric matrix is its own
    # transpose, a free Fortran view): dsymv reads one triangle of M, half the memory of a
    # general product, and dtrsv skips solve_triangular's checks (the products are bound by
    # memory bandwidth; side by side at 1000 rows 148 us against 276 us, 236 us against 300 us)
    symmetric = matrix if matrix.flags.f_contiguous else matrix.T if matrix.flags.c_contiguous else None
    if symmetric is None:
        symmetric = np.asfortranarray(matrix)
    triangle = triangle if triangle.flags.f_contiguous else np.asfortranarray(triangle)
    first_trans, second_trans = (0, 1) if lower else (1, 0)

    def inverse(x: NDArray[np.float64]) -> NDArray[np.float64]:
        """``(S M S)^-1 x = S^-1 L^-T L^-1 S^-1 x`` (or with ``U``) by two triangular solves."""
        x = x if scale is None else x / scale
        first = scipy.linalg.blas.dtrsv(triangle, x, lower=int(lower), trans=first_trans)
        second: NDArray[np.float64] = scipy.linalg.blas.dtrsv(
            triangle, first, lower=int(lower), trans=second_trans, overwrite_x=1
        )
        return second if scale is None else second / scale

    def forward(x: NDArray[np.float64]) -> NDArray[np.float64]:
        """``S M S x`` (``M x`` without a scale)."""
        if scale is None:
            plain: NDArray[np.float64] = scipy.linalg.blas.dsymv(1.0, symmetric, x, lower=1)
            return plain
        product: NDArray[np.float64] = scale * scipy.linalg.blas.dsymv(1.0, symmetric, scale * x, lower=1)
        return product

    inverse_operator = scipy.sparse.linalg.LinearOperator((size, size), matvec=inverse, dtype=np.float64)
    operator = scipy.sparse.linalg.LinearOperator((size, size), matvec=forward, dtype=np.float64)
    try:
        inverse_high = _largest(inverse_operator, size)
        high = _largest(operator, size)
    except (scipy.sparse.linalg.ArpackNoConvergence, scipy.sparse.linalg.ArpackError):
        return _dense(dense_matrix())
    diagonal = np.diag(matrix) if scale is None else np.diag(matrix) * scale**2
    if not (inverse_high > 0.0 and np.isfinite(inverse_high) and np.isfinite(high)):
        return _dense(dense_matrix())
    low = 1.0 / inverse_high
    slack = 1e-12
    if low > diagonal.min() * (1.0 + slack) or high < diagonal.max() * (1.0 - slack):
        return _dense(dense_matrix())
    return SpectrumEnds(low, high, "lanczos")
