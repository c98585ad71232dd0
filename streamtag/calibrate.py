"""`streamtag calibrate`: choose the review threshold on labelled data.

The dev set is tagged with the model. For each line we know its confidence (the tagger's line
confidence), its predicted and gold character spans, and so whether it is fully correct. Then:

- threshold table (an even grid plus the thresholds sending 1%, 2%, 5% ... of lines): for each
  threshold t, lines with confidence < t go to review (the daemon's rule).
  Columns: share of lines sent; span precision/recall/F1 on the lines NOT sent; errors that slip
  through, i.e. on the lines not sent, wrong predicted spans (false positives) and missed gold spans
  (false negatives), and lines with any error; the slip rate = those lines / all lines.
- reliability tables with expected calibration error (Guo et al. 2017: M equal-width bins
  ((m-1)/M, m/M], ECE = sum_m |B_m|/n * |acc(B_m) - conf(B_m)|), for lines (confidence against
  "line fully correct") and for spans (span confidence against "span exactly in gold").
- a suggested threshold: with ``--target-share X`` the largest threshold that sends at most a share
  X of lines to review; with ``--target-error Y`` the smallest threshold whose slip rate is at most Y.

Gold spans are taken at token level from the corpus reader and turned into character spans of the
line. Column-format data has no line text: its tokens are joined with single spaces; if the tokenizer
splits that text differently from the given tokens, spans can differ for that reason alone.

``--plot FILE.svg`` draws the reliability diagram and the threshold curves as a hand-made SVG.
"""

from __future__ import annotations

import argparse
import html
import os
import sys
from dataclasses import dataclass

import numpy as np
import orjson

from streamtag.checkpoint import write_file_atomically
from streamtag.errors import ConfigError, DataError
from streamtag.evaluate import CalibrationBin, expected_calibration_error, reliability_table

DEFAULT_STEP = 0.05
FILE_MODE = 0o600


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--model", metavar="MODEL", help="model file (default: the bundled model)")
    parser.add_argument("--data", required=True, metavar="DEV", help="labelled dev data")
    parser.add_argument("--format", choices=["auto", "jsonl", "conll"], default="auto")
    parser.add_argument("--scheme", choices=["auto", "iob1", "iob2"], default="auto",
                        help="tag scheme of column-format data")
    parser.add_argument("--skip-bad", action="store_true", help="count and skip bad records instead of stopping")
    target = parser.add_mutually_exclusive_group()
    target.add_argument("--target-share", type=float, metavar="X",
                        help="suggest the threshold sending at most this share of lines to review")
    target.add_argument("--target-error", type=float, metavar="Y",
                        help="suggest the threshold letting at most this share of lines through with errors")
    parser.add_argument("--bins", type=int, default=10, help="confidence bins of the reliability tables")
    parser.add_argument("--step", type=float, default=DEFAULT_STEP, help="threshold step of the table")
    parser.add_argument("--plot", metavar="FILE.svg", help="write reliability diagram and threshold curves")
    parser.add_argument("--json", action="store_true", help="print everything as one JSON object")


# -- per-line outcome ----------------------------------------------------------------------------------------


@dataclass
class Outcome:
    """What tagging the dev set gave, per line (B lines) and per predicted span (S spans).

    line_conf (B,), line_correct (B,) bool, true_pos/false_pos/false_neg (B,) span counts;
    span_conf (S,), span_correct (S,) bool.
    """

    line_conf: np.ndarray
    line_correct: np.ndarray
    true_pos: np.ndarray
    false_pos: np.ndarray
    false_neg: np.ndarray
    span_conf: np.ndarray
    span_correct: np.ndarray


def line_and_gold(sentence) -> tuple[str, set[tuple[int, int, str]]]:
    """The line's text and its gold character spans (start, end, label)."""
    from streamtag.spans import bio_to_spans, token_to_char_spans

    if sentence.text is not None and sentence.starts is not None:
        text, starts, ends = sentence.text, sentence.starts, sentence.ends
    else:
        starts, ends, cursor = [], [], 0
        for token in sentence.texts:
            starts.append(cursor)
            ends.append(cursor + len(token))
            cursor += len(token) + 1
        text = " ".join(sentence.texts)
    return text, set(token_to_char_spans(bio_to_spans(sentence.tags), starts, ends))


