"""Tests of streamtag.evaluate against the CoNLL-2000 scorer (conlleval.pl), seqeval 1.2.2 and the
calibration definition of Guo et al. 2017, "On Calibration of Modern Neural Networks"."""

import math
import re
import shutil
import subprocess
import warnings
from collections import Counter
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from seqeval.metrics import classification_report

from streamtag.errors import DataError
from streamtag.evaluate import (
    evaluate,
    expected_calibration_error,
    format_report,
    reliability_table,
)

EXCERPT_DIR = Path(__file__).parent / "data" / "conll2000_excerpt"
GROUND_TRUTH = EXCERPT_DIR / "ground_truth.txt"
CONLLEVAL = EXCERPT_DIR / "conlleval.pl"
PERL = shutil.which("perl")

# Output of conlleval.pl (CoNLL-2000 scorer, version 2004-01-26) on ground_truth.txt, recorded by
# running the script; used when perl is missing. Per type: (precision, recall, FB1, found).
RECORDED_OVERALL = {"tokens": 961, "phrases": 459, "found": 539, "correct": 371,
                    "accuracy": 84.08, "precision": 68.83, "recall": 80.83, "fb1": 74.35}
RECORDED_PER_TYPE = {
    "ADJP": (0.00, 0.00, 0.00, 1),
    "ADVP": (45.45, 62.50, 52.63, 11),
    "NP": (64.98, 78.63, 71.16, 317),
    "PP": (83.18, 98.89, 90.36, 107),
    "SBAR": (66.67, 33.33, 44.44, 3),
    "VP": (69.00, 79.31, 73.80, 100),
}


def read_columns(path):
    """Plain reader, independent of streamtag.corpus: (gold tag lists, predicted tag lists)."""
    gold, pred, gold_sentence, pred_sentence = [], [], [], []
    for line in path.read_text(encoding="utf-8").splitlines() + [""]:
        fields = line.split()
        if not fields:
            if gold_sentence:
                gold.append(gold_sentence)
                pred.append(pred_sentence)
            gold_sentence, pred_sentence = [], []
            continue
        gold_sentence.append(fields[-2])
        pred_sentence.append(fields[-1])
    return gold, pred


def run_conlleval(text):
    """Run the CoNLL-2000 scorer on column text; parse its overall and per-type figures."""
    output = subprocess.run(
        [PERL, str(CONLLEVAL)], input=text, capture_output=True, text=True, check=True
    ).stdout
    head = re.search(
        r"processed (\d+) tokens with (\d+) phrases; found: (\d+) phrases; correct: (\d+)", output
    )
    scores = re.search(
        r"accuracy:\s*([\d.]+)%; precision:\s*([\d.]+)%; recall:\s*([\d.]+)%; FB1:\s*([\d.]+)", output
    )
    overall = dict(zip(["tokens", "phrases", "found", "correct"], map(int, head.groups())))
    overall.update(zip(["accuracy", "precision", "recall", "fb1"], map(float, scores.groups())))
    per_type = {
        m.group(1): (float(m.group(2)), float(m.group(3)), float(m.group(4)), int(m.group(5)))
        for m in re.finditer(
            r"^\s*(\S+): precision:\s*([\d.]+)%; recall:\s*([\d.]+)%; FB1:\s*([\d.]+)\s+(\d+)$",
            output,
            re.MULTILINE,
        )
    }
    return overall, per_type


def assert_matches_conlleval(report, overall, per_type, exact_text=True):
    """Our raw values against the scorer's counts, and rounded like the scorer (2 decimals)."""
    def same(ours_fraction, theirs_percent):
        if exact_text:
            return f"{100 * ours_fraction:.2f}" == f"{theirs_percent:.2f}"
        return abs(100 * ours_fraction - theirs_percent) <= 0.005 + 1e-9

    assert report.tokens == overall["tokens"]
    assert report.micro.support == overall["phrases"]
    assert report.micro.predicted == overall["found"]
    assert report.micro.correct == overall["correct"]
    assert same(report.token_accuracy, overall["accuracy"])
    assert same(report.micro.precision, overall["precision"])
    assert same(report.micro.recall, overall["recall"])
    assert same(report.micro.f1, overall["fb1"])
    assert set(report.per_label) == set(per_type)
    for label, (precision, recall, fb1, found) in per_type.items():
        scores = report.per_label[label]
        assert scores.predicted == found
        assert same(scores.precision, precision)
        assert same(scores.recall, recall)
        assert same(scores.f1, fb1)


# -- the CoNLL-2000 excerpt ---------------------------------------------------------------------------


