"""Tests of streamtag.spans against seqeval 1.2.2 (reference library) and the CoNLL chunk rules."""

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from seqeval.metrics.sequence_labeling import get_entities
from seqeval.scheme import IOB2, Entities

from streamtag.spans import (
    bio_to_spans,
    char_to_token_spans,
    count_chunk_initial_inside,
    iob1_to_iob2,
    label_list,
    repair_bio,
    spans_from_label_ids,
    spans_to_bio,
    token_to_char_spans,
)

TYPES = ["host", "path", "user"]
BIO_TAGS = ["O"] + [f"{p}-{t}" for t in TYPES for p in "BI"]
BIOES_TAGS = BIO_TAGS + [f"{p}-{t}" for t in TYPES for p in "ES"]

bio_sequences = st.lists(st.sampled_from(BIO_TAGS), max_size=12)


def seqeval_spans(tags):
    """seqeval's lenient (conlleval-compatible) chunks as our (start, end exclusive, type)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return [(start, end + 1, kind) for kind, start, end in get_entities(list(tags))]


def seqeval_strict_iob2_spans(tags):
    """seqeval's strict IOB2 chunks (only well-formed B-X I-X* runs count)."""
    entities = Entities([list(tags)], IOB2).entities[0]
    return sorted((e.start, e.end, e.tag) for e in entities)


# -- label sets --------------------------------------------------------------------------------------


def test_label_list_layout():
    # The contract layout (DEVELOPERS.md): O first, then B/I per type, types sorted.
    assert label_list(["user", "host", "user"]) == ["O", "B-host", "I-host", "B-user", "I-user"]
    assert label_list([]) == ["O"]
    with pytest.raises(ValueError):
        label_list(["two words"])


# -- chunk rules -------------------------------------------------------------------------------------


@settings(max_examples=400)
@given(st.lists(st.sampled_from(BIOES_TAGS), max_size=12))
def test_bio_to_spans_equals_seqeval_lenient_chunks(tags):
    # seqeval 1.2.2 get_entities (default mode) ports the CoNLL-2000 scorer's chunk rules.
    assert bio_to_spans(tags) == seqeval_spans(tags)


@pytest.mark.parametrize(
    "tags, expected",
    [
        # CoNLL-2000 scorer (conlleval.pl, startOfChunk/endOfChunk): I-X after O starts a chunk.
        (["O", "I-host", "I-host"], [(1, 3, "host")]),
        # ... a change of type starts a new chunk even with an I- prefix.
        (["B-host", "I-user"], [(0, 1, "host"), (1, 2, "user")]),
        # ... B-X after I-X of the same type splits two adjacent chunks.
        (["I-user", "I-user", "B-user"], [(0, 2, "user"), (2, 3, "user")]),
        (["O", "O"], []),
        ([], []),
    ],
)
def test_bio_to_spans_hand_made(tags, expected):
    assert bio_to_spans(tags) == expected
    assert bio_to_spans(tags) == seqeval_spans(tags)  # reference: seqeval 1.2.2


def test_bad_tag_is_rejected():
    # Common practice: tags are O or PREFIX-TYPE; anything else is not a chunk tag.
    with pytest.raises(ValueError):
        bio_to_spans(["host"])


@settings(max_examples=300)
@given(bio_sequences)
def test_repair_bio_gives_strict_iob2_with_the_same_chunks(tags):
    repaired = repair_bio(tags)
    # seqeval's strict IOB2 reader finds exactly the lenient chunks of the input: the output is
    # valid IOB2 and no chunk was changed.
    assert seqeval_strict_iob2_spans(repaired) == sorted(seqeval_spans(tags))
    # Round trip through spans gives the same IOB2 tags (IOB2 is one tag sequence per chunking).
    assert spans_to_bio(bio_to_spans(tags), len(tags)) == repaired
    # Only chunk-initial I-X tags change, each into B-X.
    changed = [i for i, (a, b) in enumerate(zip(tags, repaired)) if a != b]
    assert all(tags[i][0] == "I" and repaired[i] == "B" + tags[i][1:] for i in changed)
    assert len(changed) == count_chunk_initial_inside(tags)


def test_iob1_to_iob2_conll2003_style():
    # Tag pattern of the CoNLL-2003 English data, which used IOB1 (from memory): every chunk is
    # I-X, and B-X appears only to start a chunk right after another chunk of the same type.
    # Invented tokens: "Talvo Mereks met Orla Vint Quen at Brask".
    iob1 = ["I-PER", "I-PER", "O", "I-PER", "I-PER", "B-PER", "O", "I-LOC"]
    assert iob1_to_iob2(iob1) == ["B-PER", "I-PER", "O", "B-PER", "I-PER", "B-PER", "O", "B-LOC"]
    # The chunking itself is unchanged (seqeval 1.2.2 lenient chunks, CoNLL rules).
    assert bio_to_spans(iob1_to_iob2(iob1)) == seqeval_spans(iob1)
    assert seqeval_spans(iob1) == [(0, 2, "PER"), (3, 5, "PER"), (5, 6, "PER"), (7, 8, "LOC")]


