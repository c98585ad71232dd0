"""Tests of the compiled decode kernels (streamtag.crf_kernels, used by crf.decode and crf.viterbi).

References:
- brute-force enumeration of every label sequence, by the definition of a linear-chain CRF
  (Lafferty, McCallum & Pereira 2001, "Conditional Random Fields: Probabilistic Models for Segmenting
  and Labeling Sequence Data": p(y|x) = exp(score(y)) / Z), with log Z and marginals summed by
  scipy.special.logsumexp;
- numpy.argmax's documented tie rule ("the indices corresponding to the first occurrence are
  returned") for Viterbi ties;
- the numpy code in streamtag.crf (crf.USE_KERNELS = False), itself checked against the brute force in
  tests/test_crf.py: the kernels must equal it to 1e-9 (labels and Viterbi scores exactly).
"""

import itertools
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import logsumexp

pytest.importorskip("numba")

from streamtag import crf, crf_kernels  # noqa: E402

EXACT = 1e-9
LABEL_SETS = [
    ["O", "B-a", "I-a"],
    ["O", "B-a", "I-a", "B-b", "I-b"],
    ["w", "x", "y", "z"],  # no BIO prefixes: every move allowed
    ["p", "q"],
]


@pytest.fixture(autouse=True)
def kernels_on():
    crf.USE_KERNELS = True
    yield
    crf.USE_KERNELS = True


def numpy_decode(E, lengths, trans, start, end):
    """crf.decode through the numpy reference path."""
    crf.USE_KERNELS = False
    try:
        return crf.decode(E, lengths, trans, start, end)
    finally:
        crf.USE_KERNELS = True


def numpy_viterbi(E, lengths, trans, start, end):
    crf.USE_KERNELS = False
    try:
        return crf.viterbi(E, lengths, trans, start, end)
    finally:
        crf.USE_KERNELS = True


def random_model(rng, labels, n_tokens, scale=1.5):
    """Random emissions (n_tokens, L) and weights with the BIO mask applied: (E, trans_m, start_m, end)."""
    n_labels = len(labels)
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    trans, start = crf.apply_mask(rng.normal(scale=scale, size=(n_labels, n_labels)),
                                  rng.normal(scale=scale, size=n_labels), allowed_trans, allowed_start)
    return rng.normal(scale=scale, size=(n_tokens, n_labels)), trans, start, rng.normal(scale=scale, size=n_labels)


def brute_force(emissions, trans, start, end):
    """Every label sequence of one sequence (n, L) with a finite score: paths (P, n), scores (P,).

    score(y) = start[y0] + sum_t E[t, y_t] + sum_t trans[y_{t-1}, y_t] + end[y_last] (Lafferty et al. 2001).
    """
    n, n_labels = emissions.shape
    paths = np.array(list(itertools.product(range(n_labels), repeat=n)), dtype=np.int64).reshape(-1, n)
    scores = start[paths[:, 0]] + end[paths[:, -1]]
    for t in range(n):
        scores = scores + emissions[t, paths[:, t]]
    for t in range(1, n):
        scores = scores + trans[paths[:, t - 1], paths[:, t]]
    keep = np.isfinite(scores)
    return paths[keep], scores[keep]


def offsets_of(lengths):
    return np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(int) if len(lengths) else np.zeros(0, int)


def suspect_sequences(E, lengths, trans, start, end):
    """The kernel's own verdict: which sequences leave the scaled range (and are redone exactly)."""
    E = np.ascontiguousarray(E, dtype=np.float64)
    decode_flat = crf._compiled_kernels(E)[0]
    return decode_flat(E, np.asarray(lengths, dtype=np.int64), *crf._kernel_weights(E, trans, start, end))[9]


def assert_log_values_equal(mine, theirs, name):
    """Same -inf entries, no NaN, finite entries equal to 1e-9 (log space)."""
    assert mine.shape == theirs.shape, name
    assert not np.isnan(mine).any(), name
    np.testing.assert_array_equal(np.isfinite(mine), np.isfinite(theirs), err_msg=name)
    np.testing.assert_array_equal(mine[~np.isfinite(mine)], theirs[~np.isfinite(theirs)], err_msg=name)
    finite = np.isfinite(mine)
    np.testing.assert_allclose(mine[finite], theirs[finite], rtol=1e-12, atol=EXACT, err_msg=name)


def assert_rows_on_demand_equal(fb, ref_fb):
    """fb.log_alpha_at / log_beta_rows (what span_log_prob takes) equal the reference's full arrays,
    for tokens in any order and repeated."""
    n_tokens, n_labels = ref_fb.log_alpha.shape
    tokens = np.concatenate([np.arange(n_tokens), np.arange(n_tokens)[::-1]])
    assert_log_values_equal(fb.log_beta_rows(tokens), ref_fb.log_beta[tokens], "log_beta rows")
    for j in range(n_labels):
        labels = np.full(tokens.size, j)
        assert_log_values_equal(fb.log_alpha_at(tokens, labels), ref_fb.log_alpha[tokens, j], "log_alpha entries")


