"""Batch record building (``rounded``, ``make_records``) against the per-line reference path.

``make_record`` and ``encode`` are the reference; the batch path must give the same JSON bytes.
External references named beside the checks:
- Python's built-in ``round`` (general-purpose reference): ``round(x, 6)`` is the float nearest to
  x rounded to 6 decimals, ties to even (Python language reference, "Built-in Functions").
- IEEE 754 (common practice): -0.0 and 0.0 are distinct floats and NaN is unequal to itself.
- RFC 8259 (JSON) section 4: object members keep the order written (we compare bytes, so order counts).
"""

from __future__ import annotations

import math
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag import records
from streamtag.tagger import TaggedLine, TaggedSpan


def bits(value) -> tuple:
    """Type and exact bit pattern (so 0.0 and -0.0 differ, and NaN equals NaN)."""
    if isinstance(value, float):
        return float, struct.pack("<d", value)
    return type(value), value


@pytest.mark.parametrize("value", [
    0.0, -0.0, 1.0, 0.5, 0.25, 1e-7, 5e-7, 4.9999999999e-7, 0.0000005, 0.1234565, 0.1234575, 0.9999995,
    0.9999994999999, 0.3333333333333333, 2.5e-7, 1.5, -0.3, 12.3456785, math.inf, -math.inf, math.nan,
    0.123456499999999, 0.123456500000001, 1 - 2 ** -53, 2 ** -1074,
])
def test_rounded_equals_round_on_ties_and_edges(value):
    # Python's round(x, 6) is the reference, bit for bit
    assert list(map(bits, records.rounded([value]))) == [bits(round(value, 6))]


def test_rounded_keeps_other_types_as_round_does():
    # Python's round: an int stays an int (orjson would then write 1, not 1.0)
    assert list(map(bits, records.rounded([1, 0.5]))) == [bits(1), bits(0.5)]
    assert records.rounded([]) == []


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(min_value=0.0, max_value=1.0) | st.floats(allow_nan=True, allow_infinity=True),
                max_size=50))
def test_rounded_equals_round_for_any_floats(values):
    assert list(map(bits, records.rounded(values))) == [bits(round(v, 6)) for v in values]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 10 ** 6), max_size=50), st.sampled_from([-1, 0, 1]))
def test_rounded_near_ties(ks, nudge):
    # values next to k + 1/2 millionths, where a careless scale-and-floor would go the wrong way
    values = [math.nextafter((k + 0.5) / 1e6, math.inf if nudge > 0 else -math.inf) if nudge else (k + 0.5) / 1e6
              for k in ks]
    values = [v for v in values if 0.0 <= v <= 1.0]
    assert list(map(bits, records.rounded(values))) == [bits(round(v, 6)) for v in values]


# -- whole records --------------------------------------------------------------------------------

_WORDS = st.sampled_from(["relay-07", "kestrel", "192.0.2.14", "/srv/data", "E4012", "brindle-04", "\u00e9t\u00e9"])
_CONFIDENCE = st.floats(min_value=0.0, max_value=1.0)
_SPAN = st.builds(TaggedSpan, start=st.integers(0, 200), end=st.integers(0, 200),
                  label=st.sampled_from(["host", "account", "netaddr", "path"]), text=_WORDS,
                  confidence=_CONFIDENCE)
_FLAGS = st.lists(st.sampled_from(["split", "truncated", "no_newline", "invalid_utf8", "control_chars"]), max_size=3)
_TAGGED = st.builds(
    TaggedLine, text=st.text(max_size=40), spans=st.lists(_SPAN, max_size=5), confidence=_CONFIDENCE,
    n_tokens=st.integers(0, 30), flags=_FLAGS, weakest=st.sampled_from(["", "span relay-07 (host)"]),
    runner_up=st.none() | st.lists(_SPAN.map(lambda s: TaggedSpan(s.start, s.end, s.label, s.text, None)),
                                   max_size=3),
    runner_up_probability=st.none() | _CONFIDENCE,
)


def reference_bytes(tagged, model_id, reviews, sources, offsets, lines, flags, fields) -> bytes:
    return records.encode([records.make_record(t, model_id, r, s, o, n, f, x)
                           for t, r, s, o, n, f, x in zip(tagged, reviews, sources, offsets, lines, flags, fields)])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(_TAGGED, st.booleans(), st.none() | st.just("/var/log/app.log"), st.integers(0, 10 ** 9),
                          st.integers(1, 10 ** 6), _FLAGS.map(tuple),
                          st.none() | st.just({"ts": "2026-01-02", "level": 3})), max_size=8))
def test_make_records_equals_make_record(rows):
    tagged, reviews, sources, offsets, lines, flags, fields = (list(column) for column in zip(*rows)) if rows else ([],) * 7
    reference = reference_bytes(tagged, "st1-test", reviews, sources, offsets, lines, flags, fields)
    made = list(records.make_records(tagged, "st1-test", reviews, sources, offsets, lines, flags, fields))
    fused = records.encode(records.make_records(tagged, "st1-test", reviews, sources, offsets, lines, flags, fields))
    # RFC 8259 section 4: bytes compared, so member order counts too
    assert records.encode(made) == reference
    assert fused == reference


def test_make_records_with_spans_lacking_confidence():
    # runner-up style spans have no confidence: the reference omits the key (README "Output records")
    line = TaggedLine("relay-07 down", [TaggedSpan(0, 8, "host", "relay-07", None)], 0.4, 2)
    fast = list(records.make_records([line], "m", [True], [None], [0], [1], [()]))
    assert records.encode(fast) == reference_bytes([line], "m", [True], [None], [0], [1], [()], [None])
    assert "confidence" not in fast[0]["spans"][0]
