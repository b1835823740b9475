"""The plant cache: a plant seen before is answered from memory, with exactly the same numbers."""

from __future__ import annotations

import numpy as np
import pytest

from service.pipeline.caps import Caps
from service.pipeline.design import run_design_json
from service.schemas.design import DesignRequest
from service.solver.memo import array_key, plant_cache
from service.solver.models.properties import plant_properties
from service.solver.models.zeros import plant_zeros


def _plant(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = np.diag(rng.uniform(0.2, 0.9, 4))
    return a, rng.normal(size=(4, 2)), rng.normal(size=(2, 4))


def test_a_plant_seen_before_is_a_hit_and_any_changed_bit_is_a_miss():
    calls: list[int] = []

    @plant_cache
    def trace(a: np.ndarray) -> float:
        calls.append(1)
        return float(np.trace(a))

    a = np.eye(3)
    assert trace(a) == trace(a.copy()) == 3.0
    assert len(calls) == 1 and trace.cache_info()["hits"] == 1  # type: ignore[attr-defined]
    b = a.copy()
    b[2, 2] = np.nextafter(1.0, 2.0)  # one bit of one entry
    trace(b)
    assert len(calls) == 2
    # the same bytes in another shape or dtype are another plant
    assert array_key(np.zeros((2, 3))) != array_key(np.zeros((3, 2)))
    assert array_key(np.zeros(4)) != array_key(np.zeros(4, dtype=np.float32))


def test_cached_results_are_read_only_and_equal_to_a_cold_computation():
    a, b, c = _plant(1)
    plant_properties.cache_clear()  # type: ignore[attr-defined]
    first = plant_properties(a, b, c)
    again = plant_properties(a.copy(), b.copy(), c.copy())
    assert again is first
    with pytest.raises(ValueError):
        first.steady_state.gain[0, 0] = 1.0
    with pytest.raises(ValueError):
        plant_zeros(a, b, c).transmission[...] = 0.0
    cold = plant_properties.__wrapped__(a, b, c)  # type: ignore[attr-defined]
    np.testing.assert_array_equal(cold.steady_state.gain, first.steady_state.gain)
    np.testing.assert_array_equal(cold.poles, first.poles)


def test_a_design_answered_from_the_cache_is_the_same_answer_byte_for_byte(example):
    request = DesignRequest.model_validate(example)
    plant_properties.cache_clear()  # type: ignore[attr-defined]
    plant_zeros.cache_clear()  # type: ignore[attr-defined]
    cold = run_design_json(request, Caps()).body
    warm = run_design_json(request, Caps()).body
    assert plant_properties.cache_info()["hits"] >= 1  # type: ignore[attr-defined]
    assert warm == cold
