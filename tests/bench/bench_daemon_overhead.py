"""What the daemon costs per line apart from tagging (prints figures; rerunnable).

    .venv/bin/python tests/bench/bench_daemon_overhead.py [--lines N] [--distinct N] [--runs K]
        [--batch N] [--dirty-share F] [--dir DIR] [--no-profile]

The real watch loop (``Daemon.run``: follow, decode, tag, records, JSON, write, fsync, checkpoint,
latency bookkeeping) runs in this process over a file of demo lines that is already complete, with
``Tagger.tag`` and ``Tagger.tag_batch`` replaced by a table lookup of results the real tagger computed
once for each distinct line. Everything but tagging is therefore measured (the records, written by
the compiled record writer from the batch's arrays, included); the budget for it is 12 us per line (the goal of
20,000 lines/s end to end is 50 us per line in all).

Printed: the loop's us/line (best of ``--runs``), each stage on its own (read+split, decode,
records through the compiled writer, records and JSON through the dict path, write+fsync+checkpoint)
and a cProfile of one run.

Demo lines are slow to generate (about 110 us each), so the file is cached in the temp folder
(``streamtag-bench-cache``) and reused by later runs. ``--dirty-share`` mixes in lines with broken
UTF-8, NUL bytes and terminal escapes, to price the slow decoding path.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import random
import sys
import tempfile
import time
import timeit
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))  # the repository

from streamtag import batch as batch_module  # noqa: E402
from streamtag.checkpoint import State, save_state  # noqa: E402
from streamtag.config import load_watch_config  # noqa: E402
from streamtag.daemon import BatchWriter, Daemon, OutputFile  # noqa: E402
from streamtag.decode import decode_text  # noqa: E402
from streamtag.follow import Follower  # noqa: E402
from streamtag.model import default_model_path, load_model  # noqa: E402
from streamtag.tagger import TaggedBatch, TaggedLine, TaggedSpan, Tagger  # noqa: E402
import numpy as np  # noqa: E402

BUDGET_US = 12.0
REVIEW_BELOW = 0.5
DIRTY_LINES = [  # invented; each takes a different slow decoding path
    b"relay-07 \x1b[1;31mERROR\x1b[0m link down on nic0",  # ECMA-48 control sequences
    b"gatewarden[311]: user\x00kestrel from 192.0.2.14",  # NUL
    b"vault-02 backup of /srv/\xff\xfedata failed with E4012",  # invalid UTF-8
    b"tasker[77]: job nightly\r finished",  # a carriage return inside the line
]


# -- input ------------------------------------------------------------------------------------------


def cached_demo_file(n_lines: int, n_distinct: int, seed: int, dirty_share: float) -> Path:
    """The demo lines, generated once and cached under the temp folder."""
    cache = Path(tempfile.gettempdir()) / "streamtag-bench-cache"
    cache.mkdir(mode=0o700, exist_ok=True)
    path = cache / f"demo-{seed}-{n_distinct}-{n_lines}-{dirty_share:g}.log"
    if path.exists():
        return path
    from streamtag.demo.generate import generate_stream

    began = time.perf_counter()
    base = [item["text"].encode() for item in generate_stream(n_distinct, seed=seed)]
    rng = random.Random(seed)
    lines = [DIRTY_LINES[rng.randrange(len(DIRTY_LINES))] if rng.random() < dirty_share else base[i % len(base)]
             for i in range(n_lines)]
    temporary = path.with_suffix(".tmp")
    temporary.write_bytes(b"\n".join(lines) + b"\n")
    os.replace(temporary, path)
    print(f"generated {n_distinct} distinct demo lines in {time.perf_counter() - began:.1f} s -> {path}")
    return path


def precomputed_results(model_path: Path, data: bytes) -> dict:
    """tag_text -> TaggedLine from the real tagger, for every distinct line of the file."""
    tagger = Tagger(load_model(model_path))
    distinct = list(dict.fromkeys(decode_text(raw).tag_text for raw in data.split(b"\n")[:-1]))
    began = time.perf_counter()
    table = {}
    for first in range(0, len(distinct), 1000):
        texts = distinct[first:first + 1000]
        table.update(zip(texts, tagger.tag(texts, review_below=REVIEW_BELOW)))
    print(f"tagged {len(distinct)} distinct lines with the real tagger in {time.perf_counter() - began:.1f} s "
          f"({len(distinct) / (time.perf_counter() - began):.0f} lines/s)")
    return table


STAND_IN_CPU = [0.0]  # CPU seconds spent in the stand-in tagger, taken off the loop's figure


def _fresh(result: TaggedLine) -> TaggedLine:
    """A new copy, as the real tagger makes new objects per batch (they are then warm in the caches;
    handing out the same old objects again would make every later stage pay cache misses)."""
    return TaggedLine(result.text, [TaggedSpan(s.start, s.end, s.label, s.text, s.confidence) for s in result.spans],
                      result.confidence, result.n_tokens, list(result.flags), result.weakest, result.runner_up,
                      result.runner_up_probability)


def batch_of(lines: list[str], results: list[TaggedLine], type_names, review_below) -> TaggedBatch:
    """The TaggedBatch the real ``tag_batch`` gives for these results (spans as arrays, the lines
    below ``review_below`` as described objects)."""
    index = {name: i for i, name in enumerate(type_names.tolist())}
    spans = [(line, span) for line, result in enumerate(results) for span in result.spans]
    column = lambda values, dtype=np.int64: np.array(values, dtype=dtype)  # noqa: E731
    described = {} if review_below is None else {
        i: _fresh(result) for i, result in enumerate(results) if result.confidence < review_below}
    split = [("split" in result.flags) for result in results]
    return TaggedBatch(list(lines), column([line for line, _ in spans]), column([s.start for _, s in spans]),
                       column([s.end for _, s in spans]), column([index[s.label] for _, s in spans]),
                       column([s.confidence for _, s in spans], np.float64),
                       column([r.confidence for r in results], np.float64), column([r.n_tokens for r in results]),
                       column(split, bool) if any(split) else None, type_names, described)


def install_free_tagger(table: dict) -> None:
    """Replace ``Tagger.tag`` and ``Tagger.tag_batch`` by lookups of the precomputed results; lines
    not in the table (the model probe) are really tagged. Their CPU time is added up in
    ``STAND_IN_CPU``."""
    real_tag_batch = Tagger.tag_batch

    def real_tag(self, lines, review_below=None):
        return real_tag_batch(self, lines, review_below).tagged_lines()

    def lookup_tag(self, lines, review_below=None):
        began = time.process_time()
        found = list(map(table.get, lines))
        if not all(found):  # (a TaggedLine is always true)
            found = [result if result is not None else real_tag(self, [text], review_below)[0]
                     for text, result in zip(lines, found)]
        found = list(map(_fresh, found))
        STAND_IN_CPU[0] += time.process_time() - began
        return found

    def lookup_tag_batch(self, lines, review_below=None):
        results = lookup_tag(self, lines, review_below)
        began = time.process_time()
        made = batch_of(lines, results, self._type_names, review_below)
        STAND_IN_CPU[0] += time.process_time() - began
        return made

    Tagger.tag = lookup_tag
    Tagger.tag_batch = lookup_tag_batch


# -- the whole loop ---------------------------------------------------------------------------------


class _MeasuredDaemon(Daemon):
    """The daemon, stopping itself once ``expected`` lines are written; times the loop alone."""

    expected = 0
    loop_began = loop_ended = cpu_began = cpu_ended = 0.0

    def _loop(self) -> int:
        self.loop_began, self.cpu_began = time.perf_counter(), time.process_time()
        stand_in_before = STAND_IN_CPU[0]
        try:
            return super()._loop()
        finally:
            self.loop_ended, self.cpu_ended = time.perf_counter(), time.process_time()
            self.stand_in = STAND_IN_CPU[0] - stand_in_before

    def _write_with_retry(self, pending, overlap: bool) -> int:
        code = super()._write_with_retry(pending, overlap)
        self.written = getattr(self, "written", 0) + len(pending)
        if self.written >= self.expected:
            self.stop_requested = True
        return code


def run_daemon(work: Path, source: Path, n_lines: int, model: Path, batch: int | None,
               profiler: cProfile.Profile | None = None) -> tuple[float, float, int, str]:
    """One run of the loop over ``source``: (wall seconds, CPU seconds, checkpoints, output path); the
    stand-in tagger's CPU time is taken off both."""
    work.mkdir(parents=True)
    overrides = {"inputs": [str(source)], "model": str(model), "output": str(work / "tagged.jsonl"),
                 "review": str(work / "review.jsonl"), "state": str(work / "state"),
                 "threshold": REVIEW_BELOW, "stats_interval_seconds": 86400.0,
                 "poll_interval_seconds": 0.2}
    if batch is not None:
        overrides["batch_max_lines"] = batch
    config = load_watch_config(None, overrides)
    logs: list[str] = []
    daemon = _MeasuredDaemon(config, log=logs.append, install_signals=False)
    daemon.expected = n_lines
    if profiler is not None:
        profiler.enable()
    code = daemon.run()
    if profiler is not None:
        profiler.disable()
    if code != 0:
        raise SystemExit(f"daemon exited {code}: {logs[-3:]}")
    return (daemon.loop_ended - daemon.loop_began - daemon.stand_in,
            daemon.cpu_ended - daemon.cpu_began - daemon.stand_in, daemon.checkpoints, str(work / "tagged.jsonl"))


