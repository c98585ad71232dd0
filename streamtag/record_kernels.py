"""Compiled (numba) writer of output records: a batch's tagged lines, as arrays, -> JSON Lines bytes.

`records.make_records` + orjson build a dict, a list and a dict per span for every line and then
encode them: about 5 us a line, plus the tagger's objects they are made from (another ~4 us). The
kernel here writes the same bytes straight from the arrays the tagger computed, in one pass; the
Python side (`records.encode_tagged_batch`) prepares the few pieces that are not per-line numbers
(the sources, the model id, labels and any flags, each JSON-encoded by orjson once) and checks that
the batch is one the kernel writes exactly like orjson (otherwise it returns None and the caller
takes the dict path). A test compares both byte for byte.

JSON strings are written as orjson writes them, which is the minimal escaping RFC 8259 section 7
allows: '"' and '\\' escaped with a backslash; U+0008, U+0009, U+000A, U+000C, U+000D as \\b \\t \\n
\\f \\r; other characters below U+0020 as \\u00XX (lower-case hex); everything else as its UTF-8
bytes. Text arrives as code points (UTF-32), so the spans' character offsets index it directly.
A lone surrogate (not encodable in UTF-8; orjson refuses it) makes the kernel give up (-1).
"""

from __future__ import annotations

import threading
import warnings
from collections.abc import Callable
from typing import NamedTuple

import numba
import numpy as np

# The decode kernels' decorators: same options, machine code cached beside this module.
from streamtag.crf_kernels import _jit, _jit_cached

_HEX = np.frombuffer(b"0123456789abcdef", dtype=np.uint8).copy()
# The character after a backslash for the controls with a short escape (0 = use \u00XX).
_SHORT_ESCAPE = np.zeros(32, dtype=np.uint8)
for _code, _letter in ((8, "b"), (9, "t"), (10, "n"), (12, "f"), (13, "r")):
    _SHORT_ESCAPE[_code] = ord(_letter)
# A confidence is written as k / 10**6 (records.DIGITS decimals); these k are where orjson's shortest
# form is the exponent one ("1e-6" .. "9e-6"), checked against orjson for every k in a test.
_EXPONENT_BELOW = 10

# Literal pieces of a record, in its key order (records.make_record).
_SOURCE = np.frombuffer(b'{"source":', dtype=np.uint8).copy()
_OFFSET = np.frombuffer(b',"offset":', dtype=np.uint8).copy()
_LINE = np.frombuffer(b',"line":', dtype=np.uint8).copy()
_TEXT = np.frombuffer(b',"text":', dtype=np.uint8).copy()
_SPANS = np.frombuffer(b',"spans":[', dtype=np.uint8).copy()
_SPAN_START = np.frombuffer(b'{"start":', dtype=np.uint8).copy()
_SPAN_END = np.frombuffer(b',"end":', dtype=np.uint8).copy()
_SPAN_LABEL = np.frombuffer(b',"label":', dtype=np.uint8).copy()
_CONFIDENCE = np.frombuffer(b',"confidence":', dtype=np.uint8).copy()
_LINE_CONFIDENCE = np.frombuffer(b'],"confidence":', dtype=np.uint8).copy()
_MODEL = np.frombuffer(b',"model":', dtype=np.uint8).copy()
_FLAGS = np.frombuffer(b',"flags":', dtype=np.uint8).copy()
_REVIEW_TRUE = np.frombuffer(b',"review":true}\n', dtype=np.uint8).copy()
_REVIEW_FALSE = np.frombuffer(b',"review":false}\n', dtype=np.uint8).copy()
_NULL = np.frombuffer(b"null", dtype=np.uint8).copy()


@_jit
def _put(out, at, piece):
    for i in range(piece.size):
        out[at + i] = piece[i]
    return at + piece.size


@_jit
def _put_range(out, at, data, first, stop):
    for i in range(first, stop):
        out[at] = data[i]
        at += 1
    return at


