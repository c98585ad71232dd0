"""`streamtag compare OLD NEW`: what changed between two taggings of the same lines.

OLD and NEW are output files of ``replay``, ``tag`` or the daemon (one record per line). Records are
matched by (source, offset) when every record of both files has an offset, else by (source, line);
a position seen twice in one file (a log truncated in place starts again at 0) is matched by order of
appearance.
Two files that do not cover the same lines (lines only in one, or the same key with different
text) are reported and refused unless ``--allow-mismatch``, which compares the lines they share.

How spans of one line are matched (each span ends in exactly one category):
- unchanged:  same start, end and label in both;
- relabelled: same start and end, another label (counted from the old label to the new one);
- moved:      same label, boundaries changed, the old and new span overlap (paired one to one,
              left to right);
- removed:    an old span matched by none of the above;  added: a new span matched by none.
So per label, ``added + moved + relabelled_to`` equals the new spans not in the old set, and
``removed + moved + relabelled_from`` the old spans not in the new set (plain set difference of
(start, end, label)). A line is "changed" when its set of spans differs.

Output: a terminal summary; ``--json`` prints the counts as one JSON object; ``--report FILE.html``
writes one self-contained page (inline CSS, an inline SVG bar chart, no scripts, no external files).
All text from the records is escaped: log lines are untrusted.
"""

from __future__ import annotations

import argparse
import html
import os
import sys
from collections import Counter, deque
from dataclasses import dataclass, field
from pathlib import Path

import orjson

from streamtag.checkpoint import write_file_atomically
from streamtag.errors import ConfigError, DataError

Span = tuple[int, int, str]
CATEGORIES = ("added", "removed", "relabelled", "moved")
FILE_MODE = 0o600


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("old", metavar="OLD", help="earlier output (JSON Lines records)")
    parser.add_argument("new", metavar="NEW", help="later output over the same input")
    parser.add_argument("--report", metavar="FILE.html", help="also write a self-contained HTML report")
    parser.add_argument("--examples", type=int, default=5, metavar="N",
                        help="examples shown per kind of change (default %(default)s)")
    parser.add_argument("--allow-mismatch", action="store_true",
                        help="compare the lines both files share even if they cover different lines")
    parser.add_argument("--json", action="store_true", help="print the counts as one JSON object")


# -- reading ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LineRecord:
    source: str | None
    offset: int | None
    line: int | None
    text: str
    spans: tuple[Span, ...]
    review: bool
    model: str | None


