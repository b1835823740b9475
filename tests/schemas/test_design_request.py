"""Schema-level checks of the /design request: each bad input names its field."""

from __future__ import annotations

import copy

import numpy as np
import pytest
from pydantic import ValidationError

from service.errors import InvalidRequest
from service.pipeline.caps import Caps
from service.pipeline.design import check_design_request
from service.pipeline.fingerprint import design_fingerprint, fingerprint
from service.pipeline.problems import validation_problems
from service.schemas.design import DesignRequest
from service.schemas.model import MODEL_KINDS
from service.schemas.simulate import SimulateRequest


def problems_of(body, caps=Caps()):
    """The (pointer, detail) pairs the checks report for a request body.

    Empty matrices and weights are refused by the schema itself (``minItems: 1``), the other
    rules by ``check_design_request``; either way each problem names its field.
    """
    try:
        request = DesignRequest.model_validate(body)
    except ValidationError as exc:
        return [(p.pointer, p.detail) for p in validation_problems(exc.errors())]
    with pytest.raises(InvalidRequest) as caught:
        check_design_request(request, caps)
    return [(p.pointer, p.detail) for p in caught.value.problems]


def test_the_example_passes_every_check(example):
    inputs = check_design_request(DesignRequest.model_validate(example), Caps())
    assert inputs.plant.states == 4 and inputs.plant.input_count == 2 and inputs.plant.output_count == 2
    assert inputs.first_penalized == 1


def test_first_penalized_defaults_to_one(example):
    del example["horizons"]["first_penalized"]
    assert DesignRequest.model_validate(example).horizons.first_penalized == 1


@pytest.mark.parametrize(
    ("edit", "where"),
    [
        (lambda b: b["model"]["a"][0].append(1.0), "/model/a/0"),
        (lambda b: b["model"].__setitem__("a", [[0.5, 0.1]]), "/model/a"),
        (lambda b: b["model"].__setitem__("a", []), "/model/a"),
        (lambda b: b["model"]["b"].pop(), "/model/b"),
        (lambda b: b["model"]["c"][1].pop(), "/model/c/1"),
        (lambda b: b["model"]["c"].__setitem__(0, [1.0, 0.0, 0.0]), "/model/c/0"),
        (lambda b: b["horizons"].__setitem__("control", 31), "/horizons/control"),
        (lambda b: b["horizons"].__setitem__("first_penalized", 31), "/horizons/first_penalized"),
        (lambda b: b["weights"].__setitem__("output", [1.0]), "/weights/output"),
        (lambda b: b["weights"].__setitem__("output", [1.0, -2.0]), "/weights/output/1"),
        (lambda b: b["weights"].__setitem__("output", [0.0, 0.0]), "/weights/output"),
        (lambda b: b["weights"].__setitem__("move", [0.1, 0.1, 0.1]), "/weights/move"),
        (lambda b: b["weights"].__setitem__("move", [[1.0, 2.0], [0.0, 1.0]]), "/weights/move"),
        (lambda b: b["weights"].__setitem__("move", [[1.0, 2.0], [2.0, 1.0]]), "/weights/move"),
        (lambda b: b["weights"].__setitem__("move", [[1.0, 0.0]]), "/weights/move"),
        (lambda b: b["weights"].__setitem__("move", []), "/weights/move"),
    ],
)
def test_sizes_signs_and_shapes_are_checked(example, edit, where):
    edit(example)
    pointers = [p for p, _ in problems_of(example)]
    assert where in pointers


@pytest.mark.parametrize("scale", [1e-6, 1.0, 1e6])
def test_an_indefinite_weight_matrix_is_refused_in_any_units(example, scale):
    # [[1, 2], [2, 1]] has eigenvalues 3 and -1: with the first move in units 1e6 times smaller
    # (or larger) it reads D W D, still indefinite (Sylvester's law of inertia).  Found in an
    # audit of the estimator: the smallest eigenvalue was judged against the largest entry
    # alone, so the badly scaled copies (smallest eigenvalue about -3e-12 beside an entry of
    # 1e12) passed
    d = np.diag([scale, 1.0 / scale])
    example["weights"]["move"] = (d @ np.array([[1.0, 2.0], [2.0, 1.0]]) @ d).tolist()
    [(where, detail)] = problems_of(example)
    assert where == "/weights/move" and "positive semidefinite" in detail
    # and a semidefinite one (correlation exactly 1) passes in the same units
    example["weights"]["move"] = (d @ np.array([[1.0, 1.0], [1.0, 1.0]]) @ d).tolist()
    example["weights"]["output"] = [1.0, 1.0]
    check_design_request(DesignRequest.model_validate(example), Caps())


