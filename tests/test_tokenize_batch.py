"""Tests for streamtag.tokenize.BatchTokenizer: for every line, exactly the tokens of ``tokenize``.

The reference is ``tokenize`` itself, whose own tests judge it against RFCs and reference libraries;
here its corpora (RFC examples, sample log, adversarial motifs) and generated text go through the
batch path and must come out the same. The premise of the piece cache (the pattern cannot tell a
neighbouring ' ' from the start or end of the string) is checked on the parsed pattern.
"""

from __future__ import annotations

import ast
import re
import re._compiler
import re._constants as sre
import re._parser
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import test_tokenize as reference_corpora
from streamtag.errors import DataError
from streamtag.tokenize import _TOKEN_RE, KINDS, BatchTokenizer, TokenBatch, tokenize

SAMPLE = Path(__file__).parent / "data" / "tokenize_sample.log"


def assert_same_as_tokenize(lines: list[str], batch: TokenBatch) -> None:
    """The batch holds, line after line, exactly what tokenize gives for that line."""
    assert len(batch.texts) == len(batch.kinds) == len(batch.starts) == len(batch.ends)
    assert batch.starts.dtype == batch.ends.dtype == batch.counts.dtype == np.int64
    assert batch.counts.shape == (len(lines),)
    assert int(batch.counts.sum()) == len(batch.texts)
    for line, got in zip(lines, batch.per_line()):
        assert got == tokenize(line), line


def tokenize_twice(lines: list[str], cache_size: int = 100_000) -> None:
    """First call: every piece new; second call on the same tokenizer: every short piece cached."""
    tokenizer = BatchTokenizer(cache_size)
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))


# ------------------------------------------------------------------------------------------------
# the premise: a ' ' next to a piece reads like the edge of the string
# ------------------------------------------------------------------------------------------------

_STRUCTURE = {sre.BRANCH, sre.SUBPATTERN, sre.ASSERT, sre.ASSERT_NOT, sre.MAX_REPEAT, sre.MIN_REPEAT,
              sre.POSSESSIVE_REPEAT, sre.ATOMIC_GROUP}
_CONSUMING = {sre.IN, sre.LITERAL, sre.NOT_LITERAL, sre.ANY}


def _nodes(subpattern):
    """Every node of a parsed pattern, depth first."""
    for op, av in subpattern:
        yield op, av
        if op == sre.BRANCH:
            children = av[1]
        elif op == sre.SUBPATTERN:
            children = [av[-1]]
        elif op in (sre.ASSERT, sre.ASSERT_NOT):
            children = [av[1]]
        elif op in (sre.MAX_REPEAT, sre.MIN_REPEAT, sre.POSSESSIVE_REPEAT):
            children = [av[2]]
        elif op == sre.ATOMIC_GROUP:
            children = [av]
        else:
            children = []
        for child in children:
            yield from _nodes(child)


def test_pattern_cannot_tell_a_space_from_the_edge_of_the_string():
    # Python's own regular-expression parser (re._parser) reads the token pattern. If no node can
    # consume ' ' and there are no anchors (^ $ \b \A \Z) or back-references, then every
    # look-ahead and look-behind fails the same way at a ' ' as at the end or start of the string,
    # and no token spans a ' ': so tokenizing the pieces of line.split(' ') apart is exact. The same
    # holds for a tab, which the compiled piece scanner treats as ' '.
    parsed = re._parser.parse(_TOKEN_RE.pattern, _TOKEN_RE.flags)
    ops = {op for op, _ in _nodes(parsed)}
    assert ops <= _STRUCTURE | _CONSUMING, ops - _STRUCTURE - _CONSUMING
    consuming = [(op, av) for op, av in _nodes(parsed) if op in _CONSUMING]
    assert len(consuming) > 100  # the walk reached the whole pattern
    for node in consuming:
        single = re._compiler.compile(re._parser.SubPattern(parsed.state, [node]), parsed.state.flags)
        assert single.fullmatch(" ") is None and single.fullmatch("\t") is None, node
    # The check is sufficient, not exact: it flags patterns that read spaces (Python Library
    # Reference, re: lookarounds, $, \s) and, to be safe, any anchor such as \b. Where it flags one,
    # splitting at ' ' really can change the matches; the pattern it passes behaves the same.
    for pattern, flagged, differs in ((r"a(?= )", True, True), (r"a$", True, True), (r"a(?!\s)", True, True),
                                      (r"(?<=\s)a", True, True), (r"a\b", True, False), (r"a(?!\S)", False, False)):
        assert _looks_at_spaces(pattern) == flagged, pattern
        line = "a a"
        by_pieces = [m for piece in line.split(" ") for m in re.findall(pattern, piece)]
        assert (by_pieces != re.findall(pattern, line)) == differs, pattern


