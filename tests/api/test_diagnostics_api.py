"""POST /design says which diagnostics it computed and which a work budget left out."""

from __future__ import annotations


def test_design_lists_its_diagnostics(client, example):
    body = client.post("/design", json=example).json()
    report = body["diagnostics"]
    computed = report["computed"]
    # The example plant: a small Hessian (dense eigensolver), every diagnostic that applies.
    assert {"hessian_eigenvalues", "closed_loop_poles", "open_loop_poles", "steady_state_gain"} <= set(computed)
    assert report["hessian_eigenvalue_method"] == "dense"
    assert report["skipped"] == []
    square = len(body["plant"]["inputs"]) == len(body["plant"]["outputs"])
    assert ("transmission_zeros" in computed) == square
    assert ("relative_gain_array" in computed) == (body["plant"]["relative_gain_array"] is not None)
    assert ("hessian_what_if" in computed) == (body["hessian"]["condition_number"] > 1e8)
    assert "frequency_analysis" not in computed and "limit_check" not in computed


def test_design_with_limits_and_frequency_lists_them(client, example):
    example["analysis"] = {"frequency": True, "points": 20}
    example["limits"] = {"move_max": [1.0] * len(example["model"]["b"][0])}
    response = client.post("/design", json=example)
    assert response.status_code == 200, response.text
    computed = response.json()["diagnostics"]["computed"]
    assert "frequency_analysis" in computed and "limit_check" in computed
