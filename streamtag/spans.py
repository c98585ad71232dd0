"""BIO tags <-> spans, IOB1 -> IOB2, token offsets <-> character offsets, label sets.

Pure functions, no I/O. A tag is "O" or "<prefix>-<type>" with prefix B (begin) or I (inside);
E (end) and S (single) are also understood when reading chunks, because the CoNLL chunk rules
define them and mixed-scheme predictions should not crash an evaluation.

Chunk rules (those of the CoNLL-2000 scorer):
  a chunk starts at B-X, at S-X, at I-X/E-X after O, and at any tag whose type differs from the
  previous tag's type; a chunk ends before B-X/S-X/O, after E-X/S-X, and before a change of type.
So "O I-X I-X" is one chunk X of two tokens, and "B-X I-Y" is two chunks.

Spans are ``(start, end, type)`` with ``end`` exclusive, in tokens or characters as named.
"""

from __future__ import annotations

from bisect import bisect_left, bisect_right
from collections.abc import Iterable, Sequence

import numpy as np

OUTSIDE = "O"
_PREFIXES = frozenset("BIES")

Span = tuple[int, int, str]


def label_list(types: Iterable[str]) -> list[str]:
    """Label set of a model: "O" at index 0, then "B-<type>", "I-<type>" for each type, sorted.

    Type k (0-based, in sorted order) has B at index 1 + 2k and I at index 2 + 2k.
    """
    labels = [OUTSIDE]
    for entity_type in sorted(set(types)):
        if not entity_type or any(char.isspace() for char in entity_type):
            raise ValueError(f"bad entity type {entity_type!r}: must be non-empty, without spaces")
        labels += [f"B-{entity_type}", f"I-{entity_type}"]
    return labels


def split_tag(tag: str) -> tuple[str, str]:
    """"B-host" -> ("B", "host"); "O" -> ("O", ""). ValueError on anything else."""
    if tag == OUTSIDE:
        return OUTSIDE, ""
    if len(tag) > 2 and tag[1] == "-" and tag[0] in _PREFIXES:
        return tag[0], tag[2:]
    raise ValueError(f"bad tag {tag!r}: expected O, B-<type> or I-<type>")


def _chunk_ends(prev_prefix: str, prev_type: str, prefix: str, entity_type: str) -> bool:
    """True if a chunk ends between the previous tag and this one (CoNLL-2000 scorer rules)."""
    if prev_prefix in ("E", "S"):
        return True
    if prev_prefix in ("B", "I") and prefix in ("B", "S", OUTSIDE):
        return True
    return prev_prefix != OUTSIDE and prev_type != entity_type


def _chunk_starts(prev_prefix: str, prev_type: str, prefix: str, entity_type: str) -> bool:
    """True if a chunk starts at this tag (CoNLL-2000 scorer rules)."""
    if prefix in ("B", "S"):
        return True
    if prefix in ("I", "E") and prev_prefix in ("E", "S", OUTSIDE):
        return True
    return prefix != OUTSIDE and prev_type != entity_type


def bio_to_spans(tags: Sequence[str]) -> list[Span]:
    """Token spans ``[(start, end, type)]`` (end exclusive) of a tag sequence, CoNLL chunk rules."""
    spans: list[Span] = []
    prev_prefix, prev_type, chunk_start = OUTSIDE, "", 0
    for position, tag in enumerate(list(tags) + [OUTSIDE]):
        prefix, entity_type = split_tag(tag)
        if _chunk_ends(prev_prefix, prev_type, prefix, entity_type):
            spans.append((chunk_start, position, prev_type))
        if _chunk_starts(prev_prefix, prev_type, prefix, entity_type):
            chunk_start = position
        prev_prefix, prev_type = prefix, entity_type
    return spans


def spans_to_bio(spans: Iterable[Span], n_tokens: int) -> list[str]:
    """IOB2 tags for ``n_tokens`` tokens from non-overlapping token spans."""
    tags = [OUTSIDE] * n_tokens
    for start, end, entity_type in sorted(spans):
        if not 0 <= start < end <= n_tokens:
            raise ValueError(f"span ({start}, {end}) outside 0..{n_tokens} or empty")
        if any(tag != OUTSIDE for tag in tags[start:end]):
            raise ValueError(f"span ({start}, {end}, {entity_type!r}) overlaps another span")
        tags[start] = f"B-{entity_type}"
        tags[start + 1 : end] = [f"I-{entity_type}"] * (end - start - 1)
    return tags


def _continues_chunk(prev_tag: str, tag: str) -> bool:
    """True if I-X ``tag`` follows a B-X or I-X of the same type (so it is no chunk start)."""
    return prev_tag != OUTSIDE and prev_tag[2:] == tag[2:] and prev_tag[0] in ("B", "I")


def iob1_to_iob2(tags: Sequence[str]) -> list[str]:
    """IOB1 (B-X only between two adjacent chunks of type X) -> IOB2 (every chunk starts with B-X).

    The chunks are the same under the CoNLL rules; only the chunk-initial I-X become B-X.
    """
    return repair_bio(tags)


