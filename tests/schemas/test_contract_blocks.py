"""The request blocks of the contract, one schema module at a time (service/schemas/*).

What a block's field types alone must refuse, before any check of the pipeline: numbers
that are not finite (JSON, RFC 8259, has no NaN or infinity; FiniteFloat refuses them when
a client sends them anyway), booleans and strings for numbers, unknown fields (a misspelt
field must never fall back to a default), and each field's own range.
"""

from __future__ import annotations

import math

import pytest
from pydantic import ValidationError

from service.pipeline.examples import load_example
from service.schemas.batch import BatchRequest
from service.schemas.estimator import EstimatorRequest
from service.schemas.limits import DEFAULT_OUTPUT_SOFTNESS, MAX_OUTPUT_SOFTNESS, LimitsRequest
from service.schemas.model import StateSpaceModel, TransferElementModel
from service.schemas.signals import SignalTag
from service.schemas.sweep import SweepRequest
from service.schemas.tuning import Horizons, Weights


def _refused(model, data) -> list[tuple]:
    with pytest.raises(ValidationError) as caught:
        model.model_validate(data)
    return [tuple(e["loc"]) for e in caught.value.errors()]


# ---------------------------------------------------------------- tuning.py


def test_horizons_are_whole_numbers_of_at_least_one():
    assert Horizons(prediction=10, control=2).first_penalized == 1
    assert ("prediction",) in _refused(Horizons, {"prediction": 0, "control": 1})
    assert ("control",) in _refused(Horizons, {"prediction": 5, "control": 2.0})  # strict: no float for an int
    assert ("move_steps",) in _refused(Horizons, {"prediction": 5, "control": 2, "move_steps": []})
    assert ("move_steps", 0) in _refused(Horizons, {"prediction": 5, "control": 2, "move_steps": [-1]})


def test_weights_take_a_diagonal_or_a_matrix_and_refuse_unknown_fields_and_non_finite_numbers():
    assert Weights(output=[1.0, 2.0], move=[[1.0, 0.0], [0.0, 1.0]]).terminal == "none"
    assert any(loc[0] == "output" for loc in _refused(Weights, {"output": [math.nan], "move": [1.0]}))
    assert any(loc[0] == "move" for loc in _refused(Weights, {"output": [1.0], "move": [True]}))
    assert ("terminal",) in _refused(Weights, {"output": [1.0], "move": [1.0], "terminal": "lqr"})
    assert ("moves",) in _refused(Weights, {"output": [1.0], "move": [1.0], "moves": [1.0]})


# ---------------------------------------------------------------- signals.py


def test_a_signal_tag_has_a_name_and_a_positive_span():
    assert SignalTag(name="TIC-101.PV", unit="degC", span=50.0).span == 50.0
    assert ("name",) in _refused(SignalTag, {"name": ""})
    assert ("name",) in _refused(SignalTag, {"name": "bad\nname"})
    assert ("span",) in _refused(SignalTag, {"name": "FIC-1", "span": 0.0})
    assert ("span",) in _refused(SignalTag, {"name": "FIC-1", "span": math.inf})


# ---------------------------------------------------------------- model.py


def test_a_state_space_model_refuses_non_finite_entries_and_unknown_fields():
    good = {"kind": "state_space", "a": [[0.9]], "b": [[0.1]], "c": [[1.0]], "sample_time": 1.0}
    assert StateSpaceModel.model_validate(good).a == [[0.9]]
    assert any(loc[:1] == ("a",) for loc in _refused(StateSpaceModel, {**good, "a": [[math.inf]]}))
    assert ("A",) in _refused(StateSpaceModel, {**good, "A": [[0.9]]})


def test_a_transfer_element_has_at_most_two_positive_time_constants():
    assert TransferElementModel.model_validate({"gain": 2.0, "time_constants": [5.0, 1.0]}).gain == 2.0
    assert any(
        loc[0] == "time_constants"
        for loc in _refused(TransferElementModel, {"gain": 1.0, "time_constants": [3.0, 2.0, 1.0]})
    )
    assert any(
        loc[0] == "time_constants" for loc in _refused(TransferElementModel, {"gain": 1.0, "time_constants": [-1.0]})
    )


# ---------------------------------------------------------------- estimator.py


def test_the_estimator_kind_is_one_of_the_five():
    kinds = {"full_state", "per_output", "output_disturbance", "input_disturbance", "kalman"}
    assert EstimatorRequest().kind == "per_output"  # the default: one bias per output, chosen by structure
    assert EstimatorRequest().kind in kinds
    assert ("kind",) in _refused(EstimatorRequest, {"kind": "luenberger"})
    assert ("disturbance",) in _refused(EstimatorRequest, {"kind": "kalman", "disturbance": "both"})


# ---------------------------------------------------------------- limits.py


def test_limits_take_null_for_no_limit_and_bound_the_softness():
    limits = LimitsRequest.model_validate({"input_min": [0.0, None], "input_max": [None, 100.0]})
    assert limits.input_min == [0.0, None] and limits.output_softness == DEFAULT_OUTPUT_SOFTNESS
    assert ("output_softness",) in _refused(LimitsRequest, {"output_softness": -1.0})
    assert ("output_softness",) in _refused(LimitsRequest, {"output_softness": 10 * MAX_OUTPUT_SOFTNESS})
    assert any(loc[0] == "input_max" for loc in _refused(LimitsRequest, {"input_max": [math.nan]}))


# ---------------------------------------------------------------- batch.py, sweep.py


def test_the_bundled_batch_and_sweep_examples_are_valid_and_unknown_fields_are_refused():
    batch = load_example("batch_request.json")
    assert len(BatchRequest.model_validate(batch).items) == len(batch["items"])
    assert ("items",) in _refused(BatchRequest, {"items": []})
    sweep = load_example("sweep_request.json")
    assert SweepRequest.model_validate(sweep).parameter == sweep["parameter"]
    assert ("parameter",) in _refused(SweepRequest, {**sweep, "parameter": "gain"})
    assert ("values",) in _refused(SweepRequest, {**sweep, "values": []})
    assert ("values", 0) in _refused(SweepRequest, {**sweep, "values": [math.nan]})
    assert ("sweep",) in _refused(SweepRequest, {**sweep, "sweep": 1})


def test_the_sweep_schema_fits_its_values_and_signal_to_the_parameter():
    """The horizon rule is the schema's own: pydantic names /values or /signal, no pipeline check."""
    sweep = load_example("sweep_request.json")
    weights = {**sweep, "parameter": "move_weight", "signal": None}
    assert ("values",) in _refused(SweepRequest, {**weights, "values": [0.5, -1.0]})
    horizons = {**sweep, "parameter": "prediction", "signal": None}
    for bad in ([2.5], [0.0], [3.0, -2.0]):
        assert ("values",) in _refused(SweepRequest, {**horizons, "values": bad})
    assert ("signal",) in _refused(SweepRequest, {**horizons, "values": [3.0], "signal": 0})
    assert SweepRequest.model_validate({**horizons, "values": [3.0, 12.0]}).values == [3.0, 12.0]
    with pytest.raises(ValidationError) as caught:
        SweepRequest.model_validate({**horizons, "values": [4.0, 2.5]})
    assert "value 1 is 2.5" in caught.value.errors()[0]["msg"]
