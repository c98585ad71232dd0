"""Benchmark of `streamtag watch` as a real process, file in -> output file (prints figures).

    .venv/bin/python tests/bench/bench_daemon.py [--model M] [--lines N] [--rss-lines N] [--only WHAT]

Three figures (goals in brackets; they depend on the tagger's speed, which is measured too):
1. throughput: sustained lines/s of the daemon pinned to one core, over lines of about 20 tokens
   already in the input (goal >= 20,000 lines/s);
2. latency: p99 read-to-write latency (read -> fsync of its output, as the daemon measures it) while
   a writer appends a steady 2,000 lines/s (goal <= 100 ms);
3. memory: the daemon's VmRSS (from /proc/PID/status) sampled while it works through many lines;
   after a warm-up of 10 % of the lines, max/min must stay within 10 %.
A cProfile of the tagging path (in this process) shows where the time goes.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import os
import pstats
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # tests/ (daemon_support)
sys.path.insert(0, str(HERE.parent.parent))  # the repository

from daemon_support import DaemonProcess, count_lines, wait_until, write_config  # noqa: E402

from streamtag.model import default_model_path  # noqa: E402


def demo_lines(n: int, seed: int = 11, distinct: bool = True) -> list[bytes]:
    """Invented log lines of the demo world (about 21 tokens on average).

    Distinct by default: the tagger caches pieces and token types, so lines that come round again
    would measure its caches, not a live stream (generating costs about 0.1 ms a line).
    """
    from streamtag.demo.generate import generate_stream

    base = [item["text"].encode() for item in generate_stream(n if distinct else min(n, 20_000), seed=seed)]
    return [base[i % len(base)] for i in range(n)]


def write_lines(path: Path, lines: list[bytes]) -> None:
    with open(path, "ab") as handle:
        handle.write(b"\n".join(lines) + b"\n")


try:
    ALL_CORES = frozenset(os.sched_getaffinity(0))  # before this process pins itself
except (AttributeError, OSError):
    ALL_CORES = frozenset()


def pin_to_one_core(pid: int) -> str:
    """Pin the daemon to the first core, and this process (which watches the output) to the others,
    so that watching takes nothing from the daemon's core."""
    try:
        cores = ALL_CORES or os.sched_getaffinity(0)
        core = min(cores)
        os.sched_setaffinity(pid, {core})
        if len(cores) > 1:
            os.sched_setaffinity(0, cores - {core})
        return f"pinned to core {core}"
    except (AttributeError, OSError) as exc:
        return f"not pinned ({exc})"


