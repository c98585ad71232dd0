"""Tests of streamtag.crf against independent computations.

Reference for every exactness check: brute-force enumeration of all label sequences using the model
definition of a linear-chain CRF (Lafferty, McCallum & Pereira 2001, "Conditional Random Fields:
Probabilistic Models for Segmenting and Labeling Sequence Data", eq. for p(y|x) = exp(score) / Z),
with log Z and every marginal summed by scipy.special.logsumexp. Gradients are checked against finite
differences from scipy.optimize.check_grad / approx_fprime. BIO validity is checked with seqeval's
CoNLL chunker.
"""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import approx_fprime, check_grad
from scipy.special import logsumexp
from seqeval.metrics.sequence_labeling import get_entities

from streamtag import crf

LABEL_SETS = [
    ["O", "B-a", "I-a"],
    ["O", "B-a", "I-a", "B-b", "I-b"],
    ["x", "y", "z", "w"],  # no BIO prefixes: every move allowed
    ["p", "q"],
]
EXACT = 1e-9


# ----------------------------------------------------------------------------------------------------
# Brute force (the model definition, Lafferty et al. 2001)


def all_paths(n_labels, length):
    """Every label sequence of the given length, (P, length)."""
    return np.array(list(itertools.product(range(n_labels), repeat=length)), dtype=np.int64).reshape(-1, length)


def path_scores(paths, emissions, trans, start, end):
    """score(y) = start[y0] + sum_t E[t, y_t] + sum_t trans[y_{t-1}, y_t] + end[y_last] for every path."""
    length = paths.shape[1]
    scores = start[paths[:, 0]] + end[paths[:, -1]]
    for t in range(length):
        scores = scores + emissions[t, paths[:, t]]
    for t in range(1, length):
        scores = scores + trans[paths[:, t - 1], paths[:, t]]
    return scores


def brute_force(emissions, trans, start, end):
    """Allowed paths (finite score) and their scores for one sequence of emissions (n, L)."""
    paths = all_paths(emissions.shape[1], emissions.shape[0])
    scores = path_scores(paths, emissions, trans, start, end)
    keep = np.isfinite(scores)
    return paths[keep], scores[keep]


def random_model(rng, labels, lengths, scale=1.5):
    """Random emissions/weights with the BIO mask applied; returns (E, trans_m, start_m, end)."""
    n_labels = len(labels)
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    emissions = rng.normal(scale=scale, size=(int(np.sum(lengths)), n_labels))
    trans_m, start_m = crf.apply_mask(
        rng.normal(scale=scale, size=(n_labels, n_labels)), rng.normal(scale=scale, size=n_labels),
        allowed_trans, allowed_start,
    )
    return emissions, trans_m, start_m, rng.normal(scale=scale, size=n_labels)


def random_lengths(rng, max_len=6):
    lengths = list(rng.integers(0, max_len + 1, size=rng.integers(1, 7)))
    return np.array(lengths + [0, 1, max_len], dtype=np.int64)[rng.permutation(len(lengths) + 3)]


def sequences(emissions, lengths):
    offsets = np.concatenate(([0], np.cumsum(lengths)[:-1]))
    return [(int(o), emissions[o:o + n]) for o, n in zip(offsets, lengths)]


CASES = [(labels, seed) for labels in LABEL_SETS for seed in range(4)]


# ----------------------------------------------------------------------------------------------------
# Constraints


def test_bio_allowed_matches_iob2_rules():
    # IOB2 (Tjong Kim Sang & Veenstra 1999, "Representing Text Chunks"): I-X only continues a chunk
    # of type X; a sequence never starts with I-X. Table written out by hand from those rules.
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    expected = np.array([
        # to: O  B-a  I-a  B-b  I-b
        [1, 1, 0, 1, 0],  # from O
        [1, 1, 1, 1, 0],  # from B-a
        [1, 1, 1, 1, 0],  # from I-a
        [1, 1, 0, 1, 1],  # from B-b
        [1, 1, 0, 1, 1],  # from I-b
    ], dtype=bool)
    np.testing.assert_array_equal(allowed_trans, expected)
    np.testing.assert_array_equal(allowed_start, [True, True, False, True, False])


