"""Input/output pairs whose moves never reach the output inside the prediction horizon.

A pair ``(i, j)`` with dead time ``d`` samples has a step response ``S_ij(k) = 0`` for
``k <= d``.  When ``d >= Hp`` the prediction over the horizon does not depend on the moves of
input ``j`` at output ``i``, so the controller never acts on that pair (with every pair so,
all gains are zero).  The delay is the index of the first nonzero Markov parameter
``C_i A^(k-1) B_j``; by the Cayley-Hamilton theorem a pair whose first ``n`` Markov
parameters vanish never responds at all, so the search stops there.

The horizon should cover the dead time plus the settling of the dominant time constant,
about four time constants for a first-order response to settle within 2 % (textbook, e.g.
Seborg, Edgar & Mellichamp, *Process Dynamics and Control*, ch. 5).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.solver.design.closed_loop import Diagnostic
from service.solver.design.controller import ControllerDesign

__all__ = ["UnreachedPair", "dead_time_warnings", "unreached_pairs"]

#: A Markov parameter counts as zero below this fraction of the pair's largest one found.
ZERO_RESPONSE = 1e-12


@dataclass(frozen=True)
class UnreachedPair:
    """A pair whose moves reach the output only after the prediction horizon.

    Attributes
    ----------
    output, input : int
    delay : int
        Samples before the output first responds to a step of the input.
    """

    output: int
    input: int
    delay: int


def unreached_pairs(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], design: ControllerDesign
) -> list[UnreachedPair]:
    """Return the pairs that respond, but only after the design's prediction horizon.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        The design's model.
    design : ControllerDesign

    Returns
    -------
    list of UnreachedPair
        By output, then input.
    """
    pred = design.prediction
    step = pred.step_response  # (Hp+1, p, m)
    hp = pred.prediction
    markov = np.diff(step, axis=0)  # C A^(k-1) B, k = 1..Hp
    scale = np.abs(markov).max(axis=0)  # (p, m)
    silent = scale == 0.0
    if not silent.any():
        return []
    n = a.shape[0]
    row = pred.free_state[-c.shape[0] :]  # C A^Hp, the last block row of Fx
    found: dict[tuple[int, int], int] = {}
    for k in range(hp + 1, hp + n + 1):
        value = row @ b  # C A^(k-1) B
        for i, j in zip(*np.nonzero(silent & (np.abs(value) > 0.0)), strict=True):
            found.setdefault((int(i), int(j)), k)
        if all((i, j) in found for i, j in zip(*np.nonzero(silent), strict=True)):
            break
        row = row @ a
    return [UnreachedPair(i, j, d) for (i, j), d in sorted(found.items())]


def _settling_samples(a: NDArray[np.float64]) -> int:
    """About four dominant time constants, in samples (0 without a stable pole)."""
    moduli = np.abs(scipy.linalg.eigvals(a, check_finite=False)) if a.size else np.zeros(0)
    stable = moduli[(moduli < 1.0 - 1e-9) & (moduli > 0.0)]
    if stable.size == 0:
        return 0
    tau = -1.0 / math.log(float(stable.max()))
    return math.ceil(4.0 * tau - 1e-6)  # 40.0000001 is 40


def dead_time_warnings(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    design: ControllerDesign,
    *,
    input_labels: Sequence[str],
    output_labels: Sequence[str],
) -> list[Diagnostic]:
    """Return ``dead_time_beyond_horizon`` when some pair responds only after the horizon."""
    pairs = unreached_pairs(a, b, c, design)
    if not pairs:
        return []
    hp = design.prediction.prediction
    longest = max(pair.delay for pair in pairs)
    settle = _settling_samples(a)
    named = "; ".join(
        f"{output_labels[p.output]} first responds to {input_labels[p.input]} {p.delay} samples after a move"
        for p in pairs
    )
    everything = len(pairs) == c.shape[0] * b.shape[1] and not np.abs(design.gain.horizon).any()
    tail = " No output sees any move, so every gain is zero." if everything else ""
    return [
        Diagnostic(
            "dead_time_beyond_horizon",
            f"The prediction horizon of {hp} samples ends before the dead time is over: {named}.{tail} "
            f"The controller never acts on those pairs. The prediction horizon must exceed the longest "
            f"dead time plus the settling of the dominant time constant (about {settle} samples here): "
            f"use a prediction horizon of at least {longest + settle}.",
        )
    ]