def _looks_at_spaces(pattern: str) -> bool:
    parsed = re._parser.parse(pattern)
    nodes = list(_nodes(parsed))
    return any(op not in _STRUCTURE | _CONSUMING for op, _ in nodes) or any(
        re._compiler.compile(re._parser.SubPattern(parsed.state, [node]), 0).fullmatch(" ")
        for node in nodes if node[0] in _CONSUMING
    )


def test_split_keeps_one_piece_per_space():
    # Python Library Reference, str.split with an explicit separator: consecutive separators are
    # not grouped and delimit empty strings; so each line has line.count(' ') + 1 pieces and a
    # batch joined with ' ' splits into the lines' pieces in turn.
    lines = ["  a  b ", "", " ", "x\ny", "tab\there"]
    assert " ".join(lines).split(" ") == [piece for line in lines for piece in line.split(" ")]
    assert [len(line.split(" ")) for line in lines] == [line.count(" ") + 1 for line in lines]
    tokenize_twice(lines)


# ------------------------------------------------------------------------------------------------
# the tokenizer's own corpora, through the batch path
# ------------------------------------------------------------------------------------------------


def _string_constants_of_tokenizer_tests() -> list[str]:
    """Every string literal in tests/test_tokenize.py: RFC examples, prose lines, edge cases."""
    tree = ast.parse(Path(reference_corpora.__file__).read_text(encoding="utf-8"))
    found = [node.value for node in ast.walk(tree) if isinstance(node, ast.Constant) and isinstance(node.value, str)]
    return list(dict.fromkeys(found))


def test_tokenizer_test_literals():
    # Each literal alone and all of them as one batch (RFC 4291, 5952, 5424, 3339, 3986, 4122
    # examples among them, from memory as noted in tests/test_tokenize.py).
    literals = _string_constants_of_tokenizer_tests()
    assert len(literals) > 300
    tokenize_twice(literals)
    tokenize_twice([" ".join(literals)])


def test_named_corpora_of_the_tokenizer_tests():
    # The lists the tokenizer tests check against ipaddress, datetime, uuid and urllib.parse.
    corpora = [
        reference_corpora.RFC4291_FORMS,  # RFC 4291 section 2.2
        [form for pair in reference_corpora.RFC5952_RECOMMENDED for form in pair],  # RFC 5952 section 4
        reference_corpora.RFC5952_SAME_ADDRESS,  # RFC 5952 section 2.1
        reference_corpora.RFC5424_EXAMPLES,  # RFC 5424 section 6.5
        reference_corpora.RFC3986_WITH_AUTHORITY + reference_corpora.RFC3986_WITHOUT_AUTHORITY,  # RFC 3986 1.1.2
        reference_corpora.LOG_FRAGMENTS,
        reference_corpora.FAST_PATH_EDGES,
        reference_corpora.ADVERSARIAL_MOTIFS,
    ]
    for lines in corpora:
        tokenize_twice(lines)
        tokenize_twice([" ".join(lines), "  ".join(lines), "\t".join(lines)])


def test_sample_log_in_batches_with_a_small_cache():
    # The fictional sample log in batches of 64 through one tokenizer whose cache (500 pieces)
    # fills and clears many times; every batch must equal tokenize.
    lines = SAMPLE.read_text(encoding="utf-8").splitlines()
    assert len(lines) >= 1000
    tokenizer = BatchTokenizer(cache_size=500)
    for i in range(0, len(lines), 64):
        assert_same_as_tokenize(lines[i : i + 64], tokenizer.tokenize_lines(lines[i : i + 64]))
        assert tokenizer.cached_pieces <= 500
    assert tokenizer.hits > tokenizer.misses > 0


