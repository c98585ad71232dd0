"""Tests of streamtag.corpus on open datasets (hironsancorpus, the CoNLL-2000 excerpt) and on
small files written here in the formats' published conventions."""

import os
import re
import stat
from importlib import resources
from pathlib import Path

import pytest
from seqeval.metrics.sequence_labeling import get_entities
from seqeval.scheme import IOB2, Entities

from streamtag.corpus import (
    ReadStats,
    Sentence,
    detect_format,
    read_conll,
    read_corpus,
    read_jsonl,
    write_jsonl,
)
from streamtag.errors import DataError
from streamtag.evaluate import evaluate
from streamtag.tokenize import tokenize

EXCERPT = Path(__file__).parent / "data" / "conll2000_excerpt" / "ground_truth.txt"


def hironsan_corpus_path() -> Path:
    return Path(str(resources.files("hironsan.corpus").joinpath("iob_sents.txt")))


def strict_iob2_entities(tag_lists):
    """seqeval 1.2.2's strict IOB2 entities (only well-formed B-X I-X* runs count)."""
    entities = Entities([list(tags) for tags in tag_lists], IOB2).entities
    return sorted((e.sent_id, e.start, e.end, e.tag) for sentence in entities for e in sentence)


def lenient_entities(tag_lists):
    """seqeval 1.2.2 default (CoNLL-2000 scorer) chunks, sentence by sentence."""
    return sorted(
        (sent_id, start, end + 1, kind)
        for sent_id, tags in enumerate(tag_lists)
        for kind, start, end in get_entities(list(tags))
    )


# -- hironsancorpus (Japanese IOB2 NER corpus, MIT) ---------------------------------------------------


@pytest.fixture(scope="module")
def hironsan():
    return read_conll(hironsan_corpus_path())


def test_hironsan_sentences_and_tokens(hironsan):
    sentences, stats = hironsan
    path = hironsan_corpus_path()
    # Independent count: non-blank lines are tokens, blank lines end sentences.
    lines = path.read_text(encoding="utf-8").split("\n")
    assert stats.tokens == sum(1 for line in lines if line.strip("\t\r\n "))
    assert stats.tokens == sum(len(s.texts) for s in sentences) == 15520
    assert stats.records == len(sentences) == 500  # the package describes 500 sentences
    assert stats.skipped == 0 and stats.scheme == "iob2"
    assert all(len(s.texts) == len(s.tags) == len(s.kinds) for s in sentences)


def test_hironsan_tags_match_the_package_reader_after_repair(hironsan):
    import hironsan.corpus as package

    sentences, stats = hironsan
    # The package's own reader (CorpusReader: 90% train, 10% test, tag in the last column).
    reference = package.hiron2016.iob_sents("train") + package.hiron2016.iob_sents("test")
    reference_tags = [[columns[-1] for columns in sentence] for sentence in reference]
    our_tags = [s.tags for s in sentences]
    # Same chunks under the CoNLL rules (seqeval 1.2.2 lenient), and ours are strict IOB2.
    assert strict_iob2_entities(our_tags) == lenient_entities(reference_tags)
    # Corpus quirk found: two I-ART tags follow O (sentences 226 and 378, 1-based); they are the
    # only repairs. Counted independently as tags that differ from the package's.
    changed = sum(a != b for ours, ref in zip(our_tags, reference_tags) for a, b in zip(ours, ref))
    assert stats.repaired == changed == 2


def test_hironsan_keeps_ideographic_space_tokens(hironsan):
    sentences, stats = hironsan
    # Corpus quirk found: two tokens are U+3000 (ideographic space); the tab split keeps them
    # (a plain str.split() would lose them and shift the columns).
    raw_first_columns = [
        line.split("\t")[0]
        for line in hironsan_corpus_path().read_text(encoding="utf-8").split("\n")
        if line.strip("\t\r\n ")
    ]
    assert raw_first_columns.count("\u3000") == 2
    assert stats.space_tokens == 2
    assert [t for s in sentences for t in s.texts] == raw_first_columns


# -- CoNLL-2000 excerpt (columns: word POS gold predicted) --------------------------------------------