def tag_outcome(tagger, sentences, batch_size: int = 512) -> Outcome:
    lines, gold = zip(*(line_and_gold(s) for s in sentences)) if sentences else ((), ())
    line_conf, line_correct, tp, fp, fn, span_conf, span_correct = [], [], [], [], [], [], []
    for first in range(0, len(lines), batch_size):
        for result, gold_spans in zip(tagger.tag(list(lines[first:first + batch_size])),
                                      gold[first:first + batch_size]):
            predicted = {(s.start, s.end, s.label): s.confidence for s in result.spans}
            hits = predicted.keys() & gold_spans
            line_conf.append(result.confidence)
            line_correct.append(predicted.keys() == gold_spans)
            tp.append(len(hits))
            fp.append(len(predicted) - len(hits))
            fn.append(len(gold_spans) - len(hits))
            for span, confidence in predicted.items():
                span_conf.append(confidence)
                span_correct.append(span in gold_spans)
    as_int = lambda values: np.asarray(values, dtype=np.int64)  # noqa: E731
    return Outcome(np.clip(np.asarray(line_conf, dtype=np.float64), 0.0, 1.0), np.asarray(line_correct, bool),
                   as_int(tp), as_int(fp), as_int(fn),
                   np.clip(np.asarray(span_conf, dtype=np.float64), 0.0, 1.0), np.asarray(span_correct, bool))


# -- the threshold table (pure numpy) -------------------------------------------------------------------------


@dataclass
class ThresholdRows:
    """One entry per threshold, all arrays (K,)."""

    threshold: np.ndarray
    share_sent: np.ndarray
    precision: np.ndarray
    recall: np.ndarray
    f1: np.ndarray
    wrong_spans: np.ndarray  # false positives on lines not sent
    missed_spans: np.ndarray  # false negatives on lines not sent
    error_lines: np.ndarray  # lines not sent that are not fully correct
    slip_rate: np.ndarray  # error_lines / all lines

    def row(self, k: int) -> dict:
        return {name: (value[k].item()) for name, value in vars(self).items()}


def threshold_rows(outcome: Outcome, thresholds) -> ThresholdRows:
    """Vectorised over thresholds (K,) and lines (B,): kept (K, B) = confidence >= threshold."""
    thresholds = np.asarray(thresholds, dtype=np.float64)
    n_lines = outcome.line_conf.size
    kept = (outcome.line_conf[None, :] >= thresholds[:, None]).astype(np.float64)
    tp, fp, fn = kept @ outcome.true_pos, kept @ outcome.false_pos, kept @ outcome.false_neg
    precision = np.divide(tp, tp + fp, out=np.zeros_like(tp), where=(tp + fp) > 0)
    recall = np.divide(tp, tp + fn, out=np.zeros_like(tp), where=(tp + fn) > 0)
    f1 = np.divide(2 * precision * recall, precision + recall, out=np.zeros_like(tp),
                   where=(precision + recall) > 0)
    error_lines = kept @ (~outcome.line_correct).astype(np.float64)
    share = 1.0 - kept.sum(axis=1) / n_lines if n_lines else np.zeros_like(thresholds)
    slip = error_lines / n_lines if n_lines else np.zeros_like(thresholds)
    return ThresholdRows(thresholds, share, precision, recall, f1, fp.astype(np.int64), fn.astype(np.int64),
                         error_lines.astype(np.int64), slip)


def candidate_thresholds(line_conf: np.ndarray) -> np.ndarray:
    """Every threshold that sends a different set of lines: 0, each distinct confidence, and 1."""
    return np.unique(np.concatenate([[0.0, 1.0], line_conf]))


SHARE_ROWS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5)


def table_thresholds(outcome: Outcome, step: float) -> np.ndarray:
    """An even grid, plus the thresholds that send 1%, 2%, 5% ... of the lines: a model whose
    confidences crowd near 1.0 would otherwise show its whole range in the last row or two."""
    grid = np.round(np.arange(0.0, 1.0 + step / 2, step), 10)
    by_share = [suggest_for_share(outcome, share) for share in SHARE_ROWS] if outcome.line_conf.size else []
    return np.unique(np.concatenate([grid, by_share]))


