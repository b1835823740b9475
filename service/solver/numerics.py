"""Small numerical helpers shared by the solver's rooms.

- :func:`by_modulus` and :func:`eigenvalues_by_modulus`: poles in the order every answer
  lists them, by descending modulus (a stable sort, so conjugate pairs keep LAPACK's order);
- :func:`pbh_matrix` and :func:`singular_value_rank`: the Popov-Belevitch-Hautus rank test
  (standard linear systems theory): a mode ``z`` of ``A`` is reachable from ``B`` exactly
  when ``[zI - A, B]`` has full row rank, and seen by ``C`` exactly when ``[zI - A; C]`` has
  full column rank; the rank counted by singular values above a relative tolerance;
- :func:`format_complex`: a pole or zero in a message.

Pure functions on arrays; nothing here knows a request.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "by_modulus",
    "eigenvalues_by_modulus",
    "format_complex",
    "is_real",
    "pbh_matrix",
    "singular_value_rank",
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
