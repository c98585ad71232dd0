"""The output record and the review record: plain dicts, encoded one JSON object per line with orjson.

Schema (README, "Output records"): source, offset, line, text, spans, confidence, model, flags,
review; review records add reason, runner_up; JSON input adds the carried fields under "fields".
"""

from __future__ import annotations

from itertools import accumulate
from typing import Iterable, Iterator, Sequence

import numpy as np
import orjson

from streamtag.tagger import TaggedLine, TaggedSpan

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
