"""A soft output limit broken inside a dead time: the move QP is solved, not given up as 'cycling'.

The invented reactor of ``test_zone_input_target`` (dead times of 8 to 14 samples, a level in
a zone, input targets, input and move limits, a true plant whose every gain is 20 % higher)
with a soft upper limit on the temperature and an unmeasured step that pushes the
temperature over it once the loop has settled. No move reaches the temperature
before its dead time is over, so the first predicted steps break the limit whatever the
moves, and the output rows inside the dead time tie with each other and with the zone rows.
The QP is soft, hence always feasible; DAQP had stopped after 10 iterations without progress
('cycling') and the step held its input. The reference is scipy.optimize.minimize
(method='trust-constr') on the very QP of that step (tests/solver/test_qp.py's reference_solution).
"""

from __future__ import annotations

import numpy as np

from service.pipeline.caps import Caps
from service.pipeline.simulate import run_simulation
from service.schemas.simulate import SimulateRequest
from service.solver.limits import qp as qp_module
from tests.api.test_zone_input_target import ELEMENTS, POINT, _request
from tests.solver.test_qp import reference_solution

DISTURBANCE_STEP = 150


def _limited_request() -> dict:
    request = _request()
    request["limits"] = {
        "input_min": [10000.0, 40.0, 2.5, 20.0],
        "input_max": [14000.0, 60.0, 3.5, 40.0],
        "move_max": [200.0, 1.0, 0.05, 1.0],
        "output_max": [181.0, None, None],
    }
    request["scenario"] = {
        "steps": DISTURBANCE_STEP + 40,
        "setpoint_changes": [{"step": 10, "setpoint": [180.5, 1800.0, 1.5]}],
        "output_disturbances": [{"step": DISTURBANCE_STEP, "value": [2.0, 0.0, 0.0]}],
        "input_targets": POINT["inputs"],
        "true_plant": {
            **{k: v for k, v in request["model"].items() if k != "operating_point"},
            "elements": [[None if e is None else {**e, "gain": 1.2 * e["gain"]} for e in row] for row in ELEMENTS],
        },
    }
    return request


def test_a_soft_limit_broken_inside_the_dead_time_is_solved_at_its_optimum(monkeypatch):
    problems: list[qp_module.MoveProblem] = []
    solve = qp_module.MoveQP.solve

    def recording(self, **step):
        problems.append(self.problem(**step))
        return solve(self, **step)

    monkeypatch.setattr(qp_module.MoveQP, "solve", recording)
    answer = run_simulation(SimulateRequest.model_validate(_limited_request()), Caps())
    assert answer.limit_summary is not None and answer.limit_summary.fallbacks == 0
    assert not [w for w in answer.warnings if w.code == "limits_fallback"]
    # the step of the disturbance: the soft limit is broken inside the dead time whatever the moves
    problem = problems[DISTURBANCE_STEP]
    reference = reference_solution(problem)
    applied = (np.array(answer.inputs[DISTURBANCE_STEP]) - answer.inputs[DISTURBANCE_STEP - 1]) / [
        4000.0,
        20.0,
        2.0,
        20.0,
    ]
    assert np.abs(applied - reference[:4]).max() < 1e-5
    # the soft limit was used (the slack is what made the QP feasible)
    slack = answer.limit_summary.largest_output_slack
    assert slack is not None and slack > 0.0
