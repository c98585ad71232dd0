"""Training a linear-chain CRF on a labelled corpus.

Two trainers share one parameter layout:
- L-BFGS on the weighted negative log-likelihood + l2/2 ||w||^2 + l1 ||w||_1 over all parameters
  (emission, transitions, start, end). L1 is exact, not smoothed: with l1 > 0 the weights are split
  as w = u - v with u, v >= 0 and L-BFGS-B minimises over the box, so weights reach exactly 0.
- An averaged perceptron (fast, rough): mini-batches decoded together with Viterbi.

Forbidden BIO moves are not parameters at all; the model stores 0 there and the tagger masks them.
Everything is ordered deterministically, so the same data, options and seed give bit-identical weights
on the same machine with the same BLAS thread setting (OPENBLAS_NUM_THREADS): our own sums do not
depend on it, but the dot products inside scipy's L-BFGS-B do.
"""

from __future__ import annotations

import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, NamedTuple, Sequence

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, minimize

from streamtag import crf
from streamtag.errors import ConfigError, DataError

METHODS = ("lbfgs", "perceptron")
# Sentence-aligned chunks bound the memory of the CRF temporaries (several (L, N) arrays each).
CHUNK_TOKENS = 50_000
# Sentences decoded together per perceptron update: large enough for vectorised Viterbi,
# small enough that the weights move often within an epoch.
PERCEPTRON_BATCH = 32
# Corrections kept by L-BFGS(-B); memory is about 2 * LBFGS_MEMORY * number of parameters doubles.
LBFGS_MEMORY = 10

ProgressFn = Callable[[int, float, "float | None", float], None]


@dataclass
class TrainOptions:
    """Training options. `eval_every` is the dev scoring cadence (iterations or epochs); the best
    scoring weights are kept."""

    l1: float = 0.0
    l2: float = 1.0
    max_iter: int = 100
    tol: float = 1e-5
    seed: int = 0
    method: str = "lbfgs"  # or "perceptron"
    epochs: int = 10
    min_count: int = 1
    eval_every: int = 10

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ConfigError(f"method must be one of {', '.join(METHODS)}, got {self.method!r}")
        for name in ("l1", "l2", "tol"):
            if not getattr(self, name) >= 0:
                raise ConfigError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        for name in ("max_iter", "epochs", "min_count", "eval_every"):
            if int(getattr(self, name)) < 1:
                raise ConfigError(f"{name} must be >= 1, got {getattr(self, name)!r}")


class DevSet(NamedTuple):
    """Held-out data scored during training: X (N, F) CSR, gold (N,), lengths (B,), and
    score_fn(predicted labels (N,)) -> number, higher is better (None: token accuracy)."""

    X: sparse.csr_matrix
    gold: np.ndarray
    lengths: np.ndarray
    score_fn: Callable[[np.ndarray], float] | None = None


# ----------------------------------------------------------------------------------------------------
# Parameter layout and objective


