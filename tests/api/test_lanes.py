"""Solver lanes: requests are sent by their estimated work; light ones never wait behind heavy ones."""

from __future__ import annotations

import math
import os
import threading
import time

import numpy as np
import pytest

from service.api.compute import (
    Lanes,
    SolverPool,
    default_solver_processes,
    solver_lanes,
    solver_pool,
)
from service.api.settings import HEAVY_NICENESS, Settings
from service.errors import HeavyLaneFull
from service.pipeline.caps import HEAVY_WORK, design_work, request_work
from service.schemas.design import DesignRequest
from tests.api.conftest import assert_problem
from tests.conftest import random_design_request


def test_the_example_is_light_and_the_large_benchmark_case_heavy(example, rng):
    # The large case of tests/bench/bench_design.py: 200 states, 20 x 20, Hp 200, Hu 50.
    assert request_work(DesignRequest.model_validate(example)) < HEAVY_WORK
    large = random_design_request(rng, states=200, signals=20, prediction=200, control=50)
    assert request_work(DesignRequest.model_validate(large)) > HEAVY_WORK


def test_comparisons_and_identifications_have_a_work_estimate_that_grows_with_their_sizes():
    from service.pipeline import identify
    from service.pipeline.caps import IDENTIFY_WORK_PER_PARAMETER
    from service.pipeline.examples import load_example
    from service.schemas.compare import CompareRequest
    from service.schemas.identify import IdentifyRequest

    assert IDENTIFY_WORK_PER_PARAMETER == identify.WORK_PER_PARAMETER
    compare = load_example("compare_request.json")
    work = request_work(CompareRequest.model_validate(compare))
    assert 0 < work < HEAVY_WORK  # the bundled comparison stays light
    scenario = {**load_example("simulate_request.json")["scenario"], "true_plant": None}
    run = request_work(CompareRequest.model_validate({**compare, "scenario": {**scenario, "steps": 100}}))
    longer = request_work(CompareRequest.model_validate({**compare, "scenario": {**scenario, "steps": 10_000}}))
    assert work < run < longer
    test = load_example("identify_request.json")
    work = request_work(IdentifyRequest.model_validate(test))
    twice = {**test, "data": {tag: values * 2 for tag, values in test["data"].items()}}
    assert 0 < work < request_work(IdentifyRequest.model_validate(twice))
    subspace = {**test, "structure": "subspace", "pairs": [], "integrating": []}
    assert request_work(IdentifyRequest.model_validate(subspace)) > 0


def test_design_work_grows_with_every_size():
    base = {"states": 10, "inputs": 3, "outputs": 3, "prediction": 40, "control": 8}
    work = design_work(**base)
    for name in base:
        assert design_work(**{**base, name: 2 * base[name]}) > work


def test_default_light_lane_has_one_process_per_core():
    # per core of the affinity mask, within the CPU quota of the control group (test_cpu_limit.py)
    from service.api.compute import cgroup_cpu_limit

    limit = cgroup_cpu_limit()
    cores = len(os.sched_getaffinity(0))
    assert default_solver_processes() == (cores if limit is None else max(1, min(cores, math.ceil(limit))))


def _blas_threads() -> int:
    from threadpoolctl import threadpool_info

    return max(pool["num_threads"] for pool in threadpool_info())


def test_the_light_lane_runs_one_blas_thread_whatever_the_environment(monkeypatch):
    # The heavy lane takes the operator's OMP_NUM_THREADS; the light lane always one thread,
    # read back inside the solver process with threadpoolctl.
    from service.api.compute import solver_lanes
    from service.api.settings import Settings

    monkeypatch.setenv("OMP_NUM_THREADS", "2")
    lanes = solver_lanes(Settings(solver_processes=1, heavy_solver_processes=1, heavy_queue=7))
    light, _ = lanes.light.run(_blas_threads, (), deadline=time.monotonic() + 60, seconds=60)
    heavy, _ = lanes.heavy.run(_blas_threads, (), deadline=time.monotonic() + 60, seconds=60)
    assert light == 1
    assert heavy == 2


@pytest.mark.parametrize("request_name", ["design_request.json", "design_request_robustness.json"])
def test_both_lanes_give_the_same_answer(make_client, request_name):
    # Every request heavy, then every request light: byte-identical bodies.
    from service.pipeline.examples import load_example

    body = load_example(request_name)
    heavy = make_client(heavy_work=1.0).post("/design", json=body)
    light = make_client(heavy_work=1e30).post("/design", json=body)
    assert heavy.status_code == light.status_code == 200
    assert heavy.content == light.content


@pytest.mark.skipif(not hasattr(os, "nice"), reason="niceness is a POSIX notion")
def test_by_default_the_heavy_lane_runs_at_a_higher_niceness_than_the_light_one():
    # os.nice(0) reads a process's niceness without changing it (POSIX nice()).
    settings = Settings()
    lanes = solver_lanes(settings)
    here = os.nice(0)
    if here + 1 > 19:
        pytest.skip("the tests already run at the highest niceness")
    deadline = time.monotonic() + 30
    light, _ = lanes.light.run(os.nice, (0,), deadline=deadline, seconds=30)
    heavy, _ = lanes.heavy.run(os.nice, (0,), deadline=deadline, seconds=30)
    assert settings.heavy_niceness > 0
    assert light == here
    assert heavy == min(19, here + settings.heavy_niceness)
    zero = solver_lanes(Settings(heavy_niceness=0))
    assert zero.heavy.run(os.nice, (0,), deadline=deadline, seconds=30)[0] == here


