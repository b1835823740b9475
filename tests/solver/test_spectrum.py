"""Extreme eigenvalues against numpy's symmetric eigensolver."""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.design.spectrum import extreme_eigenvalues


@pytest.mark.parametrize("spread", [1e2, 1e9])
def test_extreme_eigenvalues_of_a_known_spectrum(rng, spread):
    # Reference: the eigenvalues the matrix was built from, and numpy.linalg.eigvalsh.
    size = 60
    q, _ = np.linalg.qr(rng.normal(size=(size, size)))
    values = np.geomspace(1.0, spread, size)
    h = (q * values) @ q.T
    h = 0.5 * (h + h.T)
    low, high = extreme_eigenvalues(h)
    # Backward stability: each eigenvalue is within about n eps |H| of the truth (Weyl).
    floor = 10 * size * np.finfo(float).eps * spread
    assert low == pytest.approx(1.0, rel=1e-9, abs=floor)
    assert high == pytest.approx(spread, rel=1e-11)
    reference = np.linalg.eigvalsh(h)
    assert (low, high) == pytest.approx((reference[0], reference[-1]), rel=1e-9, abs=floor)
