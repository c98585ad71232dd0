"""Tests of streamtag.tagger (the batch tagger) against independent computations.

References:
- Brute-force enumeration of every label sequence with the definition of a linear-chain CRF
  (Lafferty, McCallum & Pereira 2001: p(y|x) = exp(score(x, y)) / Z(x)), log Z by
  scipy.special.logsumexp: the best path (Viterbi's answer), the second-best path, each token's
  marginal and each span's exact probability are read off the enumeration.
- Chunks of a BIO (IOB2) path by seqeval's CoNLL chunker (``get_entities``).
- The confidence rules the README states: token confidence is the marginal of the decoded label, span
  confidence the probability of exactly that span, line confidence the lowest of them, 1 for a line
  with no tokens.
The lines are invented; the model is the bundled demo model (19 labels), so lines are kept to at most
4 tokens (19**4 paths).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.special import logsumexp
from seqeval.metrics.sequence_labeling import get_entities

from streamtag.model import load_model
from streamtag.tagger import Tagger

EXACT = 1e-9
SHORT_LINES = [
    "login failed for kestrel",
    "relay-07 down",
    "vault-02 backup 192.0.2.14",
    "",  # no tokens: confidence 1, no spans
    "kestrel",
    "ping 198.51.100.3 from brindle-04",
]


@pytest.fixture(scope="module")
def tagger():
    return Tagger(load_model(None))


def _enumerate(tagger, line):
    """(tokens, paths (P, T), scores (P,), log Z) of one line by brute force over allowed paths."""
    tokens = tagger.tokenizer.tokenize_lines([line])
    rows = tagger.scorer.type_rows(tokens.texts, tokens.kinds)
    E = tagger.scorer.emissions(rows, tokens.counts)
    n_tokens, n_labels = E.shape
    paths = np.array(list(itertools.product(range(n_labels), repeat=n_tokens)), dtype=np.int64).reshape(-1, n_tokens)
    scores = tagger.start[paths[:, 0]] + tagger.end[paths[:, -1]]
    for t in range(n_tokens):
        scores = scores + E[t, paths[:, t]]
    for t in range(1, n_tokens):
        scores = scores + tagger.trans[paths[:, t - 1], paths[:, t]]
    keep = np.isfinite(scores)
    return tokens, paths[keep], scores[keep], logsumexp(scores[keep])


def _chunks(tagger, path):
    """(type, first token, stop token) of a label path, by seqeval's CoNLL chunker."""
    return [(kind, first, last + 1) for kind, first, last in get_entities([tagger.model.labels[y] for y in path])]


def _span_probability(tagger, paths, scores, log_z, kind, first, stop):
    """P(tokens first..stop-1 form exactly one chunk of this type): B-X, I-X inside, no I-X after."""
    b_label, i_label = tagger.model.labels.index("B-" + kind), tagger.model.labels.index("I-" + kind)
    hit = (paths[:, first] == b_label) & (paths[:, first + 1:stop] == i_label).all(axis=1)
    if stop < paths.shape[1]:
        hit &= paths[:, stop] != i_label
    return float(np.exp(logsumexp(scores[hit]) - log_z))


def test_spans_and_confidences_match_brute_force(tagger):
    results = tagger.tag(SHORT_LINES)  # one batch: lines of different lengths side by side
    assert len(results) == len(SHORT_LINES)
    for line, result in zip(SHORT_LINES, results):
        assert result.text == line
        if not line:
            assert result.spans == [] and result.confidence == 1.0 and result.n_tokens == 0
            continue
        tokens, paths, scores, log_z = _enumerate(tagger, line)
        best = paths[np.argmax(scores)]
        assert result.n_tokens == paths.shape[1]
        expected = _chunks(tagger, best)
        got = [(span.label, span.start, span.end, span.text) for span in result.spans]
        assert got == [(kind, int(tokens.starts[first]), int(tokens.ends[stop - 1]),
                        line[tokens.starts[first]:tokens.ends[stop - 1]]) for kind, first, stop in expected]
        confidences = []
        for span, (kind, first, stop) in zip(result.spans, expected):
            exact = _span_probability(tagger, paths, scores, log_z, kind, first, stop)
            assert abs(span.confidence - exact) < EXACT
            confidences.append(exact)
        for t, label in enumerate(best):  # token confidence: the marginal of the decoded label
            confidences.append(float(np.exp(logsumexp(scores[paths[:, t] == label]) - log_z)))
        assert abs(result.confidence - min(confidences)) < EXACT  # the line: the lowest of them


def test_runner_up_is_the_second_best_path(tagger):
    lines = [line for line in SHORT_LINES if line]
    results = tagger.tag(lines, review_below=1.01)  # every line is doubtful: each gets a runner-up
    for line, result in zip(lines, results):
        tokens, paths, scores, log_z = _enumerate(tagger, line)
        order = np.argsort(-scores, kind="stable")
        assert scores[order[0]] > scores[order[1]]  # no tie, so "second best" is one path
        second = paths[order[1]]
        expected = [(kind, int(tokens.starts[first]), int(tokens.ends[stop - 1]))
                    for kind, first, stop in _chunks(tagger, second)]
        assert [(span.label, span.start, span.end) for span in result.runner_up] == expected
        assert all(span.confidence is None and span.text == line[span.start:span.end] for span in result.runner_up)
        assert abs(result.runner_up_probability - float(np.exp(scores[order[1]] - log_z))) < EXACT
        assert result.weakest  # a reason for the review queue