def test_a_light_call_is_answered_while_the_heavy_lane_is_busy():
    heavy = SolverPool(processes=1, niceness=HEAVY_NICENESS)
    lanes = Lanes(light=SolverPool(processes=1), heavy=heavy, heavy_work=100.0)
    try:
        lanes.start()
        heavy_pool, lane = lanes.pick(1e9)
        assert lane == "heavy"
        outcome: list[BaseException] = []

        def hold_heavy() -> None:
            try:
                heavy_pool.run(time.sleep, (60.0,), deadline=time.monotonic() + 20, seconds=20)
            except BaseException as exc:  # the deadline stops it
                outcome.append(exc)

        busy = threading.Thread(target=hold_heavy)
        busy.start()
        while heavy_pool._idle.qsize():  # the only heavy solver is taken
            time.sleep(0.01)
        light_pool, lane = lanes.pick(1.0)
        assert lane == "light"
        assert light_pool.run(abs, (-3,), deadline=time.monotonic() + 15, seconds=15)[0] == 3
        assert busy.is_alive()  # answered while the heavy call still runs
        busy.join()
        assert outcome and type(outcome[0]).__name__ == "TimeLimitExceeded"
    finally:
        lanes.light.close()
        lanes.heavy.close()


def test_a_full_heavy_lane_turns_more_away_at_once():
    pool = SolverPool(processes=1, max_waiting=0)
    try:
        busy = threading.Thread(
            target=pool.run, args=(time.sleep, (1.0,)), kwargs={"deadline": time.monotonic() + 30, "seconds": 30}
        )
        busy.start()
        while pool._idle.qsize():
            time.sleep(0.01)
        with pytest.raises(HeavyLaneFull):
            pool.run(abs, (-1,), deadline=time.monotonic() + 30, seconds=30)
        busy.join()
        assert pool.run(abs, (-4,), deadline=time.monotonic() + 30, seconds=30)[0] == 4
    finally:
        pool.close()


def test_a_full_heavy_lane_is_a_503_problem(make_client, example):
    # Every request heavy, room for one to wait; the heavy solver and the waiting place are
    # taken by calls made here on the app's own heavy pool.
    client = make_client(heavy_work=1.0, heavy_queue=1)
    settings = client.app.state.settings
    pool = solver_pool(processes=1, lane="heavy", niceness=settings.heavy_niceness, max_waiting=1)
    held = [
        threading.Thread(
            target=pool.run, args=(time.sleep, (2.0,)), kwargs={"deadline": time.monotonic() + 60, "seconds": 60}
        )
        for _ in range(2)
    ]
    held[0].start()
    while pool._idle.qsize():  # the heavy solver is taken
        time.sleep(0.01)
    held[1].start()
    while pool._waiting < 1:  # the waiting place is taken
        time.sleep(0.01)
    body = assert_problem(client.post("/design", json=example), 503, "busy")
    assert "Retry later" in body["detail"]
    for thread in held:
        thread.join()
    assert client.post("/design", json=example).status_code == 200


def test_random_requests_sort_by_their_size(rng):
    small = random_design_request(rng, states=10, signals=3, prediction=40, control=8)
    medium = random_design_request(rng, states=50, signals=10, prediction=100, control=20)
    works = [request_work(DesignRequest.model_validate(r)) for r in (small, medium)]
    assert works[0] < works[1] < HEAVY_WORK
    assert np.isfinite(works).all()


@pytest.mark.parametrize("name", ["design_request.json", "design_request_transfer_matrix.json", "step_response"])
def test_every_model_kind_has_a_work_estimate(example, name):
    from service.pipeline.caps import model_sizes
    from service.pipeline.examples import load_example

    if name == "step_response":  # a 2 x 2 table (invented numbers), one pair integrating
        pair = {"coefficients": [0.0, 0.4, 0.7, 0.9, 1.0]}
        body = {
            **example,
            "model": {
                "kind": "step_response",
                "responses": [[pair, None], [pair, {**pair, "integrating": True}]],
                "sample_time": 1.0,
            },
            "weights": {"output": [1.0, 1.0], "move": [0.1, 0.1]},
        }
    else:
        body = load_example(name)
    request = DesignRequest.model_validate(body)
    states, inputs, outputs = model_sizes(request.model)
    assert states >= 1 and inputs >= 1 and outputs >= 1
    if name == "step_response":
        assert (states, inputs, outputs) == (5 + 6, 2, 2)  # one register per input, its longest table
    assert 0 < request_work(request) < HEAVY_WORK


def test_sizes_beyond_every_cap_are_heavy_not_an_error(example):
    # A dead time of 1e300 time units at a sample time of 1e-300: no finite sample count.
    body = {
        **example,
        "model": {
            "kind": "transfer_matrix",
            "elements": [[{"gain": 1.0, "time_constants": [1.0], "dead_time": 1e300}]],
            "sample_time": 1e-300,
        },
        "weights": {"output": [1.0], "move": [0.1]},
    }
    assert request_work(DesignRequest.model_validate(body)) > HEAVY_WORK
    huge = {**example, "horizons": {"prediction": 10**200, "control": 10**200}}
    assert request_work(DesignRequest.model_validate(huge)) > HEAVY_WORK


def test_a_request_beyond_the_caps_is_still_a_422(client, example):
    example["horizons"] = {"prediction": 10**200, "control": 10**200}
    assert client.post("/design", json=example).status_code == 422


def test_the_caps_are_built_once_per_settings_and_a_copy_builds_its_own():
    from service.api.settings import Settings

    settings = Settings(max_states=40)
    caps = settings.caps()
    assert caps.max_states == 40 and settings.caps() is caps
    smaller = settings.model_copy(update={"max_states": 7})  # copies private attributes too
    assert smaller.caps().max_states == 7
    assert settings.caps() is caps and caps.max_states == 40
