"""An order's story packed into its record and read back: exactly what the stages wrote, each number at most once."""
from __future__ import annotations

import json
import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.audit.records import _NUMBERS, Packer, canonical, define_key, unpack


class Chain:
    """The define records a series of packed events refers to, as the log keeps them (by seq) and its index
    finds them (by kind and key)."""

    def __init__(self):
        self.bodies: dict[int, object] = {}
        self.found: dict[tuple[str, str], tuple[int, bytes | None]] = {}

    def defines_of(self, keys):
        return {key: self.found[key] for key in keys if key in self.found}

    def round_trip(self, event):
        *defines, packed = Packer(len(self.bodies) + 1, self.defines_of).pack([event])
        for seq, record in enumerate(defines, len(self.bodies) + 1):
            key, numbers = define_key(record)
            self.bodies[seq] = record["body"]
            self.found[record["kind"], key] = (seq, numbers)
        as_logged = json.loads(json.dumps(packed))  # what a reader of the log gets
        return packed, unpack(as_logged, self.bodies.__getitem__)


def test_a_number_the_define_holds_is_not_written_again():
    # The format as the README documents it: "<define seq> <mask> <numbers>".
    chain = Chain()
    first = {"after": 1.25, "before": 1.25, "reason": "from 1.25", "source": "ISO 8598"}
    packed, _ = chain.round_trip({"event": "published", "changes": [first]})
    assert packed["changes"] == ["1 0"]  # the first of its form: all its numbers are the define's
    second = {"after": 2.5, "before": 1.25, "reason": "from 2.5", "source": "ISO 8598"}
    packed, whole = chain.round_trip({"event": "published", "changes": [second]})
    # Numbers 0 and 2 differ from the define's (mask 0b101); number 2 is number 0 again, written "@0".
    assert packed["changes"] == ["1 5 2.5,@0"]
    assert whole["changes"] == [second]
    other_source = dict(second, source="ISO 8598 and ISO 8624")  # other words: another form, a define of its own
    flag = {"code": "x", "values": {"d": 12.695176657740783}, "message": "at 12.695176657740783"}
    packed, whole = chain.round_trip({"event": "published", "changes": [other_source, first], "flags": [flag]})
    assert packed["changes"] == ["2 0", "1 0"] and packed["flags"] == ["3 0"]
    assert whole["changes"] == [other_source, first] and whole["flags"] == [flag]
    other = {"code": "x", "values": {"d": 3.0999999999999996}, "message": "at 3.0999999999999996"}
    packed, whole = chain.round_trip({"event": "published", "changes": [second], "flags": [other]})
    # The flag's numbers are the story's 4th and 5th (counted from 0, after the change's four).
    assert packed["flags"] == ["3 3 3.0999999999999996,@4"] and whole["flags"] == [other]


def test_the_run_and_its_configuration_are_referred_to_by_seq():
    chain = Chain()
    run = {"engine_version": "1", "config": {"watch": {"quiet_seconds": 0.5}}}
    packed, whole = chain.round_trip({"event": "published", "run": run, "changes": []})
    assert packed["run"] == 2 and chain.bodies[2]["config"] == 1
    assert whole["run"] == {"engine_version": "1", "config": 1}


def test_a_story_item_that_does_not_fit_its_define_is_refused():
    chain = Chain()
    chain.round_trip({"event": "published", "changes": [{"a": 1, "b": 2}]})
    for item in ("1 4 7", "1 1 7,8", "1 3 7", "1 1 @0", "1 1 @5", "1 1 ]", "1 1 -", "x 0", "1 1 7 "):
        with pytest.raises(ValueError):
            unpack({"event": "published", "changes": [item]}, chain.bodies.__getitem__)


json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-10**12, 10**12) | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(alphabet=st.characters(codec="utf-8"), max_size=30)
    | st.sampled_from(["\x00", "\x01x", "\x02", "edge 1.7–4.2 mm", "-0", "007", "1.50", "-0.0", "1e5", "Z80.1",
                       "resin-1.67", "\n12\t", "@3", "1 0"]),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=20)
numbers = st.integers(-10**6, 10**6) | st.floats(allow_nan=False, allow_infinity=False)


def other_numbers(value, draw):
    """The same value with other numbers in it (the same form, so the same define)."""
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, (int, float)):
        return draw(numbers)
    if isinstance(value, list):
        return [other_numbers(part, draw) for part in value]
    return {key: other_numbers(part, draw) for key, part in value.items()}


@settings(max_examples=300, deadline=None)
@given(st.lists(json_values, max_size=5), st.lists(json_values, max_size=3), st.data())
def test_a_packed_story_gives_back_exactly_what_the_stages_wrote(changes, flags, data):
    chain = Chain()
    for story in ({"changes": changes, "flags": flags},
                  {"changes": other_numbers(changes, data.draw), "flags": other_numbers(flags, data.draw)},
                  {"changes": flags + changes, "flags": changes}):
        _, whole = chain.round_trip({"event": "published", **story})
        for name in ("changes", "flags"):
            # The same JSON text: the same numbers of the same type (1 is not 1.0, -0.0 is not 0.0).
            assert canonical(whole[name]) == canonical(story[name])


# Source: RFC 8259 section 6, a JSON number: minus, integer part, fraction, exponent (leading zeros allowed
# here, for the numbers in texts). The packer's pattern is written for speed; it must cut as the plain one.
PLAIN_NUMBER = re.compile(rb"(-?[0-9]+(?:\.[0-9]+)?(?:[eE][-+]?[0-9]+)?)")


@settings(max_examples=500, deadline=None)
@given(st.binary(max_size=60) | st.text(alphabet="-+.eE0123456789 x\"\x00", max_size=40).map(str.encode))
def test_the_packers_number_pattern_cuts_as_the_plain_one(text):
    assert _NUMBERS.split(text) == PLAIN_NUMBER.split(text)