def test_apply_mask_puts_minus_infinity_only_where_forbidden():
    allowed_trans, allowed_start = crf.bio_allowed(["O", "B-a", "I-a"])
    trans_m, start_m = crf.apply_mask(np.ones((3, 3)), np.ones(3), allowed_trans, allowed_start)
    # common practice: a forbidden move gets probability 0, i.e. log-score -inf.
    assert np.array_equal(np.isneginf(trans_m), ~allowed_trans)
    assert np.array_equal(np.isneginf(start_m), ~allowed_start)
    assert (trans_m[allowed_trans] == 1).all()


# ----------------------------------------------------------------------------------------------------
# Exactness against brute force


@pytest.mark.parametrize("labels,seed", CASES)
def test_log_z_marginals_viterbi_match_brute_force(labels, seed):
    rng = np.random.default_rng(seed)
    lengths = random_lengths(rng)
    E, trans, start, end = random_model(rng, labels, lengths)
    fb = crf.forward_backward(E, lengths, trans, start, end)
    marginals = crf.token_marginals(fb)
    best_labels, best_scores = crf.viterbi(E, lengths, trans, start, end)
    for b, (offset, emissions) in enumerate(sequences(E, lengths)):
        n = emissions.shape[0]
        if n == 0:
            # One empty path with score 0, so Z = 1 (Lafferty et al. definition with no factors).
            assert fb.log_z[b] == 0.0 and best_scores[b] == 0.0
            continue
        paths, scores = brute_force(emissions, trans, start, end)
        log_z = logsumexp(scores)  # scipy.special.logsumexp
        assert abs(fb.log_z[b] - log_z) < EXACT
        for t in range(n):
            for j in range(len(labels)):
                hit = paths[:, t] == j
                expected = np.exp(logsumexp(scores[hit]) - log_z) if hit.any() else 0.0
                assert abs(marginals[offset + t, j] - expected) < EXACT
        assert abs(best_scores[b] - scores.max()) < EXACT
        np.testing.assert_array_equal(best_labels[offset:offset + n], paths[scores.argmax()])
        # log alpha + log beta - log Z is the log marginal (same brute force, token 0 and last)
        for t in (0, n - 1):
            expected_log = [logsumexp(scores[paths[:, t] == j]) if (paths[:, t] == j).any() else -np.inf
                            for j in range(len(labels))]
            got = fb.log_alpha[offset + t] + fb.log_beta[offset + t]
            finite = np.isfinite(expected_log)
            assert np.array_equal(np.isfinite(got), finite)
            assert np.abs(got[finite] - np.array(expected_log)[finite]).max() < EXACT


@pytest.mark.parametrize("labels,seed", CASES)
@pytest.mark.parametrize("scale", [0.3, 6.0])
def test_viterbi_matches_brute_force_on_flat_and_confident_models(labels, seed, scale):
    # Small scores leave many near-ties between predecessors; large ones give clear leaders. Both
    # must give the brute-force best path (Lafferty et al. 2001 definition, enumerated).
    rng = np.random.default_rng(600 + seed)
    lengths = np.concatenate([random_lengths(rng) for _ in range(8)])
    E, trans, start, end = random_model(rng, labels, lengths, scale=scale)
    best_labels, best_scores = crf.viterbi(E, lengths, trans, start, end)
    for b, (offset, emissions) in enumerate(sequences(E, lengths)):
        n = emissions.shape[0]
        if n == 0:
            continue
        paths, scores = brute_force(emissions, trans, start, end)
        assert abs(best_scores[b] - scores.max()) < EXACT
        np.testing.assert_array_equal(best_labels[offset:offset + n], paths[scores.argmax()])


@pytest.fixture(params=[True, False], ids=["kernels", "numpy"])
def both_paths(request, monkeypatch):
    """Run the test through the compiled kernels (if numba imports) and through the numpy code."""
    monkeypatch.setattr(crf, "USE_KERNELS", request.param)


