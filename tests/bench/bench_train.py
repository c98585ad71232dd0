"""Benchmark of CRF training (a script, not a test): time and peak memory of L-BFGS on synthetic data.

Run: .venv/bin/python tests/bench/bench_train.py [--tokens 200000] [--iterations 100] [--l1 0.0]

The corpus is synthetic: lines of about 20 tokens, 19 labels (O + B/I of 9 types, IOB2-valid gold
paths from a small Markov chain), about 30 active binary features per token drawn from a skewed
(Zipf-like) vocabulary of --features ids, a third of them tied to the gold label so there is
something to learn. Also times the CRF inference functions on the same shapes.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np
from scipy import sparse

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from streamtag import crf, train  # noqa: E402

TYPES = [f"type{k}" for k in range(9)]


def synthetic_corpus(n_tokens: int, n_features: int, active: int, seed: int):
    """-> X (N, F) CSR, gold (N,), lengths (B,), labels."""
    rng = np.random.default_rng(seed)
    labels = ["O"] + [f"{prefix}-{name}" for name in TYPES for prefix in ("B", "I")]
    n_labels = len(labels)
    lengths = rng.integers(12, 29, size=n_tokens // 20 + 1)
    lengths = lengths[np.cumsum(lengths) <= n_tokens]
    total = int(lengths.sum())
    # Gold paths, one time step at a time for all lines: O, or B-X, or (after B-X/I-X) I-X.
    max_len = int(lengths.max())
    grid = np.zeros((lengths.size, max_len), dtype=np.int64)
    for t in range(max_len):
        previous = grid[:, t - 1] if t else np.zeros(lengths.size, dtype=np.int64)
        draw = rng.random(lengths.size)
        new_type = rng.integers(0, len(TYPES), size=lengths.size)
        label = np.where(draw < 0.6, 0, 1 + 2 * new_type)
        inside = previous > 0
        continue_chunk = inside & (draw > 0.75)
        grid[:, t] = np.where(continue_chunk, previous + (previous % 2 == 1), label)
    gold = grid[np.arange(max_len)[None, :] < lengths[:, None]]
    # Features: a skewed draw over the vocabulary; a third of each row tied to the gold label.
    tied = active // 3
    ranks = np.minimum((rng.pareto(1.1, size=(total, active)) * 50).astype(np.int64), n_features // 2 - 1)
    columns = ranks.copy()
    columns[:, :tied] = (n_features // 2 + (ranks[:, :tied] * n_labels + gold[:, None]) % (n_features // 2))
    columns[:, 0] = 0  # bias
    X = sparse.csr_matrix(
        (np.ones(columns.size), columns.ravel(), np.arange(0, columns.size + 1, active)),
        shape=(total, n_features),
    )
    X.sum_duplicates()
    X.data[:] = 1.0
    return X, gold, lengths, labels


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kilobytes on Linux


def bench_inference(E, lengths, trans, start, end, repeats=3):
    def best_of(fn):
        best = float("inf")
        for _ in range(repeats):
            began = time.perf_counter()
            fn()
            best = min(best, time.perf_counter() - began)
        return best

    n = E.shape[0]
    timings = {
        "viterbi": best_of(lambda: crf.viterbi(E, lengths, trans, start, end)),
        "forward_backward + marginals": best_of(
            lambda: crf.token_marginals(crf.forward_backward(E, lengths, trans, start, end))),
        "nbest k=2": best_of(lambda: crf.nbest(E, lengths, trans, start, end, 2)),
    }
    for name, seconds in timings.items():
        print(f"  {name:30s} {seconds * 1000:8.1f} ms  {n / seconds / 1e6:6.2f} M tokens/s")
    both = timings["viterbi"] + timings["forward_backward + marginals"]
    print(f"  {'viterbi + fb + marginals':30s} {both * 1000:8.1f} ms  {n / both / 1e6:6.2f} M tokens/s")


def saved_size_mb(params: dict, labels: list[str]) -> float:
    """Size of the model file these weights make, as `streamtag train` would write it."""
    from streamtag.features import FeatureSpec
    from streamtag.model import Model, model_to_bytes

    n_features = params["emission"].shape[0]
    model = Model(labels=list(labels), feature_spec=FeatureSpec.default().to_dict(),
                  vocabulary=[f"synthetic={i}" for i in range(n_features)], emission=params["emission"],
                  transitions=params["transitions"], start=params["start"], end=params["end"])
    return len(model_to_bytes(model)[0]) / 2**20


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=200_000)
    parser.add_argument("--features", type=int, default=80_000)
    parser.add_argument("--active", type=int, default=30)
    parser.add_argument("--iterations", type=int, default=100)
    parser.add_argument("--l1", type=float, default=0.0)
    parser.add_argument("--l2", type=float, default=1.0)
    parser.add_argument("--method", choices=train.METHODS, default="lbfgs")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--skip-inference", action="store_true")
    args = parser.parse_args()

    X, gold, lengths, labels = synthetic_corpus(args.tokens, args.features, args.active, args.seed)
    allowed_trans, allowed_start = crf.bio_allowed(labels)
    print(f"corpus: {X.shape[0]} tokens, {lengths.size} lines, {X.shape[1]} features, {len(labels)} labels, "
          f"{X.nnz / X.shape[0]:.1f} active features per token; peak RSS so far {peak_rss_mb():.0f} MB")

    if not args.skip_inference:
        rng = np.random.default_rng(1)
        weights = rng.normal(scale=0.3, size=(X.shape[1], len(labels)))
        E = X[:20_000] @ weights
        sub_lengths = lengths[np.cumsum(lengths) <= 20_000]
        E = E[: int(sub_lengths.sum())]
        trans, start = crf.apply_mask(rng.normal(size=(19, 19)), rng.normal(size=19), allowed_trans, allowed_start)
        print(f"inference on {E.shape[0]} tokens ({sub_lengths.size} lines), L={len(labels)}:")
        bench_inference(E, sub_lengths, trans, start, rng.normal(size=19))

    options = train.TrainOptions(l1=args.l1, l2=args.l2, max_iter=args.iterations, tol=0.0, method=args.method,
                                 epochs=args.iterations, seed=args.seed)
    evaluations = 0
    objective_call = train.TrainingObjective.__call__

    def counting_call(self, theta):  # count objective evaluations (line searches may need several)
        nonlocal evaluations
        evaluations += 1
        return objective_call(self, theta)

    train.TrainingObjective.__call__ = counting_call
    began = time.perf_counter()
    cpu_began = time.process_time()
    params, info = train.fit_arrays(X, gold, lengths, len(labels), allowed_trans, allowed_start, options)
    seconds, cpu = time.perf_counter() - began, time.process_time() - cpu_began
    predicted = train.decode(params, X, lengths, allowed_trans, allowed_start)
    if args.method == "perceptron":
        print(f"training (perceptron): {info['iterations']} epochs, {seconds:.1f} s wall, {cpu:.1f} s CPU, "
              f"{cpu / info['iterations']:.2f} s CPU per epoch")
    else:
        print(f"training (lbfgs, l1={args.l1}, l2={args.l2}): {info['iterations']} iterations, "
              f"{evaluations} objective evaluations, {seconds:.1f} s wall, {cpu:.1f} s CPU, "
              f"{cpu / max(evaluations, 1):.2f} s CPU per evaluation")
    print(f"  load average now {' '.join(f'{x:.1f}' for x in os.getloadavg())} (wall times stretch when it exceeds the cores)")
    print(f"  final objective {info['loss']:.2f}, train token accuracy {np.mean(predicted == gold):.4f}, "
          f"zero emission weights {np.mean(params['emission'] == 0):.1%}")
    print(f"model file {saved_size_mb(params, labels):.2f} MB (zero rows dropped, float32, compressed)")
    print(f"peak RSS {peak_rss_mb():.0f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
