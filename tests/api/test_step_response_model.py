"""The step_response model kind, accepted wherever a model is: /design, /simulate, batch, sweep."""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
import scipy.signal

from service.pipeline.examples import load_example
from service.solver.models.transfer import TransferElement, transfer_matrix_model
from tests.api.conftest import assert_problem

COEFFICIENTS = 60  # longer than the prediction horizon (40) of the example


def _element(spec: dict[str, Any] | None) -> TransferElement | None:
    if spec is None:
        return None
    return TransferElement(
        spec["gain"],
        tuple(spec.get("time_constants", ())),
        spec.get("dead_time", 0.0),
        None,
        spec.get("integrating", False),
    )


def _table(grid: list[list[dict[str, Any] | None]], sample_time: float) -> list[list[dict[str, Any] | None]]:
    """Step responses of each element by scipy.signal.dlsim of its exact sampled model (the reference)."""
    rows: list[list[dict[str, Any] | None]] = []
    for row in grid:
        out: list[dict[str, Any] | None] = []
        for spec in row:
            el = _element(spec)
            if el is None:
                out.append(None)
                continue
            sampled = transfer_matrix_model([[el]], sample_time=sample_time)
            system = (sampled.a, sampled.b, sampled.c, sampled.d, sample_time)
            _, y, _ = scipy.signal.dlsim(system, np.ones((COEFFICIENTS + 1, 1)))
            out.append({"coefficients": y[1:, 0].tolist(), "integrating": el.integrating})
        rows.append(out)
    return rows


@pytest.fixture
def pair() -> tuple[dict[str, Any], dict[str, Any]]:
    """The bundled transfer-matrix request and the same plant as a step-response table."""
    request = load_example("design_request_transfer_matrix.json")
    model = request["model"]
    table = {
        "kind": "step_response",
        "sample_time": model["sample_time"],
        "responses": _table(model["elements"], model["sample_time"]),
        "disturbance_responses": _table(model["disturbance_elements"], model["sample_time"]),
        "inputs": model["inputs"],
        "outputs": model["outputs"],
        "disturbances": model["disturbances"],
    }
    stepped = copy.deepcopy(request)
    stepped["model"] = table
    return request, stepped


def test_design_from_the_table_equals_the_transfer_matrix_design_over_the_horizon(client, pair) -> None:
    # The prediction matrix G holds the step-response coefficients 1..Hp (the formulation in the
    # design notes), so the setpoint gain Kr and the Hessian depend only on them: equal designs.
    transfer, stepped = pair
    a = client.post("/design", json=transfer)
    b = client.post("/design", json=stepped)
    assert a.status_code == 200 and b.status_code == 200, b.text
    ra, rb = a.json(), b.json()
    np.testing.assert_allclose(rb["gain"]["setpoint"], ra["gain"]["setpoint"], rtol=1e-8, atol=1e-10)
    assert rb["hessian"]["condition_number"] == pytest.approx(ra["hessian"]["condition_number"], rel=1e-8)
    # Steady-state gain and ramp rate from the table's settled value and last slope.
    gains = rb["plant"]["steady_state_gain"]
    last = stepped["model"]["responses"][0][0]["coefficients"][-1]
    assert gains["values"][0][0] == pytest.approx(last, rel=1e-9)
    assert last == pytest.approx(0.8 * (1 - np.exp(-(COEFFICIENTS - 1.5) / 12.0)), rel=1e-9)  # the lag, sampled
    assert rb["plant"]["ramp_rate"]["values"][1][1] == pytest.approx(-0.05, rel=1e-9)
    # The state count: 60 register states per column (3), one level integrator.
    assert rb["plant"]["states"] == 3 * COEFFICIENTS + 1
    assert (
        "steam_valve(k-60)" in rb["gain"]["labels"]["state"]
        and "vessel_level integrator" in rb["gain"]["labels"]["state"]
    )