# -- stages on their own ----------------------------------------------------------------------------


def _best(function, runs: int) -> float:
    """Least CPU time of ``runs`` calls (CPU time: other processes on the machine count less)."""
    return min(timeit.Timer(function, timer=time.process_time).repeat(number=1, repeat=runs))


def stage_costs(work: Path, source: Path, model_path: Path, model_id: str, batch: int, runs: int) -> dict[str, float]:
    """Seconds for each stage over the whole file, best of ``runs``."""
    def read_all():
        """The daemon's way of reading: columns (read_batch) where the follower has them."""
        follower = Follower([str(source)], idle_flush_seconds=None)
        follower.poll()
        read = getattr(follower, "read_batch", follower.read)
        out = []
        while True:
            got = read(batch)
            if not got:
                break
            out.append(got)
        follower.close()
        return out

    batches = [got.raw_lines() if hasattr(got, "raw_lines") else got for got in read_all()]
    n = sum(map(len, batches))
    costs = {"read+split": _best(read_all, runs)}
    from streamtag import decode as decode_module
    from streamtag import records

    decode_lines = getattr(decode_module, "decode_lines", None)
    if decode_lines is None:  # an older tree (for before/after figures): the per-line decoder
        def decode_lines(datas):
            return [decode_text(data) for data in datas]
    costs["decode"] = _best(lambda: [decode_lines([raw.data for raw in lines]) for lines in batches], runs)
    decoded = [decode_lines([raw.data for raw in lines]) for lines in batches]
    tagger = Tagger(load_model(model_path))  # only ``tag`` and ``tag_batch`` (the lookups) are used
    tagged = [batch_module.tag_decoded(tagger, lines, REVIEW_BELOW) for lines in decoded]
    arrays = [tagger.tag_batch(lines, REVIEW_BELOW) for lines in decoded]

    def write_records():
        return [records.encode_tagged_batch(made, model_id, made.confidence < REVIEW_BELOW, [raw.path for raw in raws],
                                            [raw.start for raw in raws], [raw.line_no for raw in raws],
                                            [raw.flags for raw in raws])
                for made, raws in zip(arrays, batches)]

    if hasattr(records, "encode_tagged_batch"):
        costs["records (compiled writer)"] = _best(write_records, runs)

    def make_records():
        made = []
        for results, raws in zip(tagged, batches):
            reviews = [result.confidence < REVIEW_BELOW for result in results]
            if hasattr(records, "make_records"):
                made.append(list(records.make_records(results, model_id, reviews, [raw.path for raw in raws],
                                                      [raw.start for raw in raws], [raw.line_no for raw in raws],
                                                      [raw.flags for raw in raws])))
            else:
                made.append([records.make_record(result, model_id, review, raw.path, raw.start, raw.line_no,
                                                 raw.flags) for result, review, raw in zip(results, reviews, raws)])
        return made

    costs["records (dict path)"] = _best(make_records, runs)
    made = make_records()
    costs["json (dict path)"] = _best(lambda: [records.encode(m) for m in made], runs)
    encoded = [records.encode(m) for m in made]

    def write_sync_checkpoint():
        directory = Path(tempfile.mkdtemp(dir=work))
        writer = BatchWriter(OutputFile(str(directory / "out"), 0o600), OutputFile(str(directory / "rev"), 0o600))
        follower = Follower([str(source)], idle_flush_seconds=None)
        follower.poll()
        for data in encoded:
            writer.write(data, b"")
            save_state(directory / "state.json", State(files=follower.snapshot(), output_bytes=writer.output.length,
                                                      review_bytes=writer.review.length, model_id=model_id))
        follower.close()
        writer.close()

    costs["write+fsync+checkpoint"] = _best(write_sync_checkpoint, runs)
    return {name: seconds / n * 1e6 for name, seconds in costs.items()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", help="model file (default: the bundled model)")
    parser.add_argument("--lines", type=int, default=200_000)
    parser.add_argument("--distinct", type=int, default=20_000, help="distinct demo lines, repeated")
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--runs", type=int, default=3, help="runs of the loop; the best counts")
    parser.add_argument("--batch", type=int, help="batch.max_lines (default: the configured default)")
    parser.add_argument("--dirty-share", type=float, default=0.0, help="share of lines needing slow decoding")
    parser.add_argument("--dir", help="folder for outputs (its file system's fsync is part of the cost)")
    parser.add_argument("--no-profile", action="store_true")
    parser.add_argument("--no-stages", action="store_true")
    args = parser.parse_args(argv)
    model = Path(args.model) if args.model else default_model_path()
    source = cached_demo_file(args.lines, args.distinct, args.seed, args.dirty_share)
    install_free_tagger(precomputed_results(model, source.read_bytes()))
    with tempfile.TemporaryDirectory(prefix="streamtag-overhead-", dir=args.dir) as tmp:
        work = Path(tmp)
        walls, cpus = [], []
        for run in range(args.runs):
            wall, cpu, batches, output = run_daemon(work / f"run{run}", source, args.lines, model, args.batch)
            walls.append(wall)
            cpus.append(cpu)
            print(f"run {run}: {wall / args.lines * 1e6:.2f} us/line wall, {cpu / args.lines * 1e6:.2f} CPU "
                  f"({args.lines / wall:,.0f} lines/s, {batches} checkpoints, {os.path.getsize(output):,} output bytes)")
        best = min(walls) / args.lines * 1e6
        print(f"daemon loop without tagging: best {best:.2f} us/line wall, {min(cpus) / args.lines * 1e6:.2f} CPU "
              f"(budget {BUDGET_US:g}: {'met' if best <= BUDGET_US else 'not met'})")
        if not args.no_stages:
            model_id = Tagger(load_model(model)).model_id
            config_batch = args.batch or load_watch_config(None, {}).batch_max_lines
            costs = stage_costs(work, source, model, model_id, config_batch, args.runs)
            print("stages on their own (CPU us/line, best of %d): " % args.runs
                  + ", ".join(f"{name} {value:.2f}" for name, value in costs.items())
                  + f"; sum of the daemon's stages {sum(v for k, v in costs.items() if 'dict path' not in k):.2f}")
        if not args.no_profile:
            profiler = cProfile.Profile()
            run_daemon(work / "profiled", source, args.lines, model, args.batch, profiler)
            text = io.StringIO()
            pstats.Stats(profiler, stream=text).sort_stats("tottime").print_stats(25)
            print("profile of one run (cProfile adds its own cost per call):")
            print(text.getvalue())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