def repair_bio(tags: Sequence[str]) -> list[str]:
    """IOB2 repair: an I-X with no B-X/I-X directly before it becomes B-X. Other tags unchanged."""
    repaired = list(tags)
    prev_tag = OUTSIDE
    for position, tag in enumerate(tags):
        split_tag(tag)  # validates
        if tag[0] == "I" and not _continues_chunk(prev_tag, tag):
            repaired[position] = "B" + tag[1:]
        prev_tag = tag
    return repaired


def count_chunk_initial_inside(tags: Sequence[str]) -> int:
    """Number of I-X tags that start a chunk (after O, another type, or the sentence start)."""
    prev_tag, count = OUTSIDE, 0
    for tag in tags:
        if tag[0] == "I" and not _continues_chunk(prev_tag, tag):
            count += 1
        prev_tag = tag
    return count


def char_to_token_spans(
    char_spans: Iterable[Span], starts: Sequence[int], ends: Sequence[int]
) -> tuple[list[Span], int]:
    """Character spans -> token spans, plus the number of misaligned character spans.

    ``starts``/``ends`` are the tokens' character offsets, sorted and non-overlapping.
    A token belongs to a span if their character ranges overlap. A character span counts as
    misaligned (once) if one of its boundaries falls strictly inside a token (it is still
    labelled, widened to whole tokens), if it covers no token at all (dropped), or if it shares
    tokens with an earlier span (those tokens stay with the earlier span; dropped if none is left).
    White space between a span boundary and the nearest token does not make it misaligned.
    """
    token_spans: list[Span] = []
    misaligned = 0
    taken_until = 0  # first token not yet claimed by an earlier span
    for char_start, char_end, entity_type in sorted(char_spans):
        first = bisect_right(ends, char_start)  # first token ending after the span starts
        stop = bisect_left(starts, char_end)  # one past the last token starting before its end
        cuts_token = first < stop and (starts[first] < char_start or ends[stop - 1] > char_end)
        shares_token = first < taken_until
        first = max(first, taken_until)
        if first >= stop:
            misaligned += 1
            continue
        misaligned += cuts_token or shares_token
        token_spans.append((first, stop, entity_type))
        taken_until = stop
    return token_spans, misaligned


def token_to_char_spans(
    token_spans: Iterable[Span], starts: Sequence[int], ends: Sequence[int]
) -> list[Span]:
    """Token spans -> character spans: from the first token's start to the last token's end."""
    return [(starts[first], ends[stop - 1], entity_type) for first, stop, entity_type in token_spans]


def spans_from_label_ids(
    label_ids: np.ndarray, lengths: np.ndarray, labels: Sequence[str]
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Chunks of a batch of label-id paths, vectorised.

    label_ids (N,) int: label index per token, all B sequences concatenated; labels in the
    ``label_list`` layout (O = 0, B of type k = 1 + 2k, I of type k = 2 + 2k).
    lengths (B,) int: tokens per sequence.

    Returns seq (S,), first (S,), stop (S,), type_index (S,), all int64, ordered by position:
    chunk s covers tokens first[s]..stop[s]-1 of sequence seq[s] (positions WITHIN the sequence)
    and has type ``type_index[s]`` (index into the sorted types). Paths need not be valid BIO: an
    I-X that does not continue a B-X/I-X starts a chunk, as in the CoNLL chunk rules.
    """
    _check_label_layout(labels)
    ids = np.asarray(label_ids, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    n_tokens = ids.shape[0]
    if lengths.sum() != n_tokens:
        raise ValueError(f"lengths sum to {lengths.sum()}, label_ids has {n_tokens} entries")
    seq_ends = np.cumsum(lengths)  # (B,) end of each sequence in the flat layout
    # Only entity tokens matter (about one in six in logs): two passes over the batch, then work on
    # those alone.
    entity = np.flatnonzero(ids > 0)  # (M,) flat positions of B-/I- tokens
    entity_ids = ids[entity]
    type_of_entity = (entity_ids - 1) // 2
    seq = np.searchsorted(seq_ends, entity, side="right")  # (M,) sequence of each entity token
    # An I-X continues a chunk when the token just before it, in the same sequence, is B-X or I-X.
    continues = np.zeros(entity.size, dtype=bool)
    continues[1:] = ((entity_ids[1:] % 2 == 0) & (entity[1:] - 1 == entity[:-1])
                     & (seq[1:] == seq[:-1]) & (type_of_entity[1:] == type_of_entity[:-1]))
    chunk_first = np.flatnonzero(~continues)  # (S,) index into entity of each chunk's first token
    # A chunk runs over its first token and every continuing one after it: to the next chunk's first.
    chunk_stop_entity = np.append(chunk_first[1:], entity.size)[: chunk_first.size] - 1  # last entity token of each chunk
    chunk_seq = seq[chunk_first]
    offsets = seq_ends[chunk_seq] - lengths[chunk_seq]
    return (
        chunk_seq,
        entity[chunk_first] - offsets,
        entity[chunk_stop_entity] + 1 - offsets,
        type_of_entity[chunk_first],
    )


def _check_label_layout(labels: Sequence[str]) -> None:
    """ValueError unless ``labels`` is in the ``label_list`` layout."""
    types = [label[2:] for label in labels[1::2]]
    if list(labels) != label_list(types) or len(types) != len(set(types)):
        raise ValueError("labels are not in label_list layout (O, then B-/I- per sorted type)")