def test_spans_to_bio_rejects_overlap_and_out_of_range():
    # Common practice: BIO cannot encode overlapping or out-of-range spans.
    with pytest.raises(ValueError):
        spans_to_bio([(0, 2, "host"), (1, 3, "user")], 3)
    with pytest.raises(ValueError):
        spans_to_bio([(2, 4, "host")], 3)


# -- character offsets -------------------------------------------------------------------------------

LINE = "user=vex.orlan host=relay-7 path=/srv/a"
#       0         1         2         3
#       0123456789012345678901234567890123456789


def tokens_of(line):
    """Whitespace tokens with offsets (Python's str.split rule), independent of streamtag."""
    starts, ends, position = [], [], 0
    for word in line.split():
        start = line.index(word, position)
        starts.append(start)
        ends.append(start + len(word))
        position = start + len(word)
    return starts, ends


def brute_force_token_spans(char_spans, starts, ends):
    """Reference by definition: a token belongs to a span if their character ranges overlap."""
    result = []
    for char_start, char_end, kind in char_spans:
        members = [i for i, (s, e) in enumerate(zip(starts, ends)) if s < char_end and e > char_start]
        if members:
            result.append((members[0], members[-1] + 1, kind))
    return result


def test_char_to_token_spans_aligned():
    starts, ends = [0, 4, 8], [3, 7, 11]  # "abc def ghi"
    spans, misaligned = char_to_token_spans([(4, 11, "x")], starts, ends)
    assert (spans, misaligned) == ([(1, 3, "x")], 0)
    assert token_to_char_spans(spans, starts, ends) == [(4, 11, "x")]


def test_char_to_token_spans_boundary_inside_token_is_counted():
    starts, ends = [0, 4, 8], [3, 7, 11]
    # Starts inside "abc", ends inside "def": both tokens still labelled, one misaligned span.
    spans, misaligned = char_to_token_spans([(1, 5, "x")], starts, ends)
    assert (spans, misaligned) == ([(0, 2, "x")], 1)
    # Leading/trailing white space inside a span is no misalignment.
    assert char_to_token_spans([(3, 8, "x")], starts, ends) == ([(1, 2, "x")], 0)
    # A span over white space only covers no token: dropped and counted.
    assert char_to_token_spans([(3, 4, "x")], starts, ends) == ([], 1)
    # Two spans cutting one token: the token stays with the first span.
    assert char_to_token_spans([(0, 1, "x"), (2, 3, "y")], starts, ends) == ([(0, 1, "x")], 2)


@settings(max_examples=300)
@given(st.lists(st.tuples(st.integers(0, len(LINE)), st.integers(1, 8)), max_size=4))
def test_char_to_token_spans_matches_overlap_definition(raw):
    starts, ends = tokens_of(LINE)
    # Non-overlapping character spans, sorted.
    char_spans, last_end = [], 0
    for start, width in sorted(raw):
        start = max(start, last_end)
        end = min(start + width, len(LINE))
        if start < end:
            char_spans.append((start, end, "t"))
            last_end = end
    spans, misaligned = char_to_token_spans(char_spans, starts, ends)
    reference = brute_force_token_spans(char_spans, starts, ends)
    # Without shared tokens the result is exactly the overlap definition.
    shared = any(a[1] > b[0] for a, b in zip(reference, reference[1:]))
    if not shared:
        assert spans == reference
        # A boundary strictly inside a token, or no token at all, counts as misaligned.
        cut = sum(
            1
            for s, e, _ in char_spans
            if any(ts < s < te or ts < e < te for ts, te in zip(starts, ends))
            or not any(ts < e and te > s for ts, te in zip(starts, ends))
        )
        assert misaligned == cut
    assert len(spans) <= len(char_spans)


# -- vectorised chunking of label paths --------------------------------------------------------------


@settings(max_examples=300)
@given(st.lists(st.lists(st.integers(0, 2 * len(TYPES)), max_size=7), max_size=5))
def test_spans_from_label_ids_equals_per_sequence_chunks(paths):
    labels = label_list(TYPES)
    lengths = np.array([len(p) for p in paths], dtype=np.int64)
    flat = np.array([i for p in paths for i in p], dtype=np.int64)
    seq, first, stop, type_index = spans_from_label_ids(flat, lengths, labels)
    got = list(zip(seq.tolist(), first.tolist(), stop.tolist(), [TYPES[k] for k in type_index.tolist()]))
    # Reference: seqeval 1.2.2 lenient chunks of each sequence's tags (CoNLL rules).
    expected = [
        (b, start, end, kind)
        for b, path in enumerate(paths)
        for start, end, kind in seqeval_spans([labels[i] for i in path])
    ]
    assert got == expected
    assert all(arr.dtype == np.int64 for arr in (seq, first, stop, type_index))


def test_spans_from_label_ids_checks_inputs():
    labels = label_list(TYPES)
    with pytest.raises(ValueError):
        spans_from_label_ids(np.array([0, 1]), np.array([3]), labels)
    with pytest.raises(ValueError):
        spans_from_label_ids(np.array([0]), np.array([1]), ["O", "I-x", "B-x"])