def test_reduction_reports_its_bound_and_keeps_the_integrator(client, pair) -> None:
    _, stepped = pair
    exact = client.post("/design", json=stepped).json()["plant"]
    stepped["model"]["reduction"] = {"states": 16}
    r = client.post("/design", json=stepped)
    assert r.status_code == 200, r.text
    plant = r.json()["plant"]
    report = plant["reduction"]
    assert report["states_before"] == 3 * COEFFICIENTS + 1
    assert report["states_after"] == plant["states"] == 16 and report["integrators_kept"] == 1
    hsv = report["hankel_singular_values"]
    assert report["error_bound"] == pytest.approx(2 * sum(hsv[15:]), rel=1e-9)
    # The bound covers every frequency, zero included: the steady-state gains move by less.
    gap = np.abs(np.array(plant["steady_state_gain"]["values"][0]) - exact["steady_state_gain"]["values"][0])
    assert gap.max() <= report["error_bound"]
    # The integrator is kept whole: the level's ramp rate is unchanged.
    assert plant["ramp_rate"]["values"][1][1] == pytest.approx(-0.05, rel=1e-6)


def test_simulate_batch_and_sweep_take_the_table(client, pair) -> None:
    transfer, stepped = pair
    for request in (transfer, stepped):
        request["estimator"] = {"kind": "input_disturbance"}  # the level integrates
    scenario = {"steps": 80, "setpoint_changes": [{"step": 5, "setpoint": [1.0, 0.0]}]}
    both = [client.post("/simulate", json={**r, "scenario": scenario}) for r in (transfer, stepped)]
    assert all(x.status_code == 200 for x in both), both[1].text
    # Same coefficients over the run's first 60 samples: the same first moves.
    ua, ub = (np.array(x.json()["inputs"]) for x in both)
    np.testing.assert_allclose(ub[:20], ua[:20], rtol=1e-6, atol=1e-8)
    true_plant = {**transfer, "scenario": {**scenario, "true_plant": stepped["model"]}}
    assert client.post("/simulate", json=true_plant).status_code == 200
    batch = client.post("/design/batch", json={"items": [{"id": "table", "request": stepped}]})
    assert batch.status_code == 200 and batch.json()["items"][0]["status"] == "designed", batch.text
    sweep = client.post(
        "/design/sweep", json={"design": stepped, "parameter": "move_weight", "signal": 0, "values": [0.1, 1.0]}
    )
    assert sweep.status_code == 200, sweep.text


def test_bad_tables_name_the_field(client, pair) -> None:
    _, stepped = pair
    ragged = copy.deepcopy(stepped)
    ragged["model"]["responses"][1].append(None)
    body = assert_problem(client.post("/design", json=ragged), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/model/responses/1"
    empty = copy.deepcopy(stepped)
    empty["model"]["responses"][0][1]["coefficients"] = []
    body = assert_problem(client.post("/design", json=empty), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/model/responses/0/1/coefficients"
    too_few = copy.deepcopy(stepped)
    too_few["model"]["reduction"] = {"states": 0}
    assert_problem(client.post("/design", json=too_few), 422, "invalid-request")
    long = copy.deepcopy(stepped)
    long["model"]["responses"][0][0]["coefficients"] = [1.0] * 600
    body = assert_problem(client.post("/design", json=long), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/model/responses/0/0/coefficients"
    assert "states" in body["errors"][0]["detail"]


@pytest.mark.parametrize("value", [1e308, -1e308])
def test_a_reduction_that_overflows_is_a_422_naming_the_responses(client, pair, value) -> None:
    # Found in an audit of hostile input: a coefficient of 1e308 overflowed the Gramians of the
    # balanced truncation (their Lyapunov equations hold its square), a 500; without a
    # reduction the same table was already a 422.
    _, stepped = pair
    stepped["model"]["reduction"] = {"tolerance": 1e-3}
    stepped["model"]["responses"][0][0]["coefficients"][1] = value
    r = client.post("/design", json=stepped)
    assert r.status_code == 422, r.text
    assert [e["pointer"] for e in r.json()["errors"]] == ["/model/responses"]
    del stepped["model"]["reduction"]
    assert client.post("/design", json=stepped).status_code == 422