def test_conll2000_excerpt_matches_recorded_scorer_output():
    # Source: conlleval.pl output on this file (recorded above).
    gold, pred = read_columns(GROUND_TRUTH)
    report = evaluate(gold, pred)
    assert_matches_conlleval(report, RECORDED_OVERALL, RECORDED_PER_TYPE)
    # Raw values are exactly the count ratios (371/539, 371/459).
    assert report.micro.precision == 371 / 539
    assert report.micro.recall == 371 / 459
    assert report.sentences == 40


@pytest.mark.skipif(PERL is None, reason="perl not installed; the recorded figures are checked instead")
def test_conll2000_excerpt_matches_running_scorer():
    # Source: the CoNLL-2000 scorer itself, run on the file.
    overall, per_type = run_conlleval(GROUND_TRUTH.read_text(encoding="utf-8"))
    assert overall == RECORDED_OVERALL  # the recording is what the script prints
    gold, pred = read_columns(GROUND_TRUTH)
    assert_matches_conlleval(evaluate(gold, pred), overall, per_type)


def test_confusion_table_counts_on_excerpt():
    gold, pred = read_columns(GROUND_TRUTH)
    by_tag = evaluate(gold, pred, confusion_by="tag")
    # Diagonal = tokens whose tag is right: 84.08% of 961 per conlleval.pl = 808 tokens.
    diagonal = sum(by_tag.confusion[label][label] for label in by_tag.confusion_labels)
    assert diagonal == round(0.8408 * 961) == 808
    by_type = evaluate(gold, pred).confusion
    # Row sums = gold tokens per entity type, counted independently from the file.
    gold_types = Counter("O" if t == "O" else t[2:] for sentence in gold for t in sentence)
    assert {label: sum(row.values()) for label, row in by_type.items()} == dict(gold_types)
    pred_types = Counter("O" if t == "O" else t[2:] for sentence in pred for t in sentence)
    columns = {label: sum(row[label] for row in by_type.values()) for label in by_type}
    assert columns == dict(pred_types)


tag = st.sampled_from(["O", "O", "B-mx", "I-mx", "B-ny", "I-ny", "B-q-r", "I-q-r"])
sentence_pairs = st.lists(st.lists(st.tuples(tag, tag), min_size=1, max_size=9), min_size=1, max_size=6)


@pytest.mark.skipif(PERL is None, reason="perl not installed")
@settings(max_examples=40, deadline=None)
@given(sentence_pairs)
def test_random_sequences_match_running_scorer(sentences):
    # Source: conlleval.pl on random (gold, predicted) columns, including a type with a hyphen.
    text = "\n\n".join("\n".join(f"w {g} {p}" for g, p in sentence) for sentence in sentences) + "\n"
    overall, per_type = run_conlleval(text)
    report = evaluate([[g for g, _ in s] for s in sentences], [[p for _, p in s] for s in sentences])
    assert_matches_conlleval(report, overall, per_type, exact_text=False)


# -- seqeval ------------------------------------------------------------------------------------------


def seqeval_report(gold, pred):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # seqeval warns on undefined ratios, then uses 0
        return classification_report(gold, pred, output_dict=True, digits=6)


def assert_matches_seqeval(report, reference):
    for label, scores in report.per_label.items():
        theirs = reference[label]
        assert scores.precision == pytest.approx(theirs["precision"], abs=1e-9)
        assert scores.recall == pytest.approx(theirs["recall"], abs=1e-9)
        assert scores.f1 == pytest.approx(theirs["f1-score"], abs=1e-9)
        assert scores.support == theirs["support"]
    labels = set(reference) - {"micro avg", "macro avg", "weighted avg"}
    assert set(report.per_label) == labels
    for ours, key in ((report.micro, "micro avg"), (report.macro, "macro avg")):
        theirs = reference[key]
        if not labels and key == "macro avg":
            # Documented difference: with no entity type at all seqeval's macro mean is NaN
            # (mean of nothing); ours is 0.0, the same convention as for undefined ratios.
            assert math.isnan(theirs["precision"]) and ours.precision == ours.recall == ours.f1 == 0.0
            continue
        assert ours.precision == pytest.approx(theirs["precision"], abs=1e-9)
        assert ours.recall == pytest.approx(theirs["recall"], abs=1e-9)
        assert ours.f1 == pytest.approx(theirs["f1-score"], abs=1e-9)
    assert report.micro.support == reference["micro avg"]["support"]


@settings(max_examples=300)
@given(sentence_pairs)
def test_random_sequences_match_seqeval(sentences):
    # Source: seqeval 1.2.2 classification_report, default (conlleval-compatible) mode.
    gold = [[g for g, _ in s] for s in sentences]
    pred = [[p for _, p in s] for s in sentences]
    report = evaluate(gold, pred)
    assert_matches_seqeval(report, seqeval_report(gold, pred))
    assert report.to_dict()["micro"]["f1"] == report.micro.f1


