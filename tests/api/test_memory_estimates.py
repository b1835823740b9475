"""Every request's memory estimate bounds what it really holds, and a request past the cap is a 422.

The real peak is measured with ``tracemalloc`` (Python's own allocation tracer; numpy reports
its array buffers to it), around the whole of a request's work in one process: check, compute,
the answer and its JSON text.  It is a measurement of memory, not of time.  The sizes are
small so that the test is quick; each kind of request is measured at a few sizes, the bundled
examples among them, and with the parts that hold the most (long runs, limits, a true plant,
noise, swept horizons, many items, long records, the subspace method's Hankel matrices).
"""

from __future__ import annotations

import copy
import gc
import tracemalloc
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from pydantic import ValidationError

from service.api.compute import Lanes, SolverPool, solver_lanes
from service.api.settings import Settings
from service.pipeline.caps import Caps
from service.pipeline.compare import run_compare
from service.pipeline.design import run_design, run_design_json
from service.pipeline.examples import load_example
from service.pipeline.export import run_export
from service.pipeline.identify import run_identify
from service.pipeline.memory import HEAVY_MEMORY_BYTES, request_memory
from service.pipeline.simulate import run_simulation
from service.pipeline.sweep import run_sweep
from service.schemas.batch import BatchItemResult, BatchRequest, BatchResponse
from service.schemas.compare import CompareRequest
from service.schemas.design import DesignRequest
from service.schemas.export import ExportRequest
from service.schemas.identify import IdentifyRequest
from service.schemas.simulate import SimulateRequest
from service.schemas.sweep import SweepRequest
from tests.api.conftest import assert_problem
from tests.conftest import random_design_request

CAPS = Caps()


def traced_peak(work: Callable[[], Any]) -> int:
    """Peak bytes allocated while ``work`` runs, above what was allocated before (tracemalloc)."""
    gc.collect()
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        before = tracemalloc.get_traced_memory()[0]
        work()
        return tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()


def assert_bounded(request, work: Callable[[], Any]) -> None:
    estimate = request_memory(request)
    assert estimate is not None and estimate.fields
    work()  # imports and caches once, outside the measurement
    peak = traced_peak(work)
    assert peak <= estimate.bytes, f"measured {peak:,} bytes above the estimate {estimate.bytes:,.0f}"
    print(f"{type(request).__name__}: peak {peak / 2**20:.2f} MiB, estimate {estimate.bytes / 2**20:.2f} MiB")


def _simulate(steps: int, *, prediction: int = 30, control: int = 5, example: str = "simulate_request.json"):
    body = load_example(example)
    body["scenario"]["steps"] = steps
    body["horizons"] = {**body["horizons"], "prediction": prediction, "control": control}
    return SimulateRequest.model_validate(body)


@pytest.mark.parametrize(("n", "signals", "prediction", "control"), [(4, 2, 30, 5), (10, 10, 150, 50), (5, 30, 60, 20)])
def test_design_estimate_bounds_its_peak(n, signals, prediction, control):
    body = random_design_request(
        np.random.default_rng(n), states=n, signals=signals, prediction=prediction, control=control
    )
    request = DesignRequest.model_validate(body)
    assert_bounded(request, lambda: run_design_json(request, CAPS))


def test_design_estimate_with_frequency_analysis_bounds_its_peak():
    request = DesignRequest.model_validate(load_example("design_request_robustness.json"))
    assert_bounded(request, lambda: run_design_json(request, CAPS))


@pytest.mark.parametrize(
    ("steps", "prediction", "control", "example"),
    [
        (240, 30, 5, "simulate_request.json"),  # true plant and noise
        (5000, 30, 5, "simulate_request.json"),
        (1500, 120, 30, "simulate_request.json"),
        (400, 30, 5, "simulate_request_limits.json"),  # the move QP and the limit report
        (300, 40, 6, "simulate_request_column.json"),  # zones, input targets, absolute units
    ],
)
def test_simulate_estimate_bounds_its_peak(steps, prediction, control, example):
    request = _simulate(steps, prediction=prediction, control=control, example=example)
    assert_bounded(request, lambda: run_simulation(request, CAPS).model_dump_json())


