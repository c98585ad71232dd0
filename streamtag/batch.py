"""One batch through the middle stages: decoded lines -> tagged lines -> record bytes.

`watch`, `replay` and `tag` differ only in where lines come from and where records go; this is
the part they share, so a line gives the same record whichever command tagged it. No files.

A decoded line is a ``DecodedLine``, or just a ``str`` for a plain line (``decode_lines``: valid
UTF-8, no controls, so the text to tag is the text to record and there are no flags); both kinds
may be mixed in one batch.
"""

from __future__ import annotations

import ctypes
import gc
from contextlib import contextmanager
from typing import Callable, Iterator, Sequence, Union

import numpy as np

from streamtag import records
from streamtag.decode import DecodedLine
from streamtag.tagger import TaggedLine, Tagger

Decoded = Union[str, DecodedLine]

# The cycle collector runs when the tracked objects allocated minus those freed pass this number.
# A batch keeps a few objects per line alive at once (records, spans, tagger work), so at Python's
# default of 700 every batch set off several collections, each rescanning the batch and promoting
# it, plus full collections over the model and caches: measured 11 us of a line's 129 us of tagging
# (and a line tagged in 105 us without them). Batch garbage is freed by reference counting; this
# threshold only bounds how much cyclic garbage (rare here) waits for the collector.
GC_YOUNG_THRESHOLD = 50_000


@contextmanager
def fewer_collections() -> Iterator[None]:
    """Run a tagging loop with the young-generation threshold at GC_YOUNG_THRESHOLD, then restore it."""
    previous = gc.get_threshold()
    gc.set_threshold(GC_YOUNG_THRESHOLD, *previous[1:])
    try:
        yield
    finally:
        gc.set_threshold(*previous)


# mallopt(3) parameters of glibc's malloc.h.
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
# Freed memory kept for reuse: a batch's buffers (alpha and beta of 1000 lines are 3.2 MB each) come
# and go every batch, well under this.
KEEP_FREED_BYTES = 64 << 20