def test_messages_say_what_is_wrong(example):
    example["weights"]["move"] = [[1.0, 2.0], [2.0, 1.0]]
    [(where, detail)] = problems_of(example)
    assert "positive semidefinite" in detail
    example["weights"]["move"] = [0.1, 0.1]
    example["horizons"]["control"] = 40
    [(where, detail)] = problems_of(example)
    assert where == "/horizons/control" and "must not exceed the prediction horizon (30)" in detail


@pytest.mark.parametrize(
    ("caps", "where"),
    [
        (Caps(max_states=3), "/model/a"),
        (Caps(max_signals=1), "/model/b"),
        (Caps(max_prediction_horizon=20), "/horizons/prediction"),
        (Caps(max_hessian_size=9), "/horizons/control"),
        (Caps(max_prediction_entries=500), "/horizons/prediction"),
        (Caps(max_response_entries=100), "/horizons/prediction"),
    ],
)
def test_size_caps_come_from_the_caps(example, caps, where):
    assert where in [p for p, _ in problems_of(example, caps)]


@pytest.mark.parametrize(
    ("edit", "where"),
    [
        (lambda b: b["weights"].__setitem__("mov", [1.0]), ("weights", "mov")),
        (lambda b: b.__setitem__("horizon", {}), ("horizon",)),
        (lambda b: b["model"].__setitem__("kind", "transfer"), ("model",)),
        (lambda b: b["model"].__setitem__("sample_time", 0.0), ("model", "sample_time")),
        (lambda b: b["model"].__setitem__("sample_time", -1.0), ("model", "sample_time")),
        (lambda b: b["model"]["a"][1].__setitem__(2, "0.3"), ("model", "a", 1, 2)),
        (lambda b: b["model"]["a"][1].__setitem__(2, True), ("model", "a", 1, 2)),
        (lambda b: b["model"]["a"][1].__setitem__(2, float("nan")), ("model", "a", 1, 2)),
        (lambda b: b["model"]["b"][0].__setitem__(0, float("inf")), ("model", "b", 0, 0)),
        (lambda b: b["horizons"].__setitem__("prediction", 0), ("horizons", "prediction")),
        (lambda b: b["horizons"].__setitem__("control", 2.5), ("horizons", "control")),
        (lambda b: b["horizons"].__setitem__("control", "5"), ("horizons", "control")),
        (lambda b: b["horizons"].pop("prediction"), ("horizons", "prediction")),
    ],
)
def test_field_types_are_strict(example, edit, where):
    edit(example)
    with pytest.raises(ValidationError) as caught:
        DesignRequest.model_validate(example)
    # A discriminated union adds the chosen kind to the location; the edge drops it.
    locations = [tuple(p for p in e["loc"] if p not in MODEL_KINDS) for e in caught.value.errors()]
    assert any(loc[: len(where)] == where for loc in locations)


def test_fingerprint_is_canonical_and_sensitive(example):
    base = fingerprint(DesignRequest.model_validate(example))
    same = copy.deepcopy(example)
    del same["horizons"]["first_penalized"]  # the default, written or not
    same["model"]["a"][0][0] = 0.92  # the same number
    reordered = {k: same[k] for k in reversed(list(same))}
    assert fingerprint(DesignRequest.model_validate(reordered)) == base
    changed = copy.deepcopy(example)
    changed["model"]["a"][0][0] = 0.9200000000000001
    assert fingerprint(DesignRequest.model_validate(changed)) != base
    assert base.startswith("sha256:") and len(base) == len("sha256:") + 64


def test_the_design_part_of_a_simulation_hashes_as_the_design_itself(example):
    # A design request is hashed as it stands; a /simulate request by its design fields,
    # rebuilt as a design request: both routes give one fingerprint for the same fields.
    design = DesignRequest.model_validate(example)
    run = SimulateRequest.model_validate({**copy.deepcopy(example), "scenario": {"steps": 5}})
    assert design_fingerprint(design) == fingerprint(design)
    assert design_fingerprint(run) == design_fingerprint(design)
    assert fingerprint(run) != fingerprint(design)  # the scenario counts in the whole request's hash
