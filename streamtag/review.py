"""`streamtag review QUEUE --out REVIEWED`: decide doubtful lines one at a time in a plain terminal.

Each queued line is shown with its spans marked (ANSI colour when stdout is a terminal and NO_COLOR is
unset; plain ``[web-03|host]`` brackets otherwise), its numbered spans, and the runner-up labelling.
Commands at the ``>`` prompt (one line each, read from stdin, so a pipe can drive it):

    a  accept the spans as they are          r  take the runner-up labelling
    e  edit the spans (see below)            s  skip: leave it for a later session
    q  quit (also end of input)              ?  help

Edit mode (``edit>`` prompt) starts from the shown spans:

    - N [N ...]          remove spans by number
    + START END LABEL    add a span over characters [START, END) (a ruler shows the offsets)
    = N LABEL            give span N another label
    runner               start over from the runner-up spans;   clear: remove every span
    anything else        the whole line re-typed with inline markup, e.g.
                         ``login failed for [mara.quill|account] from [10.4.7.21|netaddr]``;
                         without the markup it must equal the line exactly
    ok                   save the edited spans;   cancel: back without deciding

Spans are checked against the line (inside it, not empty, not overlapping, starting and ending on token
boundaries of ``streamtag.tokenize`` so training can use them) and against the model's labels; an error
is shown and the prompt comes back.

Each decision is appended to REVIEWED at once (write, flush, fsync): a crash loses nothing. A record is
labelled JSON Lines as ``streamtag train`` reads it, plus provenance::

    {"text": ..., "spans": [{"start", "end", "label"}], "decision": "accepted" | "runner_up" | "edited",
     "source": ..., "offset": ..., "line": ..., "model": ..., "queue_confidence": ..., "reviewed_at": ...}

Skips are not written (REVIEWED is training data); a skipped line comes back next session. A new
session leaves out queue records already decided, matched by (source, offset, SHA-256 of the text).
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import os
import re
import sys
from dataclasses import dataclass
from typing import TextIO

import orjson

from streamtag.compare import json_records, spans_of
from streamtag.errors import ConfigError, DataError
from streamtag.tokenize import tokenize

Span = tuple[int, int, str]
FILE_MODE = 0o600
DECISIONS = ("accepted", "runner_up", "edited")
_COLOURS = ("36", "33", "35", "32", "34", "31", "96", "93", "95", "92", "94", "91")

HELP = """commands:  a accept   r runner-up   e edit   s skip   q quit   ? help
edit mode: - N [N..] remove | + START END LABEL add | = N LABEL relabel | runner | clear
           or re-type the line with [text|label] markup | ok save | cancel back"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("queue", metavar="QUEUE", help="review records (JSON Lines) from the daemon or replay")
    parser.add_argument("--out", required=True, metavar="REVIEWED", help="decisions are appended here")
    parser.add_argument("--model", metavar="MODEL", help="model whose labels are allowed (default: bundled)")
    parser.add_argument("--labels", metavar="L1,L2", help="allowed labels, instead of a model's")
    parser.add_argument("--color", choices=["auto", "always", "never"], default="auto",
                        help="ANSI colour (auto: when stdout is a terminal and NO_COLOR is unset)")


# -- records ------------------------------------------------------------------------------------------


@dataclass
class QueueItem:
    record: dict
    text: str
    spans: list[Span]
    runner_up: list[Span] | None
    runner_up_probability: float | None

    @property
    def key(self) -> tuple:
        return decision_key(self.record.get("source"), self.record.get("offset"), self.text)


def decision_key(source, offset, text: str) -> tuple:
    """What identifies a queued line across sessions: where it came from and exactly what it says."""
    return source, offset, hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()


def read_queue(path: str) -> list[QueueItem]:
    """Review records, in file order; a last line without newline (still being written) is left out."""
    items = []
    for where, record in json_records(path, "a review record"):
        runner = record.get("runner_up")
        runner_spans = spans_of(runner.get("spans"), where) if isinstance(runner, dict) else None
        probability = runner.get("probability") if isinstance(runner, dict) else None
        items.append(QueueItem(record, record["text"], spans_of(record.get("spans"), where), runner_spans,
                               probability if isinstance(probability, (int, float)) else None))
    return items


def decided_keys(path: str) -> set[tuple]:
    """Keys of the lines already decided in REVIEWED (empty if it does not exist yet)."""
    if not os.path.exists(path):
        return set()
    return {decision_key(record.get("source"), record.get("offset"), record["text"])
            for _, record in json_records(path, "a reviewed record")}