def suggest_for_share(outcome: Outcome, target_share: float) -> float:
    """Largest threshold in [0, 1] that sends at most ``target_share`` of the lines to review."""
    candidates = candidate_thresholds(outcome.line_conf)
    rows = threshold_rows(outcome, candidates)
    # share is non-decreasing in the threshold, so the allowed candidates form a prefix.
    allowed = np.flatnonzero(rows.share_sent <= target_share + 1e-12)
    return float(candidates[allowed[-1]])


def suggest_for_error(outcome: Outcome, target_error: float) -> float | None:
    """Smallest threshold whose slip rate is at most ``target_error``; None if even 1.0 is not enough."""
    candidates = candidate_thresholds(outcome.line_conf)
    rows = threshold_rows(outcome, candidates)
    meets = np.flatnonzero(rows.slip_rate <= target_error + 1e-12)
    return float(candidates[meets[0]]) if meets.size else None


# -- report --------------------------------------------------------------------------------------------------


def _bins_dicts(table: list[CalibrationBin]) -> list[dict]:
    return [{"lo": b.lo, "hi": b.hi, "count": b.count, "mean_confidence": b.mean_conf, "accuracy": b.accuracy}
            for b in table]


def calibration_report(outcome: Outcome, step: float, bins: int, target_share: float | None,
                       target_error: float | None) -> dict:
    grid = table_thresholds(outcome, step)
    rows = threshold_rows(outcome, grid)
    report = {
        "lines": int(outcome.line_conf.size),
        "lines_correct": int(outcome.line_correct.sum()),
        "spans_predicted": int(outcome.span_conf.size),
        "spans_gold": int(outcome.true_pos.sum() + outcome.false_neg.sum()),
        "thresholds": [rows.row(k) for k in range(grid.size)],
        "line_reliability": _bins_dicts(reliability_table(outcome.line_conf, outcome.line_correct, bins)),
        "line_ece": expected_calibration_error(outcome.line_conf, outcome.line_correct, bins),
        "span_reliability": _bins_dicts(reliability_table(outcome.span_conf, outcome.span_correct, bins)),
        "span_ece": expected_calibration_error(outcome.span_conf, outcome.span_correct, bins),
        "suggestion": None,
    }
    suggested = None
    if target_share is not None:
        suggested = suggest_for_share(outcome, target_share)
        report["suggestion"] = {"target_share": target_share, "threshold": suggested}
    elif target_error is not None:
        suggested = suggest_for_error(outcome, target_error)
        report["suggestion"] = {"target_error": target_error, "threshold": suggested}
    if suggested is not None:
        report["suggestion"]["at_threshold"] = threshold_rows(outcome, [suggested]).row(0)
    return report


def format_report(report: dict) -> str:
    out = [f"{report['lines']:,} lines ({report['lines_correct']:,} fully correct), "
           f"{report['spans_predicted']:,} predicted spans, {report['spans_gold']:,} gold spans", "",
           "          threshold  sent    P(kept)  R(kept)  F1(kept)  wrong  missed  error lines  slip rate"]
    for row in report["thresholds"]:
        out.append(_threshold_line(row))
    for name in ("line", "span"):
        out += ["", f"{name} reliability (ECE {report[name + '_ece']:.4f}, Guo et al. 2017)",
                "bin            count  mean conf  accuracy  gap"]
        for b in report[f"{name}_reliability"]:
            gap = "" if not b["count"] else f"{b['accuracy'] - b['mean_confidence']:+.3f}"
            out.append(f"({b['lo']:.2f}, {b['hi']:.2f}]  {b['count']:6d}  {b['mean_confidence']:9.3f}  "
                       f"{b['accuracy']:8.3f}  {gap}")
    suggestion = report["suggestion"]
    if suggestion is not None:
        out.append("")
        goal = (f"at most {suggestion['target_share']:.1%} of lines to review" if "target_share" in suggestion
                else f"at most {suggestion['target_error']:.2%} of lines passing with errors")
        if suggestion["threshold"] is None:
            out.append(f"no threshold gives {goal}: lines with errors at confidence 1.0 always pass")
        else:
            out.append(f"suggested threshold {suggestion['threshold']!r} for {goal}:")
            out.append(_threshold_line(suggestion["at_threshold"]))
    return "\n".join(out)