def every_span(lengths, n_labels):
    """(seq, first, stop, b_label, i_label) of every token range of up to 6 tokens of every sequence, for
    the label pairs (B-a, I-a) and (B-b, I-b) where they exist (the event is defined for any pair)."""
    pairs = [(1, 2), (3, 4)] if n_labels >= 5 else [(1, n_labels - 1)]
    spans = [(b, lo, hi, b_x, i_x) for b, n in enumerate(lengths) for lo in range(n)
             for hi in range(lo + 1, min(n, lo + 6) + 1) for b_x, i_x in pairs]
    return [np.array(column, dtype=np.int64) for column in zip(*spans)] if spans else None


def assert_spans_same_as_numpy(got_fb, ref_fb, E, lengths, trans, end):
    """span_log_prob from decode's scaled forward-backward (the compiled kernel) equals the numpy code
    on the same fb to 1e-12 (relative to log Z), and the numpy code on the numpy reference's fb to the decode tolerance."""
    spans = every_span(lengths, E.shape[1])
    if spans is None:
        return
    got = crf.span_log_prob(got_fb, E, lengths, trans, end, *spans)
    crf.USE_KERNELS = False
    try:
        same_fb = crf.span_log_prob(got_fb, E, lengths, trans, end, *spans)
        reference = crf.span_log_prob(ref_fb, E, lengths, trans, end, *spans)
    finally:
        crf.USE_KERNELS = True
    assert not np.isnan(got).any()
    np.testing.assert_array_equal(np.isfinite(got), np.isfinite(same_fb))
    np.testing.assert_array_equal(got[~np.isfinite(got)], same_fb[~np.isfinite(same_fb)])
    # Both sum terms of the size of log Z (log alpha, log beta): rounding is relative to that size.
    tolerance = 1e-12 * (1.0 + np.abs(got_fb.log_z[spans[0]]))
    finite = np.isfinite(got)
    assert (np.abs(got[finite] - same_fb[finite]) <= tolerance[finite]).all()
    assert_log_values_equal(got, reference, "span_log_prob")


def assert_follow_rows_equal(fb, labels, ref_fb, E, lengths):
    """decode's follow rows (what span_log_prob reads for the label after a span): exactly the tokens
    whose previous token in the sequence is decoded other than O (label 0), and log(row) + shift equals
    E + log_beta of the numpy reference there (the definition of the row); and each token's alpha at
    its decoded label equals the reference's log_alpha there."""
    follow_slot, follow_rows, follow_shift, decoded, alpha_of_label = fb.follow
    np.testing.assert_array_equal(decoded, labels)
    tokens = np.arange(E.shape[0])
    exact_token = np.isin(tokens, fb.exact_tokens)
    with np.errstate(divide="ignore"):
        got_alpha = np.log(alpha_of_label) + fb.alpha_shift
    assert_log_values_equal(got_alpha[~exact_token], ref_fb.log_alpha[tokens, labels][~exact_token], "alpha of label")
    offsets = np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64)
    starts = np.zeros(E.shape[0], dtype=bool)
    starts[offsets[np.asarray(lengths) > 0]] = True
    follows = np.zeros(E.shape[0], dtype=bool)
    follows[1:] = labels[:-1] != 0
    follows &= ~starts
    np.testing.assert_array_equal(follow_slot >= 0, follows)
    if not follows.any():
        return
    slots = follow_slot[follows]
    assert np.unique(slots).size == slots.size
    exact = np.isin(np.flatnonzero(follows), fb.exact_tokens)
    with np.errstate(divide="ignore"):
        got = np.log(follow_rows[slots]) + follow_shift[slots][:, None]
    want = E[follows] + ref_fb.log_beta[follows]
    assert_log_values_equal(got[~exact], want[~exact], "follow rows")


def assert_same_as_numpy(E, lengths, trans, start, end):
    got = crf.decode(E, lengths, trans, start, end)
    ref = numpy_decode(E, lengths, trans, start, end)
    np.testing.assert_array_equal(got.labels, ref.labels)
    np.testing.assert_array_equal(got.scores, ref.scores)
    lazy = isinstance(got.fb, crf.ScaledForwardBackward)
    if lazy:  # before anything is materialised: entries computed on demand
        assert_spans_same_as_numpy(got.fb, ref.fb, E, lengths, trans, end)
        assert_follow_rows_equal(got.fb, got.labels, ref.fb, E, lengths)
        assert_rows_on_demand_equal(got.fb, ref.fb)
    for name in ("log_alpha", "log_beta", "log_z"):
        assert_log_values_equal(getattr(got.fb, name), getattr(ref.fb, name), name)
    if lazy:  # and from the materialised arrays
        assert_rows_on_demand_equal(got.fb, ref.fb)
    np.testing.assert_array_equal(got.fb.lengths, ref.fb.lengths)
    assert not np.isnan(got.confidence).any() and (got.confidence <= 1.0).all()
    np.testing.assert_allclose(got.confidence, ref.confidence, rtol=0, atol=EXACT)
    path, scores = crf.viterbi(E, lengths, trans, start, end)
    np.testing.assert_array_equal(path, ref.labels)
    np.testing.assert_array_equal(scores, ref.scores)
    return got


# ----------------------------------------------------------------------------------------------------
# The kernels are what runs


def test_kernels_are_loaded_and_used():
    E = np.zeros((2, 3))
    crf.decode(E, [2], np.zeros((3, 3)), np.zeros(3), np.zeros(3))
    assert crf._kernels, "numba imports, so decode must use the compiled kernels"
    assert crf._compiled_kernels(E) is not None
    crf.USE_KERNELS = False
    assert crf._compiled_kernels(E) is None