class DecisionLog:
    """REVIEWED opened for appending; each decision is written and fsynced before the next is shown."""

    def __init__(self, path: str) -> None:
        self.path = path
        try:
            self.fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_APPEND, FILE_MODE)
        except OSError as exc:
            raise DataError(f"{path}: cannot open for appending ({exc.strerror})") from None
        self.repaired = self._drop_unfinished_tail()

    def _drop_unfinished_tail(self) -> bool:
        """A record cut by a crash mid-write would break the file for training: cut it off."""
        size = os.fstat(self.fd).st_size
        if size == 0 or os.pread(self.fd, 1, size - 1) == b"\n":
            return False
        block = 1 << 16
        end = size
        while end > 0:
            start = max(0, end - block)
            found = os.pread(self.fd, end - start, start).rfind(b"\n")
            if found >= 0:
                os.ftruncate(self.fd, start + found + 1)
                return True
            end = start
        os.ftruncate(self.fd, 0)
        return True

    def append(self, record: dict) -> None:
        data = orjson.dumps(record, option=orjson.OPT_APPEND_NEWLINE)
        view = memoryview(data)
        while view:
            view = view[os.write(self.fd, view):]
        os.fsync(self.fd)

    def close(self) -> None:
        os.close(self.fd)


def reviewed_record(item: QueueItem, spans: list[Span], decision: str) -> dict:
    record = item.record
    return {
        "text": item.text,
        "spans": [{"start": s, "end": e, "label": label} for s, e, label in sorted(spans)],
        "decision": decision,
        "source": record.get("source"),
        "offset": record.get("offset"),
        "line": record.get("line"),
        "model": record.get("model"),
        "queue_confidence": record.get("confidence"),
        "reviewed_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
    }


# -- checking and editing spans ---------------------------------------------------------------------------


def check_spans(text: str, spans: list[Span], labels: set[str]) -> str | None:
    """First problem with the spans for this line, or None if they can be saved."""
    tokens = tokenize(text)
    starts, ends = set(tokens.starts), set(tokens.ends)
    previous_end = -1
    for start, end, label in sorted(spans):
        where = f"span {start}-{end}"
        if not 0 <= start < end <= len(text):
            return f"{where} is empty or outside the line (length {len(text)})"
        if label not in labels:
            return f"{where}: unknown label {label!r} (known: {', '.join(sorted(labels))})"
        if start < previous_end:
            return f"{where} overlaps the span before it"
        if start not in starts or end not in ends:
            return f"{where} ({text[start:end]!r}) does not start and end at token boundaries"
        previous_end = end
    return None


def parse_markup(typed: str, text: str, labels: set[str]) -> list[Span]:
    """Spans from the line re-typed with ``[text|label]`` markup; ValueError if it is not the line."""
    if not labels:
        raise ValueError("no labels known")
    pattern = re.compile(r"\[([^\[]+?)\|(" + "|".join(re.escape(label) for label in
                                                       sorted(labels, key=len, reverse=True)) + r")\]")
    spans, plain, cursor = [], [], 0
    length = 0
    for match in pattern.finditer(typed):
        plain.append(typed[cursor:match.start()])
        length += match.start() - cursor
        inner = match.group(1)
        spans.append((length, length + len(inner), match.group(2)))
        plain.append(inner)
        length += len(inner)
        cursor = match.end()
    plain.append(typed[cursor:])
    stripped = "".join(plain)
    if stripped != text:
        at = next((i for i, (a, b) in enumerate(zip(stripped, text)) if a != b), min(len(stripped), len(text)))
        raise ValueError(f"without the markup the line differs from the queued one at character {at} "
                         f"(expected {text[at:at + 12]!r}, got {stripped[at:at + 12]!r})")
    return spans


def apply_edit(command: str, spans: list[Span], labels: set[str]) -> list[Span]:
    """One edit command (``- N``, ``+ START END LABEL``, ``= N LABEL``) -> new spans; ValueError if bad."""
    parts = command.split()
    numbered = sorted(spans)

    def index(token: str) -> int:
        if not token.isdigit() or not 1 <= int(token) <= len(numbered):
            raise ValueError(f"no span number {token!r} (spans are numbered 1..{len(numbered)})")
        return int(token) - 1

    if parts[0] == "-" and len(parts) >= 2:
        drop = {index(token) for token in parts[1:]}
        return [span for i, span in enumerate(numbered) if i not in drop]
    if parts[0] == "+" and len(parts) == 4:
        if not (parts[1].isdigit() and parts[2].isdigit()):
            raise ValueError("usage: + START END LABEL (character offsets, END exclusive)")
        if parts[3] not in labels:
            raise ValueError(f"unknown label {parts[3]!r} (known: {', '.join(sorted(labels))})")
        return sorted(numbered + [(int(parts[1]), int(parts[2]), parts[3])])
    if parts[0] == "=" and len(parts) == 3:
        i = index(parts[1])
        if parts[2] not in labels:
            raise ValueError(f"unknown label {parts[2]!r} (known: {', '.join(sorted(labels))})")
        start, end, _ = numbered[i]
        return numbered[:i] + [(start, end, parts[2])] + numbered[i + 1:]
    raise ValueError("not understood; type ? for help")


