"""`streamtag bench`: tagging throughput and memory, beside plain read + JSON write of the same lines.

Each pass is timed as best of ``--repeat``; the ratio to plain I/O shows what tagging costs. The
stage breakdown (tokenize, features, decode) points at where time goes. Figures, not a verdict:
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
from streamtag.records import encode, make_record
from streamtag.tagger import Tagger
from streamtag.tokenize import tokenize


def run(args: argparse.Namespace) -> int:
    if args.batch < 1 or args.repeat < 1 or args.lines < 1:
        raise ConfigError("--batch, --repeat and --lines must be >= 1")
    raw_lines = _load_lines(args.file, args.lines)
    tagger = Tagger(load_model(args.model))
    result = measure(tagger, raw_lines, args.batch, args.repeat)
    result["source"] = args.file or f"{len(raw_lines)} generated demo lines"
    if args.json:
        sys.stdout.write(orjson.dumps(result, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(format_result(result))
    return 0


def _load_lines(path: str | None, n_generated: int) -> list[bytes]:
    if path is None:
        from streamtag.demo.generate import generate_stream

        return [item["text"].encode() for item in generate_stream(n_generated, seed=11)]
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from None
    lines = data.splitlines()
    if not lines:
        raise DataError(f"{path}: no lines")
    return lines


def measure(tagger: Tagger, raw_lines: list[bytes], batch: int, repeat: int) -> dict:
    """Best-of-``repeat`` timings for plain I/O, full tagging, and each stage on its own."""
    batches = [raw_lines[i : i + batch] for i in range(0, len(raw_lines), batch)]
    texts = [[raw.decode("utf-8", "replace") for raw in chunk] for chunk in batches]
    n_tokens = sum(len(tokenize(line).texts) for chunk in texts for line in chunk)
    with tempfile.TemporaryDirectory() as folder:
        sink = Path(folder) / "out.jsonl"
        plain = _best(repeat, lambda: _plain_pass(batches, sink))
        tagged = _best(repeat, lambda: _tagging_pass(tagger, batches, sink))
    stages = _stage_times(tagger, texts, repeat)
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
        "worst_line_ms": round(_worst_line_seconds(tagger) * 1000, 2),
        "peak_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "model": tagger.model_id,
    }


def _best(repeat: int, action) -> float:
    timings = []
    for _ in range(repeat):
        began = time.perf_counter()
        action()
        timings.append(time.perf_counter() - began)
    return min(timings)


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
    with open(sink, "wb") as out:
        for chunk in batches:
            texts = [raw.decode("utf-8", "replace") for raw in chunk]
            results = tagger.tag(texts, review_below=0.5)
            records = [make_record(r, tagger.model_id, r.confidence < 0.5) for r in results]
            out.write(encode(records))
        out.flush()
        os.fsync(out.fileno())


def _stage_times(tagger: Tagger, texts: list[list[str]], repeat: int) -> dict[str, float]:
    """Seconds for each stage over all batches, each measured on its own (best of ``repeat``)."""
    token_lists = [[tokenize(line) for line in chunk] for chunk in texts]
    pairs = [[(t.texts, t.kinds) for t in chunk] for chunk in token_lists]
    matrices = [tagger.extractor.transform(chunk) for chunk in pairs]
    emissions = [(np.asarray(x @ tagger.emission), lengths) for x, lengths in matrices]

    def decode() -> None:
        for e, lengths in emissions:
            crf.viterbi(e, lengths, tagger.trans, tagger.start, tagger.end)
            crf.token_marginals(crf.forward_backward(e, lengths, tagger.trans, tagger.start, tagger.end))

    return {
        "tokenize": _best(repeat, lambda: [[tokenize(line) for line in chunk] for chunk in texts]),
        "features": _best(repeat, lambda: [tagger.extractor.transform(chunk) for chunk in pairs]),
        "emissions": _best(repeat, lambda: [np.asarray(x @ tagger.emission) for x, _ in matrices]),
        "viterbi_and_marginals": _best(repeat, decode),
    }


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
        f"worst line        {result['worst_line_ms']} ms (64 KiB of one-character tokens, the byte cap)",
        f"peak memory       {result['peak_rss_mib']} MiB resident",
        f"model             {result['model']}",
    ])