# ----------------------------------------------------------------------------------------------------
# Exactness against brute force (Lafferty et al. 2001, enumerated; scipy.special.logsumexp)


@pytest.mark.parametrize("labels", LABEL_SETS)
@pytest.mark.parametrize("seed", range(6))
def test_decode_matches_brute_force(labels, seed):
    rng = np.random.default_rng(seed)
    lengths = np.array(list(rng.integers(0, 7, size=rng.integers(2, 7))) + [0, 1, 6])
    lengths = lengths[rng.permutation(lengths.size)]
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()))
    assert not suspect_sequences(E, lengths, trans, start, end).any()  # the scaled fast path is under test
    decoded = crf.decode(E, lengths, trans, start, end)
    path, path_scores = crf.viterbi(E, lengths, trans, start, end)
    marginals = crf.token_marginals(decoded.fb)
    for b, (offset, n) in enumerate(zip(offsets_of(lengths), lengths)):
        if n == 0:
            # One empty path with score 0 (no factors), so log Z = 0 (Lafferty et al. definition).
            assert decoded.fb.log_z[b] == 0.0 and decoded.scores[b] == 0.0 and path_scores[b] == 0.0
            continue
        paths, scores = brute_force(E[offset:offset + n], trans, start, end)
        log_z = logsumexp(scores)  # scipy.special.logsumexp over all label sequences
        assert abs(decoded.fb.log_z[b] - log_z) < EXACT
        best = paths[scores.argmax()]
        np.testing.assert_array_equal(decoded.labels[offset:offset + n], best)
        np.testing.assert_array_equal(path[offset:offset + n], best)
        assert abs(decoded.scores[b] - scores.max()) < EXACT
        assert abs(path_scores[b] - scores.max()) < EXACT
        for t in range(n):
            for j in range(len(labels)):
                hit = paths[:, t] == j
                expected = np.exp(logsumexp(scores[hit]) - log_z) if hit.any() else 0.0
                assert abs(marginals[offset + t, j] - expected) < EXACT
            # confidence = marginal of the decoded label (same brute force)
            expected = np.exp(logsumexp(scores[paths[:, t] == best[t]]) - log_z)
            assert abs(decoded.confidence[offset + t] - expected) < EXACT
        # log alpha includes E[t]: log-sum of the prefix scores ending in j (brute force over prefixes)
        for t in range(n):
            prefixes, prefix_scores = brute_force(E[offset:offset + t + 1], trans, start, np.zeros(len(labels)))
            for j in range(len(labels)):
                hit = prefixes[:, t] == j
                expected = logsumexp(prefix_scores[hit]) if hit.any() else -np.inf
                got = decoded.fb.log_alpha[offset + t, j]
                assert (got == expected == -np.inf) or abs(got - expected) < EXACT
        # log beta at the last token is end (nothing follows but the end score)
        np.testing.assert_allclose(decoded.fb.log_beta[offset + n - 1], end, rtol=0, atol=EXACT)


def test_ties_go_to_the_lowest_label():
    # With all weights 0 every path ties; numpy.argmax returns the first maximum (numpy documentation),
    # so the numpy path and the kernels both choose label 0 everywhere, the brute force's first path.
    lengths = np.array([3, 1, 4])
    E = np.zeros((8, 4))
    decoded = crf.decode(E, lengths, np.zeros((4, 4)), np.zeros(4), np.zeros(4))
    np.testing.assert_array_equal(decoded.labels, np.zeros(8, dtype=np.int64))
    np.testing.assert_allclose(decoded.confidence, 0.25, rtol=0, atol=EXACT)  # 4^n equal paths: 1/4 each
    np.testing.assert_allclose(decoded.fb.log_z, lengths * np.log(4.0), rtol=0, atol=EXACT)


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000))
def test_ties_between_integer_scores_match_numpy(seed):
    # Small integer weights make many exact ties, among predecessors and at the last token.
    rng = np.random.default_rng(seed)
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    lengths = rng.integers(0, 8, size=rng.integers(1, 9))
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    trans, start = crf.apply_mask(rng.integers(-1, 2, size=(5, 5)), rng.integers(-1, 2, size=5),
                                  allowed_trans, allowed_start)
    E = rng.integers(-1, 2, size=(int(lengths.sum()), 5)).astype(float)
    assert_same_as_numpy(E, lengths, trans, start, rng.integers(-1, 2, size=5).astype(float))


