"""Decode stage: the bytes of one line -> the text to record, the text to tag, and flags.

Shared by `watch`, `replay` and `tag`, so every command flags the same line the same way. No files,
no maths.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import orjson

# A line is "binary" when more than this share of its characters are control characters or
# replacement characters from broken UTF-8 (text logs have almost none).
BINARY_SHARE = 0.3
BINARY_MIN_CHARS = 16  # a shorter line is too little evidence: a few broken bytes are still text

# ECMA-48 (5th ed.) section 5.4: a control sequence is CSI (ESC [), parameter bytes 0x30-0x3F,
# intermediate bytes 0x20-0x2F, one final byte 0x40-0x7E. OSC strings (ESC ]) end with BEL or ST
# (ESC \). Other two-byte escapes are ESC followed by one byte 0x40-0x5F.
_ESCAPE_SEQUENCE = re.compile(
    r"\x1b\[[\x30-\x3f]*[\x20-\x2f]*[\x40-\x7e]"
    r"|\x1b\][^\x07\x1b]*(?:\x07|\x1b\\)?"
    r"|\x1b[\x40-\x5f]"
)
# C0 controls except TAB (white space), DEL, and the C1 controls U+0080..U+009F.
_CONTROL = re.compile(r"[\x00-\x08\x0a-\x1f\x7f-\x9f]")
# The same characters as UTF-8 bytes, for scanning a batch before decoding it: C0 and DEL are single
# bytes, and the C1 controls are C2 80..C2 9F (RFC 3629 section 3: bytes below 0x80 never occur
# inside a multi-byte sequence, so a byte scan of valid UTF-8 finds exactly these characters).
_C1_CONTROL_UTF8 = re.compile(rb"\xc2[\x80-\x9f]")
_TAB = 0x09
_SPACE = 0x20


@dataclass(slots=True)
class DecodedLine:
    """What to record (``text``, faithful) and what to tag (``tag_text``, same length, controls
    blanked so that span offsets into it are offsets into ``text``)."""

    text: str
    tag_text: str
    flags: list[str]
    fields: dict | None = None
    binary: bool = False


def decode_text(data: bytes) -> DecodedLine:
    """Bytes of one line (newline already removed) -> text, text to tag, flags.

    Invalid UTF-8 is replaced by U+FFFD ("invalid_utf8"); NUL becomes a space in the recorded text
    ("nul_bytes") because many consumers of JSON treat U+0000 as the end of a string; other control
    characters and terminal escape sequences stay in the recorded text but are blanked for tagging
    ("control_chars"); a line that is mostly controls is "binary" and not tagged.
    """
    try:
        text = data.decode("utf-8")
        flags = []
    except UnicodeDecodeError:
        text = data.decode("utf-8", errors="replace")
        flags = ["invalid_utf8"]
    return _sanitize(text, flags)


def decode_lines(datas: Sequence[bytes]) -> list[str | DecodedLine]:
    """``decode_text`` for a batch of lines, with a plain ``str`` standing for a plain line.

    A line that is valid UTF-8 without control characters decodes to ``DecodedLine(text, text, [])``;
    it comes back as just its text (no flags, nothing blanked, not binary), which saves building an
    object per line. Every other line comes back as ``decode_text`` gives it. Most batches are all
    plain: they cost one strict decode per line and one scan of the joined bytes.
    """
    try:
        texts = list(map(bytes.decode, datas))  # strict UTF-8
    except UnicodeDecodeError:
        return [_decode_one(data) for data in datas]
    if not _has_control_bytes(b"".join(datas)):
        return texts
    return [_sanitize(text, []) if _CONTROL.search(text) else text for text in texts]


def _decode_one(data: bytes) -> str | DecodedLine:
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return decode_text(data)
    return _sanitize(text, []) if _CONTROL.search(text) else text


def _has_control_bytes(data: bytes) -> bool:
    """True if the UTF-8 ``data`` may hold a character matched by ``_CONTROL``.

    A vectorised byte count: the regular expression scans about 6 ns per character, this well under 1.
    """
    codes = np.frombuffer(data, dtype=np.uint8)
    below_space = np.count_nonzero(codes < _SPACE)
    if below_space and below_space != np.count_nonzero(codes == _TAB):
        return True
    if b"\x7f" in data:
        return True
    return b"\xc2" in data and _C1_CONTROL_UTF8.search(data) is not None


def _sanitize(text: str, flags: list[str]) -> DecodedLine:
    if not _CONTROL.search(text):
        if "invalid_utf8" in flags and _is_binary(text, 0):
            return DecodedLine(text, text, flags + ["binary"], binary=True)
        return DecodedLine(text, text, flags)
    if "\0" in text:
        text = text.replace("\0", " ")
        flags.append("nul_bytes")
    n_controls = len(_CONTROL.findall(text))
    if n_controls:
        flags.append("control_chars")
    if _is_binary(text, n_controls):
        return DecodedLine(text, text, flags + ["binary"], binary=True)
    blank = lambda match: " " * len(match.group())  # noqa: E731  (keeps offsets)
    tag_text = _CONTROL.sub(" ", _ESCAPE_SEQUENCE.sub(blank, text))
    return DecodedLine(text, tag_text, flags)


def _is_binary(text: str, n_controls: int) -> bool:
    if len(text) < BINARY_MIN_CHARS:
        return False
    suspicious = n_controls + text.count("\ufffd")
    return suspicious > BINARY_SHARE * len(text)


def decode_json(data: bytes, text_field: str) -> DecodedLine:
    """A JSON object line: the text at the dotted ``text_field``, other fields under ``fields``.

    Malformed JSON (or not an object) keeps the raw line as the text, flagged "bad_json"; an
    object without a string at ``text_field`` keeps the raw line as text, flagged "no_text_field".
    """
    line = decode_text(data)
    if line.binary:
        return line
    try:
        document = orjson.loads(line.text)
    except orjson.JSONDecodeError:
        document = None
    if not isinstance(document, dict):
        line.flags.append("bad_json")
        return line
    text, fields = _pop_dotted(document, text_field.split("."))
    if not isinstance(text, str):
        line.flags.append("no_text_field")
        line.fields = document
        return line
    decoded = _sanitize(text, [f for f in line.flags if f == "invalid_utf8"])
    decoded.fields = fields
    return decoded


def _pop_dotted(document: dict, parts: list[str]) -> tuple[Any, dict]:
    """(value at the dotted path or None, the document without it); the document is not changed."""
    head, rest = parts[0], parts[1:]
    if head not in document:
        return None, document
    value = document[head]
    if not rest:
        if not isinstance(value, str):
            return None, document
        return value, {k: v for k, v in document.items() if k != head}
    if not isinstance(value, dict):
        return None, document
    found, inner = _pop_dotted(value, rest)
    if found is None:
        return None, document
    remaining = {k: v for k, v in document.items() if k != head}
    if inner:
        remaining[head] = inner
    return found, remaining
