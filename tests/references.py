"""Reference computations the tests compare movecast against, each written once.

Every function here is built from a library outside the project (scipy) and a textbook
formula, named beside it; a test imports the reference instead of writing it again.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = ["incremental_lqr", "incremental_lqr_gain", "incremental_system", "receding_horizon_radius"]


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


def receding_horizon_radius(a, b, c, q, r, *, prediction, control):
    """Spectral radius of the unconstrained receding-horizon loop, built from scratch.

    The finite-horizon least-squares problem on the incremental system
    (:func:`incremental_system`): ``min sum_{i=1..Hp} |z(k+i)|^2_Q + sum_{j<Hu} |du(k+j)|^2_R``
    with ``du`` zero after ``Hu`` moves, predictions by plain recursion of the state
    equation, solved by ``numpy.linalg.lstsq`` on the stacked weighted residuals (the textbook
    least-squares form of finite-horizon linear-quadratic control, common practice); the
    first move ``du = -K xi`` closes the loop ``xi(k+1) = (Ai - Bi K) xi``, whose largest
    eigenvalue modulus (``numpy.linalg.eigvals``) is returned.
    """
    ai, bi, ci = incremental_system(a, b, c)
    size, m = bi.shape
    wq, wr = _psd_root(q), _psd_root(r)
    after = [bi]  # after[s]: the state s + 1 steps after a unit move
    for _ in range(prediction - 1):
        after.append(ai @ after[-1])
    free, forced, power = [], [], np.eye(size)
    for i in range(1, prediction + 1):  # z(k+i); the move du(k+j) acts from step j + 1 on
        power = ai @ power
        free.append(wq @ ci @ power)
        row = [wq @ ci @ after[i - j - 1] if i > j else np.zeros((ci.shape[0], m)) for j in range(control)]
        forced.append(np.hstack(row))
    g = np.vstack([*forced, np.kron(np.eye(control), wr)])
    f = np.vstack([*free, np.zeros((control * m, size))])
    moves = np.linalg.lstsq(g, -f, rcond=None)[0]  # du over the horizon = moves @ xi
    gain = -moves[:m]
    return float(np.abs(np.linalg.eigvals(ai - bi @ gain)).max())


def _psd_root(weight):
    """The symmetric square root of a positive-semidefinite weight, by ``numpy.linalg.eigh``."""
    values, vectors = np.linalg.eigh(np.atleast_2d(weight))
    return vectors @ np.diag(np.sqrt(np.clip(values, 0.0, None))) @ vectors.T
