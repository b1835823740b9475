"""Weight matrices: a diagonal given as one number per signal, or a full matrix.

The cost of the design notes is ``|z - r|^2_Q + |du|^2_R`` with one ``Q`` (p x p) shared by
every penalized prediction step and one ``R`` (m x m) shared by every move.  The solver never
forms the block-diagonal ``kron(I, Q)``: it works with a square root ``W`` of ``Q``
(``W.T @ W == Q``) applied block by block.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["weight_matrix", "weight_root"]


def weight_matrix(weight: ArrayLike, size: int) -> NDArray[np.float64]:
    """Return the full symmetric weight matrix for ``size`` signals.

    Parameters
    ----------
    weight : array_like, shape (size,) or (size, size)
        One non-negative number per signal (a diagonal weight) or a full symmetric
        positive-semidefinite matrix.
    size : int
        Number of signals the weight applies to.

    Returns
    -------
    ndarray, shape (size, size)
        The weight as a full matrix, symmetrized exactly.
    """
    w = np.asarray(weight, dtype=float)
    if w.ndim == 1:
        assert w.shape == (size,), f"diagonal weight has shape {w.shape}, expected ({size},)"
        return np.diag(w)
    assert w.shape == (size, size), f"weight has shape {w.shape}, expected ({size}, {size})"
    result: NDArray[np.float64] = 0.5 * (w + w.T)
    return result


def weight_root(weight: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return ``W`` with ``W.T @ W == weight`` for a symmetric positive-semidefinite weight.

    Parameters
    ----------
    weight : ndarray, shape (p, p)
        Symmetric positive-semidefinite matrix.

    Returns
    -------
    ndarray, shape (p, p)
        A square root; diagonal when ``weight`` is diagonal (then exactly ``sqrt`` of it).

    Notes
    -----
    A non-diagonal weight is decomposed with ``scipy``-free ``numpy.linalg.eigh``:
    ``weight = V diag(l) V'`` and ``W = diag(sqrt(l)) V'``.  Eigenvalues below zero by
    rounding only are clipped to zero (the schema edge has already checked the sign).
    """
    if np.count_nonzero(weight - np.diag(np.diag(weight))) == 0:
        return np.diag(np.sqrt(np.clip(np.diag(weight), 0.0, None)))
    eigenvalues, vectors = np.linalg.eigh(weight)
    result: NDArray[np.float64] = np.sqrt(np.clip(eigenvalues, 0.0, None))[:, None] * vectors.T
    return result
