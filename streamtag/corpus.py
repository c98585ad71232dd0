"""Read and write labelled data: JSON Lines with character spans, and the CoNLL column format.

JSON Lines: one object a line, ``{"text": str, "spans": [{"start", "end", "label"}], "weight"?}``;
offsets are Python string indices (code points), ``end`` exclusive. Extra fields are ignored, so
the tagger's own output records are valid training input. A missing ``spans`` means no entities.

Column format (as in the CoNLL shared tasks): one token per line, the token in the first column,
the tag in the last column (or ``tag_column``), a blank line between sentences, ``-DOCSTART-``
lines skipped. A line with a tab is split on tabs only (tokens may then hold other white space,
e.g. U+3000 in Japanese corpora); a line without tabs is split on runs of spaces.

Files are read line by line as bytes, so a broken UTF-8 sequence is reported with its line.
A bad record raises ``DataError("FILE:LINE: reason")`` unless ``skip_bad``, which counts it
(a bad line in a column file skips its whole sentence). Records that yield no token (empty or
all-blank text) are not returned; they are counted in ``ReadStats.empty``.
"""

from __future__ import annotations

import math
import os
import re
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import orjson

from streamtag.checkpoint import fsync_directory
from streamtag.errors import DataError
from streamtag.spans import (
    OUTSIDE,
    char_to_token_spans,
    count_chunk_initial_inside,
    repair_bio,
    spans_to_bio,
)
from streamtag.tokenize import token_kind, tokenize

SCHEMES = ("auto", "iob1", "iob2")
MAX_KEPT_ERRORS = 20  # messages of skipped records kept for the user; the count is exact anyway
_SPACES = re.compile(r" +")
_DOCUMENT_START = "-DOCSTART-"
_SPACE_TOKEN_KIND = "symbol"  # the tokenizer's kind for any other non-space character


@dataclass
class Sentence:
    """One labelled token sequence. ``text``/``starts``/``ends`` are set when read from JSON Lines."""

    texts: list[str]
    kinds: list[str]
    tags: list[str]
    weight: float = 1.0
    text: str | None = None
    starts: list[int] | None = None
    ends: list[int] | None = None
    reviewed: bool = False  # a person's decision from `streamtag review` (the record has "decision")


@dataclass
class ReadStats:
    """What a read found besides the sentences."""

    records: int = 0  # sentences returned
    tokens: int = 0  # tokens in them
    skipped: int = 0  # bad records skipped (skip_bad=True)
    empty: int = 0  # records without any token, not returned
    misaligned: int = 0  # character spans whose boundary cuts a token, or that overlap no token
    repaired: int = 0  # stray I-X (no B-X/I-X before it) turned into B-X
    converted: int = 0  # chunk-initial I-X of an IOB1 file turned into B-X
    space_tokens: int = 0  # column-file tokens that are only white space (e.g. U+3000)
    scheme: str | None = None  # tagging scheme of a column file: "iob1" or "iob2"
    errors: list[str] = field(default_factory=list)  # first MAX_KEPT_ERRORS skip messages


class _BadRecord(Exception):
    """A reason why one record is unusable; turned into DataError or a skip by the reader."""


# -- reading lines ----------------------------------------------------------------------------------


def _numbered_lines(path: Path) -> Iterator[tuple[int, str | None]]:
    """(line number, text without line break) for each line; text None if not valid UTF-8."""
    try:
        handle = open(path, "rb")
    except OSError as exc:
        raise DataError(f"{path}: cannot read: {exc.strerror or exc}") from None
    with handle:
        for number, raw in enumerate(handle, start=1):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError:
                yield number, None
                continue
            if number == 1:
                line = line.removeprefix("\ufeff")  # a byte-order mark is no content
            yield number, line.rstrip("\r\n")


