"""Tests of streamtag.train.

Sources: scipy.optimize.check_grad (finite differences) for the gradient of the full objective; the
optimality (KKT / orthant) conditions of L1-regularised log-linear models from Andrew & Gao 2007,
"Scalable training of L1-regularized log-linear models" (ICML), for the L1 optimum; the perceptron
convergence theorem for separable data (Collins 2002, "Discriminative training methods for hidden
Markov models: theory and experiments with perceptron algorithms") for the perceptron; the
brute-force CRF definition (Lafferty et al. 2001) through crf.nll_and_grad for the objective value.
Features are a tiny stand-in built here from scipy.sparse matrices, so these tests do not depend on
the feature extractor (one end-to-end test uses it).
"""

import numpy as np
import pytest
from scipy import sparse
from scipy.optimize import check_grad

from streamtag import crf, train
from streamtag.errors import ConfigError, DataError

LABELS = ["O", "B-a", "I-a", "B-b", "I-b"]
ALLOWED_TRANS, ALLOWED_START = crf.bio_allowed(LABELS)


def toy_corpus(seed, n_sentences=60, n_noise=20, noise_only=False):
    """Sentences of valid IOB2 gold labels with one label-revealing feature per token (unless
    noise_only) and one random noise feature; features 0..4 reveal the label, 5.. are noise."""
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, 7, size=n_sentences)
    n_tokens = int(lengths.sum())
    trans, start = crf.apply_mask(np.zeros((5, 5)), np.zeros(5), ALLOWED_TRANS, ALLOWED_START)
    gold, _ = crf.viterbi(rng.normal(scale=3.0, size=(n_tokens, 5)), lengths, trans, start, np.zeros(5))
    noise = 5 + rng.integers(0, n_noise, size=n_tokens)
    if noise_only:
        columns = noise[:, None]
    else:
        columns = np.stack([gold, noise], axis=1)
    per_row = columns.shape[1]
    X = sparse.csr_matrix(
        (np.ones(columns.size), columns.ravel(), np.arange(0, columns.size + 1, per_row)),
        shape=(n_tokens, 5 + n_noise),
    )
    weights = rng.uniform(0.5, 2.0, size=n_sentences)
    return X, gold, lengths, weights


def fit(X, gold, lengths, weights=None, **options):
    return train.fit_arrays(X, gold, lengths, len(LABELS), ALLOWED_TRANS, ALLOWED_START,
                            train.TrainOptions(**options), weights=weights)


def layout_for(X):
    return train.ParamLayout(X.shape[1], len(LABELS), ALLOWED_TRANS, ALLOWED_START)


def test_objective_gradient_matches_finite_differences():
    X, gold, lengths, weights = toy_corpus(1, n_sentences=8, n_noise=4)
    layout = layout_for(X)
    objective = train.TrainingObjective(X, gold, lengths, layout, weights, l2=0.7, chunk_tokens=10)
    theta = np.random.default_rng(2).normal(size=layout.size)
    # scipy.optimize.check_grad: 2-norm of analytic minus finite-difference gradient
    error = check_grad(lambda t: objective(t)[0], lambda t: objective(t)[1], theta, epsilon=1e-7)
    assert error < 1e-5 * max(1.0, np.linalg.norm(objective(theta)[1]))


def test_objective_value_is_weighted_nll_plus_l2():
    # Definition of the objective: sum_b w_b NLL_b + l2/2 ||theta||^2 (chunking must not change it).
    X, gold, lengths, weights = toy_corpus(3, n_sentences=12)
    layout = layout_for(X)
    theta = np.random.default_rng(4).normal(size=layout.size)
    value, _ = train.TrainingObjective(X, gold, lengths, layout, weights, l2=0.3, chunk_tokens=7)(theta)
    emission, trans, start, end = layout.masked(theta)
    nll = crf.nll_and_grad(X @ emission, gold, lengths, trans, start, end, weights)[0]
    assert value == pytest.approx(nll + 0.15 * theta @ theta, rel=1e-12)


def test_sentence_weight_equals_repetition():
    # common practice: an integer weight k counts a sentence k times.
    X, gold, lengths, _ = toy_corpus(5, n_sentences=3)
    layout = layout_for(X)
    theta = np.random.default_rng(6).normal(size=layout.size)
    doubled_X = sparse.vstack([X, X[: lengths[0]]]).tocsr()
    doubled = train.TrainingObjective(doubled_X, np.concatenate([gold, gold[: lengths[0]]]),
                                      np.append(lengths, lengths[0]), layout)(theta)
    weighted = train.TrainingObjective(X, gold, lengths, layout, np.array([2.0, 1.0, 1.0]))(theta)
    assert weighted[0] == pytest.approx(doubled[0], rel=1e-12)
    np.testing.assert_allclose(weighted[1], doubled[1], atol=1e-10)


def test_separable_problem_reaches_full_train_accuracy():
    X, gold, lengths, weights = toy_corpus(7)
    params, info = fit(X, gold, lengths, weights, l2=0.01, max_iter=200)
    predicted = train.decode(params, X, lengths, ALLOWED_TRANS, ALLOWED_START)
    assert (predicted == gold).all()  # separable data: the CRF optimum labels every token right
    assert info["iterations"] >= 1