@pytest.mark.parametrize("labels,seed", CASES)
@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_nbest_matches_brute_force(labels, seed, k, both_paths):
    rng = np.random.default_rng(100 + seed)
    lengths = random_lengths(rng, max_len=5)
    E, trans, start, end = random_model(rng, labels, lengths)
    nbest_labels, nbest_scores = crf.nbest(E, lengths, trans, start, end, k)
    assert nbest_labels.shape == (k, E.shape[0]) and nbest_scores.shape == (lengths.size, k)
    for b, (offset, emissions) in enumerate(sequences(E, lengths)):
        n = emissions.shape[0]
        if n == 0:
            assert nbest_scores[b, 0] == 0.0 and np.isneginf(nbest_scores[b, 1:]).all()
            continue
        paths, scores = brute_force(emissions, trans, start, end)
        order = np.argsort(-scores, kind="stable")[:k]
        found = len(order)
        np.testing.assert_allclose(nbest_scores[b, :found], scores[order], rtol=0, atol=EXACT)
        assert np.isneginf(nbest_scores[b, found:]).all()
        for rank in range(found):
            np.testing.assert_array_equal(nbest_labels[rank, offset:offset + n], paths[order[rank]])
        assert (nbest_labels[found:, offset:offset + n] == -1).all()


def test_nbest_marks_missing_paths(both_paths):
    # With labels O, B-a, I-a and one token, only O and B-a may start (IOB2 rule): 2 paths exist.
    allowed_trans, allowed_start = crf.bio_allowed(["O", "B-a", "I-a"])
    trans, start = crf.apply_mask(np.zeros((3, 3)), np.zeros(3), allowed_trans, allowed_start)
    labels, scores = crf.nbest(np.array([[0.0, 1.0, 5.0]]), [1], trans, start, np.zeros(3), 4)
    np.testing.assert_array_equal(labels[:, 0], [1, 0, -1, -1])
    np.testing.assert_array_equal(scores[0], [1.0, 0.0, -np.inf, -np.inf])


@pytest.mark.parametrize("labels,seed", [c for c in CASES if c[0][1].startswith("B-")])
def test_span_log_prob_matches_brute_force(labels, seed):
    rng = np.random.default_rng(200 + seed)
    lengths = random_lengths(rng)
    E, trans, start, end = random_model(rng, labels, lengths)
    fb = crf.forward_backward(E, lengths, trans, start, end)
    types = [(labels.index("B-" + name), labels.index("I-" + name)) for name in ("a", "b") if "B-" + name in labels]
    seq, first, stop, b_label, i_label, expected = [], [], [], [], [], []
    for b, (_, emissions) in enumerate(sequences(E, lengths)):
        n = emissions.shape[0]
        if n == 0:
            continue
        paths, scores = brute_force(emissions, trans, start, end)
        log_z = logsumexp(scores)
        for lo in range(n):
            for hi in range(lo + 1, n + 1):
                for b_x, i_x in types:
                    # the chunk [lo, hi): B-X at lo, I-X inside, not I-X right after
                    hit = (paths[:, lo] == b_x) & (paths[:, lo + 1:hi] == i_x).all(axis=1)
                    if hi < n:
                        hit &= paths[:, hi] != i_x
                    seq.append(b); first.append(lo); stop.append(hi); b_label.append(b_x); i_label.append(i_x)
                    expected.append(logsumexp(scores[hit]) - log_z if hit.any() else -np.inf)
    got = crf.span_log_prob(fb, E, lengths, trans, end, seq, first, stop, b_label, i_label)
    expected = np.array(expected)
    assert np.array_equal(np.isfinite(got), np.isfinite(expected))
    assert np.abs(got - expected)[np.isfinite(expected)].max() < EXACT


def test_span_log_prob_rejects_bad_spans():
    E = np.zeros((3, 3))
    fb = crf.forward_backward(E, [3], np.zeros((3, 3)), np.zeros(3), np.zeros(3))
    with pytest.raises(ValueError):  # stop past the end of the sequence
        crf.span_log_prob(fb, E, [3], np.zeros((3, 3)), np.zeros(3), [0], [2], [4], 1, 2)


# ----------------------------------------------------------------------------------------------------
# Objective and gradient


