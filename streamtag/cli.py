"""Command line: argparse front for every command. Each expected error becomes one line and an exit code.

Exit codes: 0 success, 1 failure of the job (bad data, bad model), 2 usage or configuration error,
130 interrupted.
"""

from __future__ import annotations

import argparse
import os
import sys
from typing import Callable

from streamtag import __version__
from streamtag.errors import StreamtagError

Runner = Callable[[argparse.Namespace], int]


def _add_train(sub) -> None:
    p = sub.add_parser("train", help="train a CRF model from labelled data")
    p.add_argument("--data", action="append", required=True, metavar="FILE",
                   help="labelled data (repeat for several files)")
    p.add_argument("--dev", metavar="FILE", help="labelled data scored during training; the best model is kept")
    p.add_argument("--format", choices=["auto", "jsonl", "conll"], default="auto")
    p.add_argument("--scheme", choices=["auto", "iob1", "iob2"], default="auto",
                   help="tag scheme of column-format data")
    p.add_argument("--features", metavar="FILE", help="feature spec (TOML); default: the packaged spec")
    p.add_argument("--method", choices=["lbfgs", "perceptron"], default="lbfgs")
    p.add_argument("--l1", type=float, default=0.05, help="L1 strength (exact, via split weights)")
    p.add_argument("--l2", type=float, default=0.1, help="L2 strength")
    p.add_argument("--max-iter", type=int, default=100, help="L-BFGS iterations")
    p.add_argument("--tol", type=float, default=1e-5, help="stop when the relative loss change is below this")
    p.add_argument("--epochs", type=int, default=10, help="perceptron epochs")
    p.add_argument("--min-count", type=int, default=1, help="keep features seen at least this often")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--eval-every", type=int, default=10, help="score --dev every N iterations")
    p.add_argument("--init", metavar="MODEL", help="continue from this model's weights")
    p.add_argument("--reviewed-weight", type=float, default=1.0,
                   help="weight of records that carry a review decision (from `streamtag review`)")
    p.add_argument("--skip-bad", action="store_true", help="count and skip bad records instead of stopping")
    p.add_argument("--quiet", action="store_true", help="no progress line")
    p.add_argument("--out", required=True, metavar="MODEL", help="where to write the model file")
    p.set_defaults(run=_lazy("streamtag.commands", "run_train"))


def _add_evaluate(sub) -> None:
    p = sub.add_parser("evaluate", help="score a model on labelled data (span P/R/F1)")
    p.add_argument("--model", metavar="MODEL", help="model file (default: the bundled model)")
    p.add_argument("--data", required=True, metavar="FILE")
    p.add_argument("--format", choices=["auto", "jsonl", "conll"], default="auto")
    p.add_argument("--scheme", choices=["auto", "iob1", "iob2"], default="auto")
    p.add_argument("--skip-bad", action="store_true")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(run=_lazy("streamtag.commands", "run_evaluate"))


def _add_tag(sub) -> None:
    p = sub.add_parser("tag", help="tag lines from files or stdin; one JSON record per line on stdout")
    p.add_argument("files", nargs="*", metavar="FILE")
    p.add_argument("--model", metavar="MODEL", help="model file (default: the bundled model)")
    p.add_argument("--threshold", type=float, default=0.5, help="lines below this are marked for review")
    p.add_argument("--max-tokens", type=int, default=256, help="longer lines are decoded in windows")
    p.add_argument("--batch", type=int, default=512, help="lines per batch")
    p.set_defaults(run=_lazy("streamtag.commands", "run_tag"))


def _add_inspect(sub) -> None:
    p = sub.add_parser("inspect", help="show a model: labels, features, strongest weights, metadata")
    p.add_argument("model", metavar="MODEL", nargs="?", help="model file (default: the bundled model)")
    p.add_argument("--top", type=int, default=8, help="strongest features shown per label")
    p.add_argument("--json", action="store_true")
    p.set_defaults(run=_lazy("streamtag.commands", "run_inspect"))


def _add_bench(sub) -> None:
    p = sub.add_parser("bench", help="measure tagging throughput and memory against plain I/O")
    p.add_argument("file", nargs="?", metavar="FILE", help="lines to tag (default: generated demo lines)")
    p.add_argument("--model", metavar="MODEL")
    p.add_argument("--lines", type=int, default=20000, help="generated lines when no FILE is given")
    p.add_argument("--batch", type=int, default=1000)
    p.add_argument("--repeat", type=int, default=3, help="best of N timed passes")
    p.add_argument("--json", action="store_true")
    p.set_defaults(run=_lazy("streamtag.bench", "run"))


def _add_watch(sub) -> None:
    p = sub.add_parser("watch", help="follow files and tag every new line (the daemon)")
    p.add_argument("--config", metavar="FILE", help="TOML configuration (default: built-in defaults)")
    p.add_argument("--model", metavar="MODEL")
    p.add_argument("--input", action="append", metavar="GLOB", help="file, directory or glob (repeatable)")
    p.add_argument("--output", metavar="FILE")
    p.add_argument("--review", metavar="FILE")
    p.add_argument("--threshold", type=float)
    p.add_argument("--state", metavar="DIR")
    p.set_defaults(run=_lazy("streamtag.commands", "run_watch"))


def _add_delegated(sub, name: str, module: str, help_text: str) -> None:
    """Commands whose options live beside their code (replay, compare, review, calibrate)."""
    p = sub.add_parser(name, help=help_text)
    try:
        __import__(module, fromlist=["add_arguments"]).add_arguments(p)
    except ModuleNotFoundError:  # TEMPORARY while the module is being written
        return
    p.set_defaults(run=_lazy(module, "run"))


def _lazy(module: str, name: str) -> Runner:
    def runner(args: argparse.Namespace) -> int:
        return getattr(__import__(module, fromlist=[name]), name)(args)

    return runner


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="streamtag",
        description="Tag entities in log lines with a linear-chain CRF; route doubtful lines to review.",
    )
    parser.add_argument("--version", action="version", version=f"streamtag {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    _add_watch(sub)
    _add_tag(sub)
    _add_train(sub)
    _add_evaluate(sub)
    _add_inspect(sub)
    _add_bench(sub)
    _add_delegated(sub, "replay", "streamtag.replay", "tag an archive with a model, resumable, on all cores")
    _add_delegated(sub, "compare", "streamtag.compare", "compare two outputs over the same input")
    _add_delegated(sub, "review", "streamtag.review", "review queued lines; decisions become training data")
    _add_delegated(sub, "calibrate", "streamtag.calibrate", "choose the review threshold on labelled data")
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.run(args) or 0)
    except StreamtagError as exc:
        _error(str(exc))
        return exc.exit_code
    except KeyboardInterrupt:
        _error("interrupted")
        return 130
    except BrokenPipeError:
        # The reader went away (e.g. `streamtag tag | head`): not an error of ours.
        _silence_stdout()
        return 0
    except Exception as exc:  # an internal fault: one line, the traceback only on request
        if os.environ.get("STREAMTAG_DEBUG"):
            raise
        _error(f"internal error: {type(exc).__name__}: {exc} (set STREAMTAG_DEBUG=1 for details)")
        return 1


def _error(message: str) -> None:
    first_line = message.strip().splitlines()[0] if message.strip() else "failed"
    print(f"streamtag: {first_line}", file=sys.stderr)


def _silence_stdout() -> None:
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except OSError:
        pass


if __name__ == "__main__":
    raise SystemExit(main())