def _threshold_line(row: dict) -> str:
    # repr: the shortest text that reads back as the same float, so a printed threshold can be used as is.
    return (f"{row['threshold']!r:>19}  {row['share_sent']:5.1%}  {row['precision']:7.3f}  {row['recall']:7.3f}  "
            f"{row['f1']:8.3f}  {row['wrong_spans']:5d}  {row['missed_spans']:6d}  {row['error_lines']:11d}  "
            f"{row['slip_rate']:9.2%}")


# -- SVG plot ------------------------------------------------------------------------------------------------


def _panel_axes(x0: float, y0: float, size: float, title: str, x_label: str, y_label: str) -> list[str]:
    """Frame, ticks at 0, 0.25 ... 1 and labels of a unit-square panel whose top-left is (x0, y0)."""
    parts = [f'<rect x="{x0}" y="{y0}" width="{size}" height="{size}" fill="#fff" stroke="#444"/>',
             f'<text x="{x0 + size / 2}" y="{y0 - 10}" text-anchor="middle" font-size="14">{html.escape(title)}</text>',
             f'<text x="{x0 + size / 2}" y="{y0 + size + 36}" text-anchor="middle" font-size="12">'
             f'{html.escape(x_label)}</text>',
             f'<text x="{x0 - 38}" y="{y0 + size / 2}" text-anchor="middle" font-size="12" '
             f'transform="rotate(-90 {x0 - 38} {y0 + size / 2})">{html.escape(y_label)}</text>']
    for tick in (0.0, 0.25, 0.5, 0.75, 1.0):
        x, y = x0 + tick * size, y0 + size - tick * size
        parts.append(f'<line x1="{x:.1f}" y1="{y0 + size}" x2="{x:.1f}" y2="{y0 + size + 5}" stroke="#444"/>')
        parts.append(f'<text x="{x:.1f}" y="{y0 + size + 18}" text-anchor="middle" font-size="10">{tick:g}</text>')
        parts.append(f'<line x1="{x0 - 5}" y1="{y:.1f}" x2="{x0}" y2="{y:.1f}" stroke="#444"/>')
        parts.append(f'<text x="{x0 - 8}" y="{y + 3:.1f}" text-anchor="end" font-size="10">{tick:g}</text>')
    return parts


def _polyline(x0: float, y0: float, size: float, xs, ys, colour: str, dash: str = "") -> str:
    points = " ".join(f"{x0 + x * size:.1f},{y0 + size - y * size:.1f}" for x, y in zip(xs, ys))
    dashed = f' stroke-dasharray="{dash}"' if dash else ""
    return f'<polyline points="{points}" fill="none" stroke="{colour}" stroke-width="2"{dashed}/>'


