"""POST /design/compare against two separate /design and /simulate calls.

References: each side must equal what /design and /simulate answer for its own request
(equal numbers, the service's own separate calls); the time constant of a discrete pole
``z = exp(-Ts / tau)``, so ``tau = -Ts / ln|z|`` (textbook sampling of a first-order lag);
the 6 dB threshold of peak sensitivity (common practice); CommonMark tables for the Markdown.
Plants: the example vessel and the transfer-matrix example (dead times, an integrating
level, a measured disturbance, spans), a re-identified model with 20 % more gain (invented).
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest

from service.pipeline.examples import load_example
from service.schemas.design import ADVISORY
from tests.api.test_plant_layouts import COLUMN  # a column with a spare input (invented)


def _vessel():
    body = copy.deepcopy(load_example("design_request_robustness.json"))
    body.pop("analysis")
    return body


def _compare(client, body, **headers):
    r = client.post("/design/compare", json=body, headers=headers)
    assert r.status_code == 200, r.text
    return r


def _faster_level():
    old = _vessel()
    new = copy.deepcopy(old)
    new["weights"]["output"] = [1.0, 8.0]  # the level weighed four times more
    return {"in_service": old, "proposed": new, "robustness": True}


def test_each_side_is_what_design_and_simulate_answer(client):
    body = _faster_level()
    answer = _compare(client, body).json()
    for side in ("in_service", "proposed"):
        design = copy.deepcopy(body[side])
        design["analysis"] = {"frequency": True}  # what robustness: true asks for
        alone = client.post("/design", json=design).json()
        assert answer[f"{side}_design"] == alone
        assert answer[side]["fingerprint"] == alone["fingerprint"]
        assert answer[side]["poles"] == alone["closed_loop"]["poles"]
        assert answer[side]["hessian_condition_number"] == alone["hessian"]["condition_number"]
        run = client.post("/simulate", json={**design, "scenario": answer["scenario"]["scenario"]}).json()
        assert answer["scenario"][side] == run["performance"]
        # tau = -Ts / ln|z| of the largest pole (exp(-Ts/tau) = |z|)
        z = alone["closed_loop"]["poles"][0]
        tau = -1.0 / math.log(math.hypot(z["real"], z["imag"]))
        assert answer[side]["dominant_pole"]["time_constant"] == pytest.approx(tau, rel=1e-12)
    robust = answer["robustness"]["plant_input"]
    assert robust["peak_sensitivity"] == [
        answer[f"{s}_design"]["robustness"]["plant_input"]["peak_sensitivity"] for s in ("in_service", "proposed")
    ]


def test_every_gain_entry_changes_by_the_difference_of_the_designs_largest_first(client):
    body = _faster_level()
    answer = _compare(client, body).json()
    old, new = (client.post("/design", json=body[s]).json()["gain"] for s in ("in_service", "proposed"))
    changes = answer["gain_changes"]
    m, n, p = 2, 4, 2
    assert len(changes) == m * (p + n + m)
    index = {"setpoint": "setpoint", "state": "state", "previous_input": "previous_input"}
    for c in changes:
        i = old["labels"]["rows"].index(c["row"])
        j = old["labels"][index[c["gain"]]].index(c["column"])
        a, b = old[c["gain"]][i][j], new[c["gain"]][i][j]
        assert (c["in_service"], c["proposed"]) == (a, b)
        assert c["change"] == pytest.approx(b - a, abs=1e-15)
        if a != 0.0:
            assert c["relative_change"] == pytest.approx((b - a) / abs(a), rel=1e-12)
    ranked = [abs(c["scaled_change"]) for c in changes]  # by the change between signals divided by their sizes
    assert ranked == sorted(ranked, reverse=True)
    assert ranked[0] > 0


def test_gain_changes_rank_by_the_change_between_span_scaled_signals(client):
    # Badly scaled units (invented spans): a temperature whose span is 0.5 degC beside a level
    # in % of 100.  Entries are ranked by change * span(column) / span(row), the gain between
    # signals divided by their spans (common practice for comparing gains in mixed units);
    # computed here from the two /design answers and the tags. A state has no span: its
    # column is divided by one size, the state's natural size (the same for every row).
    body = _faster_level()
    for side in ("in_service", "proposed"):
        model = body[side]["model"]
        for tag, span in zip(model["inputs"], (100.0, 100.0), strict=True):
            tag["span"] = span
        for tag, span in zip(model["outputs"], (0.5, 100.0), strict=True):
            tag["span"] = span
    answer = _compare(client, body).json()
    old, new = (client.post("/design", json=body[s]).json()["gain"] for s in ("in_service", "proposed"))
    model = body["in_service"]["model"]
    spans = {t["name"]: t["span"] for t in model["inputs"] + model["outputs"]}
    state_sizes: dict[str, list[float]] = {}
    for c in answer["gain_changes"]:
        i = old["labels"]["rows"].index(c["row"])
        j = old["labels"][c["gain"]].index(c["column"])
        change = new[c["gain"]][i][j] - old[c["gain"]][i][j]
        if c["gain"] == "state":
            if change:
                state_sizes.setdefault(c["column"], []).append(c["scaled_change"] * spans[c["row"]] / change)
            continue
        column = spans[c["column"]]
        assert c["scaled_change"] == pytest.approx(change * column / spans[c["row"]], rel=1e-12, abs=1e-300)
    assert state_sizes
    for found in state_sizes.values():
        assert min(found) > 0
        np.testing.assert_allclose(found, found[0], rtol=1e-9)
    scaled = [abs(c["scaled_change"]) for c in answer["gain_changes"]]
    assert scaled == sorted(scaled, reverse=True)
    absolute = max(answer["gain_changes"], key=lambda c: abs(c["change"]))
    top = answer["gain_changes"][0]
    assert (top["gain"], top["column"]) != (absolute["gain"], absolute["column"]), "the spans change the ranking"
    text = " ".join(answer["summary"])
    assert "The largest gain change (signals divided by their spans or natural sizes) is" in text
    assert f"[{top['row']}, {top['column']}]" in text


def test_the_summary_says_which_loop_got_faster_and_how_robustness_moved(client):
    answer = _compare(client, _faster_level()).json()
    level = next(f for f in answer["scenario"]["outputs"] if f["name"] == "vessel_level")
    s0, s1 = level["settling_time"]
    assert s0 != s1
    assert level["settling_change_percent"] == pytest.approx(100 * (s1 - s0) / s0)
    text = " ".join(answer["summary"])
    word = "faster" if s1 < s0 else "slower"
    assert f"vessel_level settles {abs(level['settling_change_percent']):.0f} % {word}" in text
    assert f"(settling time {s0:.3g} -> {s1:.3g})" in text
    ms = answer["robustness"]["plant_input"]["peak_sensitivity"]
    assert f"The peak sensitivity at the plant input {'rises' if ms[1] > ms[0] else 'falls'} from {ms[0]:.3g}" in text
    assert "Hessian's condition number" in text
    assert answer["scenario"]["default"] is True
    # without spans each output steps by its natural size, not by 1 in its unit
    # (tests/api/test_field_heater_unit.py: the figures then do not depend on the units)
    (change,) = answer["scenario"]["scenario"]["setpoint_changes"]
    assert change["step"] == 5 and len(change["setpoint"]) == 2 and min(change["setpoint"]) > 0


def test_the_same_design_twice_changes_nothing(client):
    body = {"in_service": _vessel(), "proposed": _vessel()}
    answer = _compare(client, body).json()
    assert answer["summary"][0].startswith("The two requests are the same design")
    assert all(c["change"] == 0.0 for c in answer["gain_changes"])
    assert answer["robustness"] is None  # not asked
    assert answer["scenario"]["in_service"] == answer["scenario"]["proposed"]


def test_a_re_identified_model_under_the_caller_s_scenario(client):
    # The transfer-matrix vessel (dead times, integrating level, measured inlet flow, spans)
    # against the same tuning on a model re-identified with 20 % more gain, both run on a true
    # plant with 20 % less gain than in service.
    old = copy.deepcopy(load_example("design_request_transfer_matrix.json"))
    old["estimator"] = {"kind": "input_disturbance"}
    new = copy.deepcopy(old)
    true = copy.deepcopy(old["model"])
    for row_new, row_true in zip(new["model"]["elements"], true["elements"], strict=True):
        for e_new, e_true in zip(row_new, row_true, strict=True):
            if e_new is not None:
                e_new["gain"] *= 1.2
                e_true["gain"] *= 0.8
    scenario = {
        "steps": 200,
        "setpoint_changes": [{"step": 5, "setpoint": [2.0, -3.0]}],
        "measured_disturbances": [{"step": 80, "value": [5.0]}],
        "measurement_noise": {"std": [0.02, 0.1], "seed": 2},
        "true_plant": true,
    }
    answer = _compare(client, {"in_service": old, "proposed": new, "scenario": scenario}).json()
    assert answer["scenario"]["default"] is False
    for side, design in (("in_service", old), ("proposed", new)):
        run = client.post("/simulate", json={**design, "scenario": scenario}).json()
        assert answer["scenario"][side] == run["performance"]
    kd = [c for c in answer["gain_changes"] if c["gain"] == "disturbance"]
    assert {c["column"] for c in kd} == {"inlet_flow"} and len(kd) == 2
    assert "The models differ" in " ".join(answer["summary"])


def test_a_marginal_design_is_called_marginal_not_unstable(client):
    # /design's verdict: not stable (a pole on the circle) but no unstable_closed_loop warning;
    # the change review must say the same, for either side (found in an independent audit).
    marginal = copy.deepcopy(COLUMN)
    targeted = copy.deepcopy(COLUMN)
    targeted["weights"]["input"] = [0.01, 0.01, 0.01]
    alone = client.post("/design", json=marginal).json()
    assert alone["closed_loop"]["stable"] is False and alone["closed_loop"]["marginal_modes"]
    assert "unstable_closed_loop" not in [w["code"] for w in alone["warnings"]]
    assert client.post("/design", json=targeted).json()["closed_loop"]["stable"] is True
    proposed = _compare(client, {"in_service": targeted, "proposed": marginal}).json()["summary"]
    assert not any("UNSTABLE" in line for line in proposed)
    assert "marginal, not unstable" in proposed[0] and "the one in service is stable" in proposed[0]
    back = _compare(client, {"in_service": marginal, "proposed": targeted}).json()["summary"]
    assert back[0] == "The proposed design's closed loop is stable; the one in service is marginal."
    text = _compare(client, {"in_service": targeted, "proposed": marginal}, Accept="text/markdown").text
    assert "| stable | yes | no (marginal) |" in text
    # a loop with a pole outside the circle is still called unstable
    unstable = copy.deepcopy(COLUMN)
    unstable["model"]["a"] = [[1.05, 0.0], [0.0, 0.8]]
    unstable["horizons"] = {"prediction": 2, "control": 1}
    unstable["weights"]["move"] = [1e6, 1e6, 1e6]  # hardly moves: the open loop's pole 1.05 stays
    answer = client.post("/design", json=unstable).json()
    assert "unstable_closed_loop" in [w["code"] for w in answer["warnings"]]
    lines = _compare(client, {"in_service": targeted, "proposed": unstable}).json()["summary"]
    assert lines[0].startswith("The proposed design's closed loop is UNSTABLE")


def test_markdown_for_the_change_request(client):
    body = _faster_level()
    json_answer = _compare(client, body).json()
    r = _compare(client, body, Accept="text/markdown")
    assert r.headers["content-type"].startswith("text/markdown")
    text = r.text
    assert text.startswith("# Change review")
    assert ADVISORY in text
    assert json_answer["in_service"]["fingerprint"] in text and json_answer["proposed"]["fingerprint"] in text
    for sentence in json_answer["summary"]:
        assert f"- {sentence}" in text
    assert "## Review and sign-off" in text and "Signature:" in text and "Decision:" in text
    # every table row has as many cells as its header (CommonMark tables)
    for block in text.split("\n\n"):
        rows = [line for line in block.splitlines() if line.startswith("|")]
        if rows:
            assert len({line.count(" | ") for line in rows}) == 1, block
    assert "Design aid" in json_answer["advisory"]


@pytest.mark.parametrize(
    "accept,markdown",
    [
        ("text/markdown", True),
        ("application/json", False),
        (None, False),
        ("*/*", False),
        # RFC 9110 section 12.5.1: the most specific matching range gives the quality; JSON on a tie
        ("text/*", True),
        ("text/markdown;q=0.5, application/json", False),
        ("text/markdown, application/json;q=0.5", True),
        ("text/markdown, application/json", False),
    ],
)
def test_json_unless_markdown_is_asked(client, accept, markdown):
    headers = {} if accept is None else {"Accept": accept}
    r = client.post("/design/compare", json={"in_service": _vessel(), "proposed": _vessel()}, headers=headers)
    assert r.headers["content-type"].startswith("text/markdown" if markdown else "application/json")


def _pointers(client, body):
    r = client.post("/design/compare", json=body)
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    return [e["pointer"] for e in r.json()["errors"]]


def test_problems_point_into_the_compare_request(client):
    old, new = _vessel(), _vessel()
    new["weights"]["move"] = [0.1]
    old["horizons"]["control"] = 50
    assert set(_pointers(client, {"in_service": old, "proposed": new})) == {
        "/proposed/weights/move",
        "/in_service/horizons/control",
    }


def test_other_signals_or_sample_times_do_not_compare(client):
    old, new = _vessel(), _vessel()
    new["model"]["outputs"][1]["name"] = "vessel_pressure"
    new["model"]["sample_time"] = 2.0
    assert set(_pointers(client, {"in_service": old, "proposed": new})) == {
        "/proposed/model/outputs",
        "/proposed/model/sample_time",
    }


def test_a_bad_scenario_points_at_the_scenario(client):
    body = {
        "in_service": _vessel(),
        "proposed": _vessel(),
        "scenario": {"steps": 10, "setpoint_changes": [{"step": 3, "setpoint": [1.0]}]},
    }
    assert "/scenario/setpoint_changes/0/setpoint" in _pointers(client, body)


def test_gain_changes_match_entries_by_tag_when_the_state_count_differs(client):
    # A model version with one more state: the extra state's gains have no partner.
    old = _vessel()
    new = copy.deepcopy(old)
    a = np.array(new["model"]["a"])
    a5 = np.zeros((5, 5))
    a5[:4, :4] = a
    a5[4, 4] = 0.5
    a5[4, 0] = 0.1
    new["model"]["a"] = a5.tolist()
    new["model"]["b"] = [*new["model"]["b"], [0.0, 0.0]]
    new["model"]["c"] = [[*row, 0.0] for row in new["model"]["c"]]
    answer = _compare(client, {"in_service": old, "proposed": new}).json()
    unmatched = [c for c in answer["gain_changes"] if c["change"] is None]
    assert {(c["column"], c["in_service"]) for c in unmatched} == {("x5", None)}
    assert len(unmatched) == 2 and answer["gain_changes"][-2:] == unmatched


def _column():
    body = copy.deepcopy(load_example("simulate_request_column.json"))
    body.pop("scenario")
    return body


@pytest.mark.parametrize("scenario", [False, True])
def test_designs_in_absolute_units_each_at_its_own_operating_point(client, scenario):
    # The column in absolute units, then the same column moved to a new operating point (feed
    # preheat up 20 units, tray temperature 1 K higher) with a re-identified 20 % stronger
    # steam gain (invented): each side is what /design and /simulate answer for its request.
    old = _column()
    new = copy.deepcopy(old)
    new["model"]["operating_point"]["inputs"][3] += 20.0
    new["model"]["operating_point"]["outputs"][0] += 1.0
    for row in new["model"]["elements"]:
        if row[0] is not None:
            row[0]["gain"] *= 1.2
    body = {"in_service": old, "proposed": new}
    if scenario:
        body["scenario"] = load_example("simulate_request_column.json")["scenario"]
    answer = _compare(client, body).json()
    used = answer["scenario"]["scenario"]
    if not scenario:
        # the default step: one span above the design in service's operating point
        spans = [o.get("span", 1.0) for o in old["model"]["outputs"]]
        expected = [z0 + s for z0, s in zip(old["model"]["operating_point"]["outputs"], spans, strict=True)]
        assert used["setpoint_changes"][0]["setpoint"] == pytest.approx(expected)
    for side in ("in_service", "proposed"):
        alone = client.post("/design", json=body[side]).json()
        assert answer[f"{side}_design"] == alone  # limit check and all in absolute units
        run = client.post("/simulate", json={**body[side], "scenario": used})
        assert run.status_code == 200, run.text
        assert answer["scenario"][side] == run.json()["performance"]
    assert answer["gain_changes"], "a 20 % stronger steam gain changes the gains"


def test_an_operating_point_outside_a_limit_points_into_its_side(client):
    old = _column()
    new = copy.deepcopy(old)
    new["limits"]["input_max"][0] = 20.0  # below the operating point's 25
    r = client.post("/design/compare", json={"in_service": old, "proposed": new})
    assert r.status_code == 422, r.text
    assert any(
        p["pointer"].startswith("/proposed/limits/input_max") and "operating point" in p["detail"]
        for p in r.json()["errors"]
    )


def test_a_true_plant_with_an_operating_point_of_its_own_is_refused_as_simulate_refuses_it(client):
    # Reference: the /simulate answer to each side with the same scenario (the comparison's
    # contract: every number equals what separate /design and /simulate calls give). A true
    # plant naming an operating point of its own is a 422 of /simulate at the field; the
    # comparison had run it silently around each side's point (found in an audit).
    old = _column()
    scenario = load_example("simulate_request_column.json")["scenario"]
    scenario["true_plant"]["operating_point"] = copy.deepcopy(old["model"]["operating_point"])
    run = client.post("/simulate", json={**old, "scenario": scenario})
    assert run.status_code == 422, run.text
    r = client.post("/design/compare", json={"in_service": old, "proposed": copy.deepcopy(old), "scenario": scenario})
    assert r.status_code == 422, r.text
    assert [p["pointer"] for p in r.json()["errors"]] == ["/scenario/true_plant/operating_point"]
    assert [p["pointer"] for p in run.json()["errors"]] == ["/scenario/true_plant/operating_point"]
