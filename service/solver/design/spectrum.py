"""Extreme eigenvalues of a symmetric matrix, for the exact 2-norm condition number.

The condition number the service reports is the exact 2-norm one, ``l_max / l_min`` (not
LAPACK's 1-norm estimate), from LAPACK's dense symmetric eigensolver
(``scipy.linalg.eigvalsh``).  Asking it for a subset of the spectrum is slower here, and
Lanczos iterations stall on the cluster of eigenvalues near the move weight that long control
horizons produce, so the whole spectrum is computed: with BLAS on one thread per solver
(as ``movecast serve`` sets it) it costs less than forming the Hessian (about 0.5 s for a
2000 x 2000 Hessian on one core).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

__all__ = ["extreme_eigenvalues"]


def extreme_eigenvalues(matrix: NDArray[np.float64]) -> tuple[float, float]:
    """Return ``(l_min, l_max)`` of a symmetric matrix.

    Parameters
    ----------
    matrix : ndarray, shape (k, k)
        Symmetric (only its lower triangle is read).

    Returns
    -------
    tuple of float
        Smallest and largest eigenvalue.
    """
    values = scipy.linalg.eigvalsh(matrix, check_finite=False)
    return float(values[0]), float(values[-1])