def _reject(stats: ReadStats, path: Path, number: int, reason: str, skip_bad: bool) -> None:
    """Raise DataError for a bad record, or count it when skipping."""
    message = f"{path}:{number}: {reason}"
    if not skip_bad:
        raise DataError(message)
    stats.skipped += 1
    if len(stats.errors) < MAX_KEPT_ERRORS:
        stats.errors.append(message)


# -- JSON Lines -------------------------------------------------------------------------------------


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_weight(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and value >= 0


def _parse_span(span: object, text_length: int) -> tuple[int, int, str]:
    if not isinstance(span, dict):
        raise _BadRecord("a span is not an object")
    start, end, label = span.get("start"), span.get("end"), span.get("label")
    if not (_is_int(start) and _is_int(end)):
        raise _BadRecord("span start/end must be integers")
    if not isinstance(label, str):
        raise _BadRecord("span label must be a string")
    if not label or any(char.isspace() for char in label):
        raise _BadRecord(f"span label {label!r} must be non-empty without white space")
    if not 0 <= start < end <= text_length:
        raise _BadRecord(f"span [{start}, {end}) outside the text (length {text_length}) or empty")
    return start, end, label


def _parse_record(line: str) -> tuple[str, list[tuple[int, int, str]], float, bool]:
    """(text, character spans sorted, weight, reviewed) of one JSON line; _BadRecord if unusable."""
    try:
        record = orjson.loads(line)
    except orjson.JSONDecodeError as exc:
        raise _BadRecord(f"invalid JSON ({str(exc).splitlines()[0]})") from None
    if not isinstance(record, dict):
        raise _BadRecord("record is not a JSON object")
    text = record.get("text")
    if not isinstance(text, str):
        raise _BadRecord('missing or non-string "text"')
    raw_spans = record.get("spans", [])
    if not isinstance(raw_spans, list):
        raise _BadRecord('"spans" is not a list')
    spans = sorted(_parse_span(span, len(text)) for span in raw_spans)
    for (_, previous_end, _), (start, _, _) in zip(spans, spans[1:]):
        if start < previous_end:
            raise _BadRecord(f"spans overlap at character {start}")
    weight = record.get("weight", 1.0)
    if not _is_weight(weight):
        raise _BadRecord('"weight" must be a finite number >= 0')
    return text, spans, float(weight), "decision" in record


def _sentence_from_record(text: str, char_spans, weight: float, stats: ReadStats) -> Sentence:
    tokens = tokenize(text)
    token_spans, misaligned = char_to_token_spans(char_spans, tokens.starts, tokens.ends)
    stats.misaligned += misaligned
    return Sentence(
        texts=list(tokens.texts),
        kinds=list(tokens.kinds),
        tags=spans_to_bio(token_spans, len(tokens.texts)),
        weight=weight,
        text=text,
        starts=list(tokens.starts),
        ends=list(tokens.ends),
    )


def read_jsonl(path, skip_bad: bool = False) -> tuple[list[Sentence], ReadStats]:
    """Labelled JSON Lines -> sentences tokenized with ``streamtag.tokenize.tokenize``, IOB2 tags."""
    path = Path(path)
    stats = ReadStats()
    sentences: list[Sentence] = []
    for number, line in _numbered_lines(path):
        if line is not None and not line.strip():
            continue  # blank lines are no records
        try:
            if line is None:
                raise _BadRecord("invalid UTF-8")
            text, char_spans, weight, reviewed = _parse_record(line)
        except _BadRecord as exc:
            _reject(stats, path, number, str(exc), skip_bad)
            continue
        sentence = _sentence_from_record(text, char_spans, weight, stats)
        sentence.reviewed = reviewed
        if not sentence.texts:
            stats.empty += 1
            continue
        sentences.append(sentence)
        stats.records += 1
        stats.tokens += len(sentence.texts)
    return sentences, stats


# -- column format ----------------------------------------------------------------------------------


def _check_tag(tag: str) -> None:
    if tag == OUTSIDE:
        return
    if len(tag) > 2 and tag[1] == "-" and tag[0] in "BI" and not any(c.isspace() for c in tag):
        return
    raise _BadRecord(f"tag {tag!r} is not O, B-<type> or I-<type>")


def _columns(line: str) -> list[str]:
    if "\t" in line:
        return [column.strip(" ") for column in line.split("\t")]
    return _SPACES.split(line.strip(" "))


@dataclass
class _ColumnSentence:
    """A sentence being collected from a column file."""

    first_line: int = 0
    texts: list[str] = field(default_factory=list)
    tags: list[str] = field(default_factory=list)
    bad_line: int = 0  # first bad line, 0 if none
    bad_reason: str = ""


def _column_sentences(path: Path, tag_column: int) -> Iterator[_ColumnSentence]:
    """Sentences of a column file, each with its first bad line (if any)."""
    current = _ColumnSentence()
    for number, line in _numbered_lines(path):
        is_boundary = line is not None and (not line.strip(" \t") or line.split()[0] == _DOCUMENT_START)
        if is_boundary:
            if current.texts or current.bad_line:
                yield current
            current = _ColumnSentence()
            continue
        if not current.first_line:
            current.first_line = number
        if current.bad_line:
            continue  # the sentence is lost anyway; report its first bad line only
        try:
            if line is None:
                raise _BadRecord("invalid UTF-8")
            columns = _columns(line)
            tag_index = tag_column % len(columns) if -len(columns) <= tag_column < len(columns) else 0
            if tag_index == 0:  # out of range, or pointing at the token itself
                raise _BadRecord(f"expected a token and a tag in column {tag_column}, got {len(columns)} columns")
            token, tag = columns[0], columns[tag_column]
            if not token:
                raise _BadRecord("empty token")
            _check_tag(tag)
        except _BadRecord as exc:
            current.bad_line, current.bad_reason = number, str(exc)
            continue
        current.texts.append(token)
        current.tags.append(tag)
    if current.texts or current.bad_line:
        yield current


def _column_kinds(texts: list[str], stats: ReadStats) -> list[str]:
    """Token kinds; a white-space token (tab-separated corpora can hold one, e.g. U+3000) gets the
    tokenizer's catch-all kind "symbol", since ``token_kind`` only takes non-space tokens."""
    kinds = []
    for token in texts:
        if token.isspace():
            stats.space_tokens += 1
            kinds.append(_SPACE_TOKEN_KIND)
        else:
            kinds.append(token_kind(token))
    return kinds


def _b_tags_after_outside(tags: list[str]) -> int:
    """B-X tags that do not directly follow a B-X/I-X of the same type."""
    previous, count = OUTSIDE, 0
    for tag in tags:
        if tag[0] == "B" and (previous == OUTSIDE or previous[2:] != tag[2:]):
            count += 1
        previous = tag
    return count


def read_conll(
    path, scheme: str = "auto", skip_bad: bool = False, tag_column: int = -1
) -> tuple[list[Sentence], ReadStats]:
    """Column-format file -> sentences with IOB2 tags; token kinds from ``token_kind``.

    ``scheme``: "iob2" (every chunk starts with B-X), "iob1" (B-X only starts a chunk that directly
    follows a chunk of the same type; others start with I-X), or "auto": the file is IOB1 if it
    has entity tags and no B-X ever follows O, another type or a sentence start; else IOB2.
    Either way every chunk-initial I-X becomes B-X (the chunks themselves do not change under the
    CoNLL rules): in an IOB1 file that is a conversion (``stats.converted``), in an IOB2 file a
    repair of a stray I-X (``stats.repaired``).
    ``tag_column``: index of the tag column (default last); column 0 is the token.
    """
    if scheme not in SCHEMES:
        raise DataError(f"unknown tagging scheme {scheme!r}: use one of {', '.join(SCHEMES)}")
    path = Path(path)
    stats = ReadStats()
    sentences: list[Sentence] = []
    chunk_initial_inside = b_after_outside = entity_tags = 0
    for collected in _column_sentences(path, tag_column):
        if collected.bad_line:
            _reject(stats, path, collected.bad_line, collected.bad_reason, skip_bad)
            continue
        chunk_initial_inside += count_chunk_initial_inside(collected.tags)
        b_after_outside += _b_tags_after_outside(collected.tags)
        entity_tags += sum(tag != OUTSIDE for tag in collected.tags)
        sentences.append(
            Sentence(texts=collected.texts, kinds=_column_kinds(collected.texts, stats), tags=repair_bio(collected.tags))
        )
        stats.records += 1
        stats.tokens += len(collected.texts)
    if scheme == "auto":
        scheme = "iob1" if entity_tags and not b_after_outside else "iob2"
    stats.scheme = scheme
    if scheme == "iob1":
        stats.converted = chunk_initial_inside
    else:
        stats.repaired = chunk_initial_inside
    return sentences, stats


# -- any format -------------------------------------------------------------------------------------


def _first_content_line(path: Path) -> str:
    for _, line in _numbered_lines(path):
        if line is None:
            return ""
        if line.strip():
            return line.lstrip()
    return ""


def detect_format(path) -> str:
    """"jsonl" for .jsonl/.json files or files whose first non-blank line starts with '{'; else "conll"."""
    path = Path(path)
    if path.suffix.lower() in (".jsonl", ".json"):
        return "jsonl"
    return "jsonl" if _first_content_line(path).startswith("{") else "conll"


def read_corpus(
    path, fmt: str = "auto", skip_bad: bool = False, scheme: str = "auto", tag_column: int = -1
) -> tuple[list[Sentence], ReadStats]:
    """Read a labelled file in ``fmt`` ("jsonl", "conll" or "auto": see ``detect_format``)."""
    if fmt == "auto":
        fmt = detect_format(path)
    if fmt == "jsonl":
        return read_jsonl(path, skip_bad=skip_bad)
    if fmt == "conll":
        return read_conll(path, scheme=scheme, skip_bad=skip_bad, tag_column=tag_column)
    raise DataError(f"unknown corpus format {fmt!r}: use jsonl, conll or auto")


# -- writing ----------------------------------------------------------------------------------------


def _example_record(example, index: int, path: Path) -> bytes:
    text, spans, weight = example
    try:
        if not isinstance(text, str):
            raise _BadRecord("text is not a string")
        record_spans = [_parse_span({"start": s, "end": e, "label": label}, len(text)) for s, e, label in spans]
        if not _is_weight(weight):
            raise _BadRecord("weight must be a finite number >= 0")
    except (_BadRecord, TypeError, ValueError) as exc:
        raise DataError(f"{path}: example {index}: {exc}") from None
    record = {
        "text": text,
        "spans": [{"start": s, "end": e, "label": label} for s, e, label in sorted(record_spans)],
        "weight": float(weight),
    }
    return orjson.dumps(record) + b"\n"


def write_jsonl(path, examples: Iterable[tuple[str, list[tuple[int, int, str]], float]]) -> int:
    """Write (text, [(start, end, label)], weight) examples as labelled JSON Lines; returns the count.

    Atomic: a private temporary file (mode 0600) in the same directory, flushed and fsynced, then
    renamed over ``path``; on any error the old file is left as it was.
    """
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    try:
        descriptor, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
    except OSError as exc:
        raise DataError(f"{path}: cannot write: {exc.strerror or exc}") from None
    count = 0
    try:
        with os.fdopen(descriptor, "wb") as handle:
            for count, example in enumerate(examples, start=1):
                handle.write(_example_record(example, count, path))
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(temporary, 0o600)
        os.replace(temporary, path)
    except BaseException as exc:
        Path(temporary).unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise DataError(f"{path}: cannot write: {exc.strerror or exc}") from None
        raise
    fsync_directory(directory)
    return count

