"""An 80-digit reference for the closed-loop poles of a single-input, single-output design.

Test-only.  Everything here is textbook arithmetic carried out in mpmath (80 significant
digits), independent of the service's code paths:

* the incremental MPC gain of the design notes (``H = G' Q G + R``, ``Kh`` the first row of
  ``H^-1 G' Q``, ``Kx = Kh Fx``, ``Ku = Kh Fu``), with ``Fx``, ``Fu`` and ``G`` from the
  free and step responses of ``(A, B, C)`` taken as exact data;
* the characteristic polynomial of the closed loop on ``[x; u(k-1)]`` by the matrix
  determinant lemma, ``det(zI - Aa + Ba K) = det(zI - Aa) (1 + K (zI - Aa)^-1 Ba)``, with
  ``1 + K (zI - Aa)^-1 Ba = 1 + sum_k K Aa^(k-1) Ba z^-k`` (Markov parameters) and
  ``det(zI - Aa)`` the product of the diagonal of an ``Aa`` that a permutation makes
  triangular (its graph has no cycle, which :func:`closed_loop_polynomial` checks);
* its roots by ``mpmath.polyroots``, after removing the power of ``z`` whose coefficients
  vanish to the working precision.
"""

from __future__ import annotations

import graphlib

import mpmath
import numpy as np

DIGITS = 80


def _rows(a: np.ndarray) -> list[list[tuple[int, mpmath.mpf]]]:
    """Columns' nonzeros of ``a`` by row, as exact binary fractions (double data is exact)."""
    return [[(j, mpmath.mpf(float(v))) for j, v in enumerate(row) if v != 0.0] for row in a]


def _row_times(vec: list, cols_by_row: list) -> list:
    """``vec @ A`` for a row vector ``vec`` and ``A`` given by its rows' nonzeros."""
    out = [mpmath.mpf(0)] * len(vec)
    for i, vi in enumerate(vec):
        if not vi:
            continue
        for j, aij in cols_by_row[i]:
            out[j] += vi * aij
    return out


def siso_gain(a, b, c, *, q: float, r: float, prediction: int, control: int):
    """Return ``(Kx, Ku)`` of the unconstrained incremental design in 80 digits (Hw = 1)."""
    with mpmath.workdps(DIGITS):
        n = a.shape[0]
        rows = _rows(a)
        bvec = [mpmath.mpf(float(v)) for v in b[:, 0]]
        row = [mpmath.mpf(float(v)) for v in c[0]]  # C A^i, i = 0
        free = []  # C A^i, i = 1..Hp
        markov = []  # C A^(i-1) B, i = 1..Hp
        for _ in range(prediction):
            markov.append(mpmath.fsum(x * y for x, y in zip(row, bvec, strict=True)))
            row = _row_times(row, rows)
            free.append(row)
        step = [mpmath.fsum(markov[:i]) for i in range(prediction + 1)]  # S_0..S_Hp
        g = mpmath.matrix(prediction, control)
        for i in range(1, prediction + 1):
            for j in range(control):
                if j < i:
                    g[i - 1, j] = step[i - j]
        h = g.T * g * q + mpmath.eye(control) * r
        gq = g.T * q
        e1 = mpmath.matrix([1] + [0] * (control - 1))
        y = mpmath.lu_solve(h, e1)  # H symmetric: the first row of H^-1 G' Q is (H^-1 e1)' G' Q
        first = [mpmath.fsum(y[j] * gq[j, i] for j in range(control)) for i in range(prediction)]
        kx = [mpmath.mpf(0)] * n
        for i in range(prediction):
            for s, value in enumerate(free[i]):
                if value:
                    kx[s] += first[i] * value
        ku = mpmath.fsum(first[i] * step[i + 1] for i in range(prediction))
        return kx, ku


def closed_loop_polynomial(a, b, kx, ku):
    """Coefficients (highest power first) of ``det(zI - M)`` of the loop on ``[x; u(k-1)]``."""
    n = a.shape[0]
    aa = np.block([[a, b], [np.zeros((1, n)), np.ones((1, 1))]])
    ba = np.concatenate([b[:, 0], [1.0]])
    # det(zI - Aa) is the product of the diagonal when a permutation makes Aa triangular.
    assert _triangular_after_order(aa), "Aa is not permutation-triangular"
    with mpmath.workdps(DIGITS):
        size = n + 1
        rows = _rows(aa)
        k = [*kx, ku]
        bvec = [mpmath.mpf(float(v)) for v in ba]
        # Markov parameters h_k = K Aa^(k-1) Ba, k = 1..size
        hk = []
        row = list(k)
        for _ in range(size):
            hk.append(mpmath.fsum(x * y for x, y in zip(row, bvec, strict=True)))
            row = _row_times(row, rows)
        # open-loop polynomial: prod (z - a_ii)
        poly = [mpmath.mpf(1)]
        for i in range(size):
            d = mpmath.mpf(float(aa[i, i]))
            poly = [*poly, mpmath.mpf(0)]
            for t in range(len(poly) - 1, 0, -1):
                poly[t] -= d * poly[t - 1]
        # numerator of K (zI - Aa)^-1 Ba times det: coefficient of z^(size-k) is sum_j a_j h_(k-j)
        out = list(poly)
        for kk in range(1, size + 1):
            out[kk] += mpmath.fsum(poly[j] * hk[kk - j - 1] for j in range(kk) if poly[j])
        return out


def _triangular_after_order(aa: np.ndarray) -> bool:
    """True when a permutation makes ``aa`` triangular: its graph of off-diagonal entries has no cycle."""
    graph = {i: {int(j) for j in np.nonzero(aa[i])[0] if j != i} for i in range(aa.shape[0])}
    try:
        tuple(graphlib.TopologicalSorter(graph).static_order())
    except graphlib.CycleError:
        return False
    return True


def closed_loop_roots(coefficients, *, vanish: float = 1e-60):
    """Roots of the polynomial, the trailing coefficients below ``vanish`` (relative) taken as zero roots.

    Returns ``(roots, zeros, largest_dropped)``: roots of the remaining polynomial, the number of
    roots at zero and the largest dropped coefficient relative to the largest coefficient.
    """
    with mpmath.workdps(DIGITS):
        size = max(abs(x) for x in coefficients)
        zeros = 0
        dropped = mpmath.mpf(0)
        coeffs = list(coefficients)
        while coeffs and abs(coeffs[-1]) <= vanish * size:
            dropped = max(dropped, abs(coeffs[-1]) / size)
            coeffs.pop()
            zeros += 1
        roots = mpmath.polyroots(coeffs[::-1], maxsteps=200, extraprec=200, asc=True) if len(coeffs) > 1 else []
        return [complex(z) for z in roots], zeros, float(dropped)
