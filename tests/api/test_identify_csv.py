"""Plant-test CSV to a model: POST /identify with text/csv (and its deprecated alias /identify/csv),
resampling, caps, and `movecast identify`."""

from __future__ import annotations

import gzip
import json

import numpy as np
import pytest
import scipy.signal

from service.cli import main
from service.errors import InvalidRequest
from service.pipeline.caps import Caps
from service.pipeline.examples import example_path, load_example
from service.pipeline.identify import check_identify
from service.pipeline.identify_csv import identify_request_from_csv
from service.schemas.identify import IdentifyRequest
from service.schemas.identify_csv import IdentifyCsvOptions
from tests.api.conftest import assert_problem
from tests.conftest import random_steps

QUERY = {
    "sample_time": 1.0,
    "inputs": "steam_valve,outlet_valve",
    "outputs": "vessel_temperature,vessel_level",
    "disturbances": "inlet_flow",
    "integrating": "vessel_level",
    "pairs": "vessel_level:steam_valve:none,vessel_temperature:inlet_flow:second_order_dead_time",
    "max_dead_time": 20.0,
    "settling_time": 60.0,
    "validation_fraction": 0.25,
}


def csv_body() -> bytes:
    return example_path("plant_test.csv").read_bytes()


def test_the_csv_is_the_json_example() -> None:
    from_csv = identify_request_from_csv(csv_body(), IdentifyCsvOptions.model_validate(QUERY))
    from_json = IdentifyRequest.model_validate(load_example("identify_request.json"))
    assert from_csv.data == from_json.data
    assert from_csv.time == [float(k) for k in range(len(from_json.data["steam_valve"]))]
    assert from_csv.model_copy(update={"time": None}) == from_json


def test_csv_to_identify_to_design_in_two_requests(make_client) -> None:
    client = make_client()
    r = client.post("/identify", params=QUERY, content=csv_body(), headers={"Content-Type": "text/csv"})
    assert r.status_code == 200, r.text
    design = load_example("design_request_transfer_matrix.json")
    design["model"] = r.json()["model"]
    answer = client.post("/design", json=design)
    assert answer.status_code == 200, answer.text
    gain = answer.json()["plant"]["steady_state_gain"]["values"]
    assert gain[0][0] == pytest.approx(0.8, rel=0.05)  # the example's invented steam-valve gain


