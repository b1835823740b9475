"""Reference computations the tests compare movecast against, each written once.

Every function here is built from a library outside the project (scipy) and a textbook
formula, named beside it; a test imports the reference instead of writing it again.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = [
    "current_kalman_gain",
    "horizon_gain",
    "incremental_lqr",
    "incremental_lqr_gain",
    "incremental_system",
    "prediction_by_sums",
    "receding_horizon_radius",
]


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


def current_kalman_gain(a, c, process_noise, measurement_noise):
    """Steady-state Kalman filter in current-estimator form: ``(L, P)``.

    ``P`` the stabilizing solution of ``P = A P A' - A P C' (C P C' + R)^-1 C P A' + Q`` by
    ``scipy.linalg.solve_discrete_are(A', C', Q, R)`` (the dual of the control equation), and
    ``L = P C' (C P C' + R)^-1`` (Kalman 1960; the predictor gain is ``A L``).
    """
    p = scipy.linalg.solve_discrete_are(a.T, c.T, process_noise, measurement_noise)
    s = c @ p @ c.T + measurement_noise
    return np.linalg.solve(s, c @ p).T, p


def prediction_by_sums(a, b, c, prediction, control, b_disturbance=None):
    """``(Fx, Fu, G, Fd)`` of the incremental predictor, written from the sums of the formulation.

    For ``i = 1..Hp``: ``z(k+i) = C A^i x + S_i u(k-1) + sum_{j<min(i,Hu)} S_{i-j} du(k+j)
    [+ C sum_{t<i} A^t Bd d]``, with the step-response blocks ``S_i = C sum_{t<i} A^t B``
    (textbook predictive control, incremental form); matrix powers, no recursion shared with
    the service.
    """
    n, m = b.shape
    p = c.shape[0]
    step = [np.zeros((p, m))] + [
        c @ sum(np.linalg.matrix_power(a, t) @ b for t in range(i)) for i in range(1, prediction + 1)
    ]
    fx = np.vstack([c @ np.linalg.matrix_power(a, i) for i in range(1, prediction + 1)])
    fu = np.vstack(step[1:])
    g = np.zeros((prediction * p, control * m))
    for i in range(1, prediction + 1):
        for j in range(min(i, control)):
            g[(i - 1) * p : i * p, j * m : (j + 1) * m] = step[i - j]
    fd = None
    if b_disturbance is not None:
        fd = np.vstack(
            [c @ sum(np.linalg.matrix_power(a, t) @ b_disturbance for t in range(i)) for i in range(1, prediction + 1)]
        )
    return fx, fu, g, fd


def horizon_gain(g, output_weight, move_weight, prediction, control):
    """``Kh``: the first ``m`` rows of ``(G'QG + R)^-1 G'Q`` with ``Q = I (x) diag(q)``, ``R = I (x) diag(r)``."""
    q = np.kron(np.eye(prediction), np.diag(output_weight))
    r = np.kron(np.eye(control), np.diag(move_weight))
    m = len(move_weight)
    return np.linalg.solve(g.T @ q @ g + r, g.T @ q)[:m]