@pytest.mark.parametrize("parameter", ["prediction", "move_weight"])
def test_sweep_estimate_bounds_its_peak(parameter):
    body = load_example("sweep_request.json")
    body["parameter"] = parameter
    body["signal"] = None
    body["values"] = [10.0, 40.0, 80.0] if parameter == "prediction" else [0.1, 1.0, 10.0]
    body["scenario"] = {**load_example("simulate_request.json")["scenario"], "steps": 600}
    body["design"] = {k: v for k, v in load_example("simulate_request.json").items() if k != "scenario"}
    request = SweepRequest.model_validate(body)
    assert_bounded(request, lambda: run_sweep(request, CAPS).model_dump_json())


def test_batch_estimate_bounds_its_peak():
    items = []
    for i, (n, signals, prediction, control) in enumerate([(4, 2, 30, 5), (8, 6, 80, 20), (6, 4, 120, 30)] * 2):
        body = random_design_request(
            np.random.default_rng(i), states=n, signals=signals, prediction=prediction, control=control
        )
        items.append({"id": f"grade-{i}", "request": body})
    batch = BatchRequest.model_validate({"items": items})

    def answer() -> str:  # what the route keeps: every item's answer until the batch is answered
        results = []
        for item in batch.items:
            response = run_design(DesignRequest.model_validate(item.request), CAPS)
            results.append(
                BatchItemResult(id=item.id, status="designed", fingerprint="", result=response, problem=None)
            )
        return BatchResponse(items=results).model_dump_json()

    assert_bounded(batch, answer)


def test_compare_and_export_estimates_bound_their_peaks():
    compare = CompareRequest.model_validate(load_example("compare_request.json"))
    assert_bounded(compare, lambda: run_compare(compare, CAPS).model_dump_json())
    export = ExportRequest.model_validate(load_example("export_request.json"))
    assert_bounded(export, lambda: str(run_export(export, CAPS, "2026-12-02")))


@pytest.mark.parametrize("repeat", [1, 3])
@pytest.mark.parametrize("structure", ["first_order_dead_time", "subspace"])
def test_identify_estimate_bounds_its_peak(repeat, structure):
    body = load_example("identify_request.json")
    body["data"] = {tag: [v if v is not None else 0.0 for v in values] * repeat for tag, values in body["data"].items()}
    if structure == "subspace":
        body.update(structure="subspace", pairs=[], integrating=[], outlier_limit=None, block_rows=10)
        body.pop("validation", None)
    request = IdentifyRequest.model_validate(body)
    assert_bounded(request, lambda: run_identify(request, CAPS).model_dump_json())


def test_a_long_identification_record_stays_within_its_estimate():
    """Found in an audit: the impulse response behind the fit's starts had one coefficient a lag up
    to a quarter of the record, so its regressors grew with the square of the samples: one pair of
    8000 samples peaked at 367 MB against an estimate of 42 MB (and took 10 s).  An invented heater's
    steam to outlet pressure, 1.5 Pa per kg/h, 4 min lag, 5 min dead time, white noise."""
    rng = np.random.default_rng(1)
    n = 8000
    steam = np.zeros(n)
    k = 10
    while k < n:  # a new level every 15 to 45 samples
        held = int(rng.integers(15, 45))
        steam[k : k + held] = rng.choice([-1.0, 1.0]) * rng.uniform(400.0, 800.0)
        k += held
    pressure = np.zeros(n)
    a = np.exp(-1.0 / 4.0)  # the zero-order-hold recursion of 1.5/(4 s + 1), input 5 samples late
    for i in range(5, n - 1):
        pressure[i + 1] = a * pressure[i] + 1.5 * (1.0 - a) * steam[i - 5]
    request = IdentifyRequest.model_validate(
        {
            "sample_time": 1.0,
            "inputs": ["steam"],
            "outputs": ["pressure"],
            "max_dead_time": 20.0,
            "data": {
                "steam": (1.4e4 + steam).tolist(),
                "pressure": (1.2e5 + pressure + 30.0 * rng.standard_normal(n)).tolist(),
            },
        }
    )
    assert_bounded(request, lambda: run_identify(request, CAPS).model_dump_json())


# ------------------------------------------------------------------------- the cap and the lanes