@pytest.mark.parametrize("labels,seed", CASES)
def test_nll_matches_brute_force(labels, seed):
    rng = np.random.default_rng(300 + seed)
    lengths = random_lengths(rng, max_len=5)
    E, trans, start, end = random_model(rng, labels, lengths)
    gold, _ = crf.viterbi(E + rng.normal(scale=3, size=E.shape), lengths, trans, start, end)  # a valid path
    weights = rng.uniform(0.2, 2.0, size=lengths.size)
    nll, *_ = crf.nll_and_grad(E, gold, lengths, trans, start, end, weights)
    expected = 0.0
    for b, (offset, emissions) in enumerate(sequences(E, lengths)):
        n = emissions.shape[0]
        if n == 0:
            continue
        _, scores = brute_force(emissions, trans, start, end)
        gold_score = path_scores(gold[None, offset:offset + n], emissions, trans, start, end)[0]
        expected += weights[b] * (logsumexp(scores) - gold_score)
    assert abs(nll - expected) < EXACT


@pytest.mark.parametrize("labels,seed", CASES)
def test_gradient_matches_finite_differences(labels, seed):
    rng = np.random.default_rng(400 + seed)
    lengths = random_lengths(rng, max_len=5)
    E, trans, start, end = random_model(rng, labels, lengths, scale=1.0)
    gold, _ = crf.viterbi(E + rng.normal(scale=3, size=E.shape), lengths, trans, start, end)
    weights = rng.uniform(0.2, 2.0, size=lengths.size)
    free_trans, free_start = np.isfinite(trans), np.isfinite(start)
    sizes = [E.size, int(free_trans.sum()), int(free_start.sum()), end.size]
    cuts = np.cumsum(sizes)[:-1]

    def unpack(theta):
        e, t, s, n = np.split(theta, cuts)
        tr = np.full_like(trans, -np.inf); tr[free_trans] = t
        sv = np.full_like(start, -np.inf); sv[free_start] = s
        return e.reshape(E.shape), tr, sv, n

    def objective(theta):
        e, tr, sv, n = unpack(theta)
        return crf.nll_and_grad(e, gold, lengths, tr, sv, n, weights)[0]

    def gradient(theta):
        e, tr, sv, n = unpack(theta)
        _, de, dt, ds, dn = crf.nll_and_grad(e, gold, lengths, tr, sv, n, weights)
        return np.concatenate([de.ravel(), dt[free_trans], ds[free_start], dn])

    theta = np.concatenate([E.ravel(), trans[free_trans], start[free_start], end])
    # scipy.optimize.check_grad: norm of (analytic - forward finite difference)
    error = check_grad(objective, gradient, theta, epsilon=1e-7)
    assert error < 1e-5 * max(1.0, np.linalg.norm(gradient(theta)))
    numeric = approx_fprime(theta, objective, 1e-7)
    np.testing.assert_allclose(gradient(theta), numeric, atol=2e-5)
    # Forbidden entries: exactly zero and finite.
    _, _, dt, ds, _ = crf.nll_and_grad(E, gold, lengths, trans, start, end, weights)
    assert (dt[~free_trans] == 0.0).all() and (ds[~free_start] == 0.0).all()
    assert np.isfinite(dt).all() and np.isfinite(ds).all()


def test_gradient_of_unit_weights_equals_unweighted():
    rng = np.random.default_rng(7)
    lengths = np.array([4, 2, 0, 3])
    E, trans, start, end = random_model(rng, ["O", "B-a", "I-a"], lengths)
    gold, _ = crf.viterbi(E, lengths, trans, start, end)
    plain = crf.nll_and_grad(E, gold, lengths, trans, start, end)
    doubled = crf.nll_and_grad(E, gold, lengths, trans, start, end, np.full(4, 2.0))
    # common practice: the objective is linear in the sequence weights.
    assert abs(doubled[0] - 2 * plain[0]) < 1e-12
    for a, b in zip(plain[1:], doubled[1:]):
        np.testing.assert_allclose(b, 2 * a, atol=1e-12)


def test_forbidden_gold_path_is_rejected():
    allowed_trans, allowed_start = crf.bio_allowed(["O", "B-a", "I-a"])
    trans, start = crf.apply_mask(np.zeros((3, 3)), np.zeros(3), allowed_trans, allowed_start)
    with pytest.raises(ValueError):  # O -> I-a is forbidden in IOB2 (Tjong Kim Sang & Veenstra 1999)
        crf.nll_and_grad(np.zeros((2, 3)), [0, 2], [2], trans, start, np.zeros(3))