def keep_freed_memory() -> bool:
    """Ask glibc's malloc to keep freed memory for reuse rather than hand it back to the system.

    By default glibc gives the free top of its heap back after each batch (and serves blocks over its
    mmap threshold with fresh mappings), so the next batch's decode buffers touch new pages: about
    2,000 page faults per batch of 1000 lines, 2.5 us each on this project's machines, about 5 us a
    line. With allocations up to KEEP_FREED_BYTES served from the heap and up to twice that kept at
    its top, memory is reused; resident memory then stays at the loop's working set (flat, as the
    memory benchmark checks). Process-wide and kept; True if applied, False where the C library has
    no mallopt (not glibc): nothing changes there.
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    # mallopt returns 1 on success (glibc manual, "Malloc Tunable Parameters")
    return mallopt(_M_MMAP_THRESHOLD, KEEP_FREED_BYTES) == 1 and mallopt(_M_TRIM_THRESHOLD, 2 * KEEP_FREED_BYTES) == 1


def _all_plain(decoded: Sequence[Decoded]) -> bool:
    return all(kind is str for kind in set(map(type, decoded)))


def tag_decoded(tagger: Tagger, decoded: Sequence[Decoded], review_below: float | None,
                log: Callable[[str], None] | None = None) -> list[TaggedLine]:
    """Tag the text lines of a batch; binary lines get an empty result (recorded, not tagged).

    A fault while tagging the batch must not stall a stream: the lines are then tagged one by one,
    and a line that still fails gets an empty result flagged "tag_error".
    """
    if _all_plain(decoded):
        to_tag = None
        texts = list(decoded)
        faithful = texts
    else:
        to_tag = [i for i, line in enumerate(decoded) if type(line) is str or not line.binary]
        texts = [_tag_text(decoded[i]) for i in to_tag]
        faithful = [_text(decoded[i]) for i in to_tag]
    try:
        tagged = tagger.tag(texts, review_below=review_below)
    except Exception as exc:  # noqa: BLE001 (any defect: fall back, keep the stream moving)
        if log is not None:
            log(f"tagging a batch failed ({type(exc).__name__}: {exc}); tagging its lines one by one")
        tagged = [_tag_one(tagger, text, review_below) for text in texts]
    for result, text in zip(tagged, faithful):
        result.text = text  # the faithful text; span offsets are the same in both
    if to_tag is None:
        return tagged
    results: list[TaggedLine | None] = [None] * len(decoded)
    for i, result in zip(to_tag, tagged):
        results[i] = result
    return [result if result is not None else TaggedLine(text=_text(line), spans=[], confidence=1.0, n_tokens=0)
            for line, result in zip(decoded, results)]


def _tag_text(line: Decoded) -> str:
    return line if type(line) is str else line.tag_text


def _text(line: Decoded) -> str:
    return line if type(line) is str else line.text


def _tag_one(tagger: Tagger, text: str, review_below: float | None) -> TaggedLine:
    try:
        return tagger.tag([text], review_below=review_below)[0]
    except Exception:  # noqa: BLE001
        return TaggedLine(text=text, spans=[], confidence=0.0, n_tokens=0, flags=["tag_error"])


def encode_batch(decoded: Sequence[Decoded], tagged: Sequence[TaggedLine], model_id: str, threshold: float,
                 sources: Sequence[str | None], offsets: Sequence[int | None], line_numbers: Sequence[int | None],
                 read_flags: Sequence[Sequence[str]], want_review: bool = True) -> tuple[bytes, bytes, int]:
    """Records of a batch as (output bytes, review bytes, lines sent to review).

    A line below ``threshold`` is marked for review (binary lines never are); with ``want_review``
    its review record, with reason and runner-up, goes to the review bytes as well.
    """
    if _all_plain(decoded):
        reviews = [result.confidence < threshold for result in tagged]
        flags, fields = read_flags, None
    else:
        reviews, flags, fields = [], [], []
        for line, result, read in zip(decoded, tagged, read_flags):
            if type(line) is str:
                reviews.append(result.confidence < threshold)
                flags.append(read)
                fields.append(None)
            else:
                reviews.append(not line.binary and result.confidence < threshold)
                flags.append(list(read) + line.flags)
                fields.append(line.fields)
    output = records.encode(records.make_records(tagged, model_id, reviews, sources, offsets, line_numbers, flags,
                                                 fields))
    doubtful = [i for i, review in enumerate(reviews) if review]
    review_bytes = b""
    if want_review and doubtful:
        # The output records were encoded and freed; the few doubtful ones are made again.
        review_bytes = _review_bytes([tagged[i] for i in doubtful], doubtful, model_id, threshold, sources, offsets,
                                     line_numbers, flags, fields)
    return output, review_bytes, len(doubtful)


def tag_and_encode(tagger: Tagger, decoded: Sequence[Decoded], threshold: float, review_below: float | None,
                   sources: Sequence[str | None], offsets: Sequence[int | None],
                   line_numbers: Sequence[int | None], read_flags: Sequence[Sequence[str]],
                   want_review: bool = True, log: Callable[[str], None] | None = None) -> tuple[bytes, bytes, int]:
    """``encode_batch(decoded, tag_decoded(tagger, decoded, review_below, log), ...)``: the same bytes.

    A batch of plain lines (the usual case) has its records written by the compiled record writer
    from the tagger's arrays (`records.encode_tagged_batch`), without a TaggedLine per line or a dict
    per record; only its lines going to review are made as objects, for their review records.
    """
    if _all_plain(decoded):
        encoded = _tag_and_encode_plain(tagger, list(decoded), threshold, review_below, sources, offsets,
                                        line_numbers, read_flags, want_review)
        if encoded is not None:
            return encoded
    tagged = tag_decoded(tagger, decoded, review_below, log)
    return encode_batch(decoded, tagged, tagger.model_id, threshold, sources, offsets, line_numbers, read_flags,
                        want_review)


def _tag_and_encode_plain(tagger: Tagger, texts: list[str], threshold: float, review_below: float | None,
                          sources, offsets, line_numbers, read_flags, want_review: bool) -> tuple[bytes, bytes, int] | None:
    """`tag_and_encode` of plain lines through the record writer; None to take the general path."""
    try:
        tagged = tagger.tag_batch(texts, review_below=review_below)
    except Exception:  # noqa: BLE001 (the general path tags again, logs, and falls back line by line)
        return None
    reviews = tagged.confidence < threshold  # (B,) as encode_batch decides, float for float
    output = records.encode_tagged_batch(tagged, tagger.model_id, reviews, sources, offsets, line_numbers,
                                         read_flags)
    if output is None:  # something the writer leaves to orjson: the dict path, on the same tagging
        return encode_batch(texts, tagged.tagged_lines(), tagger.model_id, threshold, sources, offsets,
                            line_numbers, read_flags, want_review)
    doubtful = np.flatnonzero(reviews).tolist()
    review_bytes = b""
    if want_review and doubtful:
        review_bytes = _review_bytes([tagged.line(i) for i in doubtful], doubtful, tagger.model_id, threshold,
                                     sources, offsets, line_numbers, read_flags, None)
    return output, review_bytes, len(doubtful)


def _review_bytes(results: list[TaggedLine], doubtful: list[int], model_id: str, threshold: float, sources,
                  offsets, line_numbers, flags, fields) -> bytes:
    """Review records of the lines ``doubtful`` (their tagged ``results``), with reason and runner-up."""
    columns = ([column[i] for i in doubtful] for column in (sources, offsets, line_numbers, flags))
    chosen_fields = None if fields is None else [fields[i] for i in doubtful]
    review_records = records.make_records(results, model_id, [True] * len(doubtful), *columns, chosen_fields)
    return records.encode([records.make_review_record(record, result, threshold)
                           for record, result in zip(review_records, results)])
