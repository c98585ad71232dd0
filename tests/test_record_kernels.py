"""The compiled record writer (``records.encode_tagged_batch``) against orjson and the dict path.

The dict path (``records.encode(records.make_records(batch.tagged_lines(), ...))``, encoded by orjson)
is the reference: the writer must give the same bytes, or None (then the caller takes the dict path).
External references named beside the checks:
- orjson (a general-purpose JSON library): its output for the same records, byte for byte; for a
  float, its shortest round-trip form ("0.25", "1e-6").
- RFC 8259 (JSON) section 7: strings escape '"', '\\' and U+0000..U+001F, everything else may be
  written as itself; section 8.1: JSON text is UTF-8. Python's json module (standard library) reads
  each record back.
- RFC 3629 (UTF-8) section 3: the surrogates U+D800..U+DFFF are not encodable, so a lone one cannot
  be written (orjson refuses it too).
- IEEE 754 (common practice): -0.0 is a distinct float (orjson writes "-0.0").
"""

from __future__ import annotations

import json
import math

import numpy as np
import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag import crf, records
from streamtag.tagger import TaggedBatch

TYPES = np.array(["host", "account", "netaddr"], dtype=object)


def batch(lines, spans, confidence=None, split=None) -> TaggedBatch:
    """A TaggedBatch by hand: spans as (line, start, end, type index, confidence), ordered by line."""
    columns = list(zip(*spans)) if spans else [[]] * 5
    as_int = lambda values: np.array(values, dtype=np.int64)  # noqa: E731
    if confidence is None:
        confidence = [0.5] * len(lines)
    return TaggedBatch(list(lines), as_int(columns[0]), as_int(columns[1]), as_int(columns[2]), as_int(columns[3]),
                       np.array(columns[4], dtype=np.float64), np.array(confidence, dtype=np.float64),
                       as_int([len(line.split()) for line in lines]),
                       None if split is None else np.array(split, dtype=bool), TYPES)


def both(tagged: TaggedBatch, reviews=None, sources=None, offsets=None, line_numbers=None, flags=None):
    """(writer bytes or None, dict-path bytes) of one batch."""
    n = len(tagged.lines)
    reviews = np.zeros(n, dtype=bool) if reviews is None else np.asarray(reviews, dtype=bool)
    sources = ["/var/log/app.log"] * n if sources is None else sources
    offsets = list(range(0, 100 * n, 100)) if offsets is None else offsets
    line_numbers = list(range(1, n + 1)) if line_numbers is None else line_numbers
    flags = [()] * n if flags is None else flags
    fast = records.encode_tagged_batch(tagged, "model-7", reviews, sources, offsets, line_numbers, flags)
    slow = records.encode(records.make_records(tagged.tagged_lines(), "model-7", reviews.tolist(), sources, offsets,
                                               line_numbers, flags))
    return fast, slow


@pytest.fixture(autouse=True)
def kernels_present():
    if crf.compiled("load", "record_kernels") is None:
        pytest.skip("numba is not available here")


def test_every_confidence_is_written_as_orjson_writes_it():
    # orjson's shortest round-trip float for every k / 10**6, k = 0 .. 10**6: the writer's rule
    # ("0.0", "1.0", "1e-6".."9e-6", else "0." and the digits without trailing zeros)
    k = np.arange(10 ** 6 + 1)
    lines = ["x"] * k.size
    tagged = batch(lines, [], confidence=k / 1e6)
    fast, slow = both(tagged, sources=[None] * k.size, offsets=[None] * k.size, line_numbers=[None] * k.size)
    assert fast == slow