def test_irregular_timestamps_are_resampled_and_said_so() -> None:
    # Irregular ISO 8601 stamps, faster than the sample time: inputs held (zero-order hold), outputs interpolated.
    rng = np.random.default_rng(0)
    seconds = np.cumsum(rng.uniform(4.0, 8.0, size=400))
    seconds -= seconds[0]
    valve = np.where((seconds // 120) % 2 == 0, 40.0, 45.0)
    temperature = 80.0 + 0.1 * seconds / 60.0
    lines = ["stamp,FIC101,TI201"]
    for t, v, y in zip(seconds, valve, temperature, strict=True):
        stamp = np.datetime64("2026-03-01T06:00:00") + np.timedelta64(round(t * 1000), "ms")
        lines.append(f"{stamp},{v},{y:.6f}")
    options = IdentifyCsvOptions(sample_time=0.5, inputs="FIC101", outputs="TI201", time_unit="min")
    request = identify_request_from_csv("\n".join(lines).encode(), options)
    assert request.time is not None and request.time[0] == 0.0
    inputs = check_identify(request, Caps())
    assert inputs.resampling is not None and "zero-order hold" in inputs.resampling
    minutes = np.round(np.array(request.time), 6)
    grid = 0.5 * np.arange(inputs.columns.shape[0])
    # Held: each instant has the valve value of the last stamp at or before it.
    last = np.searchsorted(minutes, grid + 1e-9, side="right") - 1
    np.testing.assert_array_equal(inputs.columns[:, 0], valve[last])
    # Interpolated: the temperature ramp is linear in time, so interpolation is exact (to the 6 decimals).
    np.testing.assert_allclose(inputs.outputs_data[:, 0], 80.0 + 0.1 * grid, atol=2e-6)


def test_bad_csv_names_the_cell(make_client) -> None:
    client = make_client()
    text = csv_body().decode().splitlines()
    text[6] = text[6].replace("55.0", "open", 1)
    for path in ("/identify", "/identify/csv"):
        r = client.post(path, params=QUERY, content="\n".join(text).encode(), headers={"Content-Type": "text/csv"})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["pointer"] == "/data/outlet_valve/5"
        r = client.post(path, params=QUERY, content=b"\xff\xfe\x00", headers={"Content-Type": "text/csv"})
        assert assert_problem(r, 422, "invalid-request")["errors"][0]["pointer"] == "/body"
    with pytest.raises(InvalidRequest) as caught:
        identify_request_from_csv(csv_body(), IdentifyCsvOptions.model_validate({**QUERY, "inputs": "steam"}))
    assert caught.value.problems[0].pointer == "/inputs"


@pytest.mark.parametrize(
    ("cell", "words"),
    [
        ("", "is missing"),
        ("nan", "'nan', not a finite number"),
        ("inf", "'inf', not a finite number"),
        ("8.0", "row 9 (8.0) is not after row 8 (8.0)"),
        ("3.0", "row 9 (3.0) is not after row 8 (8.0)"),
    ],
)
def test_a_bad_time_stamp_names_its_own_cell(cell, words) -> None:
    # Found in an audit of hostile input: an empty time cell in row 9 of a numeric time column was
    # blamed on row 0 ("'0.0' is neither a number nor an ISO 8601 date-time"), and a time of nan,
    # a repeated or a backward one were named "/time/9", no cell of the CSV.
    lines = csv_body().decode().splitlines()
    lines[10] = cell + "," + lines[10].split(",", 1)[1]  # row 9 below the header (minutes 9.0)
    with pytest.raises(InvalidRequest) as caught:
        identify_request_from_csv("\n".join(lines).encode(), IdentifyCsvOptions.model_validate(QUERY))
    (problem,) = caught.value.problems
    assert problem.pointer == "/data/minutes/9"
    assert words in problem.detail


def test_identify_takes_json_or_csv_and_the_deprecated_path_answers_the_same(make_client) -> None:
    client = make_client()
    csv_headers = {"Content-Type": "text/csv; charset=utf-8"}
    from_csv = client.post("/identify", params=QUERY, content=csv_body(), headers=csv_headers)
    assert from_csv.status_code == 200, from_csv.text
    from_json = client.post("/identify", json=load_example("identify_request.json"))
    assert from_json.status_code == 200, from_json.text
    # The CSV carries a time column the JSON example leaves out (samples one sample time apart):
    # the same data, so the same model.
    assert from_csv.json()["model"] == from_json.json()["model"]
    alias = client.post("/identify/csv", params=QUERY, content=csv_body(), headers=csv_headers)
    assert alias.status_code == 200 and alias.json() == from_csv.json()


@pytest.mark.parametrize(
    "content_type", ["text/plain", "application/xml", "application/x-www-form-urlencoded", "text/csv; charset=latin-1"]
)
def test_identify_refuses_other_content_types_with_415(make_client, content_type) -> None:
    r = make_client().post("/identify", params=QUERY, content=csv_body(), headers={"Content-Type": content_type})
    body = assert_problem(r, 415, "unsupported-media-type")
    assert "text/csv" in body["detail"] and "application/json" in body["detail"]
    # Accept-Post (RFC 7694, section 4) lists the media types the path accepts: both of them here
    assert {t.strip() for t in r.headers["Accept-Post"].split(",")} == {"application/json", "text/csv"}


def test_the_deprecated_csv_path_refuses_json_and_compressed_bodies_with_415(make_client) -> None:
    client = make_client()
    r = client.post("/identify/csv", params=QUERY, json=load_example("identify_request.json"))
    body = assert_problem(r, 415, "unsupported-media-type")  # it had been a 422 'input should be a valid bytes'
    assert "POST /identify" in body["detail"] and r.headers["Accept-Post"] == "text/csv"
    compressed = gzip.compress(csv_body())
    r = client.post(
        "/identify/csv",
        params=QUERY,
        content=compressed,
        headers={"Content-Type": "text/csv", "Content-Encoding": "gzip"},
    )
    assert_problem(r, 415, "unsupported-media-type")  # it had been read as CSV: a 422 'not UTF-8'
    assert r.headers["Accept-Encoding"] == "identity"
    # any other type is still read as CSV, as this older path always has (curl's default form type)
    r = client.post("/identify/csv", params=QUERY, content=csv_body(), headers={"Content-Type": "text/plain"})
    assert r.status_code == 200, r.text


def test_identify_query_parameters_go_with_csv_only_and_are_checked(make_client) -> None:
    client = make_client()
    r = client.post("/identify", params={"sample_time": 2.0}, json=load_example("identify_request.json"))
    body = assert_problem(r, 422, "invalid-request")
    assert [e["pointer"] for e in body["errors"]] == ["/sample_time"] and "text/csv" in body["errors"][0]["detail"]
    csv_headers = {"Content-Type": "text/csv"}
    cases = [
        ({**QUERY, "sample_time": "-1"}, "/sample_time"),
        ({k: v for k, v in QUERY.items() if k != "outputs"}, "/outputs"),
        ({**QUERY, "window": "3"}, "/window"),
        ({**QUERY, "structure": "third_order"}, "/structure"),
    ]
    for params, where in cases:
        r = client.post("/identify", params=params, content=csv_body(), headers=csv_headers)
        assert where in [e["pointer"] for e in assert_problem(r, 422, "invalid-request")["errors"]], (params, r.text)
    repeated = client.post(
        "/identify", params=[*QUERY.items(), ("sample_time", 2.0)], content=csv_body(), headers=csv_headers
    )
    body = assert_problem(repeated, 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/sample_time" and "more than once" in body["errors"][0]["detail"]


def test_the_openapi_document_offers_csv_on_identify_and_marks_the_old_path_deprecated(make_client) -> None:
    document = make_client().get("/openapi.json").json()
    operation = document["paths"]["/identify"]["post"]
    assert set(operation["requestBody"]["content"]) == {"application/json", "text/csv"}
    query = {p["name"]: p for p in operation["parameters"] if p["in"] == "query"}
    assert set(query) == set(IdentifyCsvOptions.model_fields)
    assert not any(p["required"] for p in query.values())  # a JSON body takes none of them
    assert document["paths"]["/identify/csv"]["post"]["deprecated"] is True
    assert not operation.get("deprecated", False)


def test_data_length_cap_from_settings(make_client) -> None:
    client = make_client(max_identify_samples=100)
    r = client.post("/identify", json=load_example("identify_request.json"))
    body = assert_problem(r, 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/data" and "at most 100" in body["errors"][0]["detail"]
    client = make_client(max_identify_work=1000)
    body = assert_problem(client.post("/identify", json=load_example("identify_request.json")), 422, "invalid-request")
    assert "work" in body["errors"][0]["detail"]


def test_movecast_identify_without_a_server(capsys) -> None:
    args = [f"--{k.replace('_', '-')}={v}" for k, v in QUERY.items()]
    assert main(["identify", str(example_path("plant_test.csv")), *args]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["model"]["kind"] == "transfer_matrix"
    assert answer["model"]["elements"][1][0] is None
    assert main(["identify", str(example_path("plant_test.csv")), *args, "--inputs=steam"]) == 2
    problem = json.loads(capsys.readouterr().err)
    assert problem["errors"][0]["pointer"] == "/inputs"


def test_a_subspace_fit_takes_the_same_choices_from_a_csv(make_client) -> None:
    # The example plant test with its gaps and spike repaired (a subspace fit needs every
    # sample), written as a historian's CSV: the same model as the JSON body with the same choices.
    from tests.api.test_identify_subspace import complete_request

    request = complete_request()
    assert request["outlier_limit"] is None  # no outlier check: 'none' in a query
    request.pop("validation")
    tags = [*request["inputs"], *request["outputs"], *request["disturbances"]]
    rows = zip(*(request["data"][t] for t in tags), strict=True)
    text = "\n".join([",".join(tags), *(",".join(repr(float(v)) for v in row) for row in rows)]) + "\n"
    query = {
        "sample_time": request["sample_time"],
        "inputs": ",".join(request["inputs"]),
        "outputs": ",".join(request["outputs"]),
        "disturbances": ",".join(request["disturbances"]),
        "structure": "subspace",
        "order": 4,
        "block_rows": 12,
        "max_dead_time": request["max_dead_time"],
        "settling_time": request["settling_time"],
        "outlier_limit": "none",
    }
    client = make_client()
    from_csv = client.post("/identify", params=query, content=text.encode(), headers={"Content-Type": "text/csv"})
    assert from_csv.status_code == 200, from_csv.text
    from_json = client.post("/identify", json={**request, "block_rows": 12})
    assert from_json.status_code == 200, from_json.text
    assert from_csv.json()["subspace"]["order"] == 4 and from_csv.json()["subspace"]["block_rows"] == 12
    assert from_csv.json()["model"] == from_json.json()["model"]


@pytest.mark.parametrize(
    ("cell", "words"),
    [
        ("4_0.0", "'4_0.0' is not a number"),  # Python's float() reads it as 40
        ("infinity", "'infinity' is not a number"),
        ("1e400", "'1e400' is too large for double precision"),
    ],
)
def test_a_data_cell_is_a_plain_number_or_says_what_it_is(cell, words) -> None:
    # Found in an audit of hostile input: cells Python reads but no CSV export means as numbers.
    lines = csv_body().decode().splitlines()
    lines[6] = lines[6].replace("55.0", cell, 1)
    with pytest.raises(InvalidRequest) as caught:
        identify_request_from_csv("\n".join(lines).encode(), IdentifyCsvOptions.model_validate(QUERY))
    (problem,) = caught.value.problems
    assert problem.pointer == "/data/outlet_valve/5"
    assert words in problem.detail


def test_plain_numbers_in_every_written_form_are_read() -> None:
    lines = csv_body().decode().splitlines()
    original = identify_request_from_csv(csv_body(), IdentifyCsvOptions.model_validate(QUERY)).data["outlet_valve"][5]
    for written in ("55", "55.", "+55.0", " 5.5e1 ", "5.5E+01", "550e-1"):
        lines[6] = csv_body().decode().splitlines()[6].replace("55.0", written, 1)
        request = identify_request_from_csv("\n".join(lines).encode(), IdentifyCsvOptions.model_validate(QUERY))
        assert request.data["outlet_valve"][5] == original == 55.0


def test_absolute_time_stamps_faster_than_the_sample_time_keep_the_dead_time(make_client) -> None:
    """An invented reheater: fuel gas (kg/h, near 2400) to outlet temperature (degC, near 420),
    0.05 degC per kg/h, 40 s lag, 9 s dead time, logged twice a second with stamps in seconds
    since 1970 and fitted at a 1 s sample time.  The truth is simulated by scipy alone
    (cont2discrete's zero-order hold of the lag at 0.5 s and scipy.signal.dlsim, the dead time as
    18 samples of shift).  The stamps' size had made the hold take each input 1.5 s late: the dead
    time came out 10 s."""
    rng = np.random.default_rng(5)
    seconds = 900
    fuel = random_steps(rng, seconds, first=60, hold=(40, 120), size=(45.0, 150.0))
    u = np.repeat(fuel, 2)  # the moves fall on whole seconds, as a 1 s controller makes them
    a, b, c, d, _ = scipy.signal.cont2discrete(
        (np.array([[-1 / 40.0]]), np.array([[0.05 / 40.0]]), np.eye(1), np.zeros((1, 1))), 0.5, method="zoh"
    )
    _, y, _ = scipy.signal.dlsim((a, b, c, d, 0.5), np.concatenate((np.zeros(18), u[:-18])))
    y = 420.0 + y.ravel() + rng.normal(scale=0.02, size=u.size)
    t0 = 1.7829e9
    lines = ["stamp,fuel_gas,outlet_temp"]
    lines += [f"{t0 + 0.5 * i:.1f},{2400.0 + u[i]:.17g},{y[i]:.17g}" for i in range(u.size)]
    query = {"sample_time": 1, "inputs": "fuel_gas", "outputs": "outlet_temp", "max_dead_time": 30}
    r = make_client().post(
        "/identify", params=query, content="\n".join(lines) + "\n", headers={"Content-Type": "text/csv"}
    )
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["data"]["resampling"] is not None
    values = {p["name"]: p["estimate"] for p in body["pairs"][0]["parameters"]}
    assert values["dead_time"] == pytest.approx(9.0, abs=0.3)
    assert values["gain"] == pytest.approx(0.05, rel=0.02)
    assert values["time_constant"] == pytest.approx(40.0, rel=0.05)
    assert body["model"]["operating_point"]["inputs"] == [2400.0]