# ----------------------------------------------------------------------------------------------------
# Extreme values and shapes


def test_extreme_scores_stay_exact_and_free_of_nan():
    # Score gaps of thousands push the scaled sums below the float range; the exact fallback must
    # still agree with scipy.special.logsumexp over the brute-force enumeration.
    labels = ["O", "B-a", "I-a"]
    rng = np.random.default_rng(11)
    lengths = np.array([4, 3])
    E, trans, start, end = random_model(rng, labels, lengths, scale=900.0)
    E[1, :] = [-np.inf, 5.0, -np.inf]  # clamped token: only B-a possible
    fb = crf.forward_backward(E, lengths, trans, start, end)
    marginals = crf.token_marginals(fb)
    assert not np.isnan(fb.log_alpha).any() and not np.isnan(fb.log_beta).any()
    assert not np.isnan(marginals).any()
    for b, (offset, emissions) in enumerate(sequences(E, lengths)):
        paths, scores = brute_force(emissions, trans, start, end)
        assert abs(fb.log_z[b] - logsumexp(scores)) < 1e-9 * max(1.0, abs(logsumexp(scores)))
    np.testing.assert_allclose(marginals.sum(axis=1), 1.0, atol=1e-12)
    assert marginals[1, 1] == 1.0


@pytest.mark.parametrize("seed", range(4))
def test_expected_pair_counts_exact_with_extreme_scores(seed):
    # Expected transition counts = sum over paths of p(path) * pair counts (model definition,
    # Lafferty et al. 2001), enumerated by brute force; scores this far apart exercise the exact
    # fallback of the scaled matrix products.
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    rng = np.random.default_rng(500 + seed)
    lengths = np.array([4, 3, 1, 5])
    E, trans, start, end = random_model(rng, labels, lengths, scale=900.0)
    gold, _ = crf.viterbi(E, lengths, trans, start, end)
    _, d_emission, d_trans, _, _ = crf.nll_and_grad(E, gold, lengths, trans, start, end)
    expected_pairs = np.zeros_like(trans)
    gold_pairs = np.zeros_like(trans)
    for offset, emissions in sequences(E, lengths):
        n = emissions.shape[0]
        paths, scores = brute_force(emissions, trans, start, end)
        prob = np.exp(scores - logsumexp(scores))
        for t in range(1, n):
            np.add.at(expected_pairs, (paths[:, t - 1], paths[:, t]), prob)
            gold_pairs[gold[offset + t - 1], gold[offset + t]] += 1
        marginal = np.stack([[prob[paths[:, t] == j].sum() for j in range(len(labels))] for t in range(n)])
        onehot = np.eye(len(labels))[gold[offset:offset + n]]
        np.testing.assert_allclose(d_emission[offset:offset + n], marginal - onehot, atol=1e-9)
    np.testing.assert_allclose(d_trans, expected_pairs - gold_pairs, atol=1e-9)


def test_impossible_sequence_gives_no_nan():
    E = np.full((2, 2), -np.inf)
    fb = crf.forward_backward(E, [2], np.zeros((2, 2)), np.zeros(2), np.zeros(2))
    assert np.isneginf(fb.log_z[0])
    assert not np.isnan(crf.token_marginals(fb)).any()
    labels, scores = crf.nbest(E, [2], np.zeros((2, 2)), np.zeros(2), np.zeros(2), 2)
    assert (labels == -1).all() and np.isneginf(scores).all()


def test_empty_batches():
    for lengths in ([], [0, 0]):
        E = np.zeros((0, 3))
        fb = crf.forward_backward(E, lengths, np.zeros((3, 3)), np.zeros(3), np.zeros(3))
        assert fb.log_alpha.shape == (0, 3) and fb.log_z.shape == (len(lengths),)
        labels, scores = crf.viterbi(E, lengths, np.zeros((3, 3)), np.zeros(3), np.zeros(3))
        assert labels.shape == (0,) and (scores == 0).all()
        nll, de, *_ = crf.nll_and_grad(E, np.zeros(0, int), lengths, np.zeros((3, 3)), np.zeros(3), np.zeros(3))
        assert nll == 0.0 and de.shape == (0, 3)