def test_demo_stream():
    # The demo generator's invented stream (about 12 pieces and 21 tokens per line).
    from streamtag.demo.generate import generate_stream

    lines = [record["text"] for record in generate_stream(3000, seed=11)]
    tokenizer = BatchTokenizer(cache_size=5_000)
    for i in range(0, len(lines), 512):
        assert_same_as_tokenize(lines[i : i + 512], tokenizer.tokenize_lines(lines[i : i + 512]))


# ------------------------------------------------------------------------------------------------
# properties (hypothesis)
# ------------------------------------------------------------------------------------------------

# Characters and fragments around every rule's edges: white space of several kinds, separators of
# addresses, times and paths, hex letters, units, quotes and brackets, non-ASCII letters, combining
# marks, control characters (NUL, ESC, DEL, C1), a lone surrogate, a BOM and an emoji.
TRICKY = [
    " ", " ", "  ", "\t", "\x85", "\u3000", "\u00a0", "\x1f", "\n", ".", ":", "::", "-", "/", "@", "\\",
    "0", "1", "2", "5", "9", "25", "255", "a", "f", "F", "e", "x", "0x", "v", "T", "Z", "z", "ms", "%",
    "'", '"', "\u2019", "(", ")", "[", "]", "{", "}", "<", ">", "=", ",", ";", "+", "~", "_", "é", "Ä",
    "न", "日", "\u0301", "\u093f", "\x00", "\x1b", "\x7f", "\x9b", "\udcff", "\ufeff", "😀",
]
FRAGMENTS = TRICKY + reference_corpora.LOG_FRAGMENTS + reference_corpora.FAST_PATH_EDGES + [
    "http://", "https://a.b/c?d=e", "192.0.2.1", ":8080", "2001:db8::1", "fe80::1%eth0", "10.0.0.0/8",
    "2026-03-01T12:00:00.003Z", "12:00:00,123", "f81d4fae-7dec-11d0-a765-00a0c91e6bf6", "deadbeef1",
    "00:1a:2b:3c:4d:5e", "mary@x.test", "/var/log/x.log", "C:\\Users\\x", "v1.2.3-rc1", "web-03.example",
]

lines_strategy = st.lists(st.sampled_from(FRAGMENTS), max_size=30).map("".join)


@settings(max_examples=500, deadline=None)
@given(st.lists(lines_strategy, min_size=1, max_size=8), st.sampled_from([0, 3, 100_000]))
def test_property_batches_of_log_like_lines(lines, cache_size):
    # tokenize is the reference, line by line; a small cache forces clearing and uncached pieces.
    tokenize_twice(lines, cache_size)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(lines_strategy, max_size=6), min_size=1, max_size=4), st.integers(0, 8))
def test_property_a_stream_of_batches_with_tiny_caches(batches, cache_size):
    # Same reference; one tokenizer over several batches, twice over, with caches of 0 to 8 pieces,
    # so batches meet pieces cached earlier while the cache fills and clears mid-batch.
    tokenizer = BatchTokenizer(cache_size=cache_size)
    for lines in batches + batches:
        assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
        assert tokenizer.cached_pieces <= cache_size


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text(alphabet=sorted({c for c in "".join(TRICKY)}), max_size=60), min_size=1, max_size=6))
def test_property_batches_of_tricky_characters(lines):
    # Same reference, on lines of single tricky characters in any order.
    tokenize_twice(lines, cache_size=50)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(max_size=40), min_size=1, max_size=6))
def test_property_batches_of_arbitrary_text(lines):
    # Same reference, on hypothesis' default text (all planes, control characters).
    tokenize_twice(lines)


# ------------------------------------------------------------------------------------------------
# edges: empty input, bad input, long pieces, huge lines
# ------------------------------------------------------------------------------------------------


def test_empty_batch_and_empty_lines():
    # DEVELOPERS.md (tokenize.py contract): no tokens for empty or all-white-space lines.
    batch = BatchTokenizer().tokenize_lines([])
    assert batch.texts == [] and batch.kinds == [] and batch.counts.shape == (0,)
    assert batch.starts.shape == batch.ends.shape == (0,)
    batch = BatchTokenizer().tokenize_lines(["", " ", "   ", "\t"])
    assert batch.texts == [] and batch.counts.tolist() == [0, 0, 0, 0]