class LineCounter:
    """Lines in a growing file, counting only the bytes added since the last call (reading the whole
    output every 50 ms cost the machine more than the daemon's own writes)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.offset = 0
        self.lines = 0

    def __call__(self) -> int:
        try:
            with open(self.path, "rb") as handle:
                handle.seek(self.offset)
                for chunk in iter(lambda: handle.read(1 << 20), b""):
                    self.lines += chunk.count(b"\n")
                    self.offset += len(chunk)
        except FileNotFoundError:
            pass
        return self.lines


def vm_rss_kib(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status") as handle:
            for line in handle:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


def setup(directory: Path, model: Path, **sections) -> tuple[Path, Path, Path]:
    logs = directory / "logs"
    logs.mkdir(parents=True)
    source = logs / "app.log"
    source.touch()
    config = write_config(directory, [str(source)], model, **sections)
    return source, config, directory / "out" / "tagged.jsonl"


def final_stats(directory: Path) -> dict:
    return json.loads((directory / "state" / "stats.json").read_text())


# -- 1. throughput ---------------------------------------------------------------------------------


def bench_throughput(work: Path, model: Path, n_lines: int, batch: int) -> dict:
    directory = work / "throughput"
    source, config, output = setup(directory, model, batch={"max_lines": batch, "max_wait_ms": 0},
                                   state={"stats_interval_seconds": 86400})
    write_lines(source, demo_lines(n_lines))
    daemon = DaemonProcess(config, directory / "daemon.log").start()
    pinned = pin_to_one_core(daemon.pid)
    counted = LineCounter(output)
    wait_until(lambda: counted() > 0, timeout=120, interval=0.01, what="first record")
    first_time, first_count = time.monotonic(), counted()
    wait_until(lambda: counted() >= n_lines, timeout=3600, interval=0.05, what="all records")
    elapsed = time.monotonic() - first_time
    daemon.stop()
    rate = (n_lines - first_count) / elapsed
    stats = final_stats(directory)
    return {"lines": n_lines, "lines_per_second": round(rate, 1), "batch": batch, "cpu": pinned,
            "review_rate": stats["review_rate"], "goal": ">= 20000 lines/s", "met": rate >= 20_000}


# -- 2. latency at a steady rate -------------------------------------------------------------------


def bench_latency(work: Path, model: Path, rate: int, seconds: float, max_wait_ms: int) -> dict:
    directory = work / "latency"
    source, config, output = setup(directory, model, batch={"max_lines": 1000, "max_wait_ms": max_wait_ms},
                                   state={"stats_interval_seconds": 86400})
    lines = demo_lines(int(rate * seconds))
    daemon = DaemonProcess(config, directory / "daemon.log").start()
    pin_to_one_core(daemon.pid)
    wait_until(lambda: "watching " in daemon.log_text(), timeout=120, what="daemon start")
    time.sleep(1.0)  # let it settle
    tick = 0.01  # 100 appends a second, rate/100 lines each
    per_tick = max(1, int(rate * tick))
    start = time.monotonic()
    fd = os.open(source, os.O_WRONLY | os.O_APPEND)
    try:
        for k, i in enumerate(range(0, len(lines), per_tick)):
            os.write(fd, b"\n".join(lines[i:i + per_tick]) + b"\n")
            delay = start + (k + 1) * tick - time.monotonic()
            if delay > 0:
                time.sleep(delay)
    finally:
        os.close(fd)
    achieved = len(lines) / (time.monotonic() - start)
    wait_until(lambda: count_lines(output) >= len(lines), timeout=600, what="all records")
    daemon.stop()
    stats = final_stats(directory)
    p99 = stats["latency_p99_ms"]
    return {"target_lines_per_second": rate, "written_lines_per_second": round(achieved, 1),
            "seconds": seconds, "max_wait_ms": max_wait_ms, "p50_ms": stats["latency_p50_ms"],
            "p99_ms": p99, "goal": "p99 <= 100 ms", "met": p99 is not None and p99 <= 100}


# -- 3. memory over many lines -----------------------------------------------------------------------


def bench_memory(work: Path, model: Path, n_lines: int) -> dict:
    directory = work / "memory"
    source, config, output = setup(directory, model, batch={"max_lines": 512, "max_wait_ms": 0},
                                   state={"stats_interval_seconds": 30})
    # Distinct lines (numbered) so caches keyed by token text see an endless stream of new tokens.
    base = demo_lines(20_000, distinct=False)
    chunk = 100_000
    for first in range(0, n_lines, chunk):
        write_lines(source, [b"%s seq=%d" % (base[i % len(base)], i) for i in range(first, min(n_lines, first + chunk))])
    daemon = DaemonProcess(config, directory / "daemon.log").start()
    samples: list[tuple[int, int]] = []  # (lines written so far, VmRSS KiB)
    stop = threading.Event()

    def sampler():
        while not stop.is_set():
            rss = vm_rss_kib(daemon.pid)
            if rss:
                samples.append((count_lines(output), rss))
            stop.wait(1.0)

    thread = threading.Thread(target=sampler, daemon=True)
    thread.start()
    wait_until(lambda: count_lines(output) >= n_lines, timeout=24 * 3600, interval=1.0, what="all records")
    stop.set()
    thread.join()
    daemon.stop()
    warm = [rss for done, rss in samples if done >= n_lines // 10]
    if not warm:
        return {"lines": n_lines, "error": "no samples after warm-up"}
    low, high = min(warm), max(warm)
    # RSS at each tenth of the run shows growth (a leak) apart from caches filling to their bound.
    by_tenth = [round(max((rss for done, rss in samples if done <= n_lines * k // 10), default=0) / 1024, 1)
                for k in range(1, 11)]
    second_half = [rss for done, rss in samples if done >= n_lines // 2]
    return {"lines": n_lines, "samples": len(warm), "rss_min_mib": round(low / 1024, 1),
            "rss_max_mib": round(high / 1024, 1), "spread": round(high / low - 1, 4),
            "rss_mib_by_tenth": by_tenth,
            "spread_second_half": round(max(second_half) / min(second_half) - 1, 4) if second_half else None,
            "goal": "max/min - 1 <= 0.10", "met": high / low - 1 <= 0.10}


# -- where the time goes -----------------------------------------------------------------------------


def profile_tagging(model: Path, n_lines: int, batch: int) -> str:
    """cProfile of the daemon's per-batch work (decode, tag, records) in this process, on lines the
    tagger has not seen (it is warmed on others first), as `Daemon._encode_batch` does it."""
    from streamtag.batch import fewer_collections, tag_and_encode
    from streamtag.decode import decode_lines
    from streamtag.demo.generate import generate_stream
    from streamtag.model import load_model
    from streamtag.tagger import Tagger

    tagger = Tagger(load_model(model))
    lines = demo_lines(n_lines)
    warm = [item["text"].encode() for item in generate_stream(min(n_lines, 5000), seed=12)]

    def work(chunks):
        for i in range(0, len(chunks), batch):
            part = chunks[i:i + batch]
            n = len(part)
            tag_and_encode(tagger, decode_lines(part), 0.5, 0.5, ["/var/log/app.log"] * n, list(range(n)),
                           list(range(1, n + 1)), [()] * n)

    with fewer_collections():
        work(warm)  # caches warm, kernels loaded
        profiler = cProfile.Profile()
        start = time.perf_counter()
        profiler.enable()
        work(lines)
        profiler.disable()
    elapsed = time.perf_counter() - start
    text = io.StringIO()
    pstats.Stats(profiler, stream=text).sort_stats("tottime").print_stats(25)
    return f"in-process decode+tag+records: {n_lines / elapsed:.0f} lines/s (profiled)\n" + text.getvalue()


def train_quick_model(path: Path, n_lines: int) -> str:
    """A model trained briefly on invented demo lines: realistic span density and review rate."""
    import orjson

    from streamtag.corpus import read_jsonl
    from streamtag.demo.generate import generate_split
    from streamtag.features import FeatureSpec
    from streamtag.model import save_model
    from streamtag.train import TrainOptions, train_model

    corpus = path.with_suffix(".jsonl")
    corpus.write_bytes(b"".join(orjson.dumps(item) + b"\n" for item in generate_split("train", n_lines, seed=5)))
    sentences, _ = read_jsonl(corpus)
    spec = FeatureSpec.from_toml(HERE.parent.parent / "config" / "features.toml")
    model = train_model(sentences, spec, TrainOptions(max_iter=40, l2=1.0))
    return save_model(model, path)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", help="model file (default: bundled model, else one trained here briefly)")
    parser.add_argument("--train-lines", type=int, default=2000, help="demo lines to train on without a model")
    parser.add_argument("--lines", type=int, default=200_000, help="lines for the throughput run")
    parser.add_argument("--batch", type=int, default=1000)
    parser.add_argument("--rate", type=int, default=2000, help="lines/s for the latency run")
    parser.add_argument("--seconds", type=float, default=20.0, help="length of the latency run")
    parser.add_argument("--max-wait-ms", type=int, default=0)
    parser.add_argument("--rss-lines", type=int, default=1_000_000, help="lines for the memory run")
    parser.add_argument("--only", choices=["throughput", "latency", "memory", "profile"], action="append")
    args = parser.parse_args(argv)
    wanted = set(args.only or ["throughput", "latency", "memory", "profile"])
    with tempfile.TemporaryDirectory(prefix="streamtag-bench-") as tmp:
        work = Path(tmp)
        model = Path(args.model) if args.model else default_model_path()
        if not model.exists():
            model = work / "quick.stm"
            began = time.monotonic()
            model_id = train_quick_model(model, args.train_lines)
            print(f"model: {model_id}, trained here on {args.train_lines} demo lines, 40 L-BFGS iterations "
                  f"({time.monotonic() - began:.0f} s; no bundled model yet)")
        else:
            print(f"model: {model}")
        try:
            if "profile" in wanted:
                print(profile_tagging(model, min(args.lines, 20_000), args.batch))
            if "throughput" in wanted:
                print("throughput:", json.dumps(bench_throughput(work, model, args.lines, args.batch)))
            if "latency" in wanted:
                print("latency:", json.dumps(bench_latency(work, model, args.rate, args.seconds, args.max_wait_ms)))
            if "memory" in wanted:
                print("memory:", json.dumps(bench_memory(work, model, args.rss_lines)))
        finally:
            DaemonProcess.kill_leftovers()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
