"""BatchTokenizer: the same tokens as `tokenize`, line by line, whatever the cache holds.

The reference is `tokenize` itself, which tests/test_tokenize.py checks against the RFC examples and
Python's parsers (ipaddress, uuid, urllib, email, datetime). Every corpus of that file is run
through the batch path here, and hypothesis builds lines from the characters that sit at token
boundaries (spaces, tabs, '.', ':', '-', '/', '@', '\\', '%', quotes, brackets, digits, hex letters,
non-ASCII letters, combining marks, controls).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import test_tokenize as corpora
from streamtag.errors import DataError
from streamtag.tokenize import BatchTokenizer, tokenize

BOUNDARY_CHARS = " \t.:-/@\\%'\"[](){}<>=,;!?#_+~*0123456789abcdefABCDEFxyzXYZ" + "é\u0301ßİ٣²\u00a0\u0085\x00\x1b\ufeff"
SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def per_line(lines):
    """The batch as `tokenize` gives it, one line at a time (the reference)."""
    texts, kinds, starts, ends, counts = [], [], [], [], []
    for line in lines:
        tokens = tokenize(line)
        texts += tokens.texts
        kinds += tokens.kinds
        starts += tokens.starts
        ends += tokens.ends
        counts.append(len(tokens.texts))
    return texts, kinds, starts, ends, counts


def assert_same(batch, lines):
    texts, kinds, starts, ends, counts = per_line(lines)
    assert batch.texts == texts
    assert batch.kinds == kinds
    assert batch.starts.tolist() == starts and batch.ends.tolist() == ends
    assert batch.counts.tolist() == counts
    assert batch.starts.dtype == np.int64 and batch.counts.dtype == np.int64


line_text = st.text(st.sampled_from(BOUNDARY_CHARS), max_size=40)


@SETTINGS
@given(st.lists(st.lists(line_text, max_size=6), min_size=1, max_size=4), st.integers(0, 8))
def test_batches_equal_tokenize_line_by_line(batches, cache_size):
    tokenizer = BatchTokenizer(cache_size=cache_size)   # tiny caches: clearing mid-stream is exercised
    for lines in batches + batches:                     # the second round meets what the cache kept
        assert_same(tokenizer.tokenize_lines(lines), lines)


@pytest.mark.parametrize("name", ["RFC4291_FORMS", "RFC5424_EXAMPLES", "RFC3986_WITH_AUTHORITY",
                                  "RFC3986_WITHOUT_AUTHORITY", "LOG_FRAGMENTS", "FAST_PATH_EDGES"])
def test_standard_examples_through_the_batch_path(name):
    # The corpora of test_tokenize.py (RFC 4291 section 2.2, RFC 5424 section 6.5, RFC 3986 examples,
    # log fragments, fast-path edges), as lines and as one line joined by spaces.
    items = [item if isinstance(item, str) else item[0] for item in getattr(corpora, name)]
    lines = items + [" ".join(items), "  ".join(items) + " ", "\t".join(items)]
    tokenizer = BatchTokenizer(cache_size=3)
    assert_same(tokenizer.tokenize_lines(lines), lines)
    assert_same(tokenizer.tokenize_lines(lines[::-1]), lines[::-1])


def test_empty_lines_runs_of_spaces_and_an_empty_batch():
    tokenizer = BatchTokenizer()
    lines = ["", " ", "   a  b ", "a", "", "\t x\t", "a b"]
    assert_same(tokenizer.tokenize_lines(lines), lines)
    empty = tokenizer.tokenize_lines([])
    assert empty.texts == [] and empty.counts.tolist() == []


def test_long_pieces_are_tokenized_but_not_kept():
    tokenizer = BatchTokenizer(cache_size=100)
    long_piece = "ab.cd-" * 100   # 600 characters, one piece
    lines = [f"x {long_piece} y", long_piece, "x y"]
    for _ in range(3):
        assert_same(tokenizer.tokenize_lines(lines), lines)
    assert long_piece not in tokenizer._entries and "x" in tokenizer._entries


def test_a_huge_line_of_one_character_tokens():
    # 64 KiB of one-character tokens (the daemon's byte cap): same tokens, no trouble.
    line = "(" * 65536
    batch = BatchTokenizer().tokenize_lines([line, "a"])
    assert batch.counts.tolist() == [65536, 1] and batch.ends[-2] == 65536


def test_cache_stays_bounded():
    tokenizer = BatchTokenizer(cache_size=50)
    for start in range(0, 2000, 100):
        lines = [f"id={n} took {n * 7}ms" for n in range(start, start + 100)]
        assert_same(tokenizer.tokenize_lines(lines), lines)
        assert len(tokenizer._entries) <= 50


def test_non_str_lines_are_a_data_error():
    with pytest.raises(DataError):
        BatchTokenizer().tokenize_lines(["ok", b"bytes"])
    with pytest.raises(ValueError):
        BatchTokenizer(cache_size=-1)
