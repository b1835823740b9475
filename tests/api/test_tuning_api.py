"""Tuning options through POST /design and POST /design/sweep."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from service.pipeline.examples import load_example
from tests.references import incremental_lqr_gain


@pytest.mark.parametrize("horizon", [1, 3])
def test_riccati_terminal_weight_gives_the_lqr_gain_for_a_short_horizon(client, example, horizon):
    # Standard result: with the Riccati terminal weight and Hu = Hp the receding-horizon gain
    # is the infinite-horizon LQR gain for any horizon (scipy.linalg.solve_discrete_are).
    example["horizons"] = {"prediction": horizon, "control": horizon}
    example["weights"]["terminal"] = "riccati"
    body = client.post("/design", json=example).json()
    a, b, c = (np.array(example["model"][k]) for k in "abc")
    k = incremental_lqr_gain(a, b, c, np.diag(example["weights"]["output"]), np.diag(example["weights"]["move"]))
    np.testing.assert_allclose(np.hstack([body["gain"]["state"], body["gain"]["previous_input"]]), k, atol=1e-9)
    assert body["closed_loop"]["stable"]


def test_move_blocking_with_every_step_free_equals_no_blocking(client, example):
    free = copy.deepcopy(example)
    free["horizons"]["move_steps"] = list(range(example["horizons"]["control"]))
    one, two = client.post("/design", json=free).json(), client.post("/design", json=example).json()
    assert one["gain"] == two["gain"] and one["hessian"] == two["hessian"]


def test_move_blocking_shrinks_the_hessian(client, example):
    example["horizons"]["move_steps"] = [0, 2]
    body = client.post("/design", json=example).json()
    assert body["hessian"]["size"] == 2 * 2


@pytest.mark.parametrize(
    ("steps", "pointer"),
    [
        ([1, 2], "/horizons/move_steps/0"),
        ([0, 2, 2], "/horizons/move_steps/2"),
        ([0, 5], "/horizons/move_steps/1"),
        ([], "/horizons/move_steps"),
    ],
)
def test_bad_move_steps_name_the_step(client, example, steps, pointer):
    example["horizons"]["move_steps"] = steps
    r = client.post("/design", json=example)
    assert r.status_code == 422 and pointer in [e["pointer"] for e in r.json()["errors"]]


def test_unknown_terminal_weight_is_refused(client, example):
    example["weights"]["terminal"] = "lqr"
    r = client.post("/design", json=example)
    assert r.status_code == 422 and "/weights/terminal" in [e["pointer"] for e in r.json()["errors"]]


def test_sweep_entries_equal_separate_design_calls(client):
    sweep = load_example("sweep_request.json")
    body = client.post("/design/sweep", json=sweep)
    assert body.status_code == 200, body.text
    entries = body.json()["entries"]
    assert [e["value"] for e in entries] == sweep["values"]
    for entry, value in zip(entries, sweep["values"], strict=True):
        single = copy.deepcopy(sweep["design"])
        single["weights"]["move"][sweep["signal"]] = value
        design = client.post("/design", json=single).json()
        assert entry["status"] == "designed"
        assert entry["fingerprint"] == design["fingerprint"]
        assert entry["spectral_radius"] == design["closed_loop"]["spectral_radius"]
        assert entry["condition_number"] == design["hessian"]["condition_number"]
        assert entry["warnings"] == design["warnings"]


def test_sweeping_every_move_weight_improves_conditioning(client, example):
    # With R = r I, H = G'QG + r I has eigenvalues l_i + r, so cond = (l_max + r)/(l_min + r)
    # falls as r grows (an eigenvalue shift; linear algebra).
    sweep = {"design": example, "parameter": "move_weight", "values": [0.01, 0.1, 1.0, 10.0]}
    entries = client.post("/design/sweep", json=sweep).json()["entries"]
    conditions = [e["condition_number"] for e in entries]
    assert conditions == sorted(conditions, reverse=True) and len(set(conditions)) == 4


def test_sweep_of_a_horizon_equals_separate_design_calls(client, example):
    sweep = {"design": example, "parameter": "prediction", "values": [6, 10, 40]}
    entries = client.post("/design/sweep", json=sweep).json()["entries"]
    for entry, value in zip(entries, sweep["values"], strict=True):
        single = copy.deepcopy(example)
        single["horizons"]["prediction"] = value
        design = client.post("/design", json=single).json()
        assert entry["spectral_radius"] == design["closed_loop"]["spectral_radius"]


def test_a_failing_value_does_not_fail_the_others(client, example):
    example["model"]["c"] = [[1.0, 0.0, 0.0, 0.0]]
    example["weights"] = {"output": [1.0], "move": [0.1, 0.0]}
    sweep = {"design": example, "parameter": "move_weight", "signal": 0, "values": [0.0, 0.5]}
    entries = client.post("/design/sweep", json=sweep).json()["entries"]
    assert entries[0]["status"] == "failed" and entries[0]["problem"]["type"].endswith("numerical-problem")
    assert entries[0]["problem"]["errors"][0]["pointer"] == "/design/weights/move"
    assert entries[1]["status"] == "designed"


@pytest.mark.parametrize(
    ("edit", "pointer"),
    [
        (lambda s: s.update(signal=7), "/signal"),
        (lambda s: s.update(values=[]), "/values"),
        (lambda s: s.update(values=[-1.0]), "/values"),
        (lambda s: s.update(parameter="prediction", values=[2.5]), "/values"),
        (lambda s: s.update(parameter="prediction", values=[0]), "/values"),
        (lambda s: s.update(parameter="control", signal=0, values=[2]), "/signal"),
        (lambda s: s.update(parameter="gain"), "/parameter"),
        (lambda s: s.update(values=[0.1] * 51), "/values"),
    ],
)
def test_bad_sweeps_are_refused(client, edit, pointer):
    sweep = load_example("sweep_request.json")
    edit(sweep)
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422 and pointer in [e["pointer"] for e in r.json()["errors"]]


def test_an_invalid_base_design_is_refused_with_pointers_under_design(client, example):
    # Found by contract fuzzing: an empty weight row in the base request.
    example["weights"]["move"] = [[]]
    sweep = {"design": example, "parameter": "move_weight", "signal": 0, "values": [0.1]}
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422
    assert all(e["pointer"].startswith("/design/weights/move") for e in r.json()["errors"])


# --------------------------------------------------------------------------- robustness and runs

SCENARIO = {
    "steps": 80,
    "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}],
    "output_disturbances": [{"step": 40, "value": [0.2, 0.1]}],
}


def analysed_sweep(points=60, **extra):
    sweep = load_example("sweep_request.json")
    sweep["values"] = [0.03, 0.3, 3.0]
    sweep["design"]["analysis"] = {"frequency": True, "points": points}
    sweep.update(extra)
    return sweep


def test_sweep_entries_with_frequency_and_scenario_equal_separate_design_and_simulate_calls(client):
    sweep = analysed_sweep(scenario=SCENARIO)
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 200, r.text
    for entry, value in zip(r.json()["entries"], sweep["values"], strict=True):
        single = copy.deepcopy(sweep["design"])
        single["weights"]["move"][sweep["signal"]] = value
        design = client.post("/design", json=single).json()
        run = client.post("/simulate", json={**single, "scenario": SCENARIO}).json()
        assert entry["status"] == "designed" and entry["fingerprint"] == design["fingerprint"]
        robustness = design["robustness"]
        assert entry["peak_sensitivity"] == max(
            robustness["plant_input"]["peak_sensitivity"], robustness["plant_output"]["peak_sensitivity"]
        )
        assert entry["warnings"] == design["warnings"] == run["design"]["warnings"]
        assert entry["spectral_radius"] == design["closed_loop"]["spectral_radius"]
        assert entry["performance"] == run["performance"]
        assert entry["performance"]["outputs"][0]["rise_time"] is not None


def test_sweep_entries_without_analysis_or_scenario_have_neither(client):
    entries = client.post("/design/sweep", json=load_example("sweep_request.json")).json()["entries"]
    assert all(e["peak_sensitivity"] is None and e["performance"] is None for e in entries)


def test_a_horizon_sweep_with_a_scenario_fails_only_the_invalid_value(client, example):
    # Hu = 5 in the example: a prediction horizon of 3 is invalid for that value alone.
    sweep = {"design": example, "parameter": "prediction", "values": [3, 12], "scenario": SCENARIO}
    entries = client.post("/design/sweep", json=sweep).json()["entries"]
    assert entries[0]["status"] == "failed"
    assert entries[0]["problem"]["errors"][0]["pointer"] == "/design/horizons/control"
    single = copy.deepcopy(example)
    single["horizons"]["prediction"] = 12
    run = client.post("/simulate", json={**single, "scenario": SCENARIO}).json()
    assert entries[1]["status"] == "designed" and entries[1]["performance"] == run["performance"]


def test_sweep_runs_together_respect_the_simulation_work_cap(make_client):
    from service.pipeline.caps import simulation_work

    # The example: 4 states, 2 inputs, 2 outputs, output disturbances, Hp = 30 (Hw = 1).
    one = simulation_work(
        steps=80,
        states=4,
        true_states=4,
        inputs=2,
        outputs=2,
        disturbances=2,
        measured_disturbances=0,
        penalized_steps=30,
    )
    sweep = analysed_sweep(scenario=SCENARIO)
    client = make_client(max_simulation_work=2 * one)  # one run fits, three do not
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422 and [e["pointer"] for e in r.json()["errors"]] == ["/values"]
    sweep["values"] = sweep["values"][:2]
    assert client.post("/design/sweep", json=sweep).status_code == 200
    client = make_client(max_simulation_work=one - 1)  # not even one run
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422 and [e["pointer"] for e in r.json()["errors"]] == ["/scenario/steps"]


def test_sweep_analyses_together_respect_the_frequency_work_cap(make_client):
    from service.pipeline.caps import frequency_work

    # Controller states with the output-disturbance estimator: n + p + m = 8.
    one = frequency_work(points=60, plant_states=4, controller_states=8, inputs=2, measured=2)
    client = make_client(max_frequency_work=2 * one)
    r = client.post("/design/sweep", json=analysed_sweep())
    assert r.status_code == 422 and [e["pointer"] for e in r.json()["errors"]] == ["/values"]
    assert client.post("/design/sweep", json=analysed_sweep(values=[0.1, 1.0])).status_code == 200


@pytest.mark.parametrize(
    ("edit", "pointer"),
    [
        (lambda s: s["design"]["analysis"].update(points=5), "/design/analysis/points"),
        (
            lambda s: s["design"].update(estimator={"kind": "full_state", "measurement_noise": [1.0, 1.0]}),
            "/design/estimator/measurement_noise",
        ),
        (lambda s: s.update(scenario={"steps": 0}), "/scenario/steps"),
        (
            lambda s: s.update(scenario={"steps": 10, "setpoint_changes": [{"step": 20, "setpoint": [1.0, 0.0]}]}),
            "/scenario/setpoint_changes/0/step",
        ),
    ],
)
def test_bad_analysis_estimator_or_scenario_of_a_sweep_name_the_field(client, edit, pointer):
    sweep = analysed_sweep()
    edit(sweep)
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422 and pointer in [e["pointer"] for e in r.json()["errors"]], r.text


@pytest.mark.parametrize("scenario", [None, SCENARIO])
def test_a_sweep_converts_its_model_once(monkeypatch, scenario):
    # The base request is checked once and each value only retunes its checked inputs: the
    # model is converted to a discrete plant once, however many values (common practice of the
    # pipeline, see service/pipeline/sweep.py); the entries still equal separate calls (above).
    import service.pipeline.design as design_module
    from service.pipeline.caps import Caps
    from service.pipeline.sweep import run_sweep
    from service.schemas.sweep import SweepRequest

    calls = []
    convert = design_module.plant_arrays

    def counted(*args, **kwargs):
        calls.append(1)
        return convert(*args, **kwargs)

    monkeypatch.setattr(design_module, "plant_arrays", counted)
    sweep = analysed_sweep(scenario=scenario)
    response = run_sweep(SweepRequest.model_validate(sweep), Caps())
    assert len(response.entries) == len(sweep["values"]) > 1
    assert all(e.status == "designed" for e in response.entries)
    assert len(calls) == 1


def test_a_sweep_entry_whose_analysis_is_not_finite_fails_with_the_reports_problem():
    # The sweep reads the peak without building the whole robustness report, but a loop with a
    # number JSON cannot carry must fail as /design's report would: the same detail and field.
    from types import SimpleNamespace

    from service.errors import NumericalError
    from service.pipeline.robustness import ANALYSIS_FIELD
    from service.pipeline.sweep import _peak_sensitivity

    good = SimpleNamespace(
        sensitivity_singular_values=np.ones((3, 2)),
        complementary_singular_values=np.ones((3, 2)),
        peak_sensitivity=1.5,
        peak_complementary=1.1,
    )
    assert _peak_sensitivity(SimpleNamespace(plant_input=good, plant_output=good)) == 1.5
    bad = SimpleNamespace(**{**vars(good), "sensitivity_singular_values": np.array([[1.0, np.inf]])})
    with pytest.raises(NumericalError) as caught:
        _peak_sensitivity(SimpleNamespace(plant_input=good, plant_output=bad))
    assert caught.value.field == ANALYSIS_FIELD and "not finite" in caught.value.detail


@pytest.mark.parametrize("with_scenario", [False, True])
def test_a_sweep_in_absolute_units_equals_separate_calls_with_the_operating_point(client, with_scenario):
    # The bundled column (absolute units: model.operating_point, absolute limits and a zone in
    # % of level): each entry equals the /design (and /simulate) call of its value, fingerprint
    # included, as for a sweep in deviations.
    column = load_example("simulate_request_column.json")
    scenario = column.pop("scenario")
    sweep = {"design": column, "parameter": "move_weight", "signal": 3, "values": [0.05, 0.1, 1.0]}
    if with_scenario:
        sweep["scenario"] = scenario
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 200, r.text
    for entry, value in zip(r.json()["entries"], sweep["values"], strict=True):
        single = copy.deepcopy(column)
        single["weights"]["move"][3] = value
        design = client.post("/design", json=single).json()
        assert entry["status"] == "designed" and entry["fingerprint"] == design["fingerprint"]
        assert entry["spectral_radius"] == design["closed_loop"]["spectral_radius"]
        assert entry["warnings"] == design["warnings"]
        if with_scenario:
            run = client.post("/simulate", json={**single, "scenario": scenario}).json()
            assert entry["performance"] == run["performance"]


def test_a_sweep_whose_limit_excludes_the_operating_point_says_so(client):
    column = load_example("simulate_request_column.json")
    column.pop("scenario")
    column["limits"]["input_max"][0] = 20.0  # below the operating point's 25
    r = client.post("/design/sweep", json={"design": column, "parameter": "move_weight", "signal": 0, "values": [0.1]})
    assert r.status_code == 422, r.text
    problems = r.json()["errors"]
    assert any(
        p["pointer"].startswith("/design/limits/input_max") and "operating point" in p["detail"] for p in problems
    ), problems


def test_a_sweep_refuses_a_true_plant_with_an_operating_point_of_its_own_as_simulate_does(client):
    # Reference: the /simulate answer to the same request with the value put in (the sweep's
    # contract: each entry is what a separate call gives). The bundled column in absolute units
    # with a true plant that names an operating point of its own: /simulate refuses it at the
    # field; the sweep had run it silently around the model's point (found in an audit).
    column = load_example("simulate_request_column.json")
    scenario = column.pop("scenario")
    scenario["true_plant"]["operating_point"] = copy.deepcopy(column["model"]["operating_point"])
    single = copy.deepcopy(column)
    single["weights"]["move"][3] = 0.1
    run = client.post("/simulate", json={**single, "scenario": scenario})
    assert run.status_code == 422, run.text
    sweep = {"design": column, "parameter": "move_weight", "signal": 3, "values": [0.1], "scenario": scenario}
    r = client.post("/design/sweep", json=sweep)
    assert r.status_code == 422, r.text
    assert [p["pointer"] for p in r.json()["errors"]] == [p["pointer"] for p in run.json()["errors"]]
    assert r.json()["errors"][0]["pointer"] == "/scenario/true_plant/operating_point"
