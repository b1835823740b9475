"""Reference computations the tests compare movecast against, each written once.

Every function here is built from a library outside the project (scipy) and a textbook
formula, named beside it; a test imports the reference instead of writing it again.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = ["incremental_lqr", "incremental_lqr_gain", "incremental_system"]


def incremental_system(a, b, c):
    """The incremental system on ``xi = [x; u(k-1)]`` with the move ``du`` as input.

    ``xi(k+1) = [[A, B], [0, I]] xi(k) + [B; I] du(k)`` and ``z = [C 0] xi`` (the standard
    velocity form of offset-free predictive control).

    Returns
    -------
    ai : ndarray, shape (n+m, n+m)
    bi : ndarray, shape (n+m, m)
    ci : ndarray, shape (p, n+m)
    """
    n, m = b.shape
    ai = np.block([[a, b], [np.zeros((m, n)), np.eye(m)]])
    bi = np.vstack([b, np.eye(m)])
    ci = np.hstack([c, np.zeros((c.shape[0], m))])
    return ai, bi, ci


def incremental_lqr(a, b, c, q, r):
    """Infinite-horizon LQR gain of the incremental system, stage cost ``|C x|^2_Q + |du|^2_R``.

    Reference: ``scipy.linalg.solve_discrete_are`` for the Riccati solution ``P``, then the
    textbook gain ``K = (R + B' P B)^-1 B' P A`` of discrete linear-quadratic regulation.

    Returns
    -------
    gain : ndarray, shape (m, n+m)
    ai, bi : ndarray
        The incremental system (:func:`incremental_system`).
    """
    ai, bi, ci = incremental_system(a, b, c)
    p = scipy.linalg.solve_discrete_are(ai, bi, ci.T @ q @ ci, r)
    return np.linalg.solve(r + bi.T @ p @ bi, bi.T @ p @ ai), ai, bi


def incremental_lqr_gain(a, b, c, q, r):
    """The gain of :func:`incremental_lqr` alone."""
    return incremental_lqr(a, b, c, q, r)[0]