def test_kinds_come_from_kinds():
    # DEVELOPERS.md (tokenize.py contract): every kind is one of KINDS.
    lines = SAMPLE.read_text(encoding="utf-8").splitlines()[:200]
    assert set(BatchTokenizer().tokenize_lines(lines).kinds) <= set(KINDS)


def test_bad_input_is_a_data_error():
    # DEVELOPERS.md ground rules: bad input raises a StreamtagError subclass with a one-line message.
    for bad in (["ok", b"bytes"], [None], None, [1.5]):
        with pytest.raises(DataError) as error:
            BatchTokenizer().tokenize_lines(bad)
        assert "\n" not in str(error.value)
    with pytest.raises(ValueError):
        BatchTokenizer(cache_size=-1)


def test_long_pieces_are_tokenized_but_not_cached():
    # Pieces over 256 characters (a base64 blob, a minified document) are never kept: a log of long
    # distinct pieces must not fill memory. tokenize is the reference for the tokens.
    blob = "QUJD" * 100  # base64 alphabet, RFC 4648 section 4
    lines = [f"user=ann blob={blob}{i} done" for i in range(50)]
    tokenizer = BatchTokenizer()
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    assert tokenizer.cached_pieces == 2  # "user=ann" and "done"
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    assert tokenizer.cached_pieces == 2


def test_cache_stays_within_its_size():
    # Memory stays flat (DEVELOPERS.md ground rules): distinct pieces never exceed cache_size.
    tokenizer = BatchTokenizer(cache_size=1000)
    for start in range(0, 20_000, 500):
        lines = [f"id={n} at 10.0.{n % 256}.{n // 256 % 256} ok" for n in range(start, start + 500)]
        assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
        assert tokenizer.cached_pieces <= 1000
    # a single batch with more new pieces than the cache holds is tokenized right, and the cache
    # keeps as many of them as fit, which the next batch finds
    lines = [f"n{n}" for n in range(3000)]
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    assert tokenizer.cached_pieces == 1000
    hits = tokenizer.hits
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    assert tokenizer.hits - hits >= 1000


@pytest.mark.parametrize(
    "line",
    [
        "a " * 32_768,  # 64 KiB of one-character tokens, each its own piece
        "a," * 32_768,  # 64 KiB of one-character tokens in one piece
        ("".join(reference_corpora.ADVERSARIAL_MOTIFS) * 1000)[:100_000],  # 100k adversarial characters
    ],
)
def test_huge_lines_equal_tokenize_and_use_memory_like_it(line):
    # tokenize is the reference for the tokens and for the memory: the batch path may not hold
    # much more at its peak (tracemalloc, Python's allocation tracer) than tokenize does.
    def peak(function):
        tracemalloc.start()
        try:
            result = function()
            return tracemalloc.get_traced_memory()[1], result
        finally:
            tracemalloc.stop()

    reference_peak, expected = peak(lambda: tokenize(line))
    batch_peak, batch = peak(lambda: BatchTokenizer().tokenize_lines([line, line]))
    assert_same_as_tokenize([line, line], batch)
    assert len(batch.texts) == 2 * len(expected.texts)
    assert batch_peak < 8 * reference_peak, (batch_peak, reference_peak)


@pytest.mark.slow
@pytest.mark.parametrize("motif", ["a ", "a,", "::1:", "http://", "a.", "1.", " ", "".join(reference_corpora.ADVERSARIAL_MOTIFS)])
def test_linear_time_on_huge_lines(motif):
    # Ratio only (the method of tests/test_tokenize.py): 100k characters cost about 10x 10k.
    def batch_of_one(line):
        return BatchTokenizer().tokenize_lines([line])

    ratio = reference_corpora._cost_ratio(motif, batch_of_one)
    assert ratio < reference_corpora.LINEAR_RATIO_LIMIT, f"{motif!r}: 100k chars cost {ratio:.1f}x 10k chars"


# ------------------------------------------------------------------------------------------------
# the compiled piece table (scan_kernels' lookup, scan and gather kernels)
# ------------------------------------------------------------------------------------------------
# With numba the tokenizer keeps its pieces in a compiled hash table (open addressing, FNV-1a);
# every check above runs through it. These check the table's own edges, always against tokenize.

import streamtag.tokenize as tokenize_module  # noqa: E402


