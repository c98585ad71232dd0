"""The output record and the review record: plain dicts, encoded one JSON object per line with orjson.

Schema (README, "Output records"): source, offset, line, text, spans, confidence, model, flags,
review; review records add reason, runner_up; JSON input adds the carried fields under "fields".
"""

from __future__ import annotations

from itertools import accumulate, compress
from typing import Iterable, Iterator, Sequence

import numpy as np
import orjson

from streamtag.tagger import TaggedBatch, TaggedLine, TaggedSpan

_DUMPS_OPTIONS = orjson.OPT_APPEND_NEWLINE
DIGITS = 6  # decimals kept for every confidence in a record
_SCALE = 10.0 ** DIGITS
# |scaled - nearest integer + 0.5| beyond this cannot be a tie: the product x * 1e6 of an x in [0, 1]
# is off the exact one by at most half an ulp of 2**20 (about 6e-11).
_TIE_MARGIN = 1e-6


def span_dict(span: TaggedSpan) -> dict:
    item = {"start": span.start, "end": span.end, "label": span.label, "text": span.text}
    if span.confidence is not None:
        item["confidence"] = round(span.confidence, 6)
    return item


def make_record(
    tagged: TaggedLine,
    model_id: str,
    review: bool,
    source: str | None = None,
    offset: int | None = None,
    line: int | None = None,
    flags: list[str] | tuple[str, ...] = (),
    fields: dict | None = None,
) -> dict:
    """One output record per input line. ``flags`` from reading are merged with the tagger's."""
    record = {
        "source": source,
        "offset": offset,
        "line": line,
        "text": tagged.text,
        "spans": [span_dict(span) for span in tagged.spans],
        "confidence": round(tagged.confidence, 6),
        "model": model_id,
        "flags": sorted(set(flags) | set(tagged.flags)),
        "review": review,
    }
    if fields is not None:
        record["fields"] = fields
    return record


def make_review_record(record: dict, tagged: TaggedLine, threshold: float) -> dict:
    """The review-queue copy of an output record, with the reason and the runner-up labelling."""
    review = dict(record)
    review["reason"] = f"confidence {tagged.confidence:.3f} below {threshold:g}: {tagged.weakest}".rstrip(": ")
    if tagged.runner_up is not None:
        review["runner_up"] = {
            "spans": [span_dict(span) for span in tagged.runner_up],
            "probability": round(tagged.runner_up_probability or 0.0, 6),
        }
    else:
        review["runner_up"] = None
    return review


def rounded(values: Sequence[float]) -> list[float]:
    """``[round(v, 6) for v in values]`` (the same floats, bit for bit), for a batch at once. (n,) -> (n,)

    ``round(x, 6)`` is the double nearest to k / 10**6, with k the integer nearest to the exact x * 10**6
    (ties to even). For x in [0, 1] whose scaled value is not within ``_TIE_MARGIN`` of a tie, k is
    ``floor(x * 1e6 + 0.5)``, and ``k / 1e6`` is that double (IEEE 754 division is correctly rounded).
    Other values (near ties, negative or beyond 1, -0.0, NaN, and anything not a plain float, whose
    ``round`` keeps its type) go through ``round`` itself. It costs about a sixth of calling ``round``
    per value, which was the largest single cost of a record.
    """
    if not values:
        return []
    if set(map(type, values)) != {float}:
        return [round(value, DIGITS) for value in values]
    x = np.asarray(values, dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):  # inf and NaN are left to round() below
        scaled = x * _SCALE
        whole = np.floor(scaled + 0.5)
        out = (whole / _SCALE).tolist()
        safe = (x >= 0.0) & (x <= 1.0) & ~np.signbit(x) & (np.abs(scaled - np.floor(scaled) - 0.5) > _TIE_MARGIN)
    if not safe.all():
        for i in np.flatnonzero(~safe).tolist():
            out[i] = round(values[i], DIGITS)
    return out


