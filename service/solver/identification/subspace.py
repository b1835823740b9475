"""A MIMO state-space model from plant-test data by a subspace method (PO-MOESP).

The past-output MOESP algorithm (Verhaegen, "Identification of the deterministic part of MIMO
state space models given in innovations form from input-output data", Automatica 30(1),
1994, doi:10.1016/0005-1098(94)90230-5; also Verhaegen & Verdult, *Filtering and System
Identification*, Cambridge 2007, section 9.6), own implementation:

1. block Hankel matrices of ``s`` block rows of the past and future inputs ``Up, Uf`` and
   outputs ``Yp, Yf`` (``j = N - 2 s + 1`` columns), stacked as ``[Uf; Up; Yp; Yf]``;
2. its LQ factorization (``scipy.linalg.qr`` of the transpose); the block ``L32`` that maps
   the past (instrument) onto the future outputs, with the future inputs projected out,
   has the column space of the extended observability matrix ``Gamma_s``: the singular
   value decomposition ``L32 = U S V'`` gives ``Gamma_s = U1 S1^(1/2)``, and the order is
   where the singular values drop (the largest ratio ``sigma_i / sigma_(i+1)`` among the
   significant ones, unless the order is given);
3. ``C`` is the first block row of ``Gamma_s``, ``A`` solves the shift equation
   ``Gamma_s[:-p] A = Gamma_s[p:]`` in least squares;
4. with ``A`` and ``C`` fixed, the output is linear in ``B``, the initial state and an output
   offset (``D = 0``: a sampled plant does not act within the sample), so they come from
   one linear least squares problem.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.signal
from numpy.typing import NDArray

__all__ = ["SubspaceModel", "block_hankel", "choose_order", "moesp"]

Array = NDArray[np.float64]


@dataclass(frozen=True)
class SubspaceModel:
    """``x(k+1) = A x(k) + B u(k)``, ``y(k) = C x(k) + offset`` fitted to the data.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    offset : ndarray, shape (p,)
        The outputs at the inputs' reference (``u = 0``) at rest.
    initial_state : ndarray, shape (n,)
    singular_values : ndarray
        Of ``L32``, largest first (the order was read from them).
    order : int
    block_rows : int
    fitted : ndarray, shape (N, p)
    """

    a: Array
    b: Array
    c: Array
    offset: Array
    initial_state: Array
    singular_values: Array
    order: int
    block_rows: int
    fitted: Array


def block_hankel(signal: Array, rows: int, columns: int, start: int = 0) -> Array:
    """Block Hankel matrix with ``rows`` block rows: block ``(i, k)`` is ``signal[start + i + k]``.

    Parameters
    ----------
    signal : ndarray, shape (N, q)
    rows, columns : int
    start : int

    Returns
    -------
    ndarray, shape (rows * q, columns)
    """
    q = signal.shape[1]
    out = np.empty((rows * q, columns))
    for i in range(rows):
        out[i * q : (i + 1) * q] = signal[start + i : start + i + columns].T
    return out


def choose_order(singular_values: Array, *, largest: int) -> int:
    """The order where the singular values drop most (largest ``sigma_i / sigma_(i+1)``).

    Only values above ``1e-10 sigma_1`` count; at most ``largest``.
    """
    s = singular_values[: largest + 1]
    significant = int(np.sum(s > 1e-10 * s[0])) if s.size and s[0] > 0 else 0
    if significant <= 1:
        return max(significant, 1)
    ratios = s[: significant - 1] / s[1:significant]
    if significant <= largest:
        return significant if ratios.max() < 10.0 else int(np.argmax(ratios)) + 1
    return int(np.argmax(ratios[:largest])) + 1


def _output_regressors(a: Array, c: Array, u: Array) -> Array:
    """Columns of the outputs' dependence on ``vec(B)`` (row-major entries), ``x0`` and the offsets."""
    n, m, p, count = a.shape[0], u.shape[1], c.shape[0], u.shape[0]
    columns = []
    for r in range(n):
        e = np.zeros((n, 1))
        e[r, 0] = 1.0
        for col in range(m):
            _, y, _ = scipy.signal.dlsim((a, e, c, np.zeros((p, 1)), 1.0), u[:, col : col + 1])
            columns.append(y.reshape(-1))
    power = np.eye(n)
    free = np.empty((count, p, n))
    for k in range(count):
        free[k] = c @ power
        power = a @ power
    for r in range(n):
        columns.append(free[:, :, r].reshape(-1))
    for i in range(p):
        ones = np.zeros((count, p))
        ones[:, i] = 1.0
        columns.append(ones.reshape(-1))
    return np.column_stack(columns)


def moesp(
    u: Array,
    y: Array,
    *,
    block_rows: int,
    order: int | None = None,
    largest_order: int = 12,
) -> SubspaceModel:
    """Fit a state-space model to input-output data by PO-MOESP.

    Parameters
    ----------
    u : ndarray, shape (N, m)
        Inputs, as deviations from a reference (the first sample, say).
    y : ndarray, shape (N, p)
        Outputs in engineering units (no missing values).
    block_rows : int, keyword-only
        ``s``, more than the order; ``N`` must exceed ``2 s (m + p + 1)``.
    order : int, keyword-only
        The model order; default: chosen from the singular values.
    largest_order : int, keyword-only
        Largest order the automatic choice considers (at most ``s p``).

    Returns
    -------
    SubspaceModel
    """
    count, m = u.shape
    p = y.shape[1]
    s = block_rows
    j = count - 2 * s + 1
    assert j > 2 * s * (m + p), (count, s)
    uc, yc = u - u.mean(axis=0), y - y.mean(axis=0)
    stacked = np.vstack(
        (block_hankel(uc, s, j, s), block_hankel(uc, s, j, 0), block_hankel(yc, s, j, 0), block_hankel(yc, s, j, s))
    ) / np.sqrt(j)
    r = scipy.linalg.qr(stacked.T, mode="r")[0]
    lower = r.T
    mu, mw = s * m, s * (m + p)
    l32 = lower[mu + mw :, mu : mu + mw]
    left, sigma, _ = scipy.linalg.svd(l32, full_matrices=False)
    n = order if order is not None else choose_order(sigma, largest=min(largest_order, s * p - 1))
    n = int(min(max(n, 1), s * p - 1))
    gamma = left[:, :n] * np.sqrt(sigma[:n])
    c = gamma[:p]
    a, *_ = scipy.linalg.lstsq(gamma[:-p], gamma[p:])
    theta, *_ = scipy.linalg.lstsq(_output_regressors(a, c, u), y.reshape(-1))
    b = theta[: n * m].reshape(n, m)
    x0 = theta[n * m : n * m + n]
    offset = theta[n * m + n :]
    _, fitted, _ = scipy.signal.dlsim((a, b, c, np.zeros((p, m)), 1.0), u, x0=x0)
    return SubspaceModel(
        a=a,
        b=b,
        c=c,
        offset=offset,
        initial_state=x0,
        singular_values=sigma,
        order=n,
        block_rows=s,
        fitted=fitted + offset,
    )