@pytest.mark.parametrize("seed", range(6))
def test_viterbi_leads_at_the_margin_and_signed_zeros_match_numpy_bit_for_bit(seed):
    # The kernel's Viterbi step takes one add where a column's best previous label leads the runner-up
    # by more than the transitions can make up (crf._MaxPlus's test), a maximum over moves elsewhere.
    # Weights on a grid of 0.25 make leads equal to that margin, exact ties and zero sums (-0.0 and
    # +0.0 compare equal but are different bits: IEEE 754-2008, section 6.3) all common. Labels as
    # the tagger's: O and B-/I- of nine types under the BIO mask (common practice), and a set without
    # prefixes, where every move is allowed. Reference: the numpy code, itself checked against brute
    # force in tests/test_crf.py; and for sequences of up to three tokens the brute force below.
    rng = np.random.default_rng(seed)
    labels = ["O"] + [f"{p}-t{k}" for k in range(9) for p in "BI"] if seed % 2 == 0 else ["w", "x", "y", "z"]
    n_labels = len(labels)
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    grid = np.array([-0.5, -0.25, -0.0, 0.0, 0.25, 0.5, 1.0])
    trans, start = crf.apply_mask(rng.choice(grid, size=(n_labels, n_labels)), rng.choice(grid, size=n_labels),
                                  allowed_trans, allowed_start)
    end = rng.choice(grid, size=n_labels)
    lengths = rng.integers(0, 30, size=300)
    lengths[:40] = rng.integers(1, 4, size=40)
    E = rng.choice(grid, size=(int(lengths.sum()), n_labels))
    got_labels, got_scores = crf.viterbi(E, lengths, trans, start, end)
    ref_labels, ref_scores = numpy_viterbi(E, lengths, trans, start, end)
    np.testing.assert_array_equal(got_labels, ref_labels)
    np.testing.assert_array_equal(got_scores.view(np.int64), ref_scores.view(np.int64))  # same bits
    decoded = crf.decode(E, lengths, trans, start, end)
    np.testing.assert_array_equal(decoded.labels, ref_labels)
    np.testing.assert_array_equal(decoded.scores.view(np.int64), ref_scores.view(np.int64))
    offsets = offsets_of(lengths)
    for b in range(40):  # short sequences: the best score by enumeration (Lafferty et al. 2001)
        rows = slice(offsets[b], offsets[b] + lengths[b])
        _, scores = brute_force(E[rows], trans, start, end)
        assert got_scores[b] == scores.max()


# ----------------------------------------------------------------------------------------------------
# Equal to the numpy path (the reference implementation)


@st.composite
def batches(draw):
    labels = draw(st.sampled_from(LABEL_SETS + [["O", "B-a", "I-a", "B-b", "I-b", "B-c", "I-c"]]))
    lengths = np.array(draw(st.lists(st.integers(0, 9), min_size=0, max_size=12)), dtype=np.int64)
    scale = draw(st.sampled_from([0.1, 1.5, 8.0, 1000.0]))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()), scale=scale)
    if draw(st.booleans()) and E.size:
        # Forbidden emissions: some entries -inf, sometimes a whole token (no finite path).
        E[rng.random(E.shape) < 0.2] = -np.inf
        E[rng.integers(0, E.shape[0])] = -np.inf
    return E, lengths, trans, start, end


@settings(max_examples=150, deadline=None)
@given(batches())
def test_decode_equals_numpy_path(batch):
    assert_same_as_numpy(*batch)


@pytest.mark.parametrize("labels", LABEL_SETS)
def test_larger_random_batches_equal_numpy_path(labels):
    rng = np.random.default_rng(len(labels))
    lengths = rng.integers(0, 40, size=700)  # several chunks of sequences, several tiles per step
    lengths[:5] = [0, 1, 1100, 0, 2]  # one sequence longer than a chunk's token budget
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()), scale=3.0)
    assert_same_as_numpy(E, lengths, trans, start, end)


def test_empty_batches_and_empty_sequences():
    trans, start, end = np.zeros((3, 3)), np.zeros(3), np.zeros(3)
    for lengths in ([], [0], [0, 0, 0]):
        decoded = assert_same_as_numpy(np.zeros((0, 3)), np.array(lengths, dtype=np.int64), trans, start, end)
        # Empty sequence: one empty path, score 0, log Z 0 (CRF definition, Lafferty et al. 2001).
        assert (decoded.fb.log_z == 0).all() and (decoded.scores == 0).all()
        assert decoded.labels.shape == (0,) and decoded.fb.log_alpha.shape == (0, 3)


def test_no_finite_path_gives_confidence_zero_not_nan():
    # A token whose every emission is -inf makes every path impossible: Z = 0 (log Z = -inf) by the
    # CRF definition, so no probability exists; confidence is defined as 0.
    labels = ["O", "B-a", "I-a"]
    rng = np.random.default_rng(3)
    lengths = np.array([3, 2, 4])
    E, trans, start, end = random_model(rng, labels, 9)
    E[1] = -np.inf  # second token of the first sequence
    E[4, [0, 1]] = -np.inf  # last token of the second sequence may only be I-a ...
    trans[:, 2] = -np.inf  # ... which nothing may reach
    decoded = assert_same_as_numpy(E, lengths, trans, start, end)
    assert decoded.fb.log_z[0] == -np.inf and decoded.fb.log_z[1] == -np.inf
    assert decoded.scores[0] == -np.inf and decoded.scores[1] == -np.inf
    np.testing.assert_array_equal(decoded.confidence[:5], 0.0)
    assert np.isfinite(decoded.fb.log_z[2]) and (decoded.confidence[5:] > 0).all()