def _needs_table(tokenizer: BatchTokenizer) -> None:
    if not tokenizer._table:
        pytest.skip("numba is not available: the batch path uses the dict of pieces")


def test_table_grows_and_rehashes_without_losing_pieces():
    # Reference: tokenize per line. Batches of growing size make the table grow (and rehash) many
    # times; every piece cached before the growth must still be found after it.
    tokenizer = BatchTokenizer(cache_size=100_000)
    seen: list[str] = []
    for size in (1, 3, 10, 40, 200, 1000, 4000):
        numbers = range(len(seen), len(seen) + size)
        lines = [f"id={n} host-{n}.example.test 10.0.{n % 256}.{n // 256 % 256} n{n}" for n in numbers]
        assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
        _needs_table(tokenizer)
        seen += lines
    assert tokenizer.cached_pieces == 4 * len(seen)  # all distinct, all short: every piece kept
    hits = tokenizer.hits
    assert_same_as_tokenize(seen, tokenizer.tokenize_lines(seen))
    assert tokenizer.hits - hits == 4 * len(seen)  # every piece found again


def test_table_after_the_scanner_or_the_kernels_are_switched_off(monkeypatch):
    # Reference: tokenize per line. A tokenizer that started with the kernels keeps giving the same
    # tokens when the scanner is switched off (new pieces go to the pattern) and when the kernels
    # are (it falls back to the dict of pieces).
    from streamtag import crf

    lines = ["user=ann from 192.0.2.1 café", "2001:db8::1 done", "", "  x  "]  # RFC 5737, RFC 3849
    tokenizer = BatchTokenizer()
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    _needs_table(tokenizer)
    monkeypatch.setattr(tokenize_module, "USE_SCANNER", False)
    more = ["user=bob from 198.51.100.7 Zürich-3", "fe80::1%eth0 done"]
    assert_same_as_tokenize(more + lines, tokenizer.tokenize_lines(more + lines))
    monkeypatch.setattr(tokenize_module, "USE_SCANNER", True)
    monkeypatch.setattr(crf, "USE_KERNELS", False)
    assert_same_as_tokenize(lines + more, tokenizer.tokenize_lines(lines + more))
    assert not tokenizer._table and tokenizer.cached_pieces > 0


def test_table_repeats_and_unsure_pieces_in_one_batch():
    # Reference: tokenize per line. A new piece met several times in its first batch (scanned, or
    # sent to the pattern: an e-mail address, RFC 2606 example domain; a non-ASCII word; a tab) is
    # tokenized once and found by its later occurrences; long pieces are tokenized for the batch only.
    blob = "QUJD" * 80  # base64 alphabet, RFC 4648 section 4: over 256 characters, never cached
    lines = ["a=1 ann@example.com naïve x\ty a=1", f"{blob} ann@example.com a=1 {blob}", "naïve  naïve"]
    tokenizer = BatchTokenizer()
    assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
    _needs_table(tokenizer)
    assert tokenizer.cached_pieces == 4  # a=1, ann@example.com, naïve, x\ty
    assert_same_as_tokenize(lines[::-1], tokenizer.tokenize_lines(lines[::-1]))
    assert tokenizer.cached_pieces == 4


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(st.sampled_from(FRAGMENTS), max_size=4).map("".join), min_size=1, max_size=40),
       st.integers(0, 12))
def test_property_many_repeated_pieces_through_a_small_table(pieces, cache_size):
    # Reference: tokenize per line. Few distinct pieces, repeated, through tables of 0 to 12 pieces:
    # collisions in a small table, pieces new twice in a batch, a table that fills mid-batch.
    lines = [" ".join(pieces[i::3]) for i in range(3)]
    tokenizer = BatchTokenizer(cache_size)
    for _ in range(3):
        assert_same_as_tokenize(lines, tokenizer.tokenize_lines(lines))
        assert tokenizer.cached_pieces <= cache_size


# ------------------------------------------------------------------------------------------------
# keys: the rows of cached pieces' tokens, for the emission scorer to find type rows without text
# ------------------------------------------------------------------------------------------------


