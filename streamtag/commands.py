"""The runners behind `train`, `evaluate`, `tag`, `inspect` and `watch`: they wire stages, no maths."""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import platform
import sys
import time
from pathlib import Path
from typing import Iterable, Iterator, TextIO

import numpy as np
import orjson

from streamtag.errors import ConfigError, DataError
from streamtag.model import Model, load_model, save_model

DEFAULT_FEATURES = Path(__file__).parent / "defaults" / "features.toml"


# -- train --------------------------------------------------------------------------------------

def run_train(args: argparse.Namespace) -> int:
    from streamtag.features import FeatureSpec
    from streamtag.train import TrainOptions, train_model

    _check_train_options(args)
    sentences = _read_labelled(args.data, args.format, args.scheme, args.skip_bad, args.reviewed_weight)
    dev = _read_labelled([args.dev], args.format, args.scheme, args.skip_bad, 1.0) if args.dev else None
    spec = FeatureSpec.from_toml(args.features or DEFAULT_FEATURES)
    init = load_model(args.init) if args.init else None
    options = TrainOptions(
        l1=args.l1, l2=args.l2, max_iter=args.max_iter, tol=args.tol, seed=args.seed, method=args.method,
        epochs=args.epochs, min_count=args.min_count, eval_every=args.eval_every,
    )
    progress = None if args.quiet or not sys.stderr.isatty() else ProgressLine(sys.stderr)
    began = time.perf_counter()
    model = train_model(sentences, spec, options, dev_sentences=dev, init_model=init, progress=progress)
    if progress is not None:
        progress.finish()
    model.metadata["data_sha256"] = _files_digest(args.data)
    model.metadata["options"] = {**vars(options), "init": init.model_id if init else None}
    model.run_info.update(
        trained_at=dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        seconds=round(time.perf_counter() - began, 3),
        python=platform.python_version(),
        data_files=[str(p) for p in args.data],
    )
    model_id = save_model(model, args.out)
    kept = len(model.pruned().vocabulary)
    print(f"wrote {args.out}: model {model_id}, {len(model.labels)} labels, {kept} features "
          f"({len(sentences)} sentences, {sum(len(s.tags) for s in sentences)} tokens, "
          f"{time.perf_counter() - began:.1f}s)", file=sys.stderr)
    return 0


def _check_train_options(args: argparse.Namespace) -> None:
    for name in ("l1", "l2", "tol"):
        if getattr(args, name) < 0:
            raise ConfigError(f"--{name.replace('_', '-')} must be >= 0")
    for name in ("max_iter", "epochs", "min_count", "eval_every"):
        if getattr(args, name) < 1:
            raise ConfigError(f"--{name.replace('_', '-')} must be >= 1")
    if args.reviewed_weight <= 0:
        raise ConfigError("--reviewed-weight must be > 0")


def _read_labelled(paths: Iterable[str], fmt: str, scheme: str, skip_bad: bool, reviewed_weight: float):
    from streamtag.corpus import read_corpus

    sentences = []
    for path in paths:
        if not Path(path).is_file():
            raise DataError(f"{path}: no such file")
        read, stats = read_corpus(path, fmt=fmt, scheme=scheme, skip_bad=skip_bad)
        if getattr(stats, "skipped", 0):
            print(f"{path}: skipped {stats.skipped} bad records", file=sys.stderr)
        for sentence in read:
            if reviewed_weight != 1.0 and getattr(sentence, "reviewed", False):
                sentence.weight *= reviewed_weight
        sentences.extend(read)
    if not sentences:
        raise DataError(f"{', '.join(map(str, paths))}: no labelled sentences")
    return sentences


def _files_digest(paths: Iterable[str]) -> str:
    digest = hashlib.sha256()
    for path in paths:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    return digest.hexdigest()


class ProgressLine:
    """A live one-line status on a terminal: iteration, loss, dev score, elapsed."""

    def __init__(self, stream: TextIO) -> None:
        self.stream = stream
        self.began = time.perf_counter()

    def __call__(self, iteration: int, loss: float, dev_score: float | None, elapsed: float) -> None:
        dev = "" if dev_score is None else f"  dev F1 {dev_score:.4f}"
        self.stream.write(f"\r\x1b[2Kiteration {iteration:4d}  loss {loss:14.4f}{dev}  {elapsed:7.1f}s")
        self.stream.flush()

    def finish(self) -> None:
        self.stream.write("\n")
        self.stream.flush()


# -- evaluate -----------------------------------------------------------------------------------

def predict_tags(model: Model, sentences, batch_size: int = 2000) -> list[list[str]]:
    """Decode pre-tokenised sentences (as read from a corpus) with the model: tags per sentence."""
    from streamtag import crf
    from streamtag.features import FeatureExtractor, FeatureSpec

    extractor = FeatureExtractor(FeatureSpec.from_dict(model.feature_spec), model.vocabulary)
    allowed_trans, allowed_start = crf.bio_allowed(model.labels)
    trans, start = crf.apply_mask(model.transitions, model.start, allowed_trans, allowed_start)
    predicted: list[list[str]] = []
    for first in range(0, len(sentences), batch_size):
        chunk = sentences[first : first + batch_size]
        features, lengths = extractor.transform([(s.texts, s.kinds) for s in chunk])
        labels, _ = crf.viterbi(np.asarray(features @ model.emission), lengths, trans, start, model.end)
        names = np.asarray(model.labels, dtype=object)[labels]
        bounds = np.cumsum(lengths)
        predicted.extend(list(part) for part in np.split(names, bounds[:-1]))
    return predicted


