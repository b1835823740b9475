"""Balanced truncation of the stable part of a discrete model, with its error bound.

The model ``x(k+1) = A x(k) + B u(k)``, ``y(k) = C x(k)`` is split additively into its
stable part (eigenvalues with ``|z| < 1``) and the rest (integrators and anything on or
outside the unit circle), which is kept whole:

1. an ordered real Schur form ``A = Z T Z'`` puts the stable eigenvalues first; the
   Sylvester equation ``T11 X - X T22 + T12 = 0`` decouples the two blocks (Golub & Van
   Loan, *Matrix Computations*, 4th ed., 2013, section 7.6.3), so the transfer function is
   ``G = Gs + Gu`` exactly;
2. the stable part is balanced by the square-root method (Laub, Heath, Paige & Ward, IEEE
   Trans. Automat. Control 32(2), 1987, doi:10.1109/TAC.1987.1104549): with Gramian factors
   ``Wc = Lc Lc'`` and ``Wo = Lo Lo'`` of the discrete Lyapunov equations and the singular
   value decomposition ``Lo' Lc = U S V'``, the kept states are ``T = Lc V1 S1^(-1/2)``,
   ``Ti = S1^(-1/2) U1' Lo'``;
3. truncating the Hankel singular values ``sigma_(r+1) .. sigma_n`` changes the transfer
   function by at most ``2 (sigma_(r+1) + ... + sigma_n)`` at every frequency (the H-infinity
   norm; Enns 1984, Glover 1984; the discrete-time case: Al-Saggaf & Franklin, Int. J.
   Control 46(2), 1987, doi:10.1080/00207178708933925).  The steady-state gain may move by
   as much as the bound: it is not preserved by truncation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

__all__ = ["BalancedTruncation", "balanced_truncation"]

#: Eigenvalues with ``|z| < 1 - STABLE_MARGIN`` count as stable.
STABLE_MARGIN = 1e-8


@dataclass(frozen=True)
class BalancedTruncation:
    """A reduced model and what was kept.

    Attributes
    ----------
    a : ndarray, shape (r + nu, r + nu)
    b : ndarray, shape (r + nu, m)
    c : ndarray, shape (p, r + nu)
        The reduced model: ``r`` balanced stable states, then the ``nu`` states of the part
        kept whole (its eigenvalues on or outside the unit circle).
    hankel_singular_values : ndarray, shape (ns,)
        Of the stable part, largest first.
    kept : int
        ``r``, the stable states kept.
    unstable : int
        ``nu``, the states on or outside the unit circle, all kept.
    error_bound : float
        ``2 (sigma_(r+1) + ... + sigma_ns)``: a bound on the largest gain of the difference of
        the two transfer functions at any frequency, in the units of ``C`` per unit of ``B``.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    hankel_singular_values: NDArray[np.float64]
    kept: int
    unstable: int
    error_bound: float


def _factor(gramian: NDArray[np.float64]) -> NDArray[np.float64]:
    """``L`` with ``L L' = W`` for a symmetric positive semidefinite ``W`` (eigenvalues clipped at 0)."""
    values, vectors = scipy.linalg.eigh((gramian + gramian.T) / 2.0)
    factor: NDArray[np.float64] = vectors * np.sqrt(np.clip(values, 0.0, None))
    return factor


def balanced_truncation(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    states: int | None = None,
    tolerance: float | None = None,
) -> BalancedTruncation:
    """Reduce the stable part of ``(A, B, C)`` by balanced truncation.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    states : int, keyword-only
        At most this many states in the reduced model in all (the part on or outside the
        unit circle included).
    tolerance : float, keyword-only
        Keep the fewest stable states whose error bound is at most this.  With both options
        the smaller model that meets both is not always possible: ``states`` wins.  With
        neither, only states with a zero Hankel singular value (relative ``1e-12``) go.

    Returns
    -------
    BalancedTruncation

    Notes
    -----
    See the module docstring (Schur split, square-root balancing, the ``2 sum sigma`` bound).
    """
    n = a.shape[0]
    assert a.shape == (n, n) and b.shape[0] == n and c.shape[1] == n
    t, z, ns = scipy.linalg.schur(a, output="real", sort=lambda x: abs(x) < 1.0 - STABLE_MARGIN)
    ns = int(ns)
    bt, ct = z.T @ b, c @ z
    t11, t12, t22 = t[:ns, :ns], t[:ns, ns:], t[ns:, ns:]
    x = scipy.linalg.solve_sylvester(t11, -t22, -t12) if ns and ns < n else np.zeros((ns, n - ns))
    bs = bt[:ns] - x @ bt[ns:]
    cs, cu, bu = ct[:, :ns], ct[:, ns:] + ct[:, :ns] @ x, bt[ns:]
    if ns == 0:
        return BalancedTruncation(a.copy(), b.copy(), c.copy(), np.zeros(0), 0, n, 0.0)
    wc = scipy.linalg.solve_discrete_lyapunov(t11, bs @ bs.T)
    wo = scipy.linalg.solve_discrete_lyapunov(t11.T, cs.T @ cs)
    lc, lo = _factor(wc), _factor(wo)
    u, sigma, vt = scipy.linalg.svd(lo.T @ lc)
    tails = np.concatenate((np.cumsum(sigma[::-1])[::-1], [0.0]))  # tails[r] = sum_{k>=r} sigma_k
    positive = int(np.sum(sigma > 1e-12 * (sigma[0] if sigma.size else 0.0)))
    r = positive
    if tolerance is not None:
        r = min(r, next(k for k in range(ns + 1) if 2.0 * tails[k] <= tolerance))
    if states is not None:
        r = min(r, max(states - (n - ns), 0))
    r = min(r, positive)
    root = np.sqrt(sigma[:r])
    right = lc @ vt[:r].T / root
    left = (u[:, :r].T @ lo.T) / root[:, None]
    ar = left @ t11 @ right
    a_out = scipy.linalg.block_diag(ar, t22)
    b_out = np.vstack((left @ bs, bu))
    c_out = np.hstack((cs @ right, cu))
    return BalancedTruncation(
        a=a_out,
        b=b_out,
        c=c_out,
        hankel_singular_values=sigma,
        kept=r,
        unstable=n - ns,
        error_bound=float(2.0 * tails[r]),
    )