def test_a_small_batch_is_readable_json_with_the_record_fields():
    lines = ['login failed for "kestrel" from 192.0.2.14', "tab\there and back\\slash"]
    tagged = batch(lines, [(0, 17, 26, 1, 0.9871234), (0, 32, 42, 2, 1.0), (1, 30, 99, 0, 0.5)], confidence=[0.9871234, 1.0])
    fast, slow = both(tagged, reviews=[True, False])
    assert fast == slow  # orjson's bytes
    first = json.loads(fast.split(b"\n")[0])  # Python's json module reads it back (RFC 8259)
    assert first["text"] == lines[0] and first["review"] is True and first["confidence"] == 0.987123
    assert first["spans"][0] == {"start": 17, "end": 26, "label": "account", "text": '"kestrel"',
                                 "confidence": 0.987123}
    assert json.loads(fast.split(b"\n")[1])["spans"][0]["text"] == ""  # past the line: clipped as slicing clips
    assert list(first) == ["source", "offset", "line", "text", "spans", "confidence", "model", "flags", "review"]


@pytest.mark.parametrize("code", list(range(0x20)) + [0x22, 0x5C, 0x7F, 0x80, 0x9F, 0x2028, 0xFEFF, 0xFFFF, 0x10FFFF])
def test_each_escaped_or_special_character(code):
    # RFC 8259 section 7: the characters that must be escaped, and some that need not be
    line = f"a{chr(code)}b host-1"
    fast, slow = both(batch([line], [(0, 4, 10, 0, 0.75)]))
    assert fast == slow
    assert json.loads(fast)["text"] == line


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=40), min_size=1,
                max_size=8), st.data())
def test_any_text_and_spans_equal_the_dict_path(lines, data):
    spans = []
    for index, line in enumerate(lines):
        bounds = sorted(data.draw(st.lists(st.integers(0, len(line)), max_size=4, unique=True)))
        for start, end in zip(bounds[::2], bounds[1::2]):
            spans.append((index, start, end, data.draw(st.integers(0, 2)), data.draw(st.floats(0.0, 1.0))))
    confidence = data.draw(st.lists(st.floats(0.0, 1.0), min_size=len(lines), max_size=len(lines)))
    reviews = [value < 0.5 for value in confidence]
    fast, slow = both(batch(lines, spans, confidence), reviews=reviews)
    assert fast == slow
    assert [json.loads(record)["text"] for record in fast.splitlines()] == lines  # RFC 8259 section 8.1


def test_flags_sources_and_missing_numbers():
    lines = ["one", "two", "three", "four"]
    tagged = batch(lines, [], split=[False, True, False, True])
    flags = [("truncated",), (), ("truncated", "invalid_utf8"), ("split",)]
    sources = ["/var/log/a.log", None, "/var/log/b \"quoted\".log", "/var/log/a.log"]
    fast, slow = both(tagged, sources=sources, offsets=[0, None, 2 ** 62, 7], line_numbers=[None, 2, 3, None],
                      flags=flags)
    assert fast == slow
    assert [json.loads(r)["flags"] for r in fast.splitlines()] == [
        ["truncated"], ["split"], ["invalid_utf8", "truncated"], ["split"]]


@pytest.mark.parametrize("change", [
    {"confidence": [math.nan]}, {"confidence": [-0.0]}, {"confidence": [1.5]}, {"offsets": [-1]},
    {"offsets": [True]}, {"offsets": [1.5]}, {"offsets": [2 ** 64]}, {"line": "\ud800 lone"},
])
def test_what_the_writer_leaves_to_orjson(change):
    # IEEE 754 (-0.0, NaN), RFC 3629 section 3 (surrogates): the writer declines, the dict path decides
    line = change.get("line", "plain")
    tagged = batch([line], [], confidence=change.get("confidence", [0.5]))
    n = 1
    fast = records.encode_tagged_batch(tagged, "model-7", np.zeros(n, dtype=bool), ["/x"], change.get("offsets", [0]),
                                       [1], [()])
    assert fast is None


def test_empty_batch_and_line_without_spans():
    assert records.encode_tagged_batch(batch([], []), "m", np.zeros(0, dtype=bool), [], [], [], []) is None
    fast, slow = both(batch([""], [], confidence=[1.0]))
    assert fast == slow == orjson.dumps(
        {"source": "/var/log/app.log", "offset": 0, "line": 1, "text": "", "spans": [], "confidence": 1.0,
         "model": "model-7", "flags": [], "review": False}, option=orjson.OPT_APPEND_NEWLINE)
