"""Schema-level checks of the /simulate request: shared design fields, defaults, caps, messages."""

from __future__ import annotations

import copy
import dataclasses

import pytest

from service.errors import InvalidRequest
from service.pipeline.caps import Caps, simulation_work
from service.pipeline.examples import load_example
from service.pipeline.simulate_checks import check_simulate_request
from service.schemas.design import DesignRequest
from service.schemas.simulate import SimulateRequest


@pytest.fixture
def body():
    return copy.deepcopy(load_example("simulate_request.json"))


def problems_of(body, caps=Caps()):
    with pytest.raises(InvalidRequest) as caught:
        check_simulate_request(SimulateRequest.model_validate(body), caps)
    return {p.pointer: p.detail for p in caught.value.problems}


def test_the_request_is_a_design_request_with_a_scenario():
    # One definition of the design fields: /design and /simulate cannot drift apart (the
    # estimator is one of them: /design analyses the loop with it).
    assert issubclass(SimulateRequest, DesignRequest)
    design, simulate = DesignRequest.model_fields, SimulateRequest.model_fields
    assert set(simulate) - set(design) == {"scenario"} and "estimator" in design
    for name, field in design.items():
        assert simulate[name].annotation == field.annotation, name


def test_the_example_passes_and_defaults_fill_in(body):
    inputs = check_simulate_request(SimulateRequest.model_validate(body), Caps())
    assert inputs.kind == "output_disturbance" and inputs.disturbance == "output"
    assert inputs.steps == 240 and inputs.true_plant is not None and inputs.true_plant.states == 4
    assert [e.step for e in inputs.setpoints] == [10]
    del body["estimator"]
    body["scenario"] = {"steps": 5}
    request = SimulateRequest.model_validate(body)
    assert request.estimator.kind == "per_output" and request.scenario.initial.state is None  # the default (issue 10)
    plain = check_simulate_request(request, Caps())
    assert plain.noise_std is None and plain.seed == 0 and plain.true_plant is None


def test_kalman_takes_the_output_disturbance_model_unless_told(body):
    body["estimator"] = {"kind": "kalman"}
    assert check_simulate_request(SimulateRequest.model_validate(body), Caps()).disturbance == "output"
    body["estimator"] = {"kind": "kalman", "disturbance": "input", "disturbance_noise": [1.0, 1.0]}
    assert check_simulate_request(SimulateRequest.model_validate(body), Caps()).disturbance == "input"
    body["estimator"] = {"kind": "kalman", "disturbance": "input", "disturbance_noise": [1.0, 1.0, 1.0]}
    assert "/estimator/disturbance_noise" in problems_of(body)


def test_messages_say_what_is_expected(body):
    body["scenario"]["setpoint_changes"][0]["step"] = 240
    body["scenario"]["output_disturbances"][0]["value"] = [0.3]
    found = problems_of(body)
    assert "0 to 239" in found["/scenario/setpoint_changes/0/step"]
    assert "1 values, expected 2" in found["/scenario/output_disturbances/0/value"]


def test_the_suggested_step_count_is_the_largest_that_fits_the_work_cap(body):
    caps = dataclasses.replace(Caps(), max_simulation_work=40_000_000)
    body["scenario"]["steps"] = 5000
    detail = problems_of(body, caps)["/scenario/steps"]
    most = int(detail.split("Simulate at most ")[1].split(" steps")[0].replace(",", ""))
    body["scenario"]["steps"] = most
    for change in ("setpoint_changes", "input_disturbances", "output_disturbances"):
        body["scenario"][change] = [e for e in body["scenario"][change] if e["step"] < most]
    check_simulate_request(SimulateRequest.model_validate(body), caps)
    body["scenario"]["steps"] = most + 1
    assert "/scenario/steps" in problems_of(body, caps)


def test_work_grows_with_steps_and_with_the_horizon():
    sizes = {"states": 4, "true_states": 4, "inputs": 2, "outputs": 2, "disturbances": 2, "measured_disturbances": 0}
    one = simulation_work(steps=1, penalized_steps=30, **sizes)
    assert simulation_work(steps=1000, penalized_steps=30, **sizes) == 1000 * one
    assert simulation_work(steps=1, penalized_steps=300, **sizes) > one
    bigger = dict(sizes, states=200, true_states=200)
    assert simulation_work(steps=1, penalized_steps=30, **bigger) > 10 * (one - 30_000)