def test_conll2000_excerpt_columns_feed_the_evaluator():
    gold, gold_stats = read_conll(EXCERPT, tag_column=-2)
    pred, pred_stats = read_conll(EXCERPT)  # last column by default
    assert gold_stats.records == pred_stats.records == 40
    assert gold_stats.tokens == 961  # conlleval.pl: "processed 961 tokens"
    assert [s.texts for s in gold] == [s.texts for s in pred]
    report = evaluate([s.tags for s in gold], [s.tags for s in pred])
    # conlleval.pl on this file: 459 phrases, found 539, correct 371 (repairs change no chunk).
    assert (report.micro.support, report.micro.predicted, report.micro.correct) == (459, 539, 371)
    # The gold column is clean IOB2; the predicted one has stray I- tags, all repaired, and every
    # repaired tag was an I-X after O or another type (counted independently below).
    assert gold_stats.repaired == 0
    raw_pred = [line.split()[-1] for line in EXCERPT.read_text().splitlines() if line.strip()]
    stray = sum(
        1 for prev, tag in zip(["O"] + raw_pred, raw_pred) if tag.startswith("I-") and prev[2:] != tag[2:]
    )
    assert pred_stats.repaired == stray == 84


# -- IOB1 -----------------------------------------------------------------------------------------------

# CoNLL-2003 layout (from memory): "-DOCSTART- -X- -X- O" first, then word POS chunk NER per line,
# NER in IOB1: chunks start with I-X; B-X only for a chunk right after one of the same type.
# Invented words.
CONLL2003_STYLE = """-DOCSTART- -X- -X- O

Vorel NNP I-NP I-ORG
Quist NNP I-NP I-ORG
hired VBD I-VP O
Tamsin NNP I-NP I-PER
Arrow NNP I-NP I-PER
Bel NNP I-NP B-PER
Ostra NNP I-NP I-PER
. . O O

Dalvik NNP I-NP I-LOC
"""


def write(tmp_path, name, text, binary=False):
    path = tmp_path / name
    if binary:
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def test_iob1_file_is_detected_and_converted(tmp_path):
    path = write(tmp_path, "news.conll", CONLL2003_STYLE)
    sentences, stats = read_conll(path)
    assert stats.scheme == "iob1" and stats.records == 2 and stats.tokens == 9
    assert sentences[0].tags == ["B-ORG", "I-ORG", "O", "B-PER", "I-PER", "B-PER", "I-PER", "O"]
    assert sentences[1].tags == ["B-LOC"]
    assert stats.converted == 3 and stats.repaired == 0
    # The chunks are those of the IOB1 reading (seqeval 1.2.2 lenient chunks, CoNLL rules).
    iob1 = [["I-ORG", "I-ORG", "O", "I-PER", "I-PER", "B-PER", "I-PER", "O"], ["I-LOC"]]
    assert strict_iob2_entities([s.tags for s in sentences]) == lenient_entities(iob1)
    # Forced IOB2 reading: the same tags, but the chunk-initial I- tags count as repairs.
    forced, forced_stats = read_conll(path, scheme="iob2")
    assert [s.tags for s in forced] == [s.tags for s in sentences]
    assert (forced_stats.scheme, forced_stats.repaired, forced_stats.converted) == ("iob2", 3, 0)


def test_iob2_file_is_not_taken_for_iob1(tmp_path):
    # In IOB2 every chunk starts with B-X (common practice), so B-X after O means IOB2.
    path = write(tmp_path, "a.conll", "Vorel B-ORG\nQuist I-ORG\nhired O\nTamsin B-PER\n")
    sentences, stats = read_conll(path)
    assert stats.scheme == "iob2" and stats.repaired == 0
    assert sentences[0].tags == ["B-ORG", "I-ORG", "O", "B-PER"]


# -- column format details ---------------------------------------------------------------------------------


def test_column_format_conventions(tmp_path):
    # CoNLL shared-task conventions (common practice): several blank lines, -DOCSTART- lines,
    # CRLF line ends, no final blank line; a tab-separated line may hold spaces in a token.
    text = b"-DOCSTART- O\r\n\r\n\r\nalpha O\r\nbeta B-x\r\n\r\n-DOCSTART- O\r\ngamma\tpos\tI-y\r\nde lta\tpos\tI-y"
    sentences, stats = read_conll(write(tmp_path, "c.txt", text, binary=True))
    assert [s.texts for s in sentences] == [["alpha", "beta"], ["gamma", "de lta"]]
    assert [s.tags for s in sentences] == [["O", "B-x"], ["B-y", "I-y"]]
    assert stats.tokens == 4


@pytest.mark.parametrize(
    "body, line, reason",
    [
        ("a O\nb X-y\n", 2, "is not O, B-<type> or I-<type>"),
        ("a O\nb\n", 2, "columns"),
        ("a O\n\nb E-y\n", 3, "is not O"),  # IOBES tags are not read
    ],
)
def test_bad_column_lines(tmp_path, body, line, reason):
    path = write(tmp_path, "bad.conll", body)
    with pytest.raises(DataError, match=f"^{re.escape(str(path))}:{line}: .*{re.escape(reason)}"):
        read_conll(path)