@pytest.mark.parametrize(
    ("path", "body", "pointer"),
    [
        (
            "/simulate",
            lambda: {
                **load_example("simulate_request.json"),
                "scenario": {**load_example("simulate_request.json")["scenario"], "steps": 20000},
            },
            "/scenario/steps",
        ),
        (
            "/design",
            lambda: {**load_example("design_request.json"), "horizons": {"prediction": 2000, "control": 300}},
            "/horizons/prediction",
        ),
        (
            "/design/sweep",
            lambda: {
                **load_example("sweep_request.json"),
                "parameter": "prediction",
                "signal": None,
                "values": [1500.0],
            },
            "/values",
        ),
        (
            "/identify",
            lambda: {
                **load_example("identify_request.json"),
                "data": {t: v * 2 for t, v in load_example("identify_request.json")["data"].items()},
            },
            "/data",
        ),
    ],
)
def test_a_request_past_the_memory_cap_is_a_422_naming_the_fields_that_drive_it(make_client, path, body, pointer):
    client = make_client(max_request_memory_bytes=2 * 1024 * 1024)
    problem = assert_problem(client.post(path, json=body()), 422, "invalid-request")
    pointers = [e["pointer"] for e in problem["errors"]]
    assert pointer in pointers, pointers
    assert "MiB" in problem["errors"][0]["detail"] and "2 MiB" in problem["errors"][0]["detail"]


def test_a_batch_past_the_memory_cap_is_a_422_naming_its_items(make_client, example):
    client = make_client(max_request_memory_bytes=8 * 1024 * 1024)
    long = {**example, "horizons": {"prediction": 400, "control": 10}}
    items = [{"id": f"op-{i}", "request": long} for i in range(40)]
    problem = assert_problem(client.post("/design/batch", json={"items": items}), 422, "invalid-request")
    assert [e["pointer"] for e in problem["errors"]] == ["/items"]
    assert client.post("/design/batch", json={"items": items[:1]}).status_code == 200


def test_a_request_that_holds_much_runs_in_the_heavy_lane():
    light, heavy = SolverPool(processes=1), SolverPool(processes=1)
    lanes = Lanes(light=light, heavy=heavy, heavy_work=1e12)
    assert lanes.pick(10.0, HEAVY_MEMORY_BYTES + 1) == (heavy, "heavy")
    assert lanes.pick(10.0, HEAVY_MEMORY_BYTES) == (light, "light")
    long_run = _simulate(100_000)
    assert request_memory(long_run).bytes > HEAVY_MEMORY_BYTES > request_memory(_simulate(240)).bytes
    light.close()
    heavy.close()


def test_the_heavy_lanes_memory_threshold_is_a_setting():
    assert solver_lanes(Settings()).heavy_memory == HEAVY_MEMORY_BYTES
    lanes = solver_lanes(Settings(heavy_memory_bytes=8 * 1024 * 1024))
    assert lanes.heavy_memory == 8 * 1024 * 1024
    assert lanes.pick(10.0, 8 * 1024 * 1024 + 1)[1] == "heavy"
    assert lanes.pick(10.0, 8 * 1024 * 1024)[1] == "light"
    with pytest.raises(ValidationError):
        Settings(heavy_memory_bytes=1000)  # below a mebibyte: a typo, refused at start-up


def test_the_bundled_examples_fit_the_default_cap_and_the_defaults_refuse_issue_15s_design():
    for name, model in [
        ("simulate_request.json", SimulateRequest),
        ("simulate_request_column.json", SimulateRequest),
        ("sweep_request.json", SweepRequest),
        ("compare_request.json", CompareRequest),
        ("identify_request.json", IdentifyRequest),
    ]:
        assert request_memory(model.model_validate(load_example(name))).bytes < CAPS.max_request_memory_bytes, name
    # the example plant's longest run the step cap allows fits the memory cap too
    assert request_memory(_simulate(CAPS.max_simulation_steps)).bytes < CAPS.max_request_memory_bytes
    big = copy.deepcopy(load_example("design_request.json"))
    big["horizons"] = {"prediction": 2000, "control": 2000}
    assert request_memory(DesignRequest.model_validate(big)).bytes > CAPS.max_request_memory_bytes