def make_records(
    tagged: Sequence[TaggedLine],
    model_id: str,
    reviews: Sequence[bool],
    sources: Sequence[str | None],
    offsets: Sequence[int | None],
    line_numbers: Sequence[int | None],
    flags: Sequence[Sequence[str]],
    fields: Sequence[dict | None] | None = None,
) -> Iterator[dict]:
    """``make_record`` for a batch: the same dicts (same keys in the same order, same values), one at
    a time, so that ``encode(make_records(...))`` encodes each as soon as it is made and the batch's
    dicts are never all alive at once (which keeps the memory they use warm).

    Built with fewer steps per line: the batch's confidences are rounded together (``rounded``), span
    dicts are made in one pass, and a line without flags gets ``[]`` without building sets.
    ``fields`` None means no line carries fields.
    """
    spans = [span for result in tagged for span in result.spans]
    span_confidences = [span.confidence for span in spans]
    if None in span_confidences:  # not the tagger's main path (only runner-up spans lack one)
        span_items = [span_dict(span) for span in spans]
    else:
        span_items = [{"start": span.start, "end": span.end, "label": span.label, "text": span.text,
                       "confidence": confidence}
                      for span, confidence in zip(spans, rounded(span_confidences))]
    line_confidences = rounded([result.confidence for result in tagged])
    bounds = list(accumulate([len(result.spans) for result in tagged], initial=0))
    records = (
        {
            "source": source,
            "offset": offset,
            "line": line,
            "text": result.text,
            "spans": span_items[first:stop],
            "confidence": confidence,
            "model": model_id,
            "flags": sorted(set(line_flags) | set(result.flags)) if line_flags or result.flags else [],
            "review": review,
        }
        for result, source, offset, line, first, stop, confidence, line_flags, review
        in zip(tagged, sources, offsets, line_numbers, bounds, bounds[1:], line_confidences, flags, reviews)
    )
    if fields is None:
        return records
    return map(_with_fields, records, fields)


def _with_fields(record: dict, carried: dict | None) -> dict:
    if carried is not None:
        record["fields"] = carried  # last, as make_record puts it
    return record


def encode(records: Iterable[dict]) -> bytes:
    """Records as JSON Lines bytes, ready for one write."""
    dumps = orjson.dumps
    return b"".join([dumps(record, option=_DUMPS_OPTIONS) for record in records])


def encode_tagged_batch(
    tagged: TaggedBatch,
    model_id: str,
    reviews: np.ndarray,
    sources: Sequence[str | None],
    offsets: Sequence[int | None],
    line_numbers: Sequence[int | None],
    flags: Sequence[Sequence[str]],
) -> bytes | None:
    """``encode(make_records(tagged.tagged_lines(), ...))`` written by a compiled kernel from the
    batch's arrays, the same bytes; None when the kernel is not there or the batch holds something it
    does not write as orjson would (a confidence outside [0, 1], a negative or non-int offset, a lone
    surrogate...): the caller then takes the dict path. ``reviews`` (B,) bool.
    """
    from streamtag.crf import compiled  # the one switch and loader of every kernel module

    kernels = compiled("load", "record_kernels")
    n_lines = len(tagged.lines)
    if kernels is None or not n_lines:
        return None
    from streamtag import record_kernels  # loaded above; imported here so that numba loads only when used
    line_micro = _micro(tagged.confidence)
    span_micro = _micro(tagged.span_confidence)
    numbers = [_int_column(offsets), _int_column(line_numbers)]
    if line_micro is None or span_micro is None or None in numbers:
        return None
    try:
        pieces = _Pieces()
        labels = np.array([pieces.add(orjson.dumps(name)) for name in tagged.type_names.tolist()], dtype=np.int64)
        model_piece = pieces.add(orjson.dumps(model_id))
        line_source = pieces.column(sources)
        line_flags = _flag_pieces(pieces, tagged, flags)
    except (TypeError, orjson.JSONEncodeError):  # not JSON as the dict path would write it: let it decide
        return None
    text = "".join(tagged.lines)
    try:
        code_points = np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype=np.uint32)
    except UnicodeEncodeError:
        return None
    line_start = np.zeros(n_lines + 1, dtype=np.int64)
    np.cumsum(np.fromiter(map(len, tagged.lines), dtype=np.int64, count=n_lines), out=line_start[1:])
    span_chars = int((tagged.span_end - tagged.span_start).sum())
    piece_bytes, piece_start = pieces.arrays()
    size = (record_kernels.MAX_BYTES_PER_CODE_POINT * (code_points.size + span_chars)
            + n_lines * (record_kernels.LINE_OVERHEAD + int(np.diff(piece_start).max()) * 3)
            + tagged.span_line.size * (record_kernels.SPAN_OVERHEAD + pieces.longest_label(labels)))
    out = np.empty(size, dtype=np.uint8)
    (offset_values, has_offset), (line_values, has_line) = numbers
    written = kernels.write_records(code_points, line_start, piece_bytes, piece_start, line_source, line_flags,
                                    model_piece, offset_values, has_offset, line_values, has_line, line_micro,
                                    np.ascontiguousarray(reviews, dtype=np.bool_), tagged.span_bounds(),
                                    tagged.span_start, tagged.span_end, labels[tagged.span_type], span_micro, out)
    if written < 0:
        return None
    return out[:written].tobytes()


