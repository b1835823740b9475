"""Divergence told by growth: a geometric series is caught where it passes the level, a big bounded run is not.

Source: a mode z^k with |z| > 1 grows by |z| per sample (the geometric sequence, by hand).
"""

from __future__ import annotations

import numpy as np

from service.solver.evaluation.divergence import DIVERGENCE_LEVEL, divergence_onset


def test_a_geometric_run_is_caught_where_it_passes_the_level_with_its_rate():
    k = np.arange(200)
    run = np.column_stack([1.1**k, np.ones(200)])
    step, rate = divergence_onset(run, reference=1.0)
    assert step == int(np.ceil(np.log(DIVERGENCE_LEVEL) / np.log(1.1) + 1e-12))  # first 1.1^k > 1e3
    assert abs(rate - 1.1) < 1e-9


def test_a_large_but_settling_run_and_a_bounded_one_are_not_diverging():
    k = np.arange(200)
    settling = np.column_stack([5e3 * 0.9**k])  # large at first, then decays
    assert divergence_onset(settling, reference=1.0) is None
    assert divergence_onset(np.column_stack([np.sin(k)]), reference=1.0) is None
    # The same growth is not divergence when the scenario itself is that large.
    assert divergence_onset(np.column_stack([1.1 ** k[:80]]), reference=1e6) is None