def _check_keys(batch: TokenBatch, seen: dict) -> None:
    """Every key (>= 0) names one (text, kind) for as long as its generation lasts: ``seen`` maps
    (generation, key) to the first (text, kind) met under it, across batches."""
    assert batch.keys.dtype == np.int64 and batch.keys.shape == (len(batch.texts),)
    assert (batch.keys >= -1).all()
    for key, text, kind in zip(batch.keys.tolist(), batch.texts, batch.kinds):
        if key >= 0:
            assert seen.setdefault((batch.generation, key), (text, kind)) == (text, kind)


@pytest.mark.parametrize("kernels", [True, False])
@pytest.mark.parametrize("cache_size", [150, 100_000])
def test_keys_stay_with_their_token_through_many_refills(monkeypatch, kernels, cache_size):
    # Reference: tokenize per line, and the rule that a key means one token for its generation.
    # Invented demo lines through a small cache that clears many times (mid-batch too, as batches
    # bring more new pieces than fit), or a large one that never does; pieces with no room, or too
    # long to cache, are tokenized for the batch only and their rows, reused in the next batch,
    # must never be keys.
    from streamtag import crf
    from streamtag.demo.generate import generate_stream

    monkeypatch.setattr(crf, "USE_KERNELS", kernels)
    lines = [record["text"] for record in generate_stream(1200, seed=7)]
    tokenizer = BatchTokenizer(cache_size=cache_size)
    seen: dict = {}
    generations = []
    for start in range(0, len(lines), 100):
        # The same lines again (nothing new: no clearing), with another long piece (RFC 4648
        # section 4 alphabet, over 256 characters) whose rows take those of the one before.
        blobs = [f"id={letter * 300}" for letter in "AB"]
        for chunk in (lines[start : start + 100] + blobs[:1], lines[start : start + 100][::-1] + blobs[1:]):
            batch = tokenizer.tokenize_lines(chunk)
            assert_same_as_tokenize(chunk, batch)
            _check_keys(batch, seen)
            generations.append(batch.generation)
    assert bool(tokenizer._table) == (kernels and tokenize_module._batch_kernels() is not None)
    # the small cache cleared several times (rows renumbered), the large one never
    assert len(set(generations)) >= 4 if cache_size < 1000 else len(set(generations)) == 1
    assert len(seen) > 150  # keys were given (and checked)


def test_keys_of_uncached_pieces_are_minus_one():
    # Pieces over 256 characters (base64 alphabet, RFC 4648 section 4) are never cached; pieces
    # beyond a full cache in a fresh tokenizer are tokenized for the batch only.
    blob = "QUJD" * 80
    tokenizer = BatchTokenizer()
    batch = tokenizer.tokenize_lines([f"a=1 {blob} b", blob])
    assert batch.texts == ["a", "=", "1", blob, "b", blob]  # common practice: key=value splits
    assert batch.keys.tolist()[3] == batch.keys.tolist()[5] == -1
    assert (batch.keys[[0, 1, 2, 4]] >= 0).all() and len(set(batch.keys[[0, 1, 2, 4]].tolist())) == 4
    full = BatchTokenizer(cache_size=2)
    batch = full.tokenize_lines(["p q r s", "p q r s"])
    keyed = batch.keys >= 0
    assert int(np.count_nonzero(keyed)) == 4 and full.cached_pieces == 2  # two pieces, twice each
    again = full.tokenize_lines(["q p"])  # only cached pieces: nothing is renumbered
    assert again.generation == batch.generation and again.keys.tolist() == batch.keys[[1, 0]].tolist()


@pytest.mark.parametrize("kernels", [True, False])
def test_generation_changes_when_the_cache_clears_mid_batch(monkeypatch, kernels):
    # A batch with more new pieces than the cache has room for, after a batch that half filled it:
    # the cache starts afresh during the batch, so the batch's keys are of a new generation.
    from streamtag import crf

    monkeypatch.setattr(crf, "USE_KERNELS", kernels)
    tokenizer = BatchTokenizer(cache_size=4)
    first = tokenizer.tokenize_lines(["alpha beta gamma"])
    second = tokenizer.tokenize_lines(["alpha delta epsilon zeta"])
    assert second.generation != first.generation and (second.keys >= 0).all()
    seen: dict = {}
    for batch in (first, second, tokenizer.tokenize_lines(["zeta epsilon delta alpha"])):
        assert_same_as_tokenize([" ".join(batch.texts)], batch)
        _check_keys(batch, seen)
    third = tokenizer.tokenize_lines(["alpha delta"])
    assert third.generation == second.generation and third.keys.tolist() == second.keys[:2].tolist()
    assert BatchTokenizer().tokenize_lines(["alpha"]).generation not in {first.generation, second.generation}


