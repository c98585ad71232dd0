"""calibrate: ECE as defined by Guo et al. 2017, the threshold table against seqeval on the kept lines,
monotone shares, suggested thresholds that meet their targets, the CLI end to end with an SVG plot.

References: Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks", ICML 2017,
section 2 (M equal-width bins ((m-1)/M, m/M], ECE = sum_m |B_m|/n |acc(B_m) - conf(B_m)|);
seqeval (CoNLL chunk scoring) for span F1; xml.etree.ElementTree (XML 1.0) for the plot.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import orjson
import pytest
from seqeval.metrics import f1_score
from seqeval.metrics.sequence_labeling import get_entities

from daemon_support import build_tiny_model
from streamtag import calibrate
from streamtag.corpus import Sentence
from streamtag.tagger import TaggedLine, TaggedSpan

REPO = Path(__file__).resolve().parent.parent
TYPES = ["account", "host", "netaddr"]


def random_tags(rng: np.random.Generator, n: int) -> list[str]:
    tags, previous = [], "O"
    for _ in range(n):
        roll = rng.random()
        if roll < 0.55:
            tag = "O"
        elif roll < 0.8 or previous == "O":
            tag = "B-" + TYPES[rng.integers(3)]
        else:
            tag = "I-" + previous[2:]
        tags.append(tag)
        previous = tag
    return tags


class ScriptedTagger:
    """Stands in for Tagger: returns the predicted chunks (found by seqeval) and chosen confidences."""

    def __init__(self, predictions: dict[str, tuple[list[str], float]]) -> None:
        self.predictions = predictions

    def tag(self, lines: list[str], review_below=None) -> list[TaggedLine]:
        results = []
        for line in lines:
            tags, confidence = self.predictions[line]
            words = line.split(" ")
            starts = np.cumsum([0] + [len(w) + 1 for w in words[:-1]])
            spans = [TaggedSpan(int(starts[first]), int(starts[last] + len(words[last])), label,
                                line[int(starts[first]):int(starts[last] + len(words[last]))], confidence)
                     for label, first, last in get_entities(tags)]
            results.append(TaggedLine(line, spans, confidence, len(words)))
        return results


@pytest.fixture(scope="module")
def scripted():
    """200 lines of distinct words with random gold and predicted BIO tags and random confidences."""
    rng = np.random.default_rng(7)
    sentences, predictions, gold_tags, pred_tags, confidences = [], {}, [], [], []
    for i in range(200):
        n = int(rng.integers(3, 9))
        words = [f"w{i}x{j}" for j in range(n)]
        gold = random_tags(rng, n)
        # Predictions agree with gold on about 60% of lines, and then tend to be more confident.
        agree = rng.random() < 0.6
        predicted = list(gold) if agree else random_tags(rng, n)
        confidence = float(np.clip(rng.beta(5, 2) if agree else rng.beta(2, 3), 0, 1))
        sentences.append(Sentence(texts=words, kinds=["word"] * n, tags=gold))
        predictions[" ".join(words)] = (predicted, confidence)
        gold_tags.append(gold)
        pred_tags.append(predicted)
        confidences.append(confidence)
    outcome = calibrate.tag_outcome(ScriptedTagger(predictions), sentences, batch_size=37)
    return outcome, gold_tags, pred_tags, np.array(confidences)


def guo_ece(confidences: np.ndarray, correct: np.ndarray, m_bins: int) -> float:
    """Direct transcription of Guo et al. 2017, eq. (3): bins I_m = ((m-1)/M, m/M]."""
    n, total = len(confidences), 0.0
    for m in range(1, m_bins + 1):
        lo, hi = (m - 1) / m_bins, m / m_bins
        members = [i for i in range(n) if lo < confidences[i] <= hi or (m == 1 and confidences[i] == 0.0)]
        if members:
            accuracy = sum(bool(correct[i]) for i in members) / len(members)
            mean_conf = sum(confidences[i] for i in members) / len(members)
            total += len(members) / n * abs(accuracy - mean_conf)
    return total


@pytest.mark.parametrize("bins", [5, 10, 15])
def test_ece_matches_guo_et_al_definition(scripted, bins):
    outcome, gold_tags, pred_tags, confidences = scripted
    report = calibrate.calibration_report(outcome, 0.05, bins, None, None)
    line_correct = [g == p for g, p in zip(gold_tags, pred_tags)]  # a line is right when all its chunks are
    assert report["line_ece"] == pytest.approx(guo_ece(confidences, np.array(line_correct), bins), abs=1e-12)
    # Span level: each predicted chunk, with its line's confidence, right if it is a gold chunk.
    span_conf, span_right = [], []
    for gold, predicted, confidence in zip(gold_tags, pred_tags, confidences):
        gold_chunks = set(get_entities(gold))
        for chunk in get_entities(predicted):
            span_conf.append(confidence)
            span_right.append(chunk in gold_chunks)
    assert report["span_ece"] == pytest.approx(guo_ece(np.array(span_conf), np.array(span_right), bins), abs=1e-12)
    assert sum(b["count"] for b in report["line_reliability"]) == len(confidences)


def test_threshold_table_matches_seqeval_on_the_lines_kept(scripted):
    outcome, gold_tags, pred_tags, confidences = scripted
    report = calibrate.calibration_report(outcome, 0.1, 10, None, None)
    for row in report["thresholds"]:
        kept = [i for i in range(len(confidences)) if not confidences[i] < row["threshold"]]
        assert row["share_sent"] == pytest.approx(1 - len(kept) / len(confidences))
        if kept and any(get_entities(pred_tags[i]) for i in kept):
            expected = f1_score([gold_tags[i] for i in kept], [pred_tags[i] for i in kept])  # seqeval
            assert row["f1"] == pytest.approx(expected, abs=1e-12)
        wrong_lines = sum(gold_tags[i] != pred_tags[i] for i in kept)
        assert row["error_lines"] == wrong_lines
        assert row["slip_rate"] == pytest.approx(wrong_lines / len(confidences))
        wrong_spans = sum(len(set(get_entities(pred_tags[i])) - set(get_entities(gold_tags[i]))) for i in kept)
        assert row["wrong_spans"] == wrong_spans


def test_share_grows_and_slip_rate_falls_with_the_threshold(scripted):
    outcome = scripted[0]
    rows = calibrate.threshold_rows(outcome, np.linspace(0, 1, 101))
    assert np.all(np.diff(rows.share_sent) >= 0)
    assert np.all(np.diff(rows.slip_rate) <= 0)
    assert rows.share_sent[0] == 0.0  # nothing is below a threshold of 0 (common practice: strict "<")


@pytest.mark.parametrize("target", [0.0, 0.1, 0.25, 0.5, 0.9, 1.0])
def test_suggested_threshold_for_a_share_is_the_largest_that_meets_it(scripted, target):
    outcome, _, _, confidences = scripted
    threshold = calibrate.suggest_for_share(outcome, target)
    assert np.mean(confidences < threshold) <= target  # meets the target
    larger = np.unique(confidences[confidences > threshold])
    if larger.size:  # the next threshold that sends more lines would exceed it
        assert np.mean(confidences < np.nextafter(larger[0], 2.0)) > target or larger[0] > 1.0


@pytest.mark.parametrize("target", [0.0, 0.05, 0.2, 0.4])
def test_suggested_threshold_for_an_error_rate_is_the_smallest_that_meets_it(scripted, target):
    outcome, gold_tags, pred_tags, confidences = scripted
    wrong = np.array([g != p for g, p in zip(gold_tags, pred_tags)])

    def slip(t: float) -> float:
        return float(np.sum(wrong & ~(confidences < t)) / len(confidences))

    threshold = calibrate.suggest_for_error(outcome, target)
    if threshold is None:
        assert slip(1.0) > target
        return
    assert slip(threshold) <= target
    smaller = np.unique(np.concatenate([[0.0] if threshold > 0 else [], confidences[confidences < threshold]]))
    assert all(slip(t) > target for t in smaller)


# -- end to end ------------------------------------------------------------------------------------------


def dev_set(path: Path) -> Path:
    """Invented labelled lines (fictional accounts and hosts, RFC 5737 addresses)."""
    lines = []
    for i in range(60):
        user, host, address = ["kestrel", "tamsin.vey", "oskar.pell"][i % 3], f"vault-{i:02d}", f"192.0.2.{i + 1}"
        text = f"login failed for {user} from {address} on {host}"
        spans = [(text.index(user), user, "account"), (text.index(address), address, "netaddr"),
                 (text.rindex(host), host, "host")]
        lines.append(orjson.dumps({"text": text, "spans": [{"start": s, "end": s + len(p), "label": label}
                                                          for s, p, label in spans]}))
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path


def test_cli_json_and_svg_plot(tmp_path):
    model = tmp_path / "tiny.stm"
    build_tiny_model(model, seed=1)
    plot = tmp_path / "calibration.svg"
    result = subprocess.run([sys.executable, "-m", "streamtag.cli", "calibrate", "--model", str(model), "--data",
                             str(dev_set(tmp_path / "dev.jsonl")), "--target-share", "0.4", "--plot", str(plot),
                             "--json"], cwd=REPO, capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    report = orjson.loads(result.stdout)
    assert report["lines"] == 60 and report["spans_gold"] == 180
    assert report["suggestion"]["at_threshold"]["share_sent"] <= 0.4
    root = ET.parse(plot).getroot()  # ParseError if the hand-made SVG is not well-formed
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert len(list(root.iter("{http://www.w3.org/2000/svg}polyline"))) == 4  # diagonal + three curves
    assert plot.stat().st_mode & 0o777 == 0o600


def test_cli_rejects_a_bad_target_in_one_line(tmp_path):
    result = subprocess.run([sys.executable, "-m", "streamtag.cli", "calibrate", "--data", str(tmp_path / "x"),
                             "--target-share", "1.5"], cwd=REPO, capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert result.stderr.strip() == "streamtag: --target-share must be between 0 and 1"


def test_column_format_lines_are_joined_with_spaces():
    sentence = Sentence(texts=["user", "kestrel", "on", "vault-02"], kinds=["word"] * 4,
                        tags=["O", "B-account", "O", "B-host"])
    text, gold = calibrate.line_and_gold(sentence)
    assert text == "user kestrel on vault-02"
    assert {(text[s:e], label) for s, e, label in gold} == {("kestrel", "account"), ("vault-02", "host")}


def test_parse_options_through_add_arguments():
    parser = argparse.ArgumentParser()
    calibrate.add_arguments(parser)
    with pytest.raises(SystemExit):  # argparse: the two targets exclude each other
        parser.parse_args(["--data", "d", "--target-share", "0.1", "--target-error", "0.1"])