def test_extreme_weights_take_the_exact_fallback_and_stay_exact():
    # Emissions of +-1000: exp(-2000) underflows, so the scaled recursion cannot hold these sequences
    # and the kernel must flag them and redo them in log space. Reference: brute force + logsumexp.
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    rng = np.random.default_rng(11)
    lengths = np.array([4, 0, 3, 5, 1])
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()))
    E[:7] += rng.choice([-1000.0, 1000.0], size=(7, 5))  # sequences 0 and 2
    E[7:] += 700.0 * rng.normal(size=(6, 5))  # sequences 3 and 4
    suspect = suspect_sequences(E, lengths, trans, start, end)
    assert suspect[[0, 2, 3]].all()  # the fallback really runs
    decoded = assert_same_as_numpy(E, lengths, trans, start, end)
    for b, (offset, n) in enumerate(zip(offsets_of(lengths), lengths)):
        if n == 0:
            continue
        paths, scores = brute_force(E[offset:offset + n], trans, start, end)
        log_z = logsumexp(scores)  # scipy.special.logsumexp
        assert abs(decoded.fb.log_z[b] - log_z) < 1e-9 * max(1.0, abs(log_z))
        for t in range(n):
            expected = np.exp(logsumexp(scores[paths[:, t] == decoded.labels[offset + t]]) - log_z)
            assert abs(decoded.confidence[offset + t] - expected) < EXACT
        # log alpha at a low-scoring label keeps its exact (very negative) value instead of -inf
        assert np.isfinite(decoded.fb.log_alpha[offset + n - 1, 0])


def test_extreme_transitions_and_end_scores_take_the_fallback():
    labels = ["w", "x", "y"]
    rng = np.random.default_rng(5)
    lengths = np.array([3, 2])
    E, trans, start, end = random_model(rng, labels, 5)
    trans[0, 1] = -900.0  # finite, but exp() of it relative to the others underflows
    end[2] = 800.0
    assert suspect_sequences(E, lengths, trans, start, end).all()
    assert_same_as_numpy(E, lengths, trans, start, end)


def test_underflow_after_the_first_token_takes_the_fallback():
    # Only the third token has an extreme gap (one label 900 below the rest), so the scaled forward
    # value of that label underflows at a later step, not at the start. Reference: brute force.
    labels = ["w", "x", "y", "z"]
    rng = np.random.default_rng(21)
    lengths = np.array([5, 3])
    E, trans, start, end = random_model(rng, labels, 8)
    E[2, 1] -= 900.0
    assert suspect_sequences(E, lengths, trans, start, end).tolist() == [True, False]
    decoded = assert_same_as_numpy(E, lengths, trans, start, end)
    paths, scores = brute_force(E[:5], trans, start, end)
    prefixes, prefix_scores = brute_force(E[:3], trans, start, np.zeros(4))
    expected = logsumexp(prefix_scores[prefixes[:, 2] == 1])  # scipy.special.logsumexp
    assert abs(decoded.fb.log_alpha[2, 1] - expected) < 1e-9 * abs(expected)
    assert abs(decoded.fb.log_z[0] - logsumexp(scores)) < EXACT


def test_underflow_in_the_backward_pass_takes_the_fallback():
    # Every move out of label 0 scores 900 below the others: going forward other labels carry each
    # sum, but beta of label 0 (all its moves) underflows in the scaled backward pass. Brute force.
    labels = ["w", "x", "y", "z"]
    rng = np.random.default_rng(22)
    lengths = np.array([4, 1])
    E, trans, start, end = random_model(rng, labels, 5)
    trans[0] -= 900.0
    assert suspect_sequences(E, lengths, trans, start, end).tolist() == [True, False]
    decoded = assert_same_as_numpy(E, lengths, trans, start, end)
    paths, scores = brute_force(E[:4], trans, start, end)
    # log alpha + log beta at label 0 of token 1 is the log-sum of the paths through it (about -900
    # below the others: as a probability it underflows, but in log space it is exact).
    expected = logsumexp(scores[paths[:, 1] == 0])  # scipy.special.logsumexp
    got = decoded.fb.log_alpha[1, 0] + decoded.fb.log_beta[1, 0]
    assert abs(got - expected) < 1e-9 * abs(expected)
    assert abs(decoded.fb.log_z[0] - logsumexp(scores)) < EXACT


def test_moderate_weights_stay_on_the_fast_path():
    # The other side of the fallback: ordinary models never leave the scaled range.
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    rng = np.random.default_rng(8)
    lengths = rng.integers(1, 60, size=300)
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()), scale=20.0)
    assert not suspect_sequences(E, lengths, trans, start, end).any()


def test_inputs_of_other_types_and_layouts():
    labels = ["O", "B-a", "I-a"]
    rng = np.random.default_rng(2)
    lengths = np.array([2, 5, 0, 3])
    E, trans, start, end = random_model(rng, labels, 10)
    reference = numpy_decode(E, lengths, trans, start, end)
    E_fortran = np.asfortranarray(E.astype(np.float32))
    trans_readonly = trans.copy()
    trans_readonly.flags.writeable = False
    got = crf.decode(E_fortran, lengths.astype(np.int32), trans_readonly, list(start), tuple(end))
    expected = numpy_decode(E.astype(np.float32), lengths, trans, start, end)
    np.testing.assert_array_equal(got.labels, expected.labels)
    np.testing.assert_allclose(got.confidence, expected.confidence, rtol=0, atol=EXACT)
    assert reference.labels.shape == got.labels.shape


def test_wrong_shapes_raise_instead_of_reading_out_of_bounds():
    E = np.zeros((4, 3))
    with pytest.raises(ValueError):
        crf.decode(E, [4], np.zeros((3, 3)), np.zeros(2), np.zeros(3))
    with pytest.raises(ValueError):
        crf.viterbi(E, [4], np.zeros((3, 3)), np.zeros(3), np.zeros(4))
    with pytest.raises(ValueError):
        crf.decode(E, [3], np.zeros((3, 3)), np.zeros(3), np.zeros(3))