def test_mismatched_lengths_raise():
    with pytest.raises(ValueError):
        crf.forward_backward(np.zeros((3, 2)), [2, 2], np.zeros((2, 2)), np.zeros(2), np.zeros(2))


def tags_are_valid_iob2(tags):
    """Valid IOB2 iff re-encoding seqeval's CoNLL chunks (get_entities) gives the same tags back."""
    rebuilt = ["O"] * len(tags)
    for kind, lo, hi in get_entities(list(tags)):  # seqeval: (type, first, last inclusive)
        rebuilt[lo] = "B-" + kind
        for t in range(lo + 1, hi + 1):
            rebuilt[t] = "I-" + kind
    return rebuilt == list(tags)


@settings(max_examples=60, deadline=None)
@given(
    lengths=st.lists(st.integers(0, 12), min_size=0, max_size=12),
    n_types=st.integers(1, 3),
    seed=st.integers(0, 2**32 - 1),
    k=st.integers(1, 4),
)
def test_shapes_and_invariants(lengths, n_types, seed, k):
    rng = np.random.default_rng(seed)
    names = ["alpha", "beta", "gamma"][:n_types]
    labels = ["O"] + [f"{p}-{n}" for n in names for p in ("B", "I")]
    lengths = np.array(lengths, dtype=np.int64)
    E, trans, start, end = random_model(rng, labels, lengths, scale=3.0)
    n_tokens, n_labels = E.shape
    fb = crf.forward_backward(E, lengths, trans, start, end)
    marginals = crf.token_marginals(fb)
    best, scores = crf.viterbi(E, lengths, trans, start, end)
    top, top_scores = crf.nbest(E, lengths, trans, start, end, k)
    assert marginals.shape == (n_tokens, n_labels) and best.shape == (n_tokens,) and scores.shape == lengths.shape
    assert top.shape == (k, n_tokens) and top_scores.shape == (lengths.size, k)
    # probabilities sum to one (definition of p(y|x), Lafferty et al. 2001)
    np.testing.assert_allclose(marginals.sum(axis=1), 1.0, atol=1e-12)
    assert (fb.log_z >= scores - 1e-9).all()  # Z includes the best path
    np.testing.assert_array_equal(top[0], best)
    np.testing.assert_allclose(top_scores[:, 0], scores, atol=1e-9)
    assert (top_scores[:, :-1] >= top_scores[:, 1:]).all()  # best first
    offsets = np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(int)
    for b, (offset, n) in enumerate(zip(offsets, lengths)):
        tags = [labels[i] for i in best[offset:offset + n]]
        assert tags_are_valid_iob2(tags)
        if n:
            # the reported score is the score of the reported path (model definition)
            path = best[None, offset:offset + n]
            assert abs(path_scores(path, E[offset:offset + n], trans, start, end)[0] - scores[b]) < 1e-9


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 10_000))
def test_fused_decode_equals_the_separate_functions(seed):
    # Reference: viterbi, forward_backward and token_marginals, each checked above against
    # brute-force enumeration of the CRF definition (Lafferty, McCallum & Pereira 2001).
    rng = np.random.default_rng(seed)
    labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    trans, start = crf.apply_mask(rng.normal(size=(5, 5)) * 2, rng.normal(size=5), allowed_trans, allowed_start)
    end = rng.normal(size=5)
    lengths = rng.integers(0, 9, size=rng.integers(1, 7))
    E = rng.normal(size=(int(lengths.sum()), 5)) * 3
    decoded = crf.decode(E, lengths, trans, start, end)
    path, scores = crf.viterbi(E, lengths, trans, start, end)
    fb = crf.forward_backward(E, lengths, trans, start, end)
    np.testing.assert_array_equal(decoded.labels, path)
    np.testing.assert_array_equal(decoded.scores, scores)
    np.testing.assert_allclose(decoded.fb.log_z, fb.log_z, rtol=0, atol=1e-12)
    marginals = crf.token_marginals(fb)
    np.testing.assert_allclose(decoded.confidence, marginals[np.arange(path.size), path], rtol=0, atol=1e-12)
