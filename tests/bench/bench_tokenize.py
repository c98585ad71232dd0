"""Tokenizer throughput on the demo stream: per-line ``tokenize`` against ``BatchTokenizer`` (a
benchmark, not a test).

Run:  .venv/bin/python tests/bench/bench_tokenize.py [--lines N] [--warmup W] [--batch B] [--repeat R]

Both paths tokenize the same N demo lines. The batch path first sees W other lines of the same
stream, so its piece cache is in the steady state a running daemon reaches (words, keys and host
names cached; timestamps, ids and addresses still new), then the N lines in batches of B, twice:
with lazy token texts (``lazy=True``, what the tagger asks for: a token's str is made only when
read) and with lists of str. Runs of the paths alternate and the best of R is printed, in CPU
seconds of this process: other processes share the machine, and the least disturbed run is the
closest to the true cost. The paths' tokens are compared with ``tokenize`` once.
"""

from __future__ import annotations

import argparse
import time

from streamtag.demo.generate import generate_stream
from streamtag.tokenize import BatchTokenizer, tokenize


def time_per_line(lines: list[str]) -> float:
    start = time.process_time()
    for line in lines:
        tokenize(line)
    return time.process_time() - start


def time_batches(warmup: list[str], lines: list[str], batch: int, lazy: bool) -> tuple[float, float]:
    """CPU seconds for ``lines`` after ``warmup`` has filled a fresh cache, and the cache hit rate."""
    tokenizer = BatchTokenizer()
    for i in range(0, len(warmup), batch):
        tokenizer.tokenize_lines(warmup[i : i + batch], lazy=lazy)
    hits, misses = tokenizer.hits, tokenizer.misses
    start = time.process_time()
    for i in range(0, len(lines), batch):
        tokenizer.tokenize_lines(lines[i : i + batch], lazy=lazy)
    seconds = time.process_time() - start
    hits, misses = tokenizer.hits - hits, tokenizer.misses - misses
    return seconds, hits / max(hits + misses, 1)


def check_equal(lines: list[str], batch: int) -> int:
    """Token count; raises if either batch path differs from tokenize on any line."""
    n_tokens = 0
    for lazy in (True, False):
        tokenizer = BatchTokenizer()
        n_tokens = 0
        for i in range(0, len(lines), batch):
            chunk = lines[i : i + batch]
            result = tokenizer.tokenize_lines(chunk, lazy=lazy)
            for line, got in zip(chunk, result.per_line()):
                if got != tokenize(line):
                    raise SystemExit(f"batch tokens (lazy={lazy}) differ from tokenize on line {line!r}")
            n_tokens += len(result.texts)
    return n_tokens


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=20_000)
    parser.add_argument("--warmup", type=int, default=20_000)
    parser.add_argument("--batch", type=int, default=1000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()

    stream = [record["text"] for record in generate_stream(args.warmup + args.lines, seed=args.seed)]
    warmup, lines = stream[: args.warmup], stream[args.warmup :]
    n_tokens = check_equal(lines, args.batch)
    print(f"{len(lines)} demo lines, {n_tokens} tokens ({n_tokens / len(lines):.1f} per line), "
          f"batches of {args.batch} after {len(warmup)} warm-up lines; best of {args.repeat}")

    best_line = best_lazy = best_lists = float("inf")
    hit_rate = 0.0
    for _ in range(args.repeat):
        best_line = min(best_line, time_per_line(lines))
        seconds, hit_rate = time_batches(warmup, lines, args.batch, lazy=True)
        best_lazy = min(best_lazy, seconds)
        best_lists = min(best_lists, time_batches(warmup, lines, args.batch, lazy=False)[0])
    for name, seconds in (("tokenize per line", best_line), ("batch, lazy texts", best_lazy),
                          ("batch, str lists", best_lists)):
        print(f"  {name:18} {seconds / len(lines) * 1e6:7.2f} us/line  {n_tokens / seconds / 1e3:8.0f}k tokens/s")
    print(f"  speed-up (lazy) {best_line / best_lazy:.1f}x; piece cache hit rate {hit_rate:.1%}")


if __name__ == "__main__":
    main()
