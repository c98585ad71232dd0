"""compare: span change counts against a plain recomputation by set difference, mismatch refusal, a
report that escapes hostile log text, and an SVG chart that is well-formed XML.

References: set difference of (start, end, label) tuples is how span changes are commonly counted
(common practice); Python's html.parser (HTML5 tokenizer rules) and xml.etree.ElementTree (XML 1.0)
from the standard library parse the report.
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from collections import Counter
from html.parser import HTMLParser
from pathlib import Path

import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag import compare
from streamtag.errors import DataError

REPO = Path(__file__).resolve().parent.parent
LABELS = ["account", "host", "netaddr"]


def record(offset: int, text: str, spans, review: bool = False, source: str = "/logs/app.log",
           line: int | None = None) -> dict:
    return {"source": source, "offset": offset, "line": line if line is not None else offset + 1, "text": text,
            "spans": [{"start": s, "end": e, "label": label, "text": text[s:e], "confidence": 0.9}
                      for s, e, label in spans],
            "confidence": 0.9, "model": "st1-test", "flags": [], "review": review}


def write_jsonl(path: Path, records: list[dict]) -> Path:
    path.write_bytes(b"".join(orjson.dumps(r) + b"\n" for r in records))
    return path


def parse_args(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    compare.add_arguments(parser)
    return parser.parse_args(argv)


# -- counting ----------------------------------------------------------------------------------------------

# Spans of one line: non-overlapping pieces of a 40-character line, each with a label.
def _spans_from(cuts: list[int], labels: list[str]) -> list[tuple[int, int, str]]:
    points = sorted(set(cuts))
    pairs = list(zip(points[::2], points[1::2]))
    return [(s, e, labels[i % len(labels)]) for i, (s, e) in enumerate(pairs) if s < e]


span_sets = st.builds(_spans_from, st.lists(st.integers(0, 40), max_size=10),
                      st.lists(st.sampled_from(LABELS), min_size=1, max_size=6))


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(span_sets, span_sets, st.booleans(), st.booleans()), min_size=1, max_size=12))
def test_counts_agree_with_plain_set_difference(pairs):
    text = "x" * 40
    old = [compare._line_record("old", record(i, text, a, ra)) for i, (a, b, ra, rb) in enumerate(pairs)]
    new = [compare._line_record("new", record(i, text, b, rb)) for i, (a, b, ra, rb) in enumerate(pairs)]
    result = compare.compare(old, new)

    # Independent recomputation (common practice): set difference of (start, end, label) tuples.
    only_new, only_old, relabel_pairs = Counter(), Counter(), Counter()
    changed = 0
    for a, b, _, _ in pairs:
        a_set, b_set = set(a), set(b)
        only_new.update(label for _, _, label in b_set - a_set)
        only_old.update(label for _, _, label in a_set - b_set)
        changed += a_set != b_set
        new_bounds = {(s, e): label for s, e, label in b_set - a_set}
        relabel_pairs.update((label, new_bounds[(s, e)]) for s, e, label in a_set - b_set if (s, e) in new_bounds)
    for label in LABELS:
        counts = result.per_label.get(label, Counter())
        assert counts["added"] + counts["moved"] + counts["relabelled_to"] == only_new[label]
        assert counts["removed"] + counts["moved"] + counts["relabelled_from"] == only_old[label]
    assert dict(result.relabellings) == dict(+relabel_pairs)
    assert result.lines_changed == changed
    assert result.to_review == sum(1 for _, _, ra, rb in pairs if rb and not ra)
    assert result.from_review == sum(1 for _, _, ra, rb in pairs if ra and not rb)


def test_categories_on_one_constructed_line():
    text = "login for kestrel from 192.0.2.7 on vault-02 port 22"
    before = [(10, 17, "account"), (23, 32, "netaddr"), (36, 44, "host"), (45, 49, "host")]
    after = [(10, 17, "host"), (23, 32, "netaddr"), (33, 44, "host"), (50, 52, "netaddr")]
    diff = compare.diff_spans(before, after)
    assert diff.unchanged == [(23, 32, "netaddr")]
    assert diff.relabelled == [((10, 17, "account"), (10, 17, "host"))]
    assert diff.moved == [((36, 44, "host"), (33, 44, "host"))]  # same label, overlapping, new boundaries
    assert diff.removed == [(45, 49, "host")]
    assert diff.added == [(50, 52, "netaddr")]


def test_records_without_offsets_are_matched_by_line(tmp_path):
    old = [record(0, "user kestrel", [(5, 12, "account")]), record(1, "on vault-02", [])]
    new = [record(0, "user kestrel", []), record(1, "on vault-02", [(3, 11, "host")])]
    for r in old + new:
        r["offset"] = None
    result = compare.compare(compare.read_records(write_jsonl(tmp_path / "a", old)),
                             compare.read_records(write_jsonl(tmp_path / "b", new)))
    assert result.key_mode == "line"
    assert result.per_label["account"]["removed"] == 1 and result.per_label["host"]["added"] == 1


def test_lines_renamed_by_rotation_are_paired_by_folder_offset_and_text(tmp_path):
    # Rename rotation (common practice): app.log becomes app.log.1 with the same bytes, and a new
    # app.log starts at offset 0. The daemon read line one as app.log; a replay calls it app.log.1.
    old = [record(0, "first on vault-02", [(9, 17, "host")], source="/logs/app.log"),
           record(0, "new file line", [], source="/logs/app.log")]
    new = [record(0, "new file line", [], source="/logs/app.log"),
           record(0, "first on vault-02", [(9, 17, "service")], source="/logs/app.log.1")]
    result = compare.compare(compare.read_records(write_jsonl(tmp_path / "a", old)),
                             compare.read_records(write_jsonl(tmp_path / "b", new)))
    assert not result.mismatched
    assert result.lines_compared == 2 and result.text_differs == 0
    assert result.per_label["host"]["relabelled_from"] == 1


# -- mismatched inputs ---------------------------------------------------------------------------------------


def mismatched_files(tmp_path: Path) -> tuple[Path, Path]:
    old = [record(0, "a on vault-02", [(5, 13, "host")]), record(14, "b", []), record(16, "c", [])]
    new = [record(0, "a on vault-02", [(5, 13, "host")]), record(16, "c changed", []), record(30, "d", [])]
    return write_jsonl(tmp_path / "old.jsonl", old), write_jsonl(tmp_path / "new.jsonl", new)


def test_mismatch_is_refused_with_counts(tmp_path):
    old, new = mismatched_files(tmp_path)
    with pytest.raises(DataError, match=r"1 only in OLD, 1 only in NEW, 1 with different text"):
        compare.run(parse_args([str(old), str(new)]))
    result = subprocess.run([sys.executable, "-m", "streamtag.cli", "compare", str(old), str(new)],
                            cwd=REPO, capture_output=True, text=True)
    assert result.returncode != 0
    assert "MISMATCH: 1 lines only in OLD, 1 only in NEW, 1 with different text" in result.stdout
    assert result.stderr.count("\n") == 1


def test_allow_mismatch_compares_the_shared_lines(tmp_path, capsys):
    old, new = mismatched_files(tmp_path)
    assert compare.run(parse_args([str(old), str(new), "--allow-mismatch", "--json"])) == 0
    summary = orjson.loads(capsys.readouterr().out)
    assert summary["lines_compared"] == 1
    assert summary["mismatch"] == {"only_old": 1, "only_new": 1, "text_differs": 1, "repeated_old": 0,
                                   "repeated_new": 0}


def test_bad_record_is_named_by_file_and_line(tmp_path):
    path = tmp_path / "bad.jsonl"
    path.write_bytes(orjson.dumps(record(0, "fine", [])) + b"\n{broken\n")
    with pytest.raises(DataError, match=r"bad.jsonl:2: not a JSON record"):
        compare.read_records(path)


# -- the report ----------------------------------------------------------------------------------------------

HOSTILE = '<script>alert(1)</script><img src=x onerror=alert(2)> & "quoted" \x1b[31mred'
HOSTILE_LABEL = 'host"><b>bold</b>'


class TagCollector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.attributes: list[tuple[str, str | None]] = []
        self.data: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attributes.extend(attrs)

    def handle_data(self, data):
        self.data.append(data)


def hostile_report(tmp_path: Path) -> str:
    start = HOSTILE.index("alert(1)")
    old = [record(0, HOSTILE, [(start, start + 5, "host")]), record(200, "user kestrel", [(5, 12, "account")])]
    new = [record(0, HOSTILE, [(start, start + 5, HOSTILE_LABEL)], review=True),
           record(200, "user kestrel", [(5, 12, "host")])]
    out = tmp_path / "report.html"
    compare.run(parse_args([str(write_jsonl(tmp_path / "o.jsonl", old)), str(write_jsonl(tmp_path / "n.jsonl", new)),
                            "--report", str(out)]))
    return out.read_text(encoding="utf-8")


def test_report_escapes_hostile_text(tmp_path, capsys):
    page = hostile_report(tmp_path)
    parser = TagCollector()
    parser.feed(page)
    parser.close()
    # html.parser sees tags as a browser's tokenizer would: none of the injected ones may appear.
    assert not {"script", "img", "b", "link", "iframe", "object"} & set(parser.tags)
    assert "mark" in parser.tags and "svg" in parser.tags
    # Self-contained: no attribute loads anything from elsewhere.
    assert not [value for name, value in parser.attributes if name in ("src", "href")]
    # The hostile text is still there, as text.
    text = "".join(parser.data)
    assert "(1)</script><img src=x onerror=alert(2)>" in text and HOSTILE_LABEL in text
    # The terminal summary does not pass the escape sequence through either.
    assert "\x1b" not in capsys.readouterr().out


def test_report_svg_is_well_formed_xml(tmp_path):
    page = hostile_report(tmp_path)
    svg = re.search(r"<svg\b.*?</svg>", page, re.S).group(0)
    root = ET.fromstring(svg)  # raises ParseError if the chart is not well-formed
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    texts = [element.text for element in root.iter("{http://www.w3.org/2000/svg}text")]
    assert HOSTILE_LABEL in texts  # the hostile label is drawn as text, not markup
    bars = [element for element in root.iter("{http://www.w3.org/2000/svg}rect")
            if element.find("{http://www.w3.org/2000/svg}title") is not None]
    assert len(bars) == 3 * 5  # account, host and the hostile label; five kinds of change each
    assert (tmp_path / "report.html").stat().st_mode & 0o777 == 0o600


def test_repeated_positions_are_matched_in_order(tmp_path):
    # A log truncated in place starts again at offset 0: both generations keep their own records.
    old = [record(0, "first generation", []), record(0, "second generation on vault-02", [])]
    new = [record(0, "first generation", []), record(0, "second generation on vault-02", [(21, 29, "host")])]
    result = compare.compare(compare.read_records(write_jsonl(tmp_path / "a", old)),
                             compare.read_records(write_jsonl(tmp_path / "b", new)))
    assert not result.mismatched and result.lines_compared == 2
    assert result.repeated_old == 1 and result.per_label["host"]["added"] == 1
