"""A level driven by a valve and a measured inflow is one integrator, and its loop is stable."""

from __future__ import annotations

from service.pipeline.examples import load_example


def test_the_transfer_matrix_example_has_one_level_integrator_and_a_stable_closed_loop(client):
    # The example's level integrates the outlet valve and the inlet flow.  With an integrator
    # per element the inflow's one was a mode at z = 1 no input reaches, a closed-loop pole at
    # exactly 1 whatever the tuning; sharing one integrator per output row removes it.
    response = client.post("/design", json=load_example("design_request_transfer_matrix.json"))
    assert response.status_code == 200, response.text
    body = response.json()
    labels = body["gain"]["labels"]["state"]
    assert [label for label in labels if "integrator" in label] == ["vessel_level integrator"]
    # By hand: lags 1 + 1 + 2 (temperature), 1 level integrator; the temperature row's
    # delays 2, 1, 2 samples share one moved to its output, leaving registers of 1, 1, 1
    # (steam, outlet, inflow): 5 + 1 + 3 = 9 states.
    assert body["plant"]["states"] == len(labels) == 9
    loop = body["closed_loop"]
    assert loop["stable"] is True and loop["spectral_radius"] < 1.0
    assert all(abs(complex(p["real"], p["imag"]) - 1.0) > 1e-3 for p in loop["poles"])
    assert not [w for w in body["warnings"] if w["code"] in {"unstable_closed_loop", "pole_near_unit_circle"}]