def run_evaluate(args: argparse.Namespace) -> int:
    from streamtag.evaluate import evaluate, format_report

    model = load_model(args.model)
    sentences = _read_labelled([args.data], args.format, args.scheme, args.skip_bad, 1.0)
    report = evaluate([s.tags for s in sentences], predict_tags(model, sentences))
    if args.json:
        payload = report.to_dict()
        payload["model"] = model.model_id
        sys.stdout.write(orjson.dumps(payload, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(f"model {model.model_id} on {args.data}")
        print(format_report(report))
    return 0


# -- tag ----------------------------------------------------------------------------------------

def run_tag(args: argparse.Namespace) -> int:
    from streamtag.batch import fewer_collections, keep_freed_memory, tag_and_encode
    from streamtag.tagger import Tagger

    if not 0.0 <= args.threshold <= 1.0:
        raise ConfigError("--threshold must be between 0 and 1")
    if args.batch < 1:
        raise ConfigError("--batch must be >= 1")
    tagger = Tagger(load_model(args.model), max_tokens=args.max_tokens)
    out = sys.stdout.buffer
    keep_freed_memory()
    with fewer_collections():
        for batch in _batches(_input_lines(args.files), args.batch):
            decoded = [line for _, _, _, line in batch]
            output, _, _ = tag_and_encode(tagger, decoded, args.threshold, None,
                                          sources=[b[0] for b in batch], offsets=[b[1] for b in batch],
                                          line_numbers=[b[2] for b in batch], read_flags=[()] * len(batch),
                                          want_review=False)
            out.write(output)
            out.flush()
    return 0


def _input_lines(files: list[str]) -> Iterator[tuple]:
    """(source, byte offset, line number, DecodedLine) for each line of the files, or of stdin."""
    sources = files or ["-"]
    for name in sources:
        if name == "-":
            yield from _lines_of(sys.stdin.buffer, None)
            continue
        try:
            handle = open(name, "rb")
        except OSError as exc:
            raise DataError(f"{name}: cannot open ({exc.strerror})") from None
        with handle:
            yield from _lines_of(handle, name)


def _lines_of(handle, source: str | None):
    from streamtag.decode import decode_lines

    offset = 0
    for line_no, raw in enumerate(handle, start=1):
        start = offset
        offset += len(raw)
        yield source, start, line_no, decode_lines([raw.rstrip(b"\n").rstrip(b"\r")])[0]


def _batches(items: Iterable, size: int) -> Iterator[list]:
    batch = []
    for item in items:
        batch.append(item)
        if len(batch) >= size:
            yield batch
            batch = []
    if batch:
        yield batch


# -- inspect ------------------------------------------------------------------------------------

def run_inspect(args: argparse.Namespace) -> int:
    model = load_model(args.model)
    summary = inspect_model(model, args.top)
    if args.json:
        sys.stdout.write(orjson.dumps(summary, option=orjson.OPT_INDENT_2).decode() + "\n")
        return 0
    print(f"model      {summary['model']}")
    print(f"labels     {' '.join(summary['labels'])}")
    print(f"features   {summary['features']} with non-zero weights")
    for key, value in sorted(summary["metadata"].items()):
        if key != "options":
            print(f"{key:<10} {value}")
    for key, value in sorted(summary["run_info"].items()):
        print(f"{key:<10} {value}")
    print("\nstrongest features per label")
    for label, items in summary["strongest"].items():
        shown = ", ".join(f"{name} {weight:+.2f}" for name, weight in items)
        print(f"  {label:<12} {shown}")
    print("\ntransitions (row: previous label, column: next label)")
    labels = summary["labels"]
    print(" " * 12 + "".join(f"{label[:8]:>9}" for label in labels))
    for label, row in zip(labels, summary["transitions"]):
        print(f"{label[:12]:<12}" + "".join(f"{value:9.2f}" for value in row))
    return 0


def inspect_model(model: Model, top: int) -> dict:
    """Labels, feature count, strongest features per label, transitions, metadata (JSON-ready)."""
    strongest = {}
    for j, label in enumerate(model.labels):
        column = model.emission[:, j]
        order = np.argsort(-column, kind="stable")[:top]
        strongest[label] = [(model.vocabulary[i], float(column[i])) for i in order if column[i] > 0]
    return {
        "model": model.model_id,
        "labels": model.labels,
        "features": int(np.count_nonzero(np.any(model.emission != 0, axis=1))),
        "strongest": strongest,
        "transitions": np.round(model.transitions, 4).tolist(),
        "start": np.round(model.start, 4).tolist(),
        "end": np.round(model.end, 4).tolist(),
        "metadata": model.metadata,
        "run_info": model.run_info,
    }


# -- watch --------------------------------------------------------------------------------------

def run_watch(args: argparse.Namespace) -> int:
    from streamtag.config import load_watch_config
    from streamtag.daemon import run

    overrides = {
        "model": args.model,
        "inputs": args.input,
        "output": args.output,
        "review": args.review,
        "threshold": args.threshold,
        "state": args.state,
    }
    config = load_watch_config(args.config, {k: v for k, v in overrides.items() if v is not None})
    return run(config)