def test_confidence_when_scaled_alpha_and_beta_disagree_by_hundreds_of_orders():
    # One token, start favours label 0 and end label 1 by 655 (exp(-655) ~ 1e-285): scaled alpha
    # (1, 1e-285) and beta (1e-285, 1) stay above the underflow guard, so the sequence is not redone,
    # but sum_j alpha_j beta_j is ~2e-285; the kernel takes the log-space formula for such a token.
    # Brute force: the two paths score 0 and 0, so each label has marginal 1/2 (Lafferty et al. 2001).
    E = np.zeros((1, 2))
    lengths = np.array([1])
    trans, start, end = np.zeros((2, 2)), np.array([0.0, -655.0]), np.array([-655.0, 0.0])
    assert not suspect_sequences(E, lengths, trans, start, end).any()
    decoded = assert_same_as_numpy(E, lengths, trans, start, end)
    paths, scores = brute_force(E, trans, start, end)
    assert decoded.labels[0] == 0  # tie: numpy.argmax's first maximum (numpy documentation)
    expected = np.exp(logsumexp(scores[paths[:, 0] == 0]) - logsumexp(scores))  # scipy.special.logsumexp
    assert abs(decoded.confidence[0] - expected) < EXACT and abs(expected - 0.5) < EXACT


@pytest.mark.parametrize("extreme", [False, True])
def test_span_log_prob_from_decode_matches_brute_force(extreme):
    # span_log_prob takes log alpha and log beta rows on demand from decode's scaled forward-backward;
    # with extreme weights some sequences are redone in log space and their rows come from there.
    # Reference: brute-force enumeration (Lafferty et al. 2001) of the event "exactly this chunk"
    # (IOB2 chunk rules, Tjong Kim Sang & Veenstra 1999), summed with scipy.special.logsumexp.
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    rng = np.random.default_rng(31 + extreme)
    lengths = np.array([4, 0, 3, 5, 1, 2])
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()))
    if extreme:
        E[:4] += rng.choice([-1000.0, 1000.0], size=(4, 5))
        E[7:12] += 700.0 * rng.normal(size=(5, 5))
        assert suspect_sequences(E, lengths, trans, start, end)[[0, 3]].all()
    decoded = crf.decode(E, lengths, trans, start, end)
    seq, first, stop, b_label, i_label, expected = [], [], [], [], [], []
    for b, (offset, n) in enumerate(zip(offsets_of(lengths), lengths)):
        if n == 0:
            continue
        paths, scores = brute_force(E[offset:offset + n], trans, start, end)
        for lo, hi, (b_x, i_x) in itertools.product(range(n), range(1, n + 1), [(1, 2), (3, 4)]):
            if hi <= lo:
                continue
            hit = (paths[:, lo] == b_x) & (paths[:, lo + 1:hi] == i_x).all(axis=1)
            if hi < n:
                hit &= paths[:, hi] != i_x
            seq.append(b); first.append(lo); stop.append(hi); b_label.append(b_x); i_label.append(i_x)  # noqa: E702
            expected.append(logsumexp(scores[hit]) - logsumexp(scores) if hit.any() else -np.inf)
    got = crf.span_log_prob(decoded.fb, E, lengths, trans, end, seq, first, stop, b_label, i_label)
    expected = np.array(expected)
    np.testing.assert_array_equal(np.isfinite(got), np.isfinite(expected))
    finite = np.isfinite(expected)
    np.testing.assert_allclose(np.exp(got[finite]), np.exp(expected[finite]), rtol=0, atol=EXACT)
    if not extreme:
        np.testing.assert_allclose(got[finite], expected[finite], rtol=0, atol=EXACT)
    # Rows on demand left the full arrays alone (the point of the lazy form).
    assert decoded.fb._log_alpha is None and decoded.fb._log_beta is None


def test_span_after_a_label_with_a_tiny_scaled_beta_matches_brute_force():
    # Token 1 after the span (token 0 as B-a) favours O by 655 in its emission, while end disfavours O
    # by 655: the candidates after the span weigh exp(-655) each in scaled form (~1e-285, above the
    # underflow guard, so decode keeps the fast path); span_log_prob must still be exact from those
    # scaled rows. Reference: brute force (Lafferty et al. 2001) of "token 0 is B-a and token 1 is
    # not I-a" (IOB2 chunk rules), summed with scipy.special.logsumexp.
    labels = ["O", "B-a", "I-a"]
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    trans, start = crf.apply_mask(np.zeros((3, 3)), np.zeros(3), allowed_trans, allowed_start)
    E = np.array([[0.0, 0.0, 0.0], [655.0, 0.0, 0.0]])
    end = np.array([-655.0, 0.0, 0.0])
    lengths = np.array([2])
    assert not suspect_sequences(E, lengths, trans, start, end).any()
    decoded = crf.decode(E, lengths, trans, start, end)
    got = crf.span_log_prob(decoded.fb, E, lengths, trans, end, [0], [0], [1], 1, 2)
    paths, scores = brute_force(E, trans, start, end)
    hit = (paths[:, 0] == 1) & (paths[:, 1] != 2)
    expected = logsumexp(scores[hit]) - logsumexp(scores)
    assert abs(got[0] - expected) < 1e-12


