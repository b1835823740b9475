"""POST /design/sweep of the input weight (``parameter: "input_weight"``, ``weights.input``).

Our own invented plant: a reboiler with a trim valve, sampled every minute, in absolute units
around an operating point (steam about 12 t/h, a bypass valve at 40 %, the trim valve at 50 %;
the outlet temperature about 180 degC, the drum pressure about 350 kPa).  Three inputs for two
outputs: one input combination leaves both outputs unchanged at steady state (the spare
direction), and an input target on the trim valve fixes it.  The runs close the loop on a
true plant with 20 % more gain.

References beside each check:

- every entry against a separate POST /design (and, with a scenario, POST /simulate) with
  that value put in the request by hand;
- the settled inputs of a run against the steady state written out here: the equality-
  constrained least squares ``min |u - u_t|^2_S`` subject to the true plant's steady-state
  gain ``G (u - u_0) = r - z_0``, solved from its KKT system with ``numpy.linalg.solve``.
  With a uniform gain error the controller's own target problem has the same row space, so
  an offset-free loop (a bias per output; common practice) settles there; as the
  trim valve's weight grows it settles on its input target, the other two inputs then
  solving ``G u = r`` alone (``numpy.linalg.solve`` of the 2 x 2 system).
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from tests.api.conftest import invalid_fields

A = [[0.9, 0.0, 0.0], [0.0, 0.8, 0.1], [0.0, 0.0, 0.7]]
B = [[0.25, -0.03, 0.0], [0.8, 0.0, -0.12], [0.0, 0.05, 0.09]]
C = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]
U0 = [12.0, 40.0, 50.0]  # steam t/h, bypass %, trim valve %
Z0 = [180.0, 350.0]  # outlet temperature degC, drum pressure kPa
GAIN_ERROR = 1.2
TRIM = 2  # the spare valve, whose input weight is swept
INPUT_WEIGHT = [0.1, 0.002, 0.01]
TARGETS = [12.0, 40.0, 42.0]  # the trim valve is to settle at 42 %, the others at their operating point
SETPOINT = [183.0, 352.0]

DESIGN: dict[str, Any] = {
    "model": {
        "kind": "state_space",
        "a": A,
        "b": B,
        "c": C,
        "sample_time": 1.0,
        "inputs": [
            {"name": "steam_flow", "unit": "t/h"},
            {"name": "bypass_valve", "unit": "%"},
            {"name": "trim_valve", "unit": "%"},
        ],
        "outputs": [{"name": "outlet_temperature", "unit": "degC"}, {"name": "drum_pressure", "unit": "kPa"}],
        "operating_point": {"inputs": U0, "outputs": Z0},
    },
    "horizons": {"prediction": 30, "control": 5},
    "weights": {"output": [1.0, 0.2], "move": [0.5, 0.05, 0.05], "input": INPUT_WEIGHT},
}
TRUE_PLANT = {
    "kind": "state_space",
    "a": A,
    "b": (GAIN_ERROR * np.array(B)).tolist(),
    "c": C,
    "sample_time": 1.0,
}
SCENARIO = {
    "steps": 300,
    "input_targets": TARGETS,
    "setpoint_changes": [{"step": 5, "setpoint": SETPOINT}],
    "true_plant": TRUE_PLANT,
}


def _design(*, input_weight: Any = INPUT_WEIGHT, terminal: str | None = None) -> dict[str, Any]:
    design = copy.deepcopy(DESIGN)
    if input_weight is None:
        del design["weights"]["input"]
    else:
        design["weights"]["input"] = copy.deepcopy(input_weight)
    if terminal is not None:
        design["weights"]["terminal"] = terminal
        design["horizons"] = {"prediction": 10, "control": 10}
    return design


def _sweep(client, design, values, *, signal=None, scenario=None) -> list[dict[str, Any]]:
    body: dict[str, Any] = {"design": design, "parameter": "input_weight", "signal": signal, "values": values}
    if scenario is not None:
        body["scenario"] = scenario
    r = client.post("/design/sweep", json=body)
    assert r.status_code == 200, r.text
    answer = r.json()
    assert answer["parameter"] == "input_weight" and answer["signal"] == signal
    assert [e["value"] for e in answer["entries"]] == values
    return answer["entries"]


def _assert_designed_as(entry: dict[str, Any], alone: dict[str, Any]) -> None:
    assert entry["status"] == "designed" and entry["problem"] is None
    assert entry["fingerprint"] == alone["fingerprint"]
    assert entry["spectral_radius"] == alone["closed_loop"]["spectral_radius"]
    assert entry["stable"] == alone["closed_loop"]["stable"]
    assert entry["condition_number"] == alone["hessian"]["condition_number"]
    assert entry["warnings"] == alone["warnings"]


def _assert_failed_as(entry: dict[str, Any], refused: Any) -> None:
    """A failed entry gives the problem the separate call answers, its fields under /design."""
    assert refused.status_code == 422, refused.text
    problem = refused.json()
    assert entry["status"] == "failed" and entry["spectral_radius"] is None and entry["performance"] is None
    assert entry["problem"]["type"] == problem["type"]
    assert entry["problem"]["errors"] == [
        {"pointer": "/design" + e["pointer"], "detail": e["detail"]} for e in problem["errors"]
    ]


# --- every entry is a separate /design ---------------------------------------------------------

# the input weight as a separate request writes it, for each base and signal (None: every input)
CASES = [
    (INPUT_WEIGHT, TRIM, lambda v: [0.1, 0.002, v]),
    (INPUT_WEIGHT, None, lambda v: [v, v, v]),
    # no weights.input in the base: zero on every input, so one input's entry keeps the others at 0
    (None, TRIM, lambda v: [0.0, 0.0, v]),
    (None, 0, lambda v: [v, 0.0, 0.0]),
    (None, None, lambda v: [v, v, v]),
    # a full matrix keeps its off-diagonal entries when one diagonal entry is swept
    (
        [[0.1, 0.0, 0.01], [0.0, 0.002, 0.0], [0.01, 0.0, 0.01]],
        TRIM,
        lambda v: [[0.1, 0.0, 0.01], [0.0, 0.002, 0.0], [0.01, 0.0, v]],
    ),
]


@pytest.mark.parametrize(("base", "signal", "written"), CASES)
def test_every_input_weight_entry_equals_a_separate_design(client, base, signal, written):
    values = [0.0, 0.01, 1.0, 100.0]
    entries = _sweep(client, _design(input_weight=base), values, signal=signal)
    for entry, value in zip(entries, values, strict=True):
        alone = client.post("/design", json=_design(input_weight=written(value)))
        if alone.status_code == 200:
            _assert_designed_as(entry, alone.json())
        else:  # a matrix whose diagonal entry no longer keeps it positive semidefinite
            _assert_failed_as(entry, alone)
    # the weight reaches the design: switched off, the loop differs from the one it pulls
    assert entries[1]["status"] == "designed" and entries[0]["spectral_radius"] != entries[1]["spectral_radius"]


def test_a_zero_input_weight_on_every_input_leaves_the_spare_direction_free_as_design_says(client):
    # all zero is no input weight at all (/design's own rule): the spare valve combination is
    # then free, a pole on the unit circle that /design names
    (entry,) = _sweep(client, _design(), [0.0])
    alone = client.post("/design", json=_design(input_weight=None)).json()
    assert entry["stable"] is False and entry["spectral_radius"] == alone["closed_loop"]["spectral_radius"]
    assert [w["code"] for w in entry["warnings"]] == [w["code"] for w in alone["warnings"]]
    assert abs(entry["spectral_radius"] - 1.0) < 1e-6


# --- with a scenario, every entry is a separate /simulate; the settled inputs by hand ------------


def _steady_inputs(s: np.ndarray) -> np.ndarray:
    """The true plant's steady state nearest the targets in the S-norm, from its KKT system.

    ``min (u - u_t)' S (u - u_t)`` subject to ``G (u - u_0) = r - z_0``, ``G = C (I - A)^-1 B_true``:
    ``[[S, G'], [G, 0]] [u; lambda] = [S u_t; r - z_0 + G u_0]`` (numpy.linalg.solve).
    """
    g = np.array(C) @ np.linalg.solve(np.eye(3) - np.array(A), GAIN_ERROR * np.array(B))
    kkt = np.block([[s, g.T], [g, np.zeros((2, 2))]])
    rhs = np.concatenate([s @ np.array(TARGETS), np.array(SETPOINT) - np.array(Z0) + g @ np.array(U0)])
    return np.linalg.solve(kkt, rhs)[:3]


def test_input_weight_entries_with_a_scenario_equal_simulate_and_settle_on_the_hand_steady_state(client):
    values = [0.0, 0.01, 1.0, 100.0]
    entries = _sweep(client, _design(), values, signal=TRIM, scenario=SCENARIO)
    settled = []
    for entry, value in zip(entries, values, strict=True):
        weight = [*INPUT_WEIGHT[:TRIM], value]
        run = client.post("/simulate", json={**_design(input_weight=weight), "scenario": SCENARIO})
        assert run.status_code == 200, run.text
        run_body = run.json()
        _assert_designed_as(entry, run_body["design"])
        assert entry["performance"] == run_body["performance"]
        # offset-free on the true plant, and the inputs where the KKT steady state puts them
        np.testing.assert_allclose(run_body["outputs"][-1], SETPOINT, rtol=0, atol=1e-7)
        np.testing.assert_allclose(run_body["inputs"][-1], _steady_inputs(np.diag(weight)), rtol=0, atol=1e-6)
        settled.append(run_body["inputs"][-1][TRIM])
    # as the trim valve's weight grows it settles nearer its target, 42 %
    gaps = [abs(u - TARGETS[TRIM]) for u in settled]
    assert gaps == sorted(gaps, reverse=True) and gaps[0] > 5.0 and gaps[-1] < 1e-3
    # its limit: the trim valve on its target, steam and bypass meeting both setpoints alone
    g = np.array(C) @ np.linalg.solve(np.eye(3) - np.array(A), GAIN_ERROR * np.array(B))
    rest = np.linalg.solve(g[:, :TRIM], np.array(SETPOINT) - np.array(Z0) - g[:, TRIM] * (TARGETS[TRIM] - U0[TRIM]))
    limit = np.array(U0[:TRIM]) + rest
    run = client.post("/simulate", json={**_design(input_weight=[*INPUT_WEIGHT[:TRIM], 100.0]), "scenario": SCENARIO})
    np.testing.assert_allclose(run.json()["inputs"][-1][:TRIM], limit, rtol=0, atol=0.05)


# --- the Riccati terminal weight: a zero input weight with spare inputs is refused ---------------


@pytest.mark.parametrize(
    ("base", "signal", "written"),
    [(INPUT_WEIGHT, None, lambda v: [v, v, v]), (None, TRIM, lambda v: [0.0, 0.0, v])],
)
def test_riccati_entries_without_an_input_weight_fail_as_design_and_simulate_refuse_them(client, base, signal, written):
    values = [0.0, 0.05]
    design = _design(input_weight=base, terminal="riccati")
    scenario = {**SCENARIO, "steps": 120}
    for with_scenario in (False, True):
        entries = _sweep(client, design, values, signal=signal, scenario=scenario if with_scenario else None)
        for entry, value in zip(entries, values, strict=True):
            single = _design(input_weight=written(value), terminal="riccati")
            if with_scenario:
                alone = client.post("/simulate", json={**single, "scenario": scenario})
            else:
                alone = client.post("/design", json=single)
            if value == 0.0:
                _assert_failed_as(entry, alone)
                pointers = {e["pointer"]: e["detail"] for e in entry["problem"]["errors"]}
                assert "weights.input" in pointers["/design/weights/terminal"]
            else:
                assert alone.status_code == 200, alone.text
                body = alone.json()
                _assert_designed_as(entry, body["design"] if with_scenario else body)
                assert entry["stable"] is True
                if with_scenario:
                    assert entry["performance"] == body["performance"]


# --- bad sweeps ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("base", "signal", "values", "pointer", "words"),
    [
        (INPUT_WEIGHT, TRIM, [0.01, -0.5], "/values", "value 1 is -0.5"),
        (None, None, [-1e-3], "/values", "must not be negative"),
        (INPUT_WEIGHT, 3, [0.01], "/signal", "the input weight has 3 entries"),
        (None, 3, [0.01], "/signal", "the plant has 3 manipulated variables"),
    ],
)
def test_bad_input_weight_sweeps_are_422_naming_the_field(client, base, signal, values, pointer, words):
    body = {"design": _design(input_weight=base), "parameter": "input_weight", "signal": signal, "values": values}
    problems = invalid_fields(client, "/design/sweep", body)
    assert words in problems[pointer]