def plot_svg(report: dict) -> str:
    size, left, top = 320.0, 70.0, 50.0
    right_x = left + size + 110
    width, height = right_x + size + 40, top + size + 110
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height:.0f}" '
             f'viewBox="0 0 {width:.0f} {height:.0f}" font-family="sans-serif">',
             f'<rect width="{width:.0f}" height="{height:.0f}" fill="#fafafa"/>']
    parts += _panel_axes(left, top, size, f"reliability (line ECE {report['line_ece']:.3f}, "
                                             f"span ECE {report['span_ece']:.3f})", "confidence", "accuracy")
    parts.append(_polyline(left, top, size, [0, 1], [0, 1], "#999", "4 4"))
    for name, colour, shift in (("line", "#3b7dd8", 0.0), ("span", "#e07b00", 1.0)):  # side by side in a bin
        for b in report[f"{name}_reliability"]:
            if not b["count"]:
                continue
            bar_width = (b["hi"] - b["lo"]) * size / 2
            x = left + b["lo"] * size + shift * bar_width
            bar_height = b["accuracy"] * size
            parts.append(f'<rect x="{x:.1f}" y="{top + size - bar_height:.1f}" width="{bar_width - 1:.1f}" '
                         f'height="{bar_height:.1f}" fill="{colour}" fill-opacity="0.75"><title>{name} '
                         f'({b["lo"]:.2f}, {b["hi"]:.2f}]: {b["count"]} items, accuracy {b["accuracy"]:.3f}'
                         f'</title></rect>')
    rows = report["thresholds"]
    xs = [row["threshold"] for row in rows]
    parts += _panel_axes(right_x, top, size, "by review threshold", "threshold", "share")
    curves = (("share_sent", "#c8463c", "share sent to review"), ("f1", "#2e9a4f", "span F1 on lines kept"),
              ("slip_rate", "#8a63d2", "lines passing with errors"))
    for key, colour, _ in curves:
        parts.append(_polyline(right_x, top, size, xs, [row[key] for row in rows], colour))
    suggestion = report.get("suggestion")
    if suggestion and suggestion.get("threshold") is not None:
        x = right_x + suggestion["threshold"] * size
        parts.append(f'<line x1="{x:.1f}" y1="{top}" x2="{x:.1f}" y2="{top + size}" stroke="#222" '
                     f'stroke-dasharray="2 3"/>')
        # The label goes on the side of the line with more room, so it stays inside the picture.
        anchor, dx = ("end", -3) if suggestion["threshold"] > 0.5 else ("start", 3)
        parts.append(f'<text x="{x + dx:.1f}" y="{top + 12}" font-size="10" text-anchor="{anchor}">suggested '
                     f'{suggestion["threshold"]:.6g}</text>')
    legend = [("#3b7dd8", "line accuracy per bin"), ("#e07b00", "span accuracy per bin")]
    legend += [(colour, text) for _, colour, text in curves]
    for i, (colour, text) in enumerate(legend):
        x, y = left + (i % 3) * 250, top + size + 56 + (i // 3) * 18
        parts.append(f'<rect x="{x}" y="{y - 9}" width="12" height="10" fill="{colour}"/>')
        parts.append(f'<text x="{x + 16}" y="{y}" font-size="11">{html.escape(text)}</text>')
    parts.append("</svg>\n")
    return "\n".join(parts)


# -- the command ---------------------------------------------------------------------------------------------


def _check_options(args: argparse.Namespace) -> None:
    for name in ("target_share", "target_error"):
        value = getattr(args, name)
        if value is not None and not 0.0 <= value <= 1.0:
            raise ConfigError(f"--{name.replace('_', '-')} must be between 0 and 1")
    if args.bins < 1:
        raise ConfigError("--bins must be at least 1")
    if not 0.0 < args.step <= 1.0:
        raise ConfigError("--step must be in (0, 1]")
    if args.plot and not args.plot.lower().endswith(".svg"):
        raise ConfigError("--plot writes SVG: give a file name ending in .svg")


def run(args: argparse.Namespace) -> int:
    from streamtag.corpus import read_corpus
    from streamtag.model import load_model
    from streamtag.tagger import Tagger

    _check_options(args)
    if not os.path.isfile(args.data):
        raise DataError(f"{args.data}: no such file")
    sentences, stats = read_corpus(args.data, fmt=args.format, scheme=args.scheme, skip_bad=args.skip_bad)
    if not sentences:
        raise DataError(f"{args.data}: no labelled lines")
    if stats.skipped:
        print(f"{args.data}: skipped {stats.skipped} bad records", file=sys.stderr)
    model = load_model(args.model)
    outcome = tag_outcome(Tagger(model), sentences)
    report = calibration_report(outcome, args.step, args.bins, args.target_share, args.target_error)
    report["model"] = model.model_id
    report["data"] = args.data
    if args.plot:
        write_file_atomically(args.plot, plot_svg(report).encode("utf-8"), FILE_MODE)
    if args.json:
        sys.stdout.write(orjson.dumps(report, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(f"model {model.model_id} on {args.data}")
        print(format_report(report))
        if args.plot:
            print(f"\nplot written to {args.plot}")
    return 0