# ----------------------------------------------------------------------------------------------------
# n-best: the kernel equals the numpy code (itself checked against brute force in tests/test_crf.py)


def numpy_nbest(E, lengths, trans, start, end, k):
    crf.USE_KERNELS = False
    try:
        return crf.nbest(E, lengths, trans, start, end, k)
    finally:
        crf.USE_KERNELS = True


def assert_nbest_same_as_numpy(E, lengths, trans, start, end, k):
    """Labels and scores identical, bit for bit: same sums in the same order, same tie rule."""
    got_labels, got_scores = crf.nbest(E, lengths, trans, start, end, k)
    ref_labels, ref_scores = numpy_nbest(E, lengths, trans, start, end, k)
    np.testing.assert_array_equal(got_labels, ref_labels)
    np.testing.assert_array_equal(got_scores, ref_scores)
    assert got_labels.dtype == ref_labels.dtype == np.int64
    return got_labels, got_scores


def test_nbest_runs_the_kernel(monkeypatch):
    calls = []
    kernels = list(crf._compiled_kernels(np.zeros((1, 2))))
    original = kernels[3]
    kernels[3] = lambda *args: calls.append(args) or original(*args)
    monkeypatch.setitem(crf._loaded, ("crf_kernels", "load"), tuple(kernels))
    labels, scores = crf.nbest(np.array([[1.0, 3.0]]), [1], np.zeros((2, 2)), np.zeros(2), np.zeros(2), 2)
    assert len(calls) == 1
    # one token, no transitions: the paths are the labels, ranked by emission (by hand from the definition)
    np.testing.assert_array_equal(labels[:, 0], [1, 0])
    np.testing.assert_array_equal(scores[0], [3.0, 1.0])


@settings(max_examples=150, deadline=None)
@given(batches(), st.integers(1, 5))
def test_nbest_equals_numpy_path(batch, k):
    assert_nbest_same_as_numpy(*batch, k)


@settings(max_examples=80, deadline=None)
@given(st.integers(0, 10_000), st.integers(1, 6))
def test_nbest_ties_and_forbidden_moves_match_numpy(seed, k):
    # Integer weights in {-1, 0, 1} tie constantly; random -inf moves, starts and emissions (some
    # sequences then have fewer than k paths, or none); lengths 0 and 1 included.
    rng = np.random.default_rng(seed)
    n_labels = int(rng.integers(1, 6))
    lengths = np.array(list(rng.integers(0, 7, size=rng.integers(0, 8))) + [0, 1], dtype=np.int64)
    lengths = lengths[rng.permutation(lengths.size)]
    n_tokens = int(lengths.sum())
    E = rng.integers(-1, 2, size=(n_tokens, n_labels)).astype(float)
    trans = rng.integers(-1, 2, size=(n_labels, n_labels)).astype(float)
    start = rng.integers(-1, 2, size=n_labels).astype(float)
    end = rng.integers(-1, 2, size=n_labels).astype(float)
    trans[rng.random(trans.shape) < 0.3] = -np.inf
    start[rng.random(n_labels) < 0.2] = -np.inf
    E[rng.random(E.shape) < 0.15] = -np.inf
    assert_nbest_same_as_numpy(E, lengths, trans, start, end, k)


def test_nbest_all_ties_go_to_the_lowest_labels():
    # All weights 0: every path ties. The numpy code ranks tied candidates with numpy.argmax's
    # first-maximum rule (numpy documentation) over states (label, rank), label-major; worked by hand
    # for 2 labels and 2 tokens: at token 1 each label keeps (from 0 rank 0, from 1 rank 0), and the
    # final states in order are (0, rank 0) -> path 0 0, (0, rank 1) -> 1 0, (1, rank 0) -> 0 1.
    labels, scores = assert_nbest_same_as_numpy(np.zeros((2, 2)), [2], np.zeros((2, 2)), np.zeros(2),
                                                np.zeros(2), 3)
    np.testing.assert_array_equal(labels, [[0, 0], [1, 0], [0, 1]])
    np.testing.assert_array_equal(scores, [[0.0, 0.0, 0.0]])


def test_nbest_edge_cases_match_numpy():
    trans, start, end = np.zeros((3, 3)), np.zeros(3), np.zeros(3)
    for lengths in ([], [0], [0, 0, 0]):  # no tokens: an empty path of score 0 per sequence
        labels, scores = assert_nbest_same_as_numpy(np.zeros((0, 3)), lengths, trans, start, end, 2)
        assert labels.shape == (2, 0) and scores.shape == (len(lengths), 2)
    impossible = np.full((3, 3), -np.inf)  # no path of finite score: all -1 and -inf
    labels, scores = assert_nbest_same_as_numpy(impossible, [1, 2], trans, start, end, 2)
    assert (labels == -1).all() and np.isneginf(scores).all()
    # k far above the number of paths (one token, two allowed starts under IOB2)
    allowed_trans, allowed_start = crf.bio_allowed(["O", "B-a", "I-a"])
    trans_m, start_m = crf.apply_mask(trans, start, allowed_trans, allowed_start)
    labels, scores = assert_nbest_same_as_numpy(np.array([[0.0, 1.0, 5.0]]), [1], trans_m, start_m, end, 6)
    np.testing.assert_array_equal(labels[:, 0], [1, 0, -1, -1, -1, -1])