def test_bad_column_sentence_is_skipped_whole(tmp_path):
    body = b"a O\nb B-x\n\nc O\nd \xff\xfe\ne O\n\nf B-y\n"  # 0xFF never occurs in UTF-8 (RFC 3629)
    path = write(tmp_path, "skip.conll", body, binary=True)
    with pytest.raises(DataError, match=r":5: invalid UTF-8"):
        read_conll(path)
    sentences, stats = read_conll(path, skip_bad=True)
    assert [s.texts for s in sentences] == [["a", "b"], ["f"]]
    assert stats.skipped == 1 and stats.errors == [f"{path}:5: invalid UTF-8"]


def test_unknown_scheme_and_missing_file(tmp_path):
    with pytest.raises(DataError, match="scheme"):
        read_conll(EXCERPT, scheme="bilou")
    with pytest.raises(DataError, match="cannot read"):
        read_conll(tmp_path / "absent.conll")


# -- JSON Lines --------------------------------------------------------------------------------------------


def overlap_tags(text, char_spans):
    """Reference tags by the definition: a token is in a span if their character ranges overlap."""
    tokens = tokenize(text)
    tags, previous_span = [], None
    for start, end in zip(tokens.starts, tokens.ends):
        inside = [k for k, (s, e, _) in enumerate(char_spans) if s < end and e > start]
        span = inside[0] if inside else None
        if span is None:
            tags.append("O")
        else:
            tags.append(("I-" if span == previous_span else "B-") + char_spans[span][2])
        previous_span = span
    return tags


def test_jsonl_records_and_output_records(tmp_path):
    # The DEVELOPERS.md input example, and a tagger output record with extra keys.
    text = "sshd[311]: login failed for mara.quill from 10.4.7.21"
    lines = [
        '{"text": "%s", "spans": [{"start": 28, "end": 38, "label": "account"}, '
        '{"start": 44, "end": 53, "label": "netaddr"}], "weight": 2.5}' % text,
        '{"source": "/var/log/x.log", "offset": 0, "line": 1, "text": "caf\\u00e9 relay ok", "spans": '
        '[{"start": 5, "end": 10, "label": "host", "text": "relay", "confidence": 0.9}], '
        '"confidence": 0.9, "flags": [], "review": false}',
        "",
        '{"text": "no entities here"}',
    ]
    path = write(tmp_path, "train.jsonl", "\n".join(lines) + "\n")
    sentences, stats = read_jsonl(path)
    assert stats.records == 3 and stats.skipped == 0
    first, second, third = sentences
    assert first.weight == 2.5 and first.text == text
    assert text[28:38] == "mara.quill" and text[44:53] == "10.4.7.21"
    assert first.tags == overlap_tags(text, [(28, 38, "account"), (44, 53, "netaddr")])
    assert {t[2:] for t in first.tags if t != "O"} == {"account", "netaddr"}
    # Offsets are code points (Python string indices): "café" is 4 characters (contract).
    assert second.text[5:10] == "relay" and "B-host" in second.tags
    assert second.tags == overlap_tags(second.text, [(5, 10, "host")])
    assert third.tags == ["O"] * len(third.texts)
    assert all(s.texts == [s.text[a:b] for a, b in zip(s.starts, s.ends)] for s in sentences)


def test_misaligned_spans_are_counted(tmp_path):
    text = "user vexa.orlan logged in"
    tokens = tokenize(text)
    # A span ending one character inside the last token of "vexa.orlan" (before "logged", "in"):
    # misaligned, still labelled.
    assert tokens.texts[-2:] == ["logged", "in"] and tokens.ends[-3] - tokens.starts[-3] > 1
    end_inside = tokens.ends[-3] - 1
    record = '{"text": "%s", "spans": [{"start": 5, "end": %d, "label": "account"}]}' % (text, end_inside)
    sentences, stats = read_jsonl(write(tmp_path, "m.jsonl", record + "\n"))
    assert stats.misaligned == 1
    assert sentences[0].tags == overlap_tags(text, [(5, end_inside, "account")])