def _micro(values: np.ndarray) -> np.ndarray | None:
    """(n,) confidences -> (n,) int64 k with round(value, DIGITS) == k / 10**DIGITS, as `rounded`
    computes it; None if any value is outside [0, 1] (or -0.0, NaN), which the kernel does not write."""
    x = np.asarray(values, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        if not ((x >= 0.0) & (x <= 1.0)).all() or np.signbit(x).any():
            return None
        scaled = x * _SCALE
        whole = np.floor(scaled + 0.5)
        near_tie = np.abs(scaled - np.floor(scaled) - 0.5) <= _TIE_MARGIN
    micro = whole.astype(np.int64)
    for i in np.flatnonzero(near_tie).tolist():  # rare: round() decides, as `rounded` lets it
        micro[i] = int(round(round(float(x[i]), DIGITS) * _SCALE))
    return micro


def _int_column(values: Sequence[int | None]) -> tuple[np.ndarray, np.ndarray] | None:
    """(values as int64 (B,), present (B,) bool) for non-negative ints and None (null); None if any
    value is something else (a bool, a float, a negative or huge int), which the kernel does not write."""
    kinds = set(map(type, values))
    if not kinds <= {int, type(None)}:
        return None
    if type(None) in kinds:
        present = np.array([value is not None for value in values], dtype=np.bool_)
        values = [0 if value is None else value for value in values]
    else:
        present = np.ones(len(values), dtype=np.bool_)
    try:
        array = np.array(values, dtype=np.int64)
    except OverflowError:
        return None
    if array.size and array.min() < 0:
        return None
    return array, present


def _flag_pieces(pieces: _Pieces, tagged: TaggedBatch, flags: Sequence[Sequence[str]]) -> np.ndarray:
    """(B,) the piece of each line's flags list, as make_records builds it (sorted, no repeats)."""
    empty = pieces.add(b"[]")
    line_flags = np.full(len(tagged.lines), empty, dtype=np.int64)
    flagged = set(compress(range(len(flags)), flags))
    if tagged.split is not None:
        flagged.update(np.flatnonzero(tagged.split).tolist())
    for i in flagged:
        names = set(flags[i])
        if tagged.split is not None and tagged.split[i]:
            names.add("split")
        line_flags[i] = pieces.add(orjson.dumps(sorted(names)))
    return line_flags


class _Pieces:
    """JSON-encoded pieces for the record kernel, each stored once: (bytes, first offsets)."""

    def __init__(self) -> None:
        self._index: dict[bytes, int] = {}

    def add(self, piece: bytes) -> int:
        return self._index.setdefault(piece, len(self._index))

    def column(self, values: Sequence) -> np.ndarray:
        """(B,) the piece of each value (JSON-encoded once per distinct value)."""
        distinct = {value: self.add(orjson.dumps(value)) for value in dict.fromkeys(values)}
        return np.fromiter(map(distinct.__getitem__, values), dtype=np.int64, count=len(values))

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        pieces = list(self._index)
        starts = np.zeros(len(pieces) + 1, dtype=np.int64)
        np.cumsum([len(piece) for piece in pieces], out=starts[1:])
        return np.frombuffer(b"".join(pieces), dtype=np.uint8), starts

    def longest_label(self, labels: np.ndarray) -> int:
        lengths = [len(piece) for piece in self._index]
        return max((lengths[i] for i in labels.tolist()), default=0)
