"""One batch through the middle stages: decoded lines -> tagged lines -> record bytes.

`watch`, `replay` and `tag` differ only in where lines come from and where records go; this is
the part they share, so a line gives the same record whichever command tagged it. No files.
"""

from __future__ import annotations

from typing import Callable, Sequence

from streamtag import records
from streamtag.decode import DecodedLine
from streamtag.tagger import TaggedLine, Tagger


def tag_decoded(tagger: Tagger, decoded: Sequence[DecodedLine], review_below: float | None,
                log: Callable[[str], None] | None = None) -> list[TaggedLine]:
    """Tag the text lines of a batch; binary lines get an empty result (recorded, not tagged).

    A fault while tagging the batch must not stall a stream: the lines are then tagged one by one,
    and a line that still fails gets an empty result flagged "tag_error".
    """
    to_tag = [i for i, line in enumerate(decoded) if not line.binary]
    texts = [decoded[i].tag_text for i in to_tag]
    try:
        tagged = tagger.tag(texts, review_below=review_below)
    except Exception as exc:  # noqa: BLE001 (any defect: fall back, keep the stream moving)
        if log is not None:
            log(f"tagging a batch failed ({type(exc).__name__}: {exc}); tagging its lines one by one")
        tagged = [_tag_one(tagger, text, review_below) for text in texts]
    results: list[TaggedLine] = [TaggedLine(text=line.text, spans=[], confidence=1.0, n_tokens=0)
                                 for line in decoded]
    for i, result in zip(to_tag, tagged):
        result.text = decoded[i].text  # the faithful text; span offsets are the same in both
        results[i] = result
    return results


def _tag_one(tagger: Tagger, text: str, review_below: float | None) -> TaggedLine:
    try:
        return tagger.tag([text], review_below=review_below)[0]
    except Exception:  # noqa: BLE001
        return TaggedLine(text=text, spans=[], confidence=0.0, n_tokens=0, flags=["tag_error"])


def encode_batch(decoded: Sequence[DecodedLine], tagged: Sequence[TaggedLine], model_id: str, threshold: float,
                 sources: Sequence[str | None], offsets: Sequence[int | None], line_numbers: Sequence[int | None],
                 read_flags: Sequence[Sequence[str]], want_review: bool = True) -> tuple[bytes, bytes, int]:
    """Records of a batch as (output bytes, review bytes, lines sent to review).

    A line below ``threshold`` is marked for review (binary lines never are); with ``want_review``
    its review record, with reason and runner-up, goes to the review bytes as well.
    """
    output, review, n_review = [], [], 0
    for i, (line, result) in enumerate(zip(decoded, tagged)):
        doubtful = not line.binary and result.confidence < threshold
        record = records.make_record(result, model_id, doubtful, source=sources[i], offset=offsets[i],
                                     line=line_numbers[i], flags=list(read_flags[i]) + line.flags,
                                     fields=line.fields)
        output.append(record)
        if doubtful:
            n_review += 1
            if want_review:
                review.append(records.make_review_record(record, result, threshold))
    return records.encode(output), records.encode(review), n_review
