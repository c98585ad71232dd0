"""Replay throughput with 1 and 2 workers, beside tagging the same lines directly (a benchmark, not a test).

Run:  .venv/bin/python tests/bench/bench_replay.py [--lines N] [--model MODEL] [--gzip] [--repeat R]

Without --model a small model is trained on generated demo data (averaged perceptron, a few epochs)
so that spans and confidences look like a real model's. The archive is generated demo stream lines.
Figures printed, per wall second and per CPU second: lines/s of a direct ``Tagger.tag`` loop in this process (batches of the replay's
chunk size, no I/O: the tagging benchmark), and of ``streamtag replay`` end to end (read, tag,
encode, write + fsync per chunk, progress file) with --workers 1 and 2, best of R runs each.
"""

from __future__ import annotations

import argparse
import gzip
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import orjson

from streamtag.corpus import read_jsonl
from streamtag.demo.generate import generate_split, generate_stream
from streamtag.features import FeatureSpec
from streamtag.model import load_model, save_model
from streamtag.tagger import Tagger
from streamtag.train import TrainOptions, train_model

REPO = Path(__file__).resolve().parents[2]
CHUNK_LINES = 1024


def train_small_model(folder: Path) -> Path:
    data = folder / "train.jsonl"
    data.write_bytes(b"".join(orjson.dumps(r) + b"\n" for r in generate_split("train", 3000, seed=5)))
    sentences, _ = read_jsonl(data)
    model = train_model(sentences, FeatureSpec.default(), TrainOptions(method="perceptron", epochs=5))
    path = folder / "bench.stm"
    save_model(model, path)
    return path


def direct_tagging_rate(model_path: Path, lines: list[str], repeat: int) -> tuple[float, float]:
    """(lines per wall second, lines per CPU second), best of ``repeat``."""
    model = load_model(model_path)
    best, best_cpu = float("inf"), float("inf")
    for _ in range(repeat):
        tagger = Tagger(model)  # a fresh feature cache each pass, as a replay process starts with
        began, began_cpu = time.perf_counter(), time.process_time()
        for first in range(0, len(lines), CHUNK_LINES):
            tagger.tag(lines[first:first + CHUNK_LINES], review_below=0.5)
        best = min(best, time.perf_counter() - began)
        best_cpu = min(best_cpu, time.process_time() - began_cpu)
    return len(lines) / best, len(lines) / best_cpu


def _children_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def replay_rate(model_path: Path, archive: Path, workers: int, n_lines: int, repeat: int,
                folder: Path) -> tuple[float, float]:
    """(lines per wall second, lines per CPU second of the replay and its workers), best of ``repeat``."""
    best, best_cpu = float("inf"), float("inf")
    for run in range(repeat):
        out = folder / f"out-{workers}-{run}.jsonl"
        command = [sys.executable, "-m", "streamtag.cli", "replay", str(archive), "--model", str(model_path),
                   "--output", str(out), "--review", str(folder / f"review-{workers}-{run}.jsonl"),
                   "--workers", str(workers), "--chunk-lines", str(CHUNK_LINES), "--quiet"]
        began, began_cpu = time.perf_counter(), _children_cpu()
        subprocess.run(command, cwd=REPO, check=True)
        best = min(best, time.perf_counter() - began)
        best_cpu = min(best_cpu, _children_cpu() - began_cpu)
    return n_lines / best, n_lines / best_cpu


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=20000)
    parser.add_argument("--model", help="model file (default: train a small one on demo data)")
    parser.add_argument("--gzip", action="store_true", help="replay a gzip archive instead of a plain file")
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        model_path = Path(args.model) if args.model else train_small_model(folder)
        lines = [item["text"] for item in generate_stream(args.lines, seed=13)]
        data = ("\n".join(lines) + "\n").encode()
        archive = folder / ("stream.log.gz" if args.gzip else "stream.log")
        archive.write_bytes(gzip.compress(data) if args.gzip else data)
        print(f"{len(lines):,} lines, {len(data) / 1e6:.1f} MB{' (gzip)' if args.gzip else ''}, "
              f"{os.cpu_count()} cores, model {load_model(model_path).model_id}")
        print(f"load average before: {os.getloadavg()[0]:.2f} (other work on the machine skews wall-clock rates)")
        direct, direct_cpu = direct_tagging_rate(model_path, lines, args.repeat)
        print(f"direct Tagger.tag, 1 process: {direct:8,.0f} lines/s wall {direct_cpu:8,.0f} lines/CPU-s")
        one, one_cpu = replay_rate(model_path, archive, 1, len(lines), args.repeat, folder)
        print(f"replay --workers 1:           {one:8,.0f} lines/s wall {one_cpu:8,.0f} lines/CPU-s "
              f"({one / direct:.0%} of direct, wall)")
        two, two_cpu = replay_rate(model_path, archive, 2, len(lines), args.repeat, folder)
        print(f"replay --workers 2:           {two:8,.0f} lines/s wall {two_cpu:8,.0f} lines/CPU-s "
              f"({two / one:.2f}x one worker, wall)")
        print(f"load average after: {os.getloadavg()[0]:.2f}")
        same = (folder / "out-1-0.jsonl").read_bytes() == (folder / "out-2-0.jsonl").read_bytes()
        print(f"outputs of 1 and 2 workers identical: {same}")


if __name__ == "__main__":
    main()