def test_long_line_is_decoded_in_flagged_windows(tagger):
    # 40 tokens with a cap of 12: windows overlap, each token's label comes from one window.
    words = ("login failed for kestrel from 192.0.2.14 port 2201 on relay-07 " * 4).split()
    line = " ".join(words)
    split = Tagger(tagger.model, max_tokens=12, window_overlap=4)
    [result] = split.tag([line])
    assert "split" in result.flags and result.n_tokens == len(words)
    [whole] = tagger.tag([line])
    assert "split" not in whole.flags  # under the default cap: one sequence
    previous_end = 0
    for span in result.spans:
        assert span.text == line[span.start:span.end] and span.start >= previous_end  # ordered, disjoint
        assert 0.0 <= span.confidence <= 1.0
        previous_end = span.end
    assert 0.0 <= result.confidence <= 1.0
    # Each window is decoded as a sequence of its own, so on the tokens it owns it labels like the
    # window's words tagged as a line of their own (same emissions, same moves).
    tokens = tagger.tokenizer.tokenize_lines([line])
    assert tokens.texts == words  # one token per word here
    windows = split._windows(len(words))
    assert len(windows) > 2
    merged = _token_types(result, tokens.starts.tolist())
    for start, length, own_from, own_to in windows:
        [alone] = tagger.tag([" ".join(words[start:start + length])])
        alone_starts = tagger.tokenizer.tokenize_lines([alone.text]).starts.tolist()
        assert _token_types(alone, alone_starts)[own_from - start:own_to - start] == merged[own_from:own_to]


def _token_types(result, token_starts):
    """Per token, the type of the span covering it (None outside spans)."""
    types = [None] * len(token_starts)
    for span in result.spans:
        for t, start in enumerate(token_starts):
            if span.start <= start < span.end:
                types[t] = span.label
    return types


def test_split_lines_get_no_runner_up_and_others_keep_theirs(tagger):
    # The second-best path of one window is not a labelling of the whole line (README, review queue).
    long_line = " ".join(("login failed for kestrel from 192.0.2.14 " * 5).split())
    split = Tagger(tagger.model, max_tokens=12, window_overlap=4)
    short, long_result, empty = split.tag(["relay-07 down", long_line, ""], review_below=1.01)
    assert "split" in long_result.flags and long_result.runner_up is None and long_result.weakest
    [alone] = tagger.tag(["relay-07 down"], review_below=1.01)
    assert short.runner_up == alone.runner_up and short.runner_up_probability == alone.runner_up_probability
    assert empty.runner_up == [] and empty.runner_up_probability == 0.0  # no tokens: no second path


def test_tag_with_tokenizer_keys_equals_tag_without(tagger):
    # Reference: the same model with its type rows looked up by text and kind only (no keys). Small
    # caches on both sides start afresh many times, mid-batch too; emissions must agree bit for bit.
    from streamtag.demo.generate import generate_stream
    from streamtag.features import EmissionScorer
    from streamtag.tokenize import BatchTokenizer

    keyed, plain = Tagger(tagger.model), Tagger(tagger.model)
    for each in (keyed, plain):
        each.tokenizer = BatchTokenizer(cache_size=150)
        each.scorer = EmissionScorer(each.extractor, each.emission, cache_size=200)
    by_text = plain.scorer.type_rows
    plain.scorer.type_rows = lambda texts, kinds, *keys: by_text(texts, kinds)  # keys dropped
    emissions = {keyed: [], plain: []}
    for each in (keyed, plain):
        scorer_emissions = each.scorer.emissions
        each.scorer.emissions = lambda rows, lengths, f=scorer_emissions, out=emissions[each]: \
            out.append(f(rows, lengths)) or out[-1]
    lines = [record["text"] for record in generate_stream(1500, seed=31)]
    generations, epoch = set(), keyed.scorer._epoch
    for start in range(0, len(lines), 100):
        # Pieces over 256 characters are never cached: their rows are the next batch's, never keys.
        chunk = lines[start : start + 100] + [f"token {'k9' * 140} sent", f"from {'QZ7'[start // 100 % 3] * 300}"]
        assert keyed.tag(chunk, review_below=0.5) == plain.tag(chunk, review_below=0.5)
        generations.add(keyed.tokenizer.generation)
    assert len(emissions[keyed]) == len(emissions[plain]) >= 15
    for got, expected in zip(emissions[keyed], emissions[plain]):
        assert np.array_equal(got, expected)
    assert len(generations) >= 4 and keyed.scorer._epoch - epoch >= 4  # both caches started afresh often
