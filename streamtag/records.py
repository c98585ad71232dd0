"""The output record and the review record: plain dicts, encoded one JSON object per line with orjson.

Schema (README, "Output records"): source, offset, line, text, spans, confidence, model, flags,
review; review records add reason, runner_up; JSON input adds the carried fields under "fields".
"""

from __future__ import annotations

import orjson

from streamtag.tagger import TaggedLine, TaggedSpan

_DUMPS_OPTIONS = orjson.OPT_APPEND_NEWLINE


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


def encode(records: list[dict]) -> bytes:
    """Records as JSON Lines bytes, ready for one write."""
    return b"".join(orjson.dumps(record, option=_DUMPS_OPTIONS) for record in records)
