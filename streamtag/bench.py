"""`streamtag bench`: tagging throughput and memory, beside plain read + JSON write of the same lines.

Each pass is timed as best of ``--repeat``; the ratio to plain I/O shows what tagging costs. The
stage breakdown (tokenize, types, emissions, decode, spans) points at where time goes. Each pass
runs on lines its tagger has not seen, after a warm-up on other lines. Figures, not a verdict:
run it on the machine that will run the daemon.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import orjson

from streamtag import crf
from streamtag.errors import ConfigError, DataError
from streamtag.model import load_model
from streamtag.batch import fewer_collections, keep_freed_memory, tag_and_encode
from streamtag.decode import decode_lines
from streamtag.tagger import Tagger
from streamtag.tokenize import tokenize


def run(args: argparse.Namespace) -> int:
    if args.batch < 1 or args.repeat < 1 or args.lines < 1:
        raise ConfigError("--batch, --repeat and --lines must be >= 1")
    raw_lines = _load_lines(args.file, args.lines, seed=11)
    # Warm-up lines the measured ones do not repeat (generated with another seed, or the file's
    # first half): the caches then hold what a long-running stream holds, not the answers.
    if args.file is None:
        warm_up = _load_lines(None, args.lines, seed=12)
    else:
        half = len(raw_lines) // 2
        warm_up, raw_lines = raw_lines[:half], raw_lines[half:] or raw_lines
    model = load_model(args.model)
    result = measure(lambda: Tagger(model), warm_up, raw_lines, args.batch, args.repeat)
    result["source"] = args.file or f"{len(raw_lines)} generated demo lines (after {len(warm_up)} others)"
    if args.json:
        sys.stdout.write(orjson.dumps(result, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(format_result(result))
    return 0


def _load_lines(path: str | None, n_generated: int, seed: int) -> list[bytes]:
    if path is None:
        from streamtag.demo.generate import generate_stream

        return [item["text"].encode() for item in generate_stream(n_generated, seed=seed)]
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from None
    lines = data.splitlines()
    if not lines:
        raise DataError(f"{path}: no lines")
    return lines


def measure(new_tagger, warm_up: list[bytes], raw_lines: list[bytes], batch: int, repeat: int) -> dict:
    """Best-of-``repeat`` timings for plain I/O, full tagging, and each stage.

    Every tagging pass gets a fresh tagger (``new_tagger()``) warmed on ``warm_up`` first, so no pass
    finds the measured lines in its caches: the figure is a live stream's, new lines every time.
    """
    batches = [raw_lines[i : i + batch] for i in range(0, len(raw_lines), batch)]
    warm_batches = [warm_up[i : i + batch] for i in range(0, len(warm_up), batch)]

    def warmed() -> Tagger:
        tagger = new_tagger()
        for chunk in warm_batches:
            tagger.tag([raw.decode("utf-8", "replace") for raw in chunk], review_below=0.5)
        return tagger

    n_tokens = sum(len(tokenize(raw.decode("utf-8", "replace")).texts) for raw in raw_lines)
    # The collector threshold the daemon, `tag` and replay run with (see batch.fewer_collections).
    keep_freed_memory()  # as the daemon, `tag` and replay run
    with tempfile.TemporaryDirectory() as folder, fewer_collections():
        sink = Path(folder) / "out.jsonl"
        plain = _best(repeat, lambda: _plain_pass(batches, sink))
        tagged = min(_timed(_tagging_pass, warmed(), batches, sink) for _ in range(repeat))
        tagger = warmed()   # for the worst line and the model id
        stages = min((_stage_times(warmed(), batches) for _ in range(repeat)), key=lambda s: sum(s.values()))
    n_lines = len(raw_lines)
    return {
        "lines": n_lines,
        "tokens": n_tokens,
        "tokens_per_line": round(n_tokens / n_lines, 2),
        "batch": batch,
        "plain_io_seconds": round(plain, 4),
        "tagging_seconds": round(tagged, 4),
        "lines_per_second": round(n_lines / tagged),
        "tokens_per_second": round(n_tokens / tagged),
        "ratio_to_plain_io": round(tagged / plain, 2),
        "stage_seconds": {name: round(value, 4) for name, value in stages.items()},
        # tokenize + features (types, emissions) + Viterbi and marginals (decode): the tagging core
        "core_tokens_per_second": round(n_tokens / sum(stages[k] for k in ("tokenize", "types", "emissions",
                                                                         "decode"))),
        "worst_line_ms": round(_worst_line_seconds(tagger) * 1000, 2),
        "peak_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "model": tagger.model_id,
    }


def _best(repeat: int, action) -> float:
    return min(_timed(action) for _ in range(repeat))


def _timed(action, *args) -> float:
    began = time.perf_counter()
    action(*args)
    return time.perf_counter() - began


def _plain_pass(batches: list[list[bytes]], sink: Path) -> None:
    """Decode each line and write a minimal JSON record: the floor any tagger sits on."""
    with open(sink, "wb") as out:
        for chunk in batches:
            out.write(b"".join(
                orjson.dumps({"text": raw.decode("utf-8", "replace")}, option=orjson.OPT_APPEND_NEWLINE)
                for raw in chunk
            ))
        out.flush()
        os.fsync(out.fileno())


def _tagging_pass(tagger: Tagger, batches: list[list[bytes]], sink: Path) -> None:
    """What `tag` and the daemon do with a batch: decode, tag, records (output and review) to a file."""
    with open(sink, "wb") as out:
        for chunk in batches:
            none = [None] * len(chunk)
            output, review, _ = tag_and_encode(tagger, decode_lines(chunk), 0.5, 0.5, none, none, none,
                                               [()] * len(chunk))
            out.write(output)
        out.flush()
        os.fsync(out.fileno())


def _stage_times(tagger: Tagger, batches: list[list[bytes]]) -> dict[str, float]:
    """Seconds spent in each stage of `Tagger.tag` over all batches, in one pass on new lines.

    The stages run as ``tag`` runs them; "spans" is the rest of ``tag`` (spans, their exact
    probabilities, confidences, review details), timed as a whole ``tag`` minus the stages.
    """
    totals = dict.fromkeys(["tokenize", "types", "emissions", "decode", "spans"], 0.0)
    clock = time.process_time   # this process's CPU only: other load on the machine does not count
    for chunk in batches:
        texts = [raw.decode("utf-8", "replace") for raw in chunk]
        t0 = clock()
        tokens = tagger.tokenizer.tokenize_lines(texts, lazy=True)
        t1 = clock()
        rows = tagger.scorer.type_rows(tokens.texts, tokens.kinds, tokens.keys, tokens.generation)
        t2 = clock()
        emissions = tagger.scorer.emissions(rows, tokens.counts)
        t3 = clock()
        crf.decode(emissions, tokens.counts, tagger.trans, tagger.start, tagger.end)
        t4 = clock()
        # The whole of tag on the same lines, now cached: what is not tokenize/types is the rest.
        tagger.tag(texts, review_below=0.5)
        t5 = clock()
        tokens = tagger.tokenizer.tokenize_lines(texts, lazy=True)
        rows = tagger.scorer.type_rows(tokens.texts, tokens.kinds, tokens.keys, tokens.generation)
        emissions = tagger.scorer.emissions(rows, tokens.counts)
        crf.decode(emissions, tokens.counts, tagger.trans, tagger.start, tagger.end)
        t6 = clock()
        for name, seconds in zip(totals, (t1 - t0, t2 - t1, t3 - t2, t4 - t3, max(0.0, (t5 - t4) - (t6 - t5)))):
            totals[name] += seconds
    return totals


def _worst_line_seconds(tagger: Tagger, max_line_bytes: int = 65536) -> float:
    """Time for the costliest line the caps allow: the byte cap filled with one-character tokens.

    The follower cuts lines at the byte cap, so no line has more tokens than this; the tagger
    decodes it in windows of ``max_tokens``, so its cost is linear in the cap and bounded.
    """
    line = ("a," * (max_line_bytes // 2))[:max_line_bytes]
    return _best(3, lambda: tagger.tag([line], review_below=1.0))


def format_result(result: dict) -> str:
    stages = ", ".join(f"{name} {seconds:.3f}s" for name, seconds in result["stage_seconds"].items())
    return "\n".join([
        f"source            {result['source']}",
        f"lines             {result['lines']} ({result['tokens']} tokens, {result['tokens_per_line']} per line)",
        f"plain read+write  {result['plain_io_seconds']:.3f}s",
        f"tagging           {result['tagging_seconds']:.3f}s  "
        f"= {result['lines_per_second']:,} lines/s, {result['tokens_per_second']:,} tokens/s",
        f"ratio to plain IO {result['ratio_to_plain_io']}x",
        f"stages            {stages}",
        f"core              {result['core_tokens_per_second']:,} tokens/s "
        "(tokenize + features + Viterbi + marginals, from the stages)",
        f"worst line        {result['worst_line_ms']} ms (64 KiB of one-character tokens, the byte cap)",
        f"peak memory       {result['peak_rss_mib']} MiB resident",
        f"model             {result['model']}",
    ])
