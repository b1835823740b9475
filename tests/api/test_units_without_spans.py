"""Engineering units without spans: the run does not depend on the units the signals are written in.

Invented plants of our own. Writing one signal in other units (a flow in g/h instead of
kg/h, with its gains, limits, weights, targets and operating point converted) is a change of
coordinates: the same controller, estimator and run in other numbers (common practice; the
README's "Verdicts do not depend on units"). Three things had broken it without spans:

- the estimator's default covariances were 1 per signal in its own unit: the natural sizes
  the README describes were never used, since every signal without a span was given span 1;
- the move QP was solved in engineering units, where a move of one input can weigh 1e16
  times another's, and DAQP answered 'optimal' with a move far from the optimum (checked
  here against scipy.optimize.minimize(method='trust-constr') on the QP with its moves
  divided by their Hessian's Jacobi scaling, an independent reformulation);
- the divergence check compared flows in kg/h with setpoint steps in degC, and called a
  stable loop "growing without bound".
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import scipy.optimize

from service.pipeline.caps import Caps
from service.pipeline.simulate import run_simulation
from service.schemas.simulate import SimulateRequest
from service.solver.limits import qp as qp_module
from tests.api.test_zone_input_target import ELEMENTS, INPUT, INPUT_SPAN, MOVE, OUTPUT_SPAN, POINT


def _reactor(coolant_per_kg: float = 1.0) -> dict[str, Any]:
    """The reactor of test_zone_input_target without spans; the coolant in kg/h times ``coolant_per_kg``."""
    elements = copy.deepcopy(ELEMENTS)
    for row in elements:
        if row[0] is not None:
            row[0]["gain"] /= coolant_per_kg
    point = copy.deepcopy(POINT)
    point["inputs"][0] *= coolant_per_kg
    input_scale = INPUT_SPAN * np.array([coolant_per_kg, 1.0, 1.0, 1.0])
    names = ["coolant_flow", "catalyst_feed", "jacket_pressure", "product_draw"]
    return {
        "model": {
            "kind": "transfer_matrix",
            "sample_time": 1.0,
            "elements": elements,
            "inputs": [{"name": n} for n in names],
            "outputs": [{"name": n} for n in ("reactor_temperature", "residual_monomer", "drum_level")],
            "operating_point": point,
        },
        "horizons": {"prediction": 80, "control": 8},
        # the weights of spans written out: Q / span^2, R / span^2, S / span^2, zone weight / span^2
        "weights": {
            "output": list(np.array([1.0, 1.0, 0.0]) / OUTPUT_SPAN**2),
            "move": list(MOVE / input_scale**2),
            "input": list(INPUT / input_scale**2),
        },
        "zones": [None, None, {"low": 1.3, "high": 1.7, "weight": 1.0 / OUTPUT_SPAN[2] ** 2}],
        "scenario": {
            "steps": 120,
            "setpoint_changes": [{"step": 10, "setpoint": [183.0, 1800.0, 1.5]}],
            "input_targets": point["inputs"],
        },
    }


def _run(request: dict[str, Any], monkeypatch=None, problems=None):
    if monkeypatch is not None:
        solve = qp_module.MoveQP.solve

        def recording(self, **step):
            problems.append(self.problem(**step))
            return solve(self, **step)

        monkeypatch.setattr(qp_module.MoveQP, "solve", recording)
    return run_simulation(SimulateRequest.model_validate(request), Caps())


def test_a_flow_in_g_per_h_gives_the_run_of_the_flow_in_kg_per_h(monkeypatch):
    base = _run(_reactor())
    problems: list[qp_module.MoveProblem] = []
    moved = _run(_reactor(1000.0), monkeypatch, problems)
    inputs = np.array(moved.inputs)
    inputs[:, 0] /= 1000.0
    reference_inputs = np.array(base.inputs)
    scale = np.abs(reference_inputs - POINT["inputs"]).max(axis=0)  # how far each input moved
    assert np.all(np.abs(inputs - reference_inputs).max(axis=0) <= 1e-6 * scale)
    np.testing.assert_allclose(moved.outputs, base.outputs, rtol=1e-9, atol=1e-6)
    assert [w.code for w in moved.warnings] == [w.code for w in base.warnings]
    # The step of the setpoint change: the QP's first move is its optimum (trust-constr on the
    # QP whose variables are divided by the Jacobi scaling of its Hessian).
    problem = problems[10]
    h, f = problem.hessian, problem.linear
    nv = h.shape[0]
    d = 1.0 / np.sqrt(np.diag(h))
    rows = np.vstack([np.eye(nv), problem.rows]) * d
    result = scipy.optimize.minimize(
        lambda z: 0.5 * (d * z) @ h @ (d * z) + f @ (d * z),
        np.zeros(nv),
        jac=lambda z: d * (h @ (d * z) + f),
        hess=lambda z: h * np.outer(d, d),
        method="trust-constr",
        constraints=[scipy.optimize.LinearConstraint(rows, problem.lower, problem.upper)],
        options={"gtol": 1e-12, "xtol": 1e-14, "maxiter": 20000},
    )
    optimum = d * result.x
    applied = np.array(moved.inputs[10]) - moved.inputs[9]
    assert np.all(np.abs(applied - optimum[:4]) <= 1e-5 * np.abs(optimum[:4]).max(initial=0.0) + 1e-9)
    assert abs(applied[0]) > 1e5  # the coolant moves (about -5e5 g/h); it had stayed put


def test_the_default_estimator_is_the_same_filter_with_the_monomer_in_ppb():
    def request(ppb_per_ppm: float) -> dict[str, Any]:
        body = _reactor()
        body.pop("zones")
        body["weights"]["output"][2] = 0.25
        body["weights"]["output"][1] /= ppb_per_ppm**2
        for element in body["model"]["elements"][1]:
            if element is not None:
                element["gain"] *= ppb_per_ppm
        body["model"]["operating_point"]["outputs"][1] *= ppb_per_ppm
        body["scenario"] = {"steps": 5}
        return body

    base, moved = _run(request(1.0)), _run(request(1000.0))
    # the filter's poles are coordinate-free (the same filter in other units has the same poles)
    poles = np.sort_complex(np.array([complex(p.real, p.imag) for p in base.estimator.poles]))
    moved_poles = np.sort_complex(np.array([complex(p.real, p.imag) for p in moved.estimator.poles]))
    big = np.abs(poles) > 0.1  # the dead-time registers' poles at 0 scatter under rounding
    np.testing.assert_allclose(moved_poles[big], poles[big], rtol=1e-8)
    assert abs(moved.estimator.spectral_radius - base.estimator.spectral_radius) < 1e-9


def test_a_steam_flow_in_kg_per_h_is_not_a_diverging_run(client):
    # A heater of our own: outlet temperature in degC, steam in kg/h (5e-4 degC per kg/h, an
    # eight-sample dead time), a setpoint step of 1 degC that needs about 7600 kg/h more steam.
    request = {
        "model": {
            "kind": "transfer_matrix",
            "sample_time": 1.0,
            "elements": [[{"gain": 5e-4, "time_constants": [10.0], "dead_time": 8.0}]],
            "inputs": [{"name": "steam_flow", "unit": "kg/h"}],
            "outputs": [{"name": "outlet_temperature", "unit": "degC"}],
            "operating_point": {"inputs": [8000.0], "outputs": [150.0]},
        },
        "horizons": {"prediction": 60, "control": 4},
        "weights": {"output": [1.0], "move": [1e-8]},
        "scenario": {"steps": 200, "setpoint_changes": [{"step": 5, "setpoint": [151.0]}]},
    }
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    answer = response.json()
    assert answer["whole_loop"]["stable"]
    assert abs(answer["outputs"][-1][0] - 151.0) < 1e-6  # settled on its setpoint
    assert answer["diverged_at"] is None
    assert "run_diverging" not in {w["code"] for w in answer["warnings"]}