def test_nbest_with_nan_takes_the_numpy_code():
    # numpy.argmax ranks NaN first (numpy documentation); the kernel does not, so NaN input is left
    # to the numpy code and the results are the same.
    E = np.array([[0.0, np.nan], [1.0, 2.0]])
    assert_nbest_same_as_numpy(E, [2], np.zeros((2, 2)), np.zeros(2), np.zeros(2), 2)


def test_nbest_large_batch_matches_numpy():
    labels = ["O"] + [f"{p}-{t}" for t in "abcdefghi" for p in "BI"]  # 19 labels, BIO masked
    rng = np.random.default_rng(19)
    lengths = rng.integers(0, 40, size=60)
    E, trans, start, end = random_model(rng, labels, int(lengths.sum()), scale=2.0)
    for k in (1, 2, 3):
        assert_nbest_same_as_numpy(E, lengths, trans, start, end, k)


# ----------------------------------------------------------------------------------------------------
# Loading: a failing cache must not stop decoding


def test_load_recovers_from_a_failing_cache(monkeypatch):
    calls = []

    def broken_then_working(*kernels):
        calls.append(kernels)
        if len(calls) == 1:
            raise OSError(28, "No space left on device")  # what a full disk gives when numba saves
        return original(*kernels)

    original = crf_kernels._warm_up
    saved = (crf_kernels.decode_flat, crf_kernels.viterbi_flat,
             crf_kernels.exact_forward_backward, crf_kernels.nbest_flat, crf_kernels.span_log_prob_scaled)
    monkeypatch.setattr(crf_kernels, "_warm_up", broken_then_working)
    try:
        kernels = crf_kernels.load()
        assert len(calls) == 2
        assert all(new is not old for new, old in zip(kernels, saved))  # rebuilt without the cache
        viterbi_flat = kernels[1]
        labels, scores = viterbi_flat(np.array([[1.0, 3.0], [2.0, 0.0]]), np.array([1, 1]), np.zeros((2, 2)),
                                      np.zeros(2), np.zeros(2))
        np.testing.assert_array_equal(labels, [1, 0])  # each token alone: its best emission
        np.testing.assert_array_equal(scores, [3.0, 2.0])
    finally:
        (crf_kernels.decode_flat, crf_kernels.viterbi_flat,
         crf_kernels.exact_forward_backward, crf_kernels.nbest_flat, crf_kernels.span_log_prob_scaled) = saved


_DECODE_SCRIPT = (
    "import numpy as np\n"
    "from streamtag import crf\n"
    "E = np.arange(12.0).reshape(4, 3) % 5\n"
    "d = crf.decode(E, [3, 1], np.zeros((3, 3)), np.zeros(3), np.zeros(3))\n"
    "assert crf._kernels\n"
    "crf.USE_KERNELS = False\n"
    "r = crf.decode(E, [3, 1], np.zeros((3, 3)), np.zeros(3), np.zeros(3))\n"
    "print((d.labels == r.labels).all(), abs(d.confidence - r.confidence).max() < 1e-9)\n"
)


def run_from_copy(tmp_path, prepare_cache):
    """Run _DECODE_SCRIPT against a copy of the package whose cache folder prepare_cache(folder) sets up."""
    package = Path(crf.__file__).parent
    target = tmp_path / "site" / "streamtag"
    shutil.copytree(package, target, ignore=shutil.ignore_patterns("__pycache__"))
    prepare_cache(target / "__pycache__")
    not_a_folder = tmp_path / "not-a-folder"
    not_a_folder.write_text("")
    env = {key: value for key, value in os.environ.items() if not key.startswith("NUMBA_")}
    # numba's other cache places (home, XDG cache) are files, so no cache can be created there.
    env.update(HOME=str(not_a_folder), XDG_CACHE_HOME=str(not_a_folder), PYTHONPATH=str(target.parent))
    result = subprocess.run([sys.executable, "-c", _DECODE_SCRIPT], capture_output=True, text=True, env=env,
                            cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert result.stderr == ""  # no traceback, no warning
    assert result.stdout.split() == ["True", "True"]


@pytest.mark.slow
def test_install_without_any_cache_folder_just_compiles(tmp_path):
    # A read-only install: __pycache__ cannot be created (here a file stands in its place, which
    # stops root too), nor numba's user cache. numba refuses cache=True then; the kernels compile.
    run_from_copy(tmp_path, lambda folder: folder.write_text("not a folder"))


@pytest.mark.slow
def test_corrupt_cache_files_are_ignored(tmp_path):
    # Cache index files full of garbage (a crash while writing, a disk error): numba's unpickling
    # fails on load; the kernels are compiled again without the cache, silently.
    def corrupt(folder):
        folder.mkdir()
        source = Path(crf_kernels.__file__).read_text()
        for name in ("decode_flat", "viterbi_flat", "exact_forward_backward", "nbest_flat", "span_log_prob_scaled"):
            line = source.splitlines().index(f"def {name}(" + source.split(f"def {name}(")[1].splitlines()[0]) + 1
            index = folder / f"crf_kernels.{name}-{line}.py{sys.version_info.major}{sys.version_info.minor}.nbi"
            index.write_bytes(b"\x80\x04garbage" * 10)

    run_from_copy(tmp_path, corrupt)
