"""Training and scoring on a real, openly licensed corpus, entirely through the command line.

Corpus: the package hironsancorpus 0.1.2 (MIT) ships hironsan/corpus/iob_sents.txt, a Japanese
news named-entity corpus: 500 sentences, 15,520 tokens, tab-separated columns, IOB2 tag last.
We train on the first 450 sentences and score on the last 50, as the README reports.
"""

import json
import subprocess
import sys
from pathlib import Path

import pytest

hironsan = pytest.importorskip("hironsan")

CORPUS = Path(hironsan.__file__).parent / "corpus" / "iob_sents.txt"
# Measured with the default `streamtag train` options on 2026-12-01: micro span F1 0.6061
# (P 0.7692, R 0.5000, 100 gold spans in the last 50 sentences). The floor leaves room for
# floating-point differences between BLAS builds, not for a worse model.
F1_FLOOR = 0.58


def split_corpus(folder: Path) -> tuple[Path, Path]:
    blocks = [block for block in CORPUS.read_text(encoding="utf-8").split("\n\n") if block.strip()]
    assert len(blocks) == 500  # the corpus as published
    train, test = folder / "train.txt", folder / "test.txt"
    train.write_text("\n\n".join(blocks[:450]) + "\n", encoding="utf-8")
    test.write_text("\n\n".join(blocks[450:]) + "\n", encoding="utf-8")
    return train, test


def streamtag(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamtag", *args], capture_output=True, text=True, check=False)


@pytest.mark.slow
def test_train_on_450_sentences_and_score_the_last_50(tmp_path):
    train, test = split_corpus(tmp_path)
    model = tmp_path / "news.stm"
    trained = streamtag("train", "--data", str(train), "--format", "conll", "--out", str(model))
    assert trained.returncode == 0, trained.stderr
    scored = streamtag("evaluate", "--model", str(model), "--data", str(test), "--format", "conll", "--json")
    assert scored.returncode == 0, scored.stderr
    report = json.loads(scored.stdout)
    assert report["sentences"] == 50
    assert report["micro"]["f1"] >= F1_FLOOR
    # Six entity types occur in the last 50 sentences (counted from the corpus file).
    assert set(report["per_label"]) == {"ART", "DAT", "LOC", "ORG", "PSN", "TIM"}
    assert sum(v["support"] for v in report["per_label"].values()) == 100