def _is_int(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def spans_of(items, where: str) -> list[Span]:
    """(start, end, label) of a record's span objects, sorted; DataError naming the place if malformed."""
    spans = []
    for item in items or []:
        if not (isinstance(item, dict) and _is_int(item.get("start")) and _is_int(item.get("end"))
                and isinstance(item.get("label"), str)):
            raise DataError(f"{where}: a span lacks integer start/end or a string label")
        spans.append((item["start"], item["end"], item["label"]))
    return sorted(spans)


def json_records(path: str, kind: str = "record") -> list[tuple[str, dict]]:
    """("FILE:LINE", object) for each record with a string "text"; DataError for anything else.

    A last line without a newline is an unfinished write (e.g. a daemon still running) and is left out.
    """
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from None
    lines = data.split(b"\n")
    lines.pop()  # after the last newline: empty, or an unfinished record
    records = []
    for number, raw in enumerate(lines, start=1):
        if not raw.strip():
            continue
        where = f"{path}:{number}"
        try:
            record = orjson.loads(raw)
        except orjson.JSONDecodeError:
            raise DataError(f"{where}: not a JSON record") from None
        if not isinstance(record, dict) or not isinstance(record.get("text"), str):
            raise DataError(f'{where}: not {kind} (no "text")')
        records.append((where, record))
    return records


def _line_record(where: str, record: dict) -> LineRecord:
    offset, line, source = record.get("offset"), record.get("line"), record.get("source")
    return LineRecord(
        source=source if isinstance(source, str) else None,
        offset=offset if _is_int(offset) else None,
        line=line if _is_int(line) else None,
        text=record["text"],
        spans=tuple(spans_of(record.get("spans"), where)),
        review=bool(record.get("review")),
        model=record.get("model") if isinstance(record.get("model"), str) else None,
    )


def read_records(path: str) -> list[LineRecord]:
    """All records of an output file; DataError naming FILE:LINE for a bad one."""
    return [_line_record(where, record) for where, record in json_records(path, "an output record")]


def key_mode(old: list[LineRecord], new: list[LineRecord]) -> str:
    """"offset" if every record has a byte offset, else "line"; DataError if neither is possible."""
    records = old + new
    if all(r.offset is not None for r in records):
        return "offset"
    if all(r.line is not None for r in records):
        return "line"
    raise DataError("records carry neither a byte offset nor a line number for every line; cannot match them")


def _keyed(records: list[LineRecord], mode: str) -> tuple[dict, int]:
    """{(source, offset or line, occurrence): record} and the number of repeated (source, position).

    A position can repeat in one file: a log truncated in place (copy-truncate) starts again at
    offset 0. The n-th record at a position in OLD is matched with the n-th one in NEW.
    """
    keyed, seen = {}, Counter()
    for record in records:
        position = (record.source, record.offset if mode == "offset" else record.line)
        keyed[position + (seen[position],)] = record
        seen[position] += 1
    return keyed, len(records) - len(seen)


# -- comparing spans -----------------------------------------------------------------------------------


@dataclass
class SpanDiff:
    unchanged: list[Span] = field(default_factory=list)
    relabelled: list[tuple[Span, Span]] = field(default_factory=list)
    moved: list[tuple[Span, Span]] = field(default_factory=list)
    added: list[Span] = field(default_factory=list)
    removed: list[Span] = field(default_factory=list)

    @property
    def changed(self) -> bool:
        return bool(self.relabelled or self.moved or self.added or self.removed)


def diff_spans(old: tuple[Span, ...] | list[Span], new: tuple[Span, ...] | list[Span]) -> SpanDiff:
    """Sort the spans of one line into the categories of the module docstring."""
    old_set, new_set = set(old), set(new)
    result = SpanDiff(unchanged=sorted(old_set & new_set))
    old_rest, new_rest = sorted(old_set - new_set), sorted(new_set - old_set)
    new_by_bounds = {(s, e): (s, e, label) for s, e, label in new_rest}
    still_old = []
    for span in old_rest:
        partner = new_by_bounds.pop((span[0], span[1]), None)
        if partner is not None:
            result.relabelled.append((span, partner))
        else:
            still_old.append(span)
    unpaired_new = sorted(new_by_bounds.values())
    for span in still_old:
        partner = next((n for n in unpaired_new if n[2] == span[2] and n[0] < span[1] and span[0] < n[1]), None)
        if partner is not None:
            unpaired_new.remove(partner)
            result.moved.append((span, partner))
        else:
            result.removed.append(span)
    result.added = unpaired_new
    return result


# -- the comparison --------------------------------------------------------------------------------------


@dataclass
class Example:
    key: tuple
    old_text: str | None  # None: the line is not in OLD
    new_text: str | None  # None: the line is not in NEW
    old_spans: tuple[Span, ...]
    new_spans: tuple[Span, ...]
    note: str


@dataclass
class Comparison:
    key_mode: str
    lines_compared: int = 0
    lines_changed: int = 0
    only_old: int = 0
    only_new: int = 0
    text_differs: int = 0
    repeated_old: int = 0
    repeated_new: int = 0
    to_review: int = 0  # not sent to review in OLD, sent in NEW
    from_review: int = 0  # sent in OLD, not in NEW
    per_label: dict[str, Counter] = field(default_factory=dict)
    relabellings: Counter = field(default_factory=Counter)  # (old label, new label) -> count
    models_old: set = field(default_factory=set)
    models_new: set = field(default_factory=set)
    examples: dict[str, list[Example]] = field(default_factory=dict)

    @property
    def mismatched(self) -> bool:
        return bool(self.only_old or self.only_new or self.text_differs)

    def label(self, name: str) -> Counter:
        return self.per_label.setdefault(name, Counter())

    def to_dict(self) -> dict:
        return {
            "matched_by": self.key_mode,
            "lines_compared": self.lines_compared,
            "lines_changed": self.lines_changed,
            "mismatch": {"only_old": self.only_old, "only_new": self.only_new, "text_differs": self.text_differs,
                         "repeated_old": self.repeated_old, "repeated_new": self.repeated_new},
            "review": {"now_sent": self.to_review, "no_longer_sent": self.from_review},
            "per_label": {name: {k: counts[k] for k in LABEL_COLUMNS} for name, counts in sorted(self.per_label.items())},
            "totals": self.totals(),
            "relabellings": [{"from": a, "to": b, "count": n} for (a, b), n in self.relabellings.most_common()],
            "models": {"old": sorted(self.models_old), "new": sorted(self.models_new)},
        }

    def totals(self) -> dict:
        return {k: sum(c[k] for c in self.per_label.values()) for k in LABEL_COLUMNS}


LABEL_COLUMNS = ("unchanged", "added", "removed", "relabelled_from", "relabelled_to", "moved")
EXAMPLE_KINDS = ("added", "removed", "relabelled", "moved", "now sent to review", "no longer sent to review",
                 "only in OLD", "only in NEW", "text differs")


def compare(old: list[LineRecord], new: list[LineRecord], examples: int = 5) -> Comparison:
    mode = key_mode(old, new)
    repeated_old, repeated_new = _keyed(old, mode)[1], _keyed(new, mode)[1]
    result = Comparison(key_mode=mode, repeated_old=repeated_old, repeated_new=repeated_new)
    result.models_old = {r.model for r in old if r.model}
    result.models_new = {r.model for r in new if r.model}
    result.examples = {kind: [] for kind in EXAMPLE_KINDS}

    def note(kind: str, key, record_old: LineRecord | None, record_new: LineRecord | None, text: str,
             new_spans_apply: bool = True) -> None:
        """Keep an example; with different texts NEW's text is shown bare (its spans fit only it)."""
        if len(result.examples[kind]) < examples:
            new_spans = record_new.spans if record_new and new_spans_apply else ()
            result.examples[kind].append(Example(
                key, record_old.text if record_old else None, record_new.text if record_new else None,
                record_old.spans if record_old else (), new_spans, text))

    pairs, old_left, new_left = pair_lines(old, new, mode)
    old_keyed, _ = _keyed(old_left, mode)
    new_keyed, _ = _keyed(new_left, mode)
    for key, record in old_keyed.items():
        if key not in new_keyed:
            result.only_old += 1
            note("only in OLD", key, record, None, "")
    for key, record in new_keyed.items():
        if key not in old_keyed:
            result.only_new += 1
            note("only in NEW", key, None, record, "")
    for key in sorted(old_keyed.keys() & new_keyed.keys(), key=_sortable):
        result.text_differs += 1
        note("text differs", key, old_keyed[key], new_keyed[key], "", new_spans_apply=False)
    for key, before, after in sorted(pairs, key=lambda item: _sortable(item[0])):
        result.lines_compared += 1
        _count_line(result, key, before, after, note)
    return result


def pair_lines(old: list[LineRecord], new: list[LineRecord], mode: str):
    """Pair the records of the same input line: ([(key, old, new)], OLD left over, NEW left over).

    First by (source, position, text); then what is left by (folder, position, text). A log rotated
    by renaming keeps its bytes and offsets (rename rotation, common practice), so the daemon may
    have named a line app.log while a later replay of the folder calls it app.log.1.
    """
    def position(record: LineRecord):
        return record.offset if mode == "offset" else record.line

    def exact(record: LineRecord):
        return (record.source, position(record), record.text)

    def same_folder(record: LineRecord):
        return (os.path.dirname(record.source or ""), position(record), record.text)

    pairs, occurrence = [], Counter()
    for key_of in (exact, same_folder):
        waiting: dict = {}
        for record in old:
            waiting.setdefault(key_of(record), deque()).append(record)
        unmatched_new = []
        for record in new:
            queue = waiting.get(key_of(record))
            if not queue:
                unmatched_new.append(record)
                continue
            before = queue.popleft()
            where = (before.source, position(before))
            pairs.append((where + (occurrence[where],), before, record))
            occurrence[where] += 1
        matched = {id(before) for _, before, _ in pairs}
        old = [record for record in old if id(record) not in matched]
        new = unmatched_new
    return pairs, old, new


def _sortable(key: tuple) -> tuple:
    source, position, occurrence = key
    return (source or "", position, occurrence)


def _count_line(result: Comparison, key, before: LineRecord, after: LineRecord, note) -> None:
    diff = diff_spans(before.spans, after.spans)
    for span in diff.unchanged:
        result.label(span[2])["unchanged"] += 1
    for span in diff.added:
        result.label(span[2])["added"] += 1
    for span in diff.removed:
        result.label(span[2])["removed"] += 1
    for old_span, new_span in diff.moved:
        result.label(old_span[2])["moved"] += 1
    for old_span, new_span in diff.relabelled:
        result.label(old_span[2])["relabelled_from"] += 1
        result.label(new_span[2])["relabelled_to"] += 1
        result.relabellings[(old_span[2], new_span[2])] += 1
    if diff.changed:
        result.lines_changed += 1
    for kind in CATEGORIES:
        items = getattr(diff, kind)
        if items:
            note(kind, key, before, after, "; ".join(_describe_change(kind, item, before.text) for item in items))
    if before.review != after.review:
        if after.review:
            result.to_review += 1
            note("now sent to review", key, before, after, "")
        else:
            result.from_review += 1
            note("no longer sent to review", key, before, after, "")


def _describe_change(kind: str, item, text: str) -> str:
    if kind in ("added", "removed"):
        start, end, label = item
        return f"{text[start:end]!r} {label}"
    (s0, e0, l0), (s1, e1, l1) = item
    if kind == "relabelled":
        return f"{text[s0:e0]!r} {l0} -> {l1}"
    return f"{text[s0:e0]!r} -> {text[s1:e1]!r} {l0}"


# -- presenting -------------------------------------------------------------------------------------------


def mark_up(text: str, spans: tuple[Span, ...] | list[Span]) -> str:
    """Plain inline markup: ``[web-03|host]`` for each span (shared with the review screen)."""
    pieces, cursor = [], 0
    for start, end, label in sorted(spans):
        pieces.append(text[cursor:start])
        pieces.append(f"[{text[start:end]}|{label}]")
        cursor = end
    pieces.append(text[cursor:])
    return "".join(pieces)


def _where(key: tuple, mode: str) -> str:
    source, position, occurrence = key
    again = f" (occurrence {occurrence + 1})" if occurrence else ""
    return f"{source or '-'} {'offset' if mode == 'offset' else 'line'} {position}{again}"


def format_summary(result: Comparison, old_path: str, new_path: str, with_examples: bool = True) -> str:
    lines = [f"OLD {old_path}  (model {', '.join(sorted(result.models_old)) or '?'})",
             f"NEW {new_path}  (model {', '.join(sorted(result.models_new)) or '?'})"]
    lines += _mismatch_lines(result)
    share = result.lines_changed / result.lines_compared * 100 if result.lines_compared else 0.0
    lines.append(f"lines compared {result.lines_compared:,} (matched by source and {result.key_mode}); "
                 f"changed {result.lines_changed:,} ({share:.1f}%)")
    lines.append(f"review: {result.to_review:,} now sent to review, {result.from_review:,} no longer sent")
    header = ["label", "unchanged", "added", "removed", "relabelled from", "relabelled to", "moved"]
    rows = [[name] + [f"{counts[c]:,}" for c in LABEL_COLUMNS] for name, counts in sorted(result.per_label.items())]
    rows.append(["total"] + [f"{v:,}" for v in result.totals().values()])
    widths = [max(len(row[i]) for row in rows + [header]) for i in range(len(header))]
    lines.append("")
    lines.append("  ".join(h.ljust(w) if i == 0 else h.rjust(w) for i, (h, w) in enumerate(zip(header, widths))))
    for row in rows:
        lines.append("  ".join(v.ljust(w) if i == 0 else v.rjust(w) for i, (v, w) in enumerate(zip(row, widths))))
    if result.relabellings:
        lines.append("")
        lines.append("relabellings: " + ", ".join(f"{a} -> {b} {n:,}" for (a, b), n in result.relabellings.most_common()))
    if with_examples:
        for kind, items in result.examples.items():
            if not items:
                continue
            lines.append("")
            lines.append(f"examples: {kind}")
            for example in items:
                lines.append(f"  {_where(example.key, result.key_mode)}{'  ' + example.note if example.note else ''}")
                if example.old_text is not None:
                    lines.append(f"    old: {_printable(mark_up(example.old_text, example.old_spans))}")
                if example.new_text is not None:
                    lines.append(f"    new: {_printable(mark_up(example.new_text, example.new_spans))}")
    return "\n".join(lines)


def format_mismatch(result: Comparison) -> str:
    """The mismatch counts and examples of lines that are not in both files alike."""
    lines = _mismatch_lines(result)
    for kind in ("only in OLD", "only in NEW", "text differs"):
        for example in result.examples[kind]:
            lines.append(f"  {kind}: {_where(example.key, result.key_mode)}")
            for name, text in (("old", example.old_text), ("new", example.new_text)):
                if text is not None:
                    lines.append(f"    {name}: {_printable(text)}")
    return "\n".join(lines)


def _mismatch_lines(result: Comparison) -> list[str]:
    lines = []
    if result.mismatched:
        lines.append(f"MISMATCH: {result.only_old:,} lines only in OLD, {result.only_new:,} only in NEW, "
                     f"{result.text_differs:,} with different text")
    if result.repeated_old or result.repeated_new:
        lines.append(f"repeated positions (matched in order of appearance): {result.repeated_old:,} in OLD, "
                     f"{result.repeated_new:,} in NEW")
    return lines


def _printable(text: str) -> str:
    """Control characters from log lines must not drive the terminal (e.g. ANSI escapes)."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


# -- HTML report ----------------------------------------------------------------------------------------

_CSS = """
body{font:14px/1.45 system-ui,sans-serif;margin:2em auto;max-width:68em;color:#1d232a;padding:0 1em}
h1{font-size:1.4em}h2{font-size:1.15em;margin-top:1.6em;border-bottom:1px solid #d0d7de}
table{border-collapse:collapse;margin:.5em 0}th,td{padding:.25em .7em;border-bottom:1px solid #e4e8ec}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
.warn{background:#fff4d6;border-left:4px solid #e0a100;padding:.5em 1em}
.line{font-family:ui-monospace,monospace;white-space:pre-wrap;word-break:break-all;background:#f6f8fa;padding:.2em .5em}
mark{background:#d8ecff;border-radius:3px;padding:0 2px}mark.new{background:#dff5e1}
mark small{color:#55606b;margin-left:3px}
.ex{margin:.6em 0 1em}.where{color:#55606b;font-size:.9em}
"""

_BAR_COLOURS = {"added": "#2e9a4f", "removed": "#c8463c", "relabelled_from": "#e0a100",
                "relabelled_to": "#8a63d2", "moved": "#3b7dd8"}


def _escape(text: object) -> str:
    """Text for HTML: markup characters escaped, control characters shown as escapes, not passed on."""
    return html.escape(_printable(str(text)), quote=True)


def bar_chart_svg(result: Comparison) -> str:
    """Horizontal grouped bars: per label, one bar per kind of change. Pure SVG, text escaped."""
    kinds = list(_BAR_COLOURS)
    labels = sorted(result.per_label)
    bar, gap, left, width = 12, 10, 150, 420
    top = 30
    height = top + max(len(labels), 1) * (len(kinds) * bar + gap) + 10
    largest = max([result.per_label[name][k] for name in labels for k in kinds] + [1])
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{left + width + 80}" height="{height}" '
             f'viewBox="0 0 {left + width + 80} {height}" role="img" aria-label="changes per label">']
    for i, kind in enumerate(kinds):  # legend
        x = 10 + i * 120
        parts.append(f'<rect x="{x}" y="6" width="10" height="10" fill="{_BAR_COLOURS[kind]}"/>')
        parts.append(f'<text x="{x + 14}" y="15" font-size="11">{_escape(kind.replace("_", " "))}</text>')
    y = top
    for name in labels:
        parts.append(f'<text x="{left - 8}" y="{y + len(kinds) * bar / 2 + 4}" font-size="12" '
                     f'text-anchor="end">{_escape(name)}</text>')
        for kind in kinds:
            value = result.per_label[name][kind]
            length = width * value / largest
            parts.append(f'<rect x="{left}" y="{y}" width="{length:.1f}" height="{bar - 2}" '
                         f'fill="{_BAR_COLOURS[kind]}"><title>{_escape(name)} {_escape(kind)}: {value}</title></rect>')
            if value:
                parts.append(f'<text x="{left + length + 4:.1f}" y="{y + bar - 3}" font-size="10">{value}</text>')
            y += bar
        y += gap
    parts.append("</svg>")
    return "".join(parts)


def _html_line(text: str, spans, css_class: str) -> str:
    pieces, cursor = [], 0
    for start, end, label in sorted(spans):
        pieces.append(_escape(text[cursor:start]))
        pieces.append(f'<mark class="{css_class}" title="{_escape(label)}">{_escape(text[start:end])}'
                      f'<small>{_escape(label)}</small></mark>')
        cursor = end
    pieces.append(_escape(text[cursor:]))
    return f'<div class="line">{"".join(pieces)}</div>'


def html_report(result: Comparison, old_path: str, new_path: str) -> str:
    out = ['<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>streamtag compare: {_escape(os.path.basename(old_path))} vs {_escape(os.path.basename(new_path))}"
           f"</title><style>{_CSS}</style></head><body>",
           "<h1>What changed between two taggings</h1>", "<table>"]
    for name, path, models in (("OLD", old_path, result.models_old), ("NEW", new_path, result.models_new)):
        out.append(f"<tr><th>{name}</th><td>{_escape(path)}</td><td>model {_escape(', '.join(sorted(models)) or '?')}"
                   "</td></tr>")
    out.append("</table>")
    for line in _mismatch_lines(result):
        out.append(f'<p class="warn">{_escape(line)}</p>')
    share = result.lines_changed / result.lines_compared * 100 if result.lines_compared else 0.0
    out.append(f"<p>{result.lines_compared:,} lines compared (matched by source and {_escape(result.key_mode)}); "
               f"<strong>{result.lines_changed:,}</strong> changed ({share:.1f}%). Review: {result.to_review:,} now sent, "
               f"{result.from_review:,} no longer sent.</p>")
    out.append("<h2>Spans per label</h2><table><tr><th>label</th>"
               + "".join(f'<th class="n">{_escape(c.replace("_", " "))}</th>' for c in LABEL_COLUMNS) + "</tr>")
    for name, counts in sorted(result.per_label.items()):
        out.append(f"<tr><td>{_escape(name)}</td>" + "".join(f'<td class="n">{counts[c]:,}</td>' for c in LABEL_COLUMNS)
                   + "</tr>")
    out.append("<tr><th>total</th>" + "".join(f'<th class="n">{v:,}</th>' for v in result.totals().values())
               + "</tr></table>")
    out.append(bar_chart_svg(result))
    if result.relabellings:
        out.append("<h2>Relabellings</h2><table><tr><th>from</th><th>to</th><th class='n'>spans</th></tr>")
        for (before, after), n in result.relabellings.most_common():
            out.append(f"<tr><td>{_escape(before)}</td><td>{_escape(after)}</td><td class='n'>{n:,}</td></tr>")
        out.append("</table>")
    for kind, items in result.examples.items():
        if not items:
            continue
        out.append(f"<h2>Examples: {_escape(kind)}</h2>")
        for example in items:
            out.append(f'<div class="ex"><div class="where">{_escape(_where(example.key, result.key_mode))}'
                       f'{" — " + _escape(example.note) if example.note else ""}</div>')
            if example.old_text is not None:
                out.append("old " + _html_line(example.old_text, example.old_spans, "old"))
            if example.new_text is not None:
                out.append("new " + _html_line(example.new_text, example.new_spans, "new"))
            out.append("</div>")
    out.append("</body></html>\n")
    return "\n".join(out)


# -- the command ------------------------------------------------------------------------------------------


def run(args: argparse.Namespace) -> int:
    if args.examples < 0:
        raise ConfigError("--examples must be >= 0")
    result = compare(read_records(args.old), read_records(args.new), args.examples)
    if result.mismatched and not args.allow_mismatch:
        if args.json:
            sys.stdout.write(orjson.dumps({"mismatch": result.to_dict()["mismatch"]}).decode() + "\n")
        else:
            print(format_mismatch(result))
        raise DataError(f"OLD and NEW cover different lines ({result.only_old:,} only in OLD, "
                        f"{result.only_new:,} only in NEW, {result.text_differs:,} with different text); "
                        "pass --allow-mismatch to compare the lines they share")
    if args.json:
        sys.stdout.write(orjson.dumps(result.to_dict(), option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(format_summary(result, args.old, args.new, with_examples=args.examples > 0))
    if args.report:
        write_file_atomically(args.report, html_report(result, args.old, args.new).encode("utf-8"), FILE_MODE)
        if not args.json:
            print(f"\nreport written to {args.report}")
    return 0