# ------------------------------------------------------------------------------------------------
# lazy texts and kinds (tokenize_lines(lazy=True)): the str of a token is made when it is asked for
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("kernels", [True, False])
@pytest.mark.parametrize("cache_size", [4, 150, 100_000])
def test_lazy_batches_hold_the_tokens_of_tokenize(monkeypatch, kernels, cache_size):
    # Reference: tokenize per line. Invented demo lines with long pieces, unsure pieces (RFC 3849
    # address, RFC 2606 domain), non-ASCII words, a lone surrogate and a NUL, through small caches
    # that clear many times (mid-batch too) and a large one that never does.
    from streamtag import crf
    from streamtag.demo.generate import generate_stream

    monkeypatch.setattr(crf, "USE_KERNELS", kernels)
    lines = [record["text"] for record in generate_stream(400, seed=5)]
    odd = ["naïve Ωmega-7 \ud800 a\x00b ann@example.com 2001:db8::1", "QUJD" * 80 + " end", "", "  x  "]
    tokenizer = BatchTokenizer(cache_size=cache_size)
    for start in range(0, len(lines), 50):
        chunk = lines[start : start + 50] + odd
        lazy = tokenizer.tokenize_lines(chunk, lazy=True)
        assert_same_as_tokenize(chunk, lazy)
        eager = tokenizer.tokenize_lines(chunk)
        assert type(eager.texts) is list and type(eager.kinds) is list
        # the same tokens whichever way they are asked for, and the same keys (no piece is new now
        # unless the cache cleared in between: then the generation tells)
        assert lazy.texts == eager.texts and eager.texts == lazy.texts and list(lazy.texts) == eager.texts
        assert lazy.kinds == eager.kinds and list(lazy.kinds) == eager.kinds
        if lazy.generation == eager.generation:
            assert lazy.keys.tolist() == eager.keys.tolist()
        n = len(eager.texts)
        picked = np.random.default_rng(start).integers(0, n, size=40)
        if hasattr(lazy.texts, "pick"):  # the piece table's lazy texts (the dict cache gives lists)
            assert lazy.texts.pick(picked) == [eager.texts[i] for i in picked.tolist()]
            assert lazy.kinds.pick(picked) == [eager.kinds[i] for i in picked.tolist()]
        for i in (0, n // 2, n - 1, -1, -n):
            assert lazy.texts[i] == eager.texts[i] and lazy.kinds[i] == eager.kinds[i]
        assert lazy.texts[5:17] == eager.texts[5:17] and lazy.kinds[::-3] == eager.kinds[::-3]
        assert set(lazy.kinds) <= set(KINDS)


def test_lazy_texts_behave_as_a_list():
    # Reference: Python's list (the Sequence protocol: len, indexing, IndexError past the end,
    # iteration, equality with a list either way round).
    tokenizer = BatchTokenizer()
    batch = tokenizer.tokenize_lines(["a=1 bé", "x"], lazy=True)
    expected = ["a", "=", "1", "bé", "x"]  # common practice: key=value splits
    assert len(batch.texts) == 5 and batch.texts == expected and expected == batch.texts
    assert batch.texts != expected[:4] and batch.texts != "a=1bex"
    assert list(reversed(batch.texts)) == expected[::-1] and "bé" in batch.texts
    with pytest.raises(IndexError):
        batch.texts[5]
    with pytest.raises(IndexError):
        batch.kinds[-6]
    assert [line.texts for line in batch.per_line()] == [expected[:4], expected[4:]]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(st.sampled_from(FRAGMENTS + ["\t", "\t\t"]), max_size=6).map("".join), min_size=1,
                max_size=30))
def test_property_pieces_holding_tabs(pieces):
    # Reference: tokenize per line. Tabs inside pieces (the scanner reads them as ' '), at their
    # ends, doubled, or a piece of tabs alone; each batch twice (new pieces, then cached ones).
    tokenize_twice([" ".join(pieces[i::2]) for i in range(2)])
