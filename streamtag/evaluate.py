"""Scoring a tagger against gold tags: span precision/recall/F1, token accuracy, confusion; calibration.

Spans are chunks under the CoNLL-2000 scorer rules (``streamtag.spans.bio_to_spans``); a predicted
span is correct only if its start, end and type all equal a gold span's (exact match).

Zero-division convention: precision with no predicted span, recall with no gold span, and F1 with
precision + recall = 0 are 0.0 (the convention of seqeval's default). The macro average is the
unweighted mean over the entity types seen in gold or prediction; with no type at all it is 0.0.
Token accuracy counts tags equal as strings, like the CoNLL-2000 scorer.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from streamtag.errors import DataError
from streamtag.spans import OUTSIDE, bio_to_spans


@dataclass(frozen=True)
class Scores:
    """Precision, recall and F1 of one label or an average, with the span counts behind them."""

    precision: float
    recall: float
    f1: float
    support: int = 0  # gold spans
    predicted: int = 0  # predicted spans
    correct: int = 0  # predicted spans that match a gold span exactly

    def to_dict(self, with_support: bool = True) -> dict:
        scores = {"precision": self.precision, "recall": self.recall, "f1": self.f1}
        if with_support:
            scores["support"] = self.support
        return scores


@dataclass
class Report:
    """Result of ``evaluate``. ``confusion[gold][predicted]`` counts tokens."""

    per_label: dict[str, Scores]
    micro: Scores
    macro: Scores
    token_accuracy: float
    sentences: int
    tokens: int
    confusion_labels: list[str] = field(default_factory=list)
    confusion: dict[str, dict[str, int]] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "micro": self.micro.to_dict(with_support=False),
            "macro": self.macro.to_dict(with_support=False),
            "per_label": {label: scores.to_dict() for label, scores in self.per_label.items()},
            "token_accuracy": self.token_accuracy,
            "sentences": self.sentences,
            "tokens": self.tokens,
            "spans": {"gold": self.micro.support, "predicted": self.micro.predicted, "correct": self.micro.correct},
            "confusion": {gold: dict(row) for gold, row in self.confusion.items()},
        }


def _ratio(numerator: float, denominator: float) -> float:
    return numerator / denominator if denominator else 0.0


def _scores(correct: int, predicted: int, gold: int) -> Scores:
    precision, recall = _ratio(correct, predicted), _ratio(correct, gold)
    f1 = _ratio(2 * precision * recall, precision + recall)
    return Scores(precision, recall, f1, support=gold, predicted=predicted, correct=correct)


def _entity_type(tag: str) -> str:
    return OUTSIDE if tag == OUTSIDE else tag[2:]


def evaluate(
    gold_tags: Sequence[Sequence[str]], pred_tags: Sequence[Sequence[str]], confusion_by: str = "type"
) -> Report:
    """Compare predicted tags with gold tags, sentence by sentence.

    ``confusion_by``: "type" (entity type, O included: B-X and I-X both count as X) or "tag".
    DataError if the sentence counts or lengths differ.
    """
    if confusion_by not in ("type", "tag"):
        raise ValueError(f"confusion_by must be 'type' or 'tag', not {confusion_by!r}")
    if len(gold_tags) != len(pred_tags):
        raise DataError(f"{len(gold_tags)} gold sentences but {len(pred_tags)} predicted")
    gold_count: Counter[str] = Counter()
    predicted_count: Counter[str] = Counter()
    correct_count: Counter[str] = Counter()
    for index, (gold, pred) in enumerate(zip(gold_tags, pred_tags)):
        if len(gold) != len(pred):
            raise DataError(f"sentence {index + 1}: {len(gold)} gold tags but {len(pred)} predicted")
        gold_spans, pred_spans = set(bio_to_spans(gold)), set(bio_to_spans(pred))
        gold_count.update(span[2] for span in gold_spans)
        predicted_count.update(span[2] for span in pred_spans)
        correct_count.update(span[2] for span in gold_spans & pred_spans)

    types = sorted(set(gold_count) | set(predicted_count))
    per_label = {t: _scores(correct_count[t], predicted_count[t], gold_count[t]) for t in types}
    micro = _scores(sum(correct_count.values()), sum(predicted_count.values()), sum(gold_count.values()))
    macro = _macro(per_label, micro)

    flat_gold = np.array([tag for sentence in gold_tags for tag in sentence], dtype=object)
    flat_pred = np.array([tag for sentence in pred_tags for tag in sentence], dtype=object)
    n_tokens = int(flat_gold.size)
    token_accuracy = _ratio(int(np.sum(flat_gold == flat_pred)), n_tokens)
    confusion_labels, confusion = _confusion(flat_gold, flat_pred, confusion_by)
    return Report(
        per_label=per_label,
        micro=micro,
        macro=macro,
        token_accuracy=token_accuracy,
        sentences=len(gold_tags),
        tokens=n_tokens,
        confusion_labels=confusion_labels,
        confusion=confusion,
    )


def _macro(per_label: dict[str, Scores], micro: Scores) -> Scores:
    """Unweighted mean of each measure over the labels (0.0 when there is no label)."""
    if not per_label:
        return Scores(0.0, 0.0, 0.0, support=0)
    values = np.array([[s.precision, s.recall, s.f1] for s in per_label.values()])
    precision, recall, f1 = values.mean(axis=0).tolist()
    return Scores(precision, recall, f1, support=micro.support, predicted=micro.predicted, correct=micro.correct)


def _confusion(flat_gold: np.ndarray, flat_pred: np.ndarray, by: str) -> tuple[list[str], dict[str, dict[str, int]]]:
    """Token confusion table: labels (O first, then sorted) and counts[gold][predicted]."""
    if by == "type":
        flat_gold = np.array([_entity_type(tag) for tag in flat_gold], dtype=object)
        flat_pred = np.array([_entity_type(tag) for tag in flat_pred], dtype=object)
    seen = set(flat_gold.tolist()) | set(flat_pred.tolist())
    labels = [OUTSIDE] + sorted(seen - {OUTSIDE})
    index = {label: i for i, label in enumerate(labels)}
    counts = np.zeros((len(labels), len(labels)), dtype=np.int64)
    if flat_gold.size:
        gold_ids = np.array([index[tag] for tag in flat_gold])
        pred_ids = np.array([index[tag] for tag in flat_pred])
        np.add.at(counts, (gold_ids, pred_ids), 1)
    table = {gold: {pred: int(counts[i, j]) for j, pred in enumerate(labels)} for i, gold in enumerate(labels)}
    return labels, table


# -- text report ------------------------------------------------------------------------------------


def format_report(report: Report) -> str:
    """A plain-text table for the terminal: one row per label, then the averages and token figures."""
    name_width = max([len(label) for label in report.per_label] + [len("all spans")])
    header = f"{'label':<{name_width}}  {'gold':>6} {'tagged':>6} {'exact':>6}  {'prec %':>7} {'rec %':>7} {'F1 %':>7}"
    rule = "-" * len(header)

    def row(name: str, s: Scores, counts: bool = True) -> str:
        count_cells = f"{s.support:>6} {s.predicted:>6} {s.correct:>6}" if counts else " " * 20
        return (
            f"{name:<{name_width}}  {count_cells}  "
            f"{100 * s.precision:>7.2f} {100 * s.recall:>7.2f} {100 * s.f1:>7.2f}"
        )

    lines = [header, rule]
    lines += [row(label, scores) for label, scores in report.per_label.items()]
    lines += [rule, row("all spans", report.micro), row("label mean", report.macro, counts=False), ""]
    lines.append(
        f"{report.sentences} sentences, {report.tokens} tokens, "
        f"{100 * report.token_accuracy:.2f}% of tokens tagged exactly"
    )
    lines += ["", _format_confusion(report)]
    return "\n".join(lines)


def _format_confusion(report: Report) -> str:
    labels = report.confusion_labels
    if not labels:
        return "token confusion: no tokens"
    width = max(6, *(len(label) for label in labels))
    corner = "gold/tagged"
    first_width = max(width, len(corner))
    head = f"{corner:<{first_width}} " + " ".join(f"{label:>{width}}" for label in labels)
    body = [
        f"{gold:<{first_width}} " + " ".join(f"{report.confusion[gold][pred]:>{width}}" for pred in labels)
        for gold in labels
    ]
    return "\n".join(["token confusion (rows: gold, columns: tagged)", head, *body])


# -- calibration ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CalibrationBin:
    """One confidence bin (lo, hi]; mean_conf and accuracy are 0.0 for an empty bin."""

    lo: float
    hi: float
    count: int
    mean_conf: float
    accuracy: float


def _check_calibration_input(confidences, correct) -> tuple[np.ndarray, np.ndarray]:
    conf = np.asarray(confidences, dtype=np.float64).reshape(-1)
    hits = np.asarray(correct, dtype=bool).reshape(-1)
    if conf.shape != hits.shape:
        raise ValueError(f"{conf.size} confidences but {hits.size} correctness flags")
    if conf.size and not (np.all(np.isfinite(conf)) and conf.min() >= 0.0 and conf.max() <= 1.0):
        raise ValueError("confidences must be finite and within [0, 1]")
    return conf, hits


def reliability_table(confidences, correct, bins: int = 10) -> list[CalibrationBin]:
    """Equal-width bins over [0, 1]: bin m holds confidences in ((m-1)/M, m/M], bin 1 also holds 0.

    confidences (M,) float in [0, 1]; correct (M,) bool. Returns ``bins`` CalibrationBin rows.
    """
    if bins < 1:
        raise ValueError("bins must be at least 1")
    conf, hits = _check_calibration_input(confidences, correct)
    edges = np.linspace(0.0, 1.0, bins + 1)
    # side="left" puts a confidence equal to an upper edge into that edge's bin (right-closed bins).
    bin_of = np.clip(np.searchsorted(edges, conf, side="left") - 1, 0, bins - 1)
    counts = np.bincount(bin_of, minlength=bins)
    conf_sums = np.bincount(bin_of, weights=conf, minlength=bins)
    hit_sums = np.bincount(bin_of, weights=hits.astype(np.float64), minlength=bins)
    safe = np.maximum(counts, 1)
    return [
        CalibrationBin(float(edges[m]), float(edges[m + 1]), int(counts[m]),
                       float(conf_sums[m] / safe[m]), float(hit_sums[m] / safe[m]))
        for m in range(bins)
    ]


def expected_calibration_error(confidences, correct, bins: int = 10) -> float:
    """ECE = sum over bins b of |B_b|/n * |acc_b - conf_b| (Guo et al. 2017); 0.0 with no sample."""
    table = reliability_table(confidences, correct, bins)
    total = sum(b.count for b in table)
    if not total:
        return 0.0
    return float(sum(b.count / total * abs(b.accuracy - b.mean_conf) for b in table))