class ParamLayout:
    """Where each parameter block lives in the flat parameter vector theta.

    theta = [emission (F*L, row-major), transitions at allowed moves (row-major order),
    start at allowed labels, end (L)]. Forbidden moves are not in theta.
    """

    def __init__(self, n_features: int, n_labels: int, allowed_trans: np.ndarray, allowed_start: np.ndarray):
        self.n_features, self.n_labels = int(n_features), int(n_labels)
        self.allowed_trans = np.asarray(allowed_trans, dtype=bool)
        self.allowed_start = np.asarray(allowed_start, dtype=bool)
        sizes = [self.n_features * self.n_labels, int(self.allowed_trans.sum()), int(self.allowed_start.sum()),
                 self.n_labels]
        bounds = np.concatenate(([0], np.cumsum(sizes)))
        self.emission, self.trans, self.start, self.end = (slice(a, b) for a, b in zip(bounds[:-1], bounds[1:]))
        self.size = int(bounds[-1])

    def params(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """Model arrays from theta: emission (F, L), transitions (L, L) (0 where forbidden), start, end."""
        transitions = np.zeros((self.n_labels, self.n_labels))
        transitions[self.allowed_trans] = theta[self.trans]
        start = np.zeros(self.n_labels)
        start[self.allowed_start] = theta[self.start]
        return {
            "emission": theta[self.emission].reshape(self.n_features, self.n_labels).copy(),
            "transitions": transitions,
            "start": start,
            "end": theta[self.end].copy(),
        }

    def masked(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(emission (F, L) view, trans (L, L) and start (L,) with -inf where forbidden, end (L,))."""
        trans = np.full((self.n_labels, self.n_labels), -np.inf)
        trans[self.allowed_trans] = theta[self.trans]
        start = np.full(self.n_labels, -np.inf)
        start[self.allowed_start] = theta[self.start]
        return theta[self.emission].reshape(self.n_features, self.n_labels), trans, start, theta[self.end]

    def pack(self, params: dict[str, np.ndarray]) -> np.ndarray:
        """theta from model arrays (entries at forbidden moves are dropped)."""
        theta = np.empty(self.size)
        theta[self.emission] = np.asarray(params["emission"], dtype=np.float64).ravel()
        theta[self.trans] = np.asarray(params["transitions"], dtype=np.float64)[self.allowed_trans]
        theta[self.start] = np.asarray(params["start"], dtype=np.float64)[self.allowed_start]
        theta[self.end] = np.asarray(params["end"], dtype=np.float64)
        return theta


class _Chunk(NamedTuple):
    X: sparse.csr_matrix  # (n, F)
    gold: np.ndarray
    lengths: np.ndarray
    weights: np.ndarray


def _sentence_chunks(lengths: np.ndarray, chunk_tokens: int) -> list[tuple[int, int]]:
    """Split sentences 0..B into consecutive [first, stop) ranges of about chunk_tokens tokens."""
    first_token = np.cumsum(lengths) - lengths
    chunk_of = first_token // max(int(chunk_tokens), 1)
    bounds = np.concatenate(([0], np.flatnonzero(np.diff(chunk_of)) + 1, [lengths.size]))
    return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]


class TrainingObjective:
    """Weighted NLL + l2/2 * ||theta||^2 over a corpus, and its gradient, as a function of theta.

    X (N, F) CSR features, gold (N,) label ids, lengths (B,), weights (B,) or None. The corpus is
    processed in sentence-aligned chunks of about CHUNK_TOKENS tokens, on `threads` threads; chunks
    are summed in order, so the result is deterministic and independent of the thread count.
    """

    def __init__(self, X, gold, lengths, layout: ParamLayout, weights=None, l2: float = 0.0,
                 chunk_tokens: int = CHUNK_TOKENS, threads: int = 1):
        X = sparse.csr_matrix(X, dtype=np.float64)
        gold = np.asarray(gold, dtype=np.int64)
        lengths = np.asarray(lengths, dtype=np.int64)
        weights = np.ones(lengths.size) if weights is None else np.asarray(weights, dtype=np.float64)
        _check_corpus(X, gold, lengths, weights, layout)
        self.layout, self.l2 = layout, float(l2)
        self.chunks = []
        offsets = np.concatenate(([0], np.cumsum(lengths)))
        for first, stop in _sentence_chunks(lengths, chunk_tokens):
            rows = slice(int(offsets[first]), int(offsets[stop]))
            self.chunks.append(_Chunk(X[rows], gold[rows], lengths[first:stop], weights[first:stop]))
        self.threads = max(1, min(int(threads), len(self.chunks)))

    @staticmethod
    def _chunk_terms(chunk: _Chunk, emission, trans, start, end):
        """NLL and gradients of one chunk: (nll, d_emission (F, L), dtrans, dstart, dend)."""
        E = chunk.X @ emission
        nll, dE, dT, dS, dN = crf.nll_and_grad(E, chunk.gold, chunk.lengths, trans, start, end, chunk.weights)
        # X.T is a CSC view of the same arrays: no transposed copy of the corpus is kept.
        return nll, chunk.X.T @ dE, dT, dS, dN

    def __call__(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        """(objective value, gradient (P,)) at theta (P,)."""
        layout = self.layout
        masked = layout.masked(theta)
        if self.threads > 1:
            # numpy and scipy.sparse release the GIL in their loops, so chunks overlap on several
            # cores; results are summed in chunk order, so the sum is the same bits as serially.
            with ThreadPoolExecutor(self.threads) as pool:
                terms = list(pool.map(lambda chunk: self._chunk_terms(chunk, *masked), self.chunks))
        else:
            terms = [self._chunk_terms(chunk, *masked) for chunk in self.chunks]
        grad = np.zeros(layout.size)
        d_emission = grad[layout.emission].reshape(layout.n_features, layout.n_labels)
        d_trans, d_start, d_end = np.zeros_like(masked[1]), np.zeros_like(masked[2]), np.zeros_like(masked[3])
        loss = 0.0
        for nll, dW, dT, dS, dN in terms:
            loss += nll
            d_emission += dW
            d_trans += dT
            d_start += dS
            d_end += dN
        grad[layout.trans] = d_trans[layout.allowed_trans]
        grad[layout.start] = d_start[layout.allowed_start]
        grad[layout.end] = d_end
        if self.l2:
            loss += 0.5 * self.l2 * float(theta @ theta)
            grad += self.l2 * theta
        return loss, grad


def _check_corpus(X, gold, lengths, weights, layout: ParamLayout) -> None:
    if X.shape != (gold.size, layout.n_features):
        raise DataError(f"features are {X.shape} but there are {gold.size} tokens and {layout.n_features} features")
    if int(lengths.sum()) != gold.size or (lengths < 0).any():
        raise DataError(f"sentence lengths sum to {int(lengths.sum())} but there are {gold.size} tokens")
    if weights.shape != lengths.shape or not (weights >= 0).all():
        raise DataError("sentence weights must be one non-negative number per sentence")
    if gold.size and (gold.min() < 0 or gold.max() >= layout.n_labels):
        raise DataError("gold label id out of range")
    # A gold path through a forbidden move has probability 0: the tags need repairing first.
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1]))[lengths > 0]
    if not layout.allowed_start[gold[starts]].all():
        raise DataError("a gold tag sequence starts with I-X; repair the tags (IOB2) first")
    follows = np.ones(gold.size, dtype=bool)
    follows[starts] = False
    after = np.flatnonzero(follows)
    if not layout.allowed_trans[gold[after - 1], gold[after]].all():
        raise DataError("a gold tag sequence has I-X after O or another type; repair the tags (IOB2) first")


# ----------------------------------------------------------------------------------------------------
# Dev scoring


def decode(params: dict[str, np.ndarray], X, lengths, allowed_trans, allowed_start) -> np.ndarray:
    """Viterbi labels (N,) of the sentences of X (N, F) under model arrays `params`."""
    trans, start = crf.apply_mask(params["transitions"], params["start"], allowed_trans, allowed_start)
    labels, _ = crf.viterbi(X @ params["emission"], lengths, trans, start, params["end"])
    return labels


class _KeepBest:
    """Scores the dev set on request and remembers the best parameters (the latest one on ties)."""

    def __init__(self, dev: DevSet | None, allowed_trans, allowed_start):
        self.dev = dev
        self.allowed = (allowed_trans, allowed_start)
        self.best_score: float | None = None
        self.best_params: dict[str, np.ndarray] | None = None
        self.best_iteration = 0
        self.last_scored: int | None = None

    def score(self, params: dict[str, np.ndarray], iteration: int) -> float | None:
        if self.dev is None:
            return None
        X, gold, lengths, score_fn = self.dev
        predicted = decode(params, X, lengths, *self.allowed)
        self.last_scored = iteration
        if score_fn is not None:
            value = float(score_fn(predicted))
        else:
            value = float(np.mean(predicted == np.asarray(gold))) if len(gold) else 0.0
        if self.best_score is None or value >= self.best_score:  # on ties the later, more trained weights
            self.best_score, self.best_params, self.best_iteration = value, params, iteration
        return value


# ----------------------------------------------------------------------------------------------------
# Trainers


def fit_arrays(X, gold, lengths, n_labels, allowed_trans, allowed_start, options: TrainOptions | None = None,
               weights=None, init: dict | None = None, dev=None, progress: ProgressFn | None = None):
    """Fit CRF weights to a featurised corpus.

    X (N, F) CSR, gold (N,) label ids (valid IOB2 paths), lengths (B,), n_labels L, allowed_trans (L, L)
    and allowed_start (L,) bool (`crf.bio_allowed`), weights (B,) or None, init: model arrays to start
    from (emission (F, L), transitions (L, L), start (L,), end (L,)), dev: DevSet or a tuple
    (X_dev, gold_dev, lengths_dev, score_fn), progress(iteration, loss, dev_score or None, seconds).
    Returns (params: emission (F, L), transitions (L, L), start (L,), end (L,);
    info: iterations, loss, converged, dev_score, best_iteration, seconds).
    """
    options = options or TrainOptions()
    began = time.perf_counter()
    X = sparse.csr_matrix(X, dtype=np.float64)
    layout = ParamLayout(X.shape[1], n_labels, allowed_trans, allowed_start)
    theta0 = layout.pack(init) if init is not None else np.zeros(layout.size)
    keeper = _KeepBest(DevSet(*dev) if dev is not None else None, layout.allowed_trans, layout.allowed_start)
    if options.method == "perceptron":
        theta, info = _fit_perceptron(X, gold, lengths, layout, options, weights, theta0, keeper, progress, began)
    else:
        theta, info = _fit_lbfgs(X, gold, lengths, layout, options, weights, theta0, keeper, progress, began)
    params = layout.params(theta)
    final_iteration = info["iterations"]
    if keeper.dev is not None and keeper.last_scored != final_iteration:
        keeper.score(params, final_iteration)  # the final weights compete too
    if keeper.best_params is not None:
        params = keeper.best_params
    info.update(dev_score=keeper.best_score, best_iteration=keeper.best_iteration if keeper.dev else final_iteration,
                seconds=time.perf_counter() - began)
    return params, info


def _default_threads() -> int:
    """Cores this process may use, at most 4 (more chunks in flight cost memory, gain little)."""
    try:
        available = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        available = os.cpu_count() or 1
    return max(1, min(4, available))


def _fit_lbfgs(X, gold, lengths, layout, options, weights, theta0, keeper, progress, began):
    """L-BFGS(-B) on the change delta = theta - theta0, with the L1 and L2 penalties on delta.

    With no initial model theta0 is zero and this is the usual elastic net. With one, the penalties
    become a prior centred on the old weights (Chelba & Acero 2004, "Adaptation of maximum entropy
    capitalizer: little data can help a lot"): a few corrected lines move the model where they
    disagree with it instead of pulling every old weight towards zero.
    """
    objective = TrainingObjective(X, gold, lengths, layout, weights, l2=0.0, threads=_default_threads())
    n_params, l1, l2 = layout.size, float(options.l1), float(options.l2)

    def penalised(delta):
        value, grad = objective(theta0 + delta)
        if l2:
            value += 0.5 * l2 * float(delta @ delta)
            grad += l2 * delta
        return value, grad

    if l1 > 0:
        # delta = u - v, u, v >= 0: the L1 norm becomes the linear term l1 * sum(u + v), so the problem
        # is smooth on a box and L-BFGS-B reaches exact zeros at the bounds.
        def to_theta(x):
            return theta0 + (x[:n_params] - x[n_params:])

        def fun(x):
            value, grad = penalised(x[:n_params] - x[n_params:])
            return value + l1 * float(x.sum()), np.concatenate((grad + l1, l1 - grad))

        x0 = np.zeros(2 * n_params)
        bounds = Bounds(np.zeros(2 * n_params), np.full(2 * n_params, np.inf))
    else:
        def to_theta(x):
            return theta0 + x

        fun, x0, bounds = penalised, np.zeros(n_params), None

    iteration = 0

    def callback(intermediate_result):
        nonlocal iteration
        iteration += 1
        dev_score = None
        if keeper.dev is not None and iteration % options.eval_every == 0:
            dev_score = keeper.score(layout.params(to_theta(intermediate_result.x)), iteration)
        if progress is not None:
            progress(iteration, float(intermediate_result.fun), dev_score, time.perf_counter() - began)

    result = minimize(
        fun, x0, jac=True, method="L-BFGS-B", bounds=bounds, callback=callback,
        options={"maxiter": int(options.max_iter), "ftol": float(options.tol), "gtol": 1e-10,
                 "maxcor": LBFGS_MEMORY, "maxfun": 20 * int(options.max_iter) + 20},
    )
    theta = to_theta(result.x)
    return theta, {"iterations": int(result.nit), "loss": float(result.fun), "converged": bool(result.status == 0)}


def _fit_perceptron(X, gold, lengths, layout, options, weights, theta0, keeper, progress, began):
    """Averaged perceptron over shuffled mini-batches of sentences.

    Averaging by the lazy trick: with step counter c, every update delta is added to the weights w and
    c * delta to an accumulator u; after C steps the average of the C + 1 weight vectors is w - u / (C + 1).
    """
    gold = np.asarray(gold, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    weights = np.ones(lengths.size) if weights is None else np.asarray(weights, dtype=np.float64)
    _check_corpus(X, gold, lengths, weights, layout)
    n_labels = layout.n_labels
    params = layout.params(theta0)
    emission, trans, start, end = params["emission"], params["transitions"], params["start"], params["end"]
    sums = {name: np.zeros_like(value) for name, value in params.items()}  # the accumulator u
    offsets = np.concatenate(([0], np.cumsum(lengths)))
    rng = np.random.default_rng(options.seed)
    step = 1
    mistakes = 0.0

    def averaged():
        return {name: params[name] - sums[name] / step for name in params}

    for epoch in range(1, int(options.epochs) + 1):
        order = rng.permutation(lengths.size)
        mistakes = 0.0
        for begin in range(0, order.size, PERCEPTRON_BATCH):
            batch = order[begin:begin + PERCEPTRON_BATCH]
            batch_lengths = lengths[batch]
            rows = _ranges(offsets[batch], batch_lengths)
            X_batch, gold_batch = X[rows], gold[rows]
            masked_trans, masked_start = crf.apply_mask(trans, start, layout.allowed_trans, layout.allowed_start)
            predicted, _ = crf.viterbi(X_batch @ emission, batch_lengths, masked_trans, masked_start, end)
            token_weight = np.repeat(weights[batch], batch_lengths)
            wrong = predicted != gold_batch
            if not wrong.any():
                step += 1
                continue
            mistakes += float(token_weight[wrong].sum())
            deltas = _perceptron_deltas(X_batch, gold_batch, predicted, wrong, batch_lengths, token_weight, n_labels)
            for name, (index, value) in deltas.items():
                params[name][index] += value
                sums[name][index] += step * value
            step += 1
        dev_score = None
        if keeper.dev is not None and epoch % options.eval_every == 0:
            dev_score = keeper.score(averaged(), epoch)
        if progress is not None:
            progress(epoch, mistakes, dev_score, time.perf_counter() - began)
    theta = layout.pack(averaged())
    return theta, {"iterations": int(options.epochs), "loss": mistakes, "converged": mistakes == 0.0}


def _ranges(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Concatenation of arange(s, s + c) for each (s, c), without a Python loop."""
    total = int(counts.sum())
    begins = np.cumsum(counts) - counts
    return np.repeat(starts - begins, counts) + np.arange(total)


def _perceptron_deltas(X, gold, predicted, wrong, lengths, token_weight, n_labels):
    """Perceptron updates (gold features up, predicted features down) as {name: (unique index, value)}.

    Emission: X[wrong].T @ D with D (n_wrong, L) = w * (onehot(gold) - onehot(predicted)), one sparse
    product whose result has each (feature, label) pair once. Transitions/start/end: pair counts.
    """
    wrong_rows = np.flatnonzero(wrong)
    difference = sparse.csr_matrix(
        (np.concatenate((token_weight[wrong_rows], -token_weight[wrong_rows])),
         (np.concatenate((np.arange(wrong_rows.size),) * 2), np.concatenate((gold[wrong_rows], predicted[wrong_rows])))),
        shape=(wrong_rows.size, n_labels),
    )
    emission = (X[wrong_rows].T @ difference).tocoo()
    starts = np.cumsum(lengths) - lengths
    nonempty = lengths > 0
    firsts, lasts = starts[nonempty], (starts + lengths - 1)[nonempty]
    follows = np.ones(gold.size, dtype=bool)
    follows[firsts] = False
    after = np.flatnonzero(follows)
    pair_weight = token_weight[after]

    def counts(flat_gold, flat_pred, weight, size):
        return (np.bincount(flat_gold, weights=weight, minlength=size)
                - np.bincount(flat_pred, weights=weight, minlength=size))

    trans = counts(gold[after - 1] * n_labels + gold[after], predicted[after - 1] * n_labels + predicted[after],
                   pair_weight, n_labels * n_labels).reshape(n_labels, n_labels)
    start = counts(gold[firsts], predicted[firsts], token_weight[firsts], n_labels)
    end = counts(gold[lasts], predicted[lasts], token_weight[lasts], n_labels)
    return {
        "emission": ((emission.row, emission.col), emission.data),
        "transitions": (slice(None), trans),
        "start": (slice(None), start),
        "end": (slice(None), end),
    }


# ----------------------------------------------------------------------------------------------------
# Corpus level


def align_init(old_model, new_labels: Sequence[str], new_vocabulary: Sequence[str]) -> dict[str, np.ndarray]:
    """Weights of `old_model` mapped onto a new label list and vocabulary, by name.

    Features and labels the old model does not know start at 0. Returns emission (F, L),
    transitions (L, L), start (L,), end (L,).
    """
    new_labels, new_vocabulary = list(new_labels), list(new_vocabulary)
    label_new, label_old = _matching(new_labels, list(old_model.labels))
    feature_new, feature_old = _matching(new_vocabulary, list(old_model.vocabulary))
    n_labels = len(new_labels)
    emission = np.zeros((len(new_vocabulary), n_labels))
    old_emission = np.asarray(old_model.emission, dtype=np.float64)
    emission[np.ix_(feature_new, label_new)] = old_emission[np.ix_(feature_old, label_old)]
    transitions = np.zeros((n_labels, n_labels))
    transitions[np.ix_(label_new, label_new)] = np.asarray(old_model.transitions, np.float64)[np.ix_(label_old, label_old)]
    start, end = np.zeros(n_labels), np.zeros(n_labels)
    start[label_new] = np.asarray(old_model.start, np.float64)[label_old]
    end[label_new] = np.asarray(old_model.end, np.float64)[label_old]
    return {"emission": emission, "transitions": transitions, "start": start, "end": end}


def _matching(new: list[str], old: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Indices (in new, in old) of the names both lists hold."""
    if not new or not old:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    _, in_new, in_old = np.intersect1d(np.array(new, dtype=object), np.array(old, dtype=object),
                                       assume_unique=True, return_indices=True)
    return in_new, in_old


def _entity_types(tag_lists) -> set[str]:
    return {tag[2:] for tags in tag_lists for tag in tags if tag != "O"}


def train_model(sentences, feature_spec, options: TrainOptions | None = None, dev_sentences=None,
                init_model=None, progress: ProgressFn | None = None):
    """Train a Model on corpus.Sentence objects (texts, kinds, tags, weight).

    Builds the label list (spans.label_list) from the tags (and the init model's labels), repairs
    tags to IOB2, fits the feature vocabulary (union with the init model's), featurises, fits, and
    returns a streamtag.model.Model. Dev sentences are scored by span F1 (streamtag.evaluate).
    """
    from streamtag.evaluate import evaluate
    from streamtag.features import FeatureExtractor, FeatureSpec
    from streamtag.model import Model
    from streamtag.spans import label_list, repair_bio

    options = options or TrainOptions()
    spec = feature_spec if isinstance(feature_spec, FeatureSpec) else FeatureSpec.from_dict(feature_spec)
    sentences = list(sentences)
    tags = [repair_bio(sentence.tags) for sentence in sentences]
    if not any(tags):
        raise DataError("no labelled tokens to train on")
    old_types = _entity_types([init_model.labels]) if init_model is not None else set()
    labels = label_list(_entity_types(tags) | old_types)
    label_id = {label: number for number, label in enumerate(labels)}

    extractor = FeatureExtractor(spec)
    vocabulary = extractor.fit([(s.texts, s.kinds) for s in sentences], min_count=options.min_count)
    if init_model is not None:
        extractor.vocabulary = vocabulary = sorted(set(vocabulary) | set(init_model.vocabulary))
    X, lengths = extractor.transform([(s.texts, s.kinds) for s in sentences])
    gold = np.array([label_id[tag] for sentence_tags in tags for tag in sentence_tags], dtype=np.int64)
    weights = np.array([sentence.weight for sentence in sentences], dtype=np.float64)

    dev = None
    if dev_sentences:
        dev_sentences = list(dev_sentences)
        dev_tags = [repair_bio(sentence.tags) for sentence in dev_sentences]
        X_dev, dev_lengths = extractor.transform([(s.texts, s.kinds) for s in dev_sentences])
        dev_gold = np.array([label_id.get(tag, -1) for sentence_tags in dev_tags for tag in sentence_tags], np.int64)
        cuts = np.cumsum(dev_lengths)[:-1]

        def span_f1(predicted: np.ndarray) -> float:
            predicted_tags = [[labels[i] for i in part] for part in np.split(predicted, cuts)]
            return evaluate(dev_tags, predicted_tags).micro.f1

        dev = DevSet(X_dev, dev_gold, dev_lengths, span_f1)

    allowed_trans, allowed_start = crf.bio_allowed(labels)
    init = align_init(init_model, labels, vocabulary) if init_model is not None else None
    params, info = fit_arrays(X, gold, lengths, len(labels), allowed_trans, allowed_start, options,
                              weights=weights, init=init, dev=dev, progress=progress)
    # Only deterministic facts go in metadata (it is part of the model id); timing goes in run_info.
    metadata = {"training": {"method": options.method, "iterations": info["iterations"],
                             "loss": info["loss"], "converged": info["converged"],
                             "dev_span_f1": info["dev_score"], "best_iteration": info["best_iteration"],
                             "sentences": len(sentences), "tokens": int(gold.size)}}
    return Model(labels=labels, feature_spec=spec.to_dict(), vocabulary=list(vocabulary), metadata=metadata,
                 run_info={"training_seconds": round(info["seconds"], 3)}, **params)