BAD_RECORDS = [
    ("{not json", "invalid JSON"),  # RFC 8259 section 2: object members are "name": value
    ('["text"]', "not a JSON object"),
    ('{"spans": []}', '"text"'),
    ('{"text": 5}', '"text"'),
    ('{"text": "abc", "spans": [{"start": 0, "end": 9, "label": "a"}]}', "outside the text"),
    ('{"text": "abc", "spans": [{"start": 2, "end": 2, "label": "a"}]}', "empty"),
    ('{"text": "abc", "spans": [{"start": 2, "end": 1, "label": "a"}]}', "empty"),
    ('{"text": "abcd", "spans": [{"start": 0, "end": 2, "label": "a"}, {"start": 1, "end": 3, "label": "b"}]}',
     "overlap"),
    ('{"text": "abc", "spans": [{"start": 0, "end": 1, "label": 7}]}', "label must be a string"),
    ('{"text": "abc", "spans": [{"start": 0.5, "end": 1, "label": "a"}]}', "integers"),
    ('{"text": "abc", "spans": {"start": 0}}', "not a list"),
    ('{"text": "abc", "weight": -1}', "weight"),
    ('{"text": "abc", "weight": "heavy"}', "weight"),
]


@pytest.mark.parametrize("record, reason", BAD_RECORDS)
def test_bad_jsonl_record_names_file_and_line(tmp_path, record, reason):
    path = write(tmp_path, "bad.jsonl", '{"text": "fine"}\n\n' + record + "\n")
    with pytest.raises(DataError) as caught:
        read_jsonl(path)
    message = str(caught.value)
    assert message.startswith(f"{path}:3: ") and reason in message and "\n" not in message


def test_broken_utf8_and_skip_counts(tmp_path):
    # RFC 3629 section 3: bytes 0xC0, 0xC1, 0xF5..0xFF never appear in UTF-8.
    body = b'{"text": "ok one"}\n{"text": "bad \xc0\xaf"}\n' + "\n".join(r for r, _ in BAD_RECORDS).encode()
    body += b'\n{"text": "ok two"}\n{"text": "   "}\n'
    path = write(tmp_path, "mixed.jsonl", body, binary=True)
    with pytest.raises(DataError, match=r":2: invalid UTF-8$"):
        read_jsonl(path)
    sentences, stats = read_jsonl(path, skip_bad=True)
    assert [s.text for s in sentences] == ["ok one", "ok two"]
    assert stats.skipped == 1 + len(BAD_RECORDS)
    assert stats.empty == 1  # white space only: no token, not returned
    assert stats.errors[0] == f"{path}:2: invalid UTF-8"


# -- format detection and writing -----------------------------------------------------------------------------


def test_read_corpus_detects_format(tmp_path):
    jsonl_named_txt = write(tmp_path, "labelled.txt", '\n  {"text": "abc"}\n')
    conll = write(tmp_path, "labelled.data", "abc O\n")
    assert detect_format(jsonl_named_txt) == "jsonl"
    assert detect_format(conll) == "conll"
    assert detect_format(tmp_path / "whatever.jsonl") == "jsonl"  # by extension, unread
    assert read_corpus(jsonl_named_txt)[0][0].texts == ["abc"]
    assert read_corpus(conll)[0][0].tags == ["O"]
    with pytest.raises(DataError, match="format"):
        read_corpus(conll, fmt="xml")


def test_write_jsonl_round_trip_private_and_atomic(tmp_path):
    path = tmp_path / "out.jsonl"
    examples = [("login by vexa orlan", [(9, 19, "person")], 1.0), ("caf\u00e9 \u00e9t\u00e9", [], 0.5)]
    assert write_jsonl(path, examples) == 2
    # Project rule: files we create are private.
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    sentences, stats = read_jsonl(path)
    assert [(s.text, s.weight) for s in sentences] == [(t, w) for t, _, w in examples]
    assert sentences[0].tags == overlap_tags(examples[0][0], [(9, 19, "person")])
    # A bad example: DataError, the old file untouched, no temporary file left behind.
    before = path.read_bytes()
    with pytest.raises(DataError, match="example 2"):
        write_jsonl(path, [("fine", [], 1.0), ("short", [(0, 99, "x")], 1.0)])
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.jsonl"]


def test_sentence_and_stats_defaults():
    # Contract (DEVELOPERS.md): weight defaults to 1.0; column sentences carry no offsets.
    sentence = Sentence(texts=["a"], kinds=["word"], tags=["O"])
    assert sentence.weight == 1.0 and sentence.text is None and sentence.starts is None
    assert ReadStats().skipped == 0


def test_byte_order_mark_and_crlf_are_ignored(tmp_path):
    # RFC 8259 section 8.1: parsers MAY ignore a byte order mark; CRLF line ends are common practice.
    body = '\ufeff{"text": "alpha beta", "spans": [{"start": 6, "end": 10, "label": "x"}]}\r\n'.encode()
    sentences, stats = read_jsonl(write(tmp_path, "bom.jsonl", body, binary=True))
    assert stats.records == 1 and sentences[0].text == "alpha beta"
    assert sentences[0].tags == overlap_tags("alpha beta", [(6, 10, "x")])