# -- showing a line ---------------------------------------------------------------------------------------


def _visible(text: str) -> str:
    """One visible character per character: control characters (e.g. escape sequences) must not reach
    the terminal, and offsets on the ruler must stay right."""
    return "".join(c if c.isprintable() else "\ufffd" for c in text)


class Screen:
    def __init__(self, out: TextIO, colour: bool, labels: list[str]) -> None:
        self.out = out
        self.colour = colour
        self.colour_of = {label: _COLOURS[i % len(_COLOURS)] for i, label in enumerate(sorted(labels))}

    def say(self, text: str = "") -> None:
        self.out.write(text + "\n")
        self.out.flush()

    def prompt(self, text: str) -> None:
        self.out.write(text)
        self.out.flush()

    def marked(self, text: str, spans: list[Span]) -> str:
        pieces, cursor = [], 0
        for start, end, label in sorted(spans):
            pieces.append(_visible(text[cursor:start]))
            inner = _visible(text[start:end])
            if self.colour:
                code = self.colour_of.get(label, "37")
                pieces.append(f"\x1b[1;{code}m{inner}\x1b[0m\x1b[2;{code}m|{_visible(label)}\x1b[0m")
            else:
                pieces.append(f"[{inner}|{_visible(label)}]")
            cursor = end
        pieces.append(_visible(text[cursor:]))
        return "".join(pieces)

    def span_list(self, text: str, spans: list[Span]) -> str:
        if not spans:
            return "  (no spans)"
        return "\n".join(f"  {n}) {start}-{end} {_visible(label)} {_visible(text[start:end])!r}"
                         for n, (start, end, label) in enumerate(sorted(spans), start=1))

    def show(self, item: QueueItem, number: int, total: int) -> None:
        record = item.record
        place = f"{record.get('source') or '-'} line {record.get('line')} offset {record.get('offset')}"
        self.say(f"\n--- {number} of {total} --- {_visible(place)}")
        confidence = record.get("confidence")
        reason = record.get("reason")
        if not reason:  # records from `streamtag tag` or another tool carry no reason
            reason = f"confidence {confidence if confidence is not None else '?'}"
        self.say("why: " + _visible(str(reason)))
        self.say("  " + self.marked(item.text, item.spans))
        self.say(self.span_list(item.text, item.spans))
        if item.runner_up is None:
            self.say("runner-up: none")
        else:
            probability = "?" if item.runner_up_probability is None else f"{item.runner_up_probability:.3f}"
            self.say(f"runner-up (p {probability}): " + self.marked(item.text, item.runner_up))

    def ruler(self, text: str) -> str:
        """Offsets every 10 characters under the plain line, for ``+ START END LABEL``."""
        marks = "".join(f"{i:<10d}" for i in range(0, len(text) + 1, 10))
        return "  " + _visible(text) + "\n  " + marks.rstrip()


# -- the session ------------------------------------------------------------------------------------------


