"""POST /design names an uncontrollable mode of a non-minimal model as a decoupling zero, not a zero.

Reference: Rosenbrock, *State-space and Multivariable Theory* (1970), ch. 3: the model
``a = diag(0.5, 1.2)``, ``b = [[1], [0]]``, ``c = [[1, 1]]`` has the transfer function
``1 / (z - 0.5)`` (no zero); 1.2 is an input-decoupling zero (``[zI - A, B]`` loses rank).
"""

from __future__ import annotations


def _request(a, b, c, prediction=3):
    return {
        "model": {"kind": "state_space", "a": a, "b": b, "c": c, "sample_time": 1.0},
        "horizons": {"prediction": prediction, "control": 1},
        "weights": {"output": [1.0] * len(c), "move": [0.1] * len(b[0])},
    }


def test_an_uncontrollable_mode_is_not_called_a_non_minimum_phase_zero(client):
    response = client.post("/design", json=_request([[0.5, 0.0], [0.0, 1.2]], [[1.0], [0.0]], [[1.0, 1.0]]))
    assert response.status_code == 200, response.text
    warnings = {w["code"]: w["message"] for w in response.json()["warnings"]}
    assert "non_minimum_phase_short_horizon" not in warnings
    assert "1.2 (input-decoupling" in warnings["decoupling_zeros"]
    assert "uncontrollable_mode" in warnings


def test_a_true_zero_next_to_a_decoupling_zero_is_still_reported(client):
    # G(z) = (z - 1.5) / ((z - 0.5)(z - 0.8)) (controllable canonical form) and an unmoved mode at 1.2.
    a = [[1.3, -0.4, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.2]]
    response = client.post("/design", json=_request(a, [[1.0], [0.0], [0.0]], [[1.0, -1.5, 1.0]], prediction=2))
    assert response.status_code == 200, response.text
    warnings = {w["code"]: w["message"] for w in response.json()["warnings"]}
    assert "1.5" in warnings["non_minimum_phase_short_horizon"]
    assert "1.2" not in warnings["non_minimum_phase_short_horizon"]
    assert "1.2 (input-decoupling" in warnings["decoupling_zeros"]
