"""Tuning options through POST /design and POST /design/sweep."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import scipy.linalg

from service.schemas.examples import load_example


def lqr_gain(a, b, c, q, r):
    """Infinite-horizon LQR gain on [x; u(k-1)] (reference: scipy.linalg.solve_discrete_are)."""
    n, m = b.shape
    ai = np.block([[a, b], [np.zeros((m, n)), np.eye(m)]])
    bi = np.vstack([b, np.eye(m)])
    ci = np.hstack([c, np.zeros((c.shape[0], m))])
    p = scipy.linalg.solve_discrete_are(ai, bi, ci.T @ q @ ci, r)
    return np.linalg.solve(r + bi.T @ p @ bi, bi.T @ p @ ai)


@pytest.mark.parametrize("horizon", [1, 3])
def test_riccati_terminal_weight_gives_the_lqr_gain_for_a_short_horizon(client, example, horizon):
    # Standard result: with the Riccati terminal weight and Hu = Hp the receding-horizon gain
    # is the infinite-horizon LQR gain for any horizon (scipy.linalg.solve_discrete_are).
    example["horizons"] = {"prediction": horizon, "control": horizon}
    example["weights"]["terminal"] = "riccati"
    body = client.post("/design", json=example).json()
    a, b, c = (np.array(example["model"][k]) for k in "abc")
    k = lqr_gain(a, b, c, np.diag(example["weights"]["output"]), np.diag(example["weights"]["move"]))
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
    [([1, 2], "/horizons/move_steps/0"), ([0, 2, 2], "/horizons/move_steps/2"), ([0, 5], "/horizons/move_steps/1"), ([], "/horizons/move_steps")],
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
        (lambda s: s.update(values=[-1.0]), ""),
        (lambda s: s.update(parameter="prediction", values=[2.5]), ""),
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