class ReviewSession:
    """Drives the review of ``items`` with lines from ``stdin``; decisions go to ``log``."""

    def __init__(self, items: list[QueueItem], log: DecisionLog, labels: list[str], stdin: TextIO,
                 screen: Screen) -> None:
        self.items = items
        self.log = log
        self.labels = set(labels)
        self.stdin = stdin
        self.screen = screen
        self.counts = {decision: 0 for decision in DECISIONS} | {"skipped": 0}
        self.echo = not _isatty(stdin)

    def read(self, prompt: str) -> str | None:
        self.screen.prompt(prompt)
        line = self.stdin.readline()
        if not line:
            self.screen.say()
            return None
        if self.echo:
            self.screen.say(line.rstrip("\n"))  # echo piped input so the screen reads like a typed session
        return line.strip()

    def run(self) -> bool:
        """True if every item was seen; False when the reviewer quit (or input ended) early."""
        for number, item in enumerate(self.items, start=1):
            self.screen.show(item, number, len(self.items))
            if not self.decide(item):
                return False
        return True

    def decide(self, item: QueueItem) -> bool:
        """Prompt until a decision for this item; False to quit."""
        while True:
            command = self.read("[a]ccept [r]unner-up [e]dit [s]kip [q]uit [?]help > ")
            if command is None or command in ("q", "quit"):
                return False
            if command in ("a", "accept"):
                if self.save(item, item.spans, "accepted"):
                    return True
            elif command in ("r", "runner-up", "runner"):
                if item.runner_up is None:
                    self.screen.say("error: this line has no runner-up labelling")
                elif self.save(item, item.runner_up, "runner_up"):
                    return True
            elif command in ("e", "edit"):
                outcome = self.edit(item)
                if outcome is None:
                    return False
                if outcome:
                    return True
                self.screen.show(item, self.items.index(item) + 1, len(self.items))
            elif command in ("s", "skip"):
                self.counts["skipped"] += 1
                return True
            elif command in ("?", "h", "help"):
                self.screen.say(HELP)
            else:
                self.screen.say(f"error: unknown command {command!r}; type ? for help")

    def save(self, item: QueueItem, spans: list[Span], decision: str) -> bool:
        problem = check_spans(item.text, spans, self.labels)
        if problem:
            self.screen.say(f"error: {problem}; edit the spans instead")
            return False
        self.log.append(reviewed_record(item, spans, decision))
        self.counts[decision] += 1
        return True

    def edit(self, item: QueueItem) -> bool | None:
        """Edit mode: True when saved, False when cancelled, None when input ended."""
        spans = list(item.spans)
        self.screen.say(self.screen.ruler(item.text))
        while True:
            self.screen.say("  " + self.screen.marked(item.text, spans))
            self.screen.say(self.screen.span_list(item.text, spans))
            command = self.read("edit> ")
            if command is None:
                return None
            if command in ("ok", "done"):
                if self.save(item, spans, "edited"):
                    return True
                continue
            if command == "cancel":
                return False
            if command in ("?", "help"):
                self.screen.say(HELP)
                continue
            try:
                changed = self.edited(command, item, spans)
            except ValueError as exc:
                self.screen.say(f"error: {exc}")
                continue
            problem = check_spans(item.text, changed, self.labels)
            if problem:
                self.screen.say(f"error: {problem}; spans unchanged")
                continue
            spans = changed

    def edited(self, command: str, item: QueueItem, spans: list[Span]) -> list[Span]:
        if command == "clear":
            return []
        if command == "runner":
            if item.runner_up is None:
                raise ValueError("this line has no runner-up labelling")
            return list(item.runner_up)
        if command[:1] in ("+", "-", "=") and (len(command) == 1 or command[1] == " "):
            return apply_edit(command, spans, self.labels)
        if not command:
            raise ValueError("type ok to save, cancel to go back, ? for help")
        return parse_markup(command, item.text, self.labels)


# -- the command ------------------------------------------------------------------------------------------


def allowed_labels(args: argparse.Namespace) -> list[str]:
    if args.labels:
        labels = [label.strip() for label in args.labels.split(",") if label.strip()]
        if not labels or any(any(c.isspace() or c in "[]|" for c in label) for label in labels):
            raise ConfigError("--labels must be a comma-separated list of labels without spaces, [, ] or |")
        return labels
    from streamtag.model import load_model

    model = load_model(args.model)
    return sorted({label[2:] for label in model.labels if label[:2] in ("B-", "I-")})


def _isatty(stream) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def use_colour(choice: str, stream: TextIO) -> bool:
    if choice != "auto":
        return choice == "always"
    return _isatty(stream) and "NO_COLOR" not in os.environ


def run(args: argparse.Namespace, stdin: TextIO | None = None, stdout: TextIO | None = None) -> int:
    stdin = stdin or sys.stdin
    stdout = stdout or sys.stdout
    if os.path.abspath(args.queue) == os.path.abspath(args.out):
        raise ConfigError("--out must name another file than the queue")
    labels = allowed_labels(args)
    queue = read_queue(args.queue)
    log = DecisionLog(args.out)
    try:
        done = decided_keys(args.out)
        pending, seen = [], set(done)
        for item in queue:
            if item.key not in seen:
                seen.add(item.key)
                pending.append(item)
        screen = Screen(stdout, use_colour(args.color, stdout), labels)
        if log.repaired:
            screen.say(f"note: cut an unfinished record off the end of {args.out}")
        screen.say(f"{len(queue)} queued, {len(queue) - len(pending)} already decided, {len(pending)} to review")
        session = ReviewSession(pending, log, labels, stdin, screen)
        finished = session.run()
    finally:
        log.close()
    counts = session.counts
    decided = sum(counts[d] for d in DECISIONS)
    screen.say(f"{decided} decided ({counts['accepted']} accepted, {counts['runner_up']} runner-up, "
               f"{counts['edited']} edited), {counts['skipped']} skipped"
               + ("" if finished else "; run again to continue"))
    return 0