def test_l1_gives_exact_zeros_and_kkt_conditions_hold():
    X, gold, lengths, weights = toy_corpus(8, n_sentences=80, n_noise=30)
    l1, l2 = 1.0, 0.1
    params, info = fit(X, gold, lengths, weights, l1=l1, l2=l2, max_iter=1000, tol=1e-14)
    layout = layout_for(X)
    theta = layout.pack(params)
    zero = theta == 0.0
    assert zero.sum() > 0.5 * theta.size  # most noise weights are exactly 0, not merely small
    _, smooth_grad = train.TrainingObjective(X, gold, lengths, layout, weights, l2=l2)(theta)
    # Andrew & Gao 2007, optimality of f(w) + l1 |w|_1: |df/dw_i| <= l1 where w_i = 0,
    # and df/dw_i + l1 sign(w_i) = 0 where w_i != 0.
    tol = 1e-3
    assert (np.abs(smooth_grad[zero]) <= l1 + tol).all()
    assert np.abs(smooth_grad[~zero] + l1 * np.sign(theta[~zero])).max() <= tol


def test_forbidden_transitions_stay_zero():
    X, gold, lengths, weights = toy_corpus(9)
    params, _ = fit(X, gold, lengths, weights, max_iter=30)
    # IOB2: O -> I-a and the start with I-a are not parameters (Tjong Kim Sang & Veenstra 1999)
    assert (params["transitions"][~ALLOWED_TRANS] == 0.0).all()
    assert (params["start"][~ALLOWED_START] == 0.0).all()


@pytest.mark.parametrize("method,l1", [("lbfgs", 0.0), ("lbfgs", 0.5), ("perceptron", 0.0)])
def test_training_is_bit_identical_across_runs(method, l1):
    # A property of the implementation (reproducibility); it fails if any order is unstable.
    X, gold, lengths, weights = toy_corpus(10)
    first, _ = fit(X, gold, lengths, weights, method=method, l1=l1, max_iter=40, epochs=3, seed=4)
    second, _ = fit(X, gold, lengths, weights, method=method, l1=l1, max_iter=40, epochs=3, seed=4)
    for name in first:
        assert np.array_equal(first[name], second[name]), name


def test_perceptron_learns_separable_problem():
    # Collins 2002 (after Novikoff): on separable data the perceptron makes a bounded number of
    # mistakes, so the last epochs are error-free. The averaged weights (Freund & Schapire 1999,
    # "Large margin classification using the perceptron algorithm") mix in the early epochs, so
    # they are only required to be nearly error-free.
    X, gold, lengths, weights = toy_corpus(11)
    params, info = fit(X, gold, lengths, weights, method="perceptron", epochs=30)
    assert info["loss"] == 0.0  # no mistakes in the last epoch
    predicted = train.decode(params, X, lengths, ALLOWED_TRANS, ALLOWED_START)
    assert (predicted == gold).mean() >= 0.97
    layout = layout_for(X)
    untrained = train.decode(layout.params(np.zeros(layout.size)), X, lengths, ALLOWED_TRANS, ALLOWED_START)
    assert (untrained == gold).mean() < 0.6  # the problem is not trivial to start with


def test_perceptron_seed_changes_order_not_quality():
    X, gold, lengths, weights = toy_corpus(12)
    a, _ = fit(X, gold, lengths, weights, method="perceptron", epochs=2, seed=1)
    b, _ = fit(X, gold, lengths, weights, method="perceptron", epochs=2, seed=2)
    assert not np.array_equal(a["emission"], b["emission"])  # the shuffle follows the seed


def test_dev_scoring_keeps_best_and_reports_progress():
    X, gold, lengths, weights = toy_corpus(13)
    calls = []
    scores = iter([0.2, 0.9, 0.5, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1])
    dev = (X, gold, lengths, lambda predicted: next(scores))
    params, info = train.fit_arrays(X, gold, lengths, len(LABELS), ALLOWED_TRANS, ALLOWED_START,
                                    train.TrainOptions(max_iter=6, eval_every=2, tol=0.0), weights=weights,
                                    dev=dev, progress=lambda *args: calls.append(args))
    assert info["dev_score"] == 0.9 and info["best_iteration"] == 4
    assert [c[0] for c in calls] == list(range(1, len(calls) + 1))
    assert [c[2] is not None for c in calls[:4]] == [False, True, False, True]


def test_init_is_the_centre_of_the_prior():
    # With --init the penalty is on the change from the old weights (a prior centred on them, as in
    # Chelba & Acero 2004): a very strong prior leaves the old weights where they were.
    X, gold, lengths, weights = toy_corpus(14)
    old, _ = fit(X, gold, lengths, weights, max_iter=200, l2=0.5)
    old = {name: value + 0.75 for name, value in old.items()}  # deliberately not the optimum
    kept, _ = train.fit_arrays(X, gold, lengths, len(LABELS), ALLOWED_TRANS, ALLOWED_START,
                               train.TrainOptions(max_iter=200, l2=1e7), weights=weights, init=old)
    np.testing.assert_allclose(kept["emission"], old["emission"], atol=1e-4)