@_jit
def _put_int(out, at, value):
    """A non-negative int64 in decimal."""
    if value == 0:
        out[at] = 48
        return at + 1
    digits = 0
    rest = value
    while rest:
        digits += 1
        rest //= 10
    end = at + digits
    rest = value
    for i in range(end - 1, at - 1, -1):
        out[i] = 48 + rest % 10
        rest //= 10
    return end


@_jit
def _put_int_or_null(out, at, value, present):
    if present:
        return _put_int(out, at, value)
    return _put(out, at, _NULL)


@_jit
def _put_micro(out, at, k):
    """k / 10**6 (0 <= k <= 10**6) as orjson writes that double: '0.0', '1.0', '3e-6', '0.25', '0.000125'."""
    if k == 0 or k == 1_000_000:
        out[at] = 48 + k // 1_000_000
        out[at + 1] = 46
        out[at + 2] = 48
        return at + 3
    if k < _EXPONENT_BELOW:
        out[at] = 48 + k
        out[at + 1] = 101  # e
        out[at + 2] = 45  # -
        out[at + 3] = 54  # 6
        return at + 4
    out[at] = 48
    out[at + 1] = 46
    at += 2
    divisor = 100_000
    while k:  # digits after the point, without trailing zeros
        out[at] = 48 + k // divisor
        at += 1
        k %= divisor
        divisor //= 10
    return at


@_jit
def _put_string(out, at, code_points, first, stop):
    """code_points[first:stop] as a JSON string (quotes included), UTF-8; -1 at a lone surrogate."""
    out[at] = 34
    at += 1
    for i in range(first, stop):
        c = code_points[i]
        if c < 0x80:
            if c < 0x20:
                out[at] = 92
                short = _SHORT_ESCAPE[c]
                if short:
                    out[at + 1] = short
                    at += 2
                else:
                    out[at + 1] = 117  # u
                    out[at + 2] = 48
                    out[at + 3] = 48
                    out[at + 4] = _HEX[c >> 4]
                    out[at + 5] = _HEX[c & 15]
                    at += 6
            elif c == 34 or c == 92:
                out[at] = 92
                out[at + 1] = c
                at += 2
            else:
                out[at] = c
                at += 1
        elif c < 0x800:
            out[at] = 0xC0 | (c >> 6)
            out[at + 1] = 0x80 | (c & 0x3F)
            at += 2
        elif c < 0x10000:
            if 0xD800 <= c < 0xE000:
                return -1
            out[at] = 0xE0 | (c >> 12)
            out[at + 1] = 0x80 | ((c >> 6) & 0x3F)
            out[at + 2] = 0x80 | (c & 0x3F)
            at += 3
        else:
            out[at] = 0xF0 | (c >> 18)
            out[at + 1] = 0x80 | ((c >> 12) & 0x3F)
            out[at + 2] = 0x80 | ((c >> 6) & 0x3F)
            out[at + 3] = 0x80 | (c & 0x3F)
            at += 4
    out[at] = 34
    return at + 1


