"""The fast JSON route of request bodies gives the strict route's value, or leaves the body to it.

Reference: Python's standard ``json`` module with the service's strict hooks (integer reading
and repeated-member detection), the route the fast one stands in for; and Python's ``float``,
which rounds a decimal to the nearest double (David Gay's correctly rounded conversion).
"""

from __future__ import annotations

import json
import math
import random
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.api.bodies import MAX_INTEGER_DIGITS, _integer, _parsed_plainly, parse_json
from service.errors import InvalidRequest, MalformedBody
from service.pipeline.examples import load_example


def _same(a, b) -> bool:
    """Equal values of equal types, floats bit for bit (NaN equal to NaN, -0.0 apart from 0.0)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, float):
        return struct.pack("<d", a) == struct.pack("<d", b) or (math.isnan(a) and math.isnan(b))
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def _strict(text: str):
    return json.loads(text, parse_int=_integer)


scalars = (
    st.floats(allow_nan=False)
    | st.integers(min_value=-(10**35), max_value=10**35)
    | st.booleans()
    | st.none()
    | st.text(max_size=8)
)
values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=6) | st.dictionaries(st.text(max_size=6), inner, max_size=6),
    max_leaves=40,
)


@settings(max_examples=300, deadline=None)
@given(
    value=st.lists(values, max_size=4) | st.dictionaries(st.text(max_size=6), values, max_size=4), spaced=st.booleans()
)
def test_parse_json_equals_the_standard_parser_with_the_strict_hooks(value, spaced):
    # Whatever the route taken (strings with colons and integers of 31 digits and more go to
    # the strict one), the value is the standard json module's, types and float bits included.
    text = json.dumps(value, separators=(", ", ": ") if spaced else (",", ":"), ensure_ascii=False)
    assert _same(parse_json(text.encode()), _strict(text))


def test_numbers_round_as_python_float_does():
    # Reference: float(text) (int(text) for a text without fraction or exponent), on 20,000 random doubles written four ways (shortest repr,
    # 17 and 15 significant digits, fixed point), subnormals and the extremes included.
    rng = random.Random(20261203)
    texts = ["4.9e-324", "2.2250738585072011e-308", "1.7976931348623157e308", "1e400", "-0.0", "0.1e-400"]
    while len(texts) < 80_000:
        x = struct.unpack("<d", struct.pack("<Q", rng.getrandbits(64)))[0]
        if math.isfinite(x):
            texts += [repr(x), f"{x:.17g}", f"{x:.15g}", f"{x:.6f}" if abs(x) < 1e15 else f"{x:.3e}"]
    body = ("[" + ",".join(texts) + "]").encode()
    fast = _parsed_plainly(body)
    assert fast is not None, "a plain array of numbers takes the fast route"
    expected = [int(t) if t.lstrip("-").isdigit() else float(t) for t in texts]  # JSON integers stay integers
    assert all(_same(got, want) for got, want in zip(fast, expected, strict=True))


def test_the_bundled_design_example_takes_the_fast_route_with_the_strict_value():
    # The fast route is not a dead branch: the bundled example (invented numbers) parses on it.
    text = json.dumps(load_example("design_request.json"))
    fast = _parsed_plainly(text.encode())
    assert fast is not None and _same(fast, _strict(text))


@pytest.mark.parametrize(
    "text",
    [
        '{"a": 1, "b": {"c": 2, "c": 3}}',  # a repeated member: the strict route names it
        '{"label": "flow: inlet", "x": [1.0]}',  # a colon inside a string
        '{"big": ' + "9" * (MAX_INTEGER_DIGITS + 1) + "}",  # read as a float by the strict route
        "[1, 2",  # malformed: the strict route words the 400
        "3.5",  # not an object or array
        '"\\ud800"',  # a lone surrogate, refused by pydantic-core, kept by json
    ],
)
def test_what_the_fast_route_leaves_to_the_strict_one(text):
    assert _parsed_plainly(text.encode()) is None


def test_a_repeated_member_inside_arrays_is_still_named():
    body = b'{"model": {"a": [[1.0]], "b": [[1.0]], "c": [[1.0]], "a": [[2.0]]}, "x": [{"k": 1, "k": 2}]}'
    with pytest.raises(InvalidRequest) as caught:
        parse_json(body)
    assert sorted(p.pointer for p in caught.value.problems) == ["/model/a", "/x/0/k"]


def test_a_malformed_body_keeps_the_strict_message():
    with pytest.raises(MalformedBody) as caught:
        parse_json(b'{"a": [1, 2,]}')
    assert "not valid JSON" in str(caught.value) and "line 1" in str(caught.value)


def _text(node) -> str:
    """JSON text of a tree whose objects are lists of (name, value) pairs, repeats allowed."""
    kind, content = node
    if kind == "object":
        return "{" + ", ".join(f"{json.dumps(k)}: {_text(v)}" for k, v in content) + "}"
    if kind == "array":
        return "[" + ",".join(_text(v) for v in content) + "]"
    return json.dumps(content)


names = st.sampled_from(["a", "b", "model", "x:y", "\u00e9"])
trees = st.recursive(
    st.tuples(st.just("scalar"), scalars),
    lambda inner: (
        st.tuples(st.just("array"), st.lists(inner, max_size=5))
        | st.tuples(st.just("object"), st.lists(st.tuples(names, inner), max_size=5))
    ),
    max_leaves=30,
)


@settings(max_examples=300, deadline=None)
@given(tree=trees.filter(lambda t: t[0] != "scalar"))
def test_repeated_members_get_the_strict_routes_verdict(tree):
    # Reference: the strict route alone (the standard json module with the strict hooks), on
    # texts whose objects repeat names at random: the same value, or the same 422 naming the
    # same pointers.
    import service.api.bodies as bodies

    body = _text(tree).encode()

    def verdict(parse):
        try:
            return "value", parse(body)
        except InvalidRequest as exc:
            return "repeated", sorted(p.pointer for p in exc.problems)

    kind, got = verdict(parse_json)
    original = bodies._parsed_plainly
    bodies._parsed_plainly = lambda _body: None
    try:
        strict_kind, strict = verdict(parse_json)
    finally:
        bodies._parsed_plainly = original
    assert kind == strict_kind
    assert got == strict if kind == "repeated" else _same(got, strict)