def test_init_optimum_satisfies_first_order_conditions():
    # At the minimum of NLL(w) + l2/2 ||w - w0||^2 the gradient vanishes (first-order optimality
    # condition of smooth unconstrained minimisation; Nocedal & Wright, Numerical Optimization, thm 2.2).
    X, gold, lengths, weights = toy_corpus(14)
    rng = np.random.default_rng(3)
    layout = train.ParamLayout(X.shape[1], len(LABELS), ALLOWED_TRANS, ALLOWED_START)
    theta0 = rng.normal(size=layout.size)
    got, _ = train.fit_arrays(X, gold, lengths, len(LABELS), ALLOWED_TRANS, ALLOWED_START,
                              train.TrainOptions(max_iter=1000, l2=0.5, tol=1e-15), weights=weights,
                              init=layout.params(theta0))
    theta = layout.pack(got)
    _, grad = train.TrainingObjective(X, gold, lengths, layout, weights, l2=0.0)(theta)
    np.testing.assert_allclose(grad + 0.5 * (theta - theta0), 0.0, atol=1e-4)


def test_align_init_maps_by_name():
    class Old:
        labels = ["O", "B-a", "I-a"]
        vocabulary = ["f1", "f2"]
        emission = np.array([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])
        transitions = np.arange(9.0).reshape(3, 3)
        start = np.array([7.0, 8.0, 9.0])
        end = np.array([-1.0, -2.0, -3.0])

    new_labels = ["O", "B-a", "I-a", "B-b", "I-b"]
    aligned = train.align_init(Old, new_labels, ["f0", "f2", "f3"])
    # common practice: weights follow the feature string and label name; unknown ones start at 0.
    np.testing.assert_array_equal(aligned["emission"], [[0, 0, 0, 0, 0], [4, 5, 6, 0, 0], [0, 0, 0, 0, 0]])
    np.testing.assert_array_equal(aligned["transitions"][:3, :3], Old.transitions)
    assert (aligned["transitions"][3:] == 0).all() and (aligned["transitions"][:, 3:] == 0).all()
    np.testing.assert_array_equal(aligned["start"], [7, 8, 9, 0, 0])
    np.testing.assert_array_equal(aligned["end"], [-1, -2, -3, 0, 0])


def test_bad_inputs_raise_one_line_errors():
    X, gold, lengths, weights = toy_corpus(15)
    with pytest.raises(ConfigError):
        train.TrainOptions(method="annealing")
    with pytest.raises(ConfigError):
        train.TrainOptions(l2=-1.0)
    broken = gold.copy()
    broken[0] = 2  # I-a at a sentence start: invalid IOB2 (Tjong Kim Sang & Veenstra 1999)
    with pytest.raises(DataError):
        fit(X, broken, lengths)
    with pytest.raises(DataError):
        fit(X, gold, lengths[:-1])


def test_train_model_end_to_end():
    from streamtag.corpus import Sentence
    from streamtag.features import FeatureSpec

    # Invented hosts and accounts (fictional names).
    def line(host, user):
        return Sentence(["login", "from", host, "by", user], ["word", "word", "host", "word", "word"],
                        ["O", "O", "B-host", "O", "B-account"])

    hosts = ["zorvik-01", "quellan-7", "brisa-db2", "tarnwell-03"]
    users = ["mara.quill", "odo.venn", "lysa.korr", "pim.ashgrove"]
    sentences = [line(h, u) for h in hosts for u in users]
    sentences.append(Sentence(["I", "saw"], ["word", "word"], ["I-account", "O"]))  # repaired to B-account
    calls = []
    model = train.train_model(sentences, FeatureSpec.default(), train.TrainOptions(max_iter=50, l2=0.1),
                              dev_sentences=sentences[:4], progress=lambda *a: calls.append(a))
    assert model.labels == ["O", "B-account", "I-account", "B-host", "I-host"]  # spans.label_list layout
    assert model.emission.shape == (len(model.vocabulary), 5)
    assert model.metadata["training"]["dev_span_f1"] == 1.0
    assert calls
    again = train.train_model(sentences, FeatureSpec.default(), train.TrainOptions(max_iter=5), init_model=model)
    assert set(model.vocabulary) <= set(again.vocabulary)


def test_objective_is_bit_identical_with_threads():
    # Chunks summed in a fixed order: the thread count must not change a single bit.
    X, gold, lengths, weights = toy_corpus(16, n_sentences=90)
    layout = layout_for(X)
    theta = np.random.default_rng(17).normal(size=layout.size)
    serial = train.TrainingObjective(X, gold, lengths, layout, weights, l2=0.2, chunk_tokens=40, threads=1)(theta)
    threaded = train.TrainingObjective(X, gold, lengths, layout, weights, l2=0.2, chunk_tokens=40, threads=3)(theta)
    assert serial[0] == threaded[0] and np.array_equal(serial[1], threaded[1])