@_jit_cached
def write_records(code_points, line_start, pieces, piece_start, line_source, line_flags, model_piece,
                  offsets, has_offset, line_numbers, has_line_number, line_micro, review,
                  span_bounds, span_start, span_end, span_label, span_micro, out):
    """Write the output records of B lines into out (M,) uint8; return the bytes written, or -1.

    code_points (C,) uint32: the lines' texts, line b at [line_start[b], line_start[b + 1]) (B + 1,).
    pieces (P,) uint8 with piece_start (K + 1,): JSON-encoded pieces (sources, flag lists, labels, the
    model id); line_source, line_flags (B,) and span_label (S,) name a piece, model_piece is one.
    offsets, line_numbers (B,) int64 (>= 0) with has_offset, has_line_number (B,) bool (False: null);
    line_micro (B,) and span_micro (S,) int64: confidences as k / 10**6, 0 <= k <= 10**6; review (B,)
    bool. Line b's spans are [span_bounds[b], span_bounds[b + 1]) (B + 1,), with character offsets
    span_start, span_end (S,) into the line. out must hold the records (`records` sizes it).
    """
    at = 0
    for b in range(line_source.size):
        first = line_start[b]
        at = _put(out, at, _SOURCE)
        at = _put_range(out, at, pieces, piece_start[line_source[b]], piece_start[line_source[b] + 1])
        at = _put(out, at, _OFFSET)
        at = _put_int_or_null(out, at, offsets[b], has_offset[b])
        at = _put(out, at, _LINE)
        at = _put_int_or_null(out, at, line_numbers[b], has_line_number[b])
        at = _put(out, at, _TEXT)
        at = _put_string(out, at, code_points, first, line_start[b + 1])
        if at < 0:
            return -1
        at = _put(out, at, _SPANS)
        for s in range(span_bounds[b], span_bounds[b + 1]):
            if s > span_bounds[b]:
                out[at] = 44  # ,
                at += 1
            at = _put(out, at, _SPAN_START)
            at = _put_int(out, at, span_start[s])
            at = _put(out, at, _SPAN_END)
            at = _put_int(out, at, span_end[s])
            at = _put(out, at, _SPAN_LABEL)
            at = _put_range(out, at, pieces, piece_start[span_label[s]], piece_start[span_label[s] + 1])
            at = _put(out, at, _TEXT)
            # Clipped to the line as Python's slicing clips (the tagger's spans always lie within it).
            stop = min(first + span_end[s], line_start[b + 1])
            at = _put_string(out, at, code_points, min(first + span_start[s], stop), stop)
            at = _put(out, at, _CONFIDENCE)
            at = _put_micro(out, at, span_micro[s])
            out[at] = 125  # }
            at += 1
        at = _put(out, at, _LINE_CONFIDENCE)
        at = _put_micro(out, at, line_micro[b])
        at = _put(out, at, _MODEL)
        at = _put_range(out, at, pieces, piece_start[model_piece], piece_start[model_piece + 1])
        at = _put(out, at, _FLAGS)
        at = _put_range(out, at, pieces, piece_start[line_flags[b]], piece_start[line_flags[b] + 1])
        at = _put(out, at, _REVIEW_TRUE if review[b] else _REVIEW_FALSE)
    return at


# Bytes of a record besides its text, spans, source, flags and model (keys, punctuation, two
# int64 and a confidence at most), and of a span besides its text and label.
LINE_OVERHEAD = 160
SPAN_OVERHEAD = 80
# Bytes a code point takes at most in a JSON string (\u00XX).
MAX_BYTES_PER_CODE_POINT = 6

_LOAD_LOCK = threading.Lock()


class Kernels(NamedTuple):
    """The compiled kernels `records` uses."""

    write_records: Callable


def _warm_up(kernels: Kernels) -> None:
    """Compile (or load from the cache) the signature `records` uses, on a one-line batch."""
    one = np.ones(1, dtype=np.int64)
    zero = np.zeros(1, dtype=np.int64)
    flag = np.ones(1, dtype=np.bool_)
    kernels.write_records(np.frombuffer("a".encode("utf-32-le"), dtype=np.uint32), np.array([0, 1], dtype=np.int64),
                          np.frombuffer(b"nullnull[]", dtype=np.uint8), np.array([0, 4, 8, 10], dtype=np.int64),
                          zero, one + 1, 0, zero, flag, zero, flag, zero, flag, np.array([0, 1], dtype=np.int64),
                          zero, one, one, zero, np.empty(400, dtype=np.uint8))


def load() -> Kernels:
    """The kernels, compiled (from the cache when it can be read, else compiled afresh, silently)."""
    with _LOAD_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", numba.NumbaWarning)
        kernels = Kernels(write_records)
        try:
            _warm_up(kernels)
        except Exception:  # noqa: BLE001 - a cache fault; a real compile error recurs below and is raised
            kernels = Kernels(_jit(write_records.py_func))
            _warm_up(kernels)
        return kernels
