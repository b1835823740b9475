"""Where a run starts to grow without bound, told by its growth rate rather than by overflow.

A linear loop with a pole outside the unit circle grows like ``rho^k`` once that mode is
excited; long before double precision overflows (near 1e308) its numbers are meaningless for
a plant.  With the envelope ``E(k) = max_i |s_i(k)|`` of the run's signals in spans (outputs
and inputs scaled by their spans; the caller divides a signal without a span by its natural
size, :mod:`service.solver.estimation.sizes`, so that no unit decides) and the scenario's own
size ``ref`` (the largest setpoint, disturbance or initial value in the same sizes, at least
1), the run is called diverging at the first
step ``k`` with

    E(k) > DIVERGENCE_LEVEL * ref      and      (E(k) / E(k - w))^(1/w) > 1 + GROWTH_RATE

(a run a thousand times larger than anything the scenario asked for, and still growing by
more than 0.1 % per sample over the window ``w``).  A bounded run never meets the first
condition; a large but settling one fails the second.  Both levels are common practice.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["DIVERGENCE_LEVEL", "GROWTH_RATE", "divergence_onset"]

#: How many times the scenario's own size a diverging run must have reached.
DIVERGENCE_LEVEL = 1e3
#: Smallest growth per sample of the envelope (relative) that counts as growing.
GROWTH_RATE = 1e-3


def divergence_onset(signals: NDArray[np.float64], *, reference: float) -> tuple[int, float] | None:
    """Return the step at which a run diverges and its growth per sample, or ``None``.

    Parameters
    ----------
    signals : ndarray, shape (steps, k)
        The run's outputs and inputs in spans (finite rows only).
    reference : float
        The scenario's own size in spans (at least 1 is used).

    Returns
    -------
    (int, float) or None
        The first step that meets both conditions of the module notes, and the envelope's
        growth factor per sample there; ``None`` for a run that does not diverge.
    """
    steps = signals.shape[0]
    if steps < 2 or signals.shape[1] == 0:
        return None
    envelope = np.max(np.abs(signals), axis=1)
    level = DIVERGENCE_LEVEL * max(1.0, float(reference))
    window = max(5, steps // 20)
    for k in np.flatnonzero(envelope > level):
        back = max(0, int(k) - window)
        if back == k or envelope[back] <= 0.0:
            continue
        rate = float((envelope[k] / envelope[back]) ** (1.0 / (k - back)))
        if rate > 1.0 + GROWTH_RATE:
            return int(k), rate
    return None