def test_seqeval_documented_example():
    # Source: seqeval 1.2.2 classification_report docstring: MISC 0/0/0, PER 1/1/1, micro 0.5.
    gold = [["O", "O", "O", "B-MISC", "I-MISC", "I-MISC", "O"], ["B-PER", "I-PER", "O"]]
    pred = [["O", "O", "B-MISC", "I-MISC", "I-MISC", "I-MISC", "O"], ["B-PER", "I-PER", "O"]]
    report = evaluate(gold, pred)
    assert report.per_label["MISC"].f1 == 0.0 and report.per_label["PER"].f1 == 1.0
    assert (report.micro.precision, report.micro.recall, report.micro.f1) == (0.5, 0.5, 0.5)
    assert report.macro.f1 == 0.5
    assert_matches_seqeval(report, seqeval_report(gold, pred))


def test_no_entities_anywhere_matches_seqeval_except_macro_nan():
    gold, pred = [["O", "O"]], [["O", "O"]]
    report = evaluate(gold, pred)
    assert_matches_seqeval(report, seqeval_report(gold, pred))
    assert report.token_accuracy == 1.0


def test_report_dict_keys_and_text():
    gold, pred = read_columns(GROUND_TRUTH)
    report = evaluate(gold, pred)
    as_dict = report.to_dict()
    # Keys of the contract (DEVELOPERS.md / evaluate.py docstring).
    assert {"micro", "macro", "per_label", "token_accuracy", "sentences", "tokens", "confusion"} <= set(as_dict)
    assert as_dict["per_label"]["NP"]["support"] == 262
    text = format_report(report)
    # The figures conlleval.pl prints appear in our table too.
    for figure in ("68.83", "80.83", "74.35", "84.08%", "71.16"):
        assert figure in text


def test_mismatched_lengths_are_data_errors():
    # Common practice: gold and prediction must align token for token.
    with pytest.raises(DataError, match="sentence 1"):
        evaluate([["O", "O"]], [["O"]])
    with pytest.raises(DataError):
        evaluate([["O"]], [])


# -- calibration ----------------------------------------------------------------------------------------


def test_reliability_table_and_ece_worked_example():
    # Guo et al. 2017, section 2: bins B_m = ((m-1)/M, m/M]; ECE = sum_m |B_m|/n |acc(B_m) - conf(B_m)|.
    # Worked by hand with M = 10 (confidence 0 is put in the first bin):
    #   bin 1: {0.05 wrong, 0.0 wrong}        conf 0.025,  acc 0    -> 2/8 * 0.025  = 0.00625
    #   bin 2: {0.15 right, 0.15 wrong}       conf 0.15,   acc 0.5  -> 2/8 * 0.35   = 0.0875
    #   bin 10: {0.95 x3 (2 right), 1.0 right} conf 0.9625, acc 0.75 -> 4/8 * 0.2125 = 0.10625
    #   ECE = 0.2
    confidences = [0.05, 0.15, 0.15, 0.95, 0.95, 0.95, 1.0, 0.0]
    correct = [False, True, False, True, True, False, True, False]
    table = reliability_table(confidences, correct, bins=10)
    assert [b.count for b in table] == [2, 2, 0, 0, 0, 0, 0, 0, 0, 4]
    assert table[0].mean_conf == pytest.approx(0.025) and table[0].accuracy == 0.0
    assert table[9].mean_conf == pytest.approx(0.9625) and table[9].accuracy == 0.75
    assert (table[2].lo, table[2].hi) == pytest.approx((0.2, 0.3))
    assert expected_calibration_error(confidences, correct, bins=10) == pytest.approx(0.2)


def test_bins_are_closed_on_the_right():
    # Guo et al. 2017: B_m = ((m-1)/M, m/M], so a confidence of exactly m/M falls in bin m.
    table = reliability_table([k / 10 for k in range(1, 11)], [True] * 10, bins=10)
    assert [b.count for b in table] == [1] * 10


def test_calibrated_bins_give_zero_ece():
    # By the definition (Guo et al. 2017): accuracy equal to confidence in every bin -> ECE 0.
    confidences = [0.8] * 10 + [0.3] * 10
    correct = [True] * 8 + [False] * 2 + [True] * 3 + [False] * 7
    assert expected_calibration_error(confidences, correct) == pytest.approx(0.0, abs=1e-12)
    assert expected_calibration_error([], []) == 0.0


def test_calibration_rejects_bad_input():
    # Common practice: confidences are probabilities.
    with pytest.raises(ValueError):
        reliability_table([1.5], [True])
    with pytest.raises(ValueError):
        reliability_table([0.5, 0.5], [True])
