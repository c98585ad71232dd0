r"""Split one log line into tokens with character offsets and a coarse kind per token.

One compiled pattern of named alternatives, tried in priority order at each position by ``finditer``;
the alternative that matched gives the token's kind (see ``KINDS``). The pattern has three parts:
fast paths for plain words, punctuation, numbers, dotted names and identifiers, which accept only
what no rule of higher priority could claim; then the full rules in priority order, split by whether
the token starts with a word character. A test checks that the fast paths change no token.

Guarantees (checked by the tests):
- ``texts[i] == line[starts[i]:ends[i]]``; tokens are in order, never overlap and never contain a
  character for which ``str.isspace()`` is true.
- Every other character is inside exactly one token. Characters no rule claims (control characters
  such as NUL or ESC, a byte-order mark, emoji, lone surrogates, a combining mark with no letter
  before it) become one-character tokens of kind ``"symbol"``: never dropped, never glued to a
  neighbour. White-space controls (tab, NEL, U+001C..U+001F) separate tokens like a space.
- Linear time in the line's length. Every repetition either runs over a class that the following
  part cannot start with, and is possessive or atomic so it never gives characters back, or is
  bounded by the standard it follows (IPv6 groups, URI scheme length, e-mail local part and labels).
  An alternative that scans a long run and then fails is always followed, at the same position, by
  one that consumes that run, so no run is rescanned from many start positions.
  ``tests/test_tokenize.py`` checks this with adversarial lines.

Cost: about 7.7k machine instructions per token on service logs (callgrind), about 1.2-1.6 us per
token on a 2 GHz core; a bare ``\w+|[^\w\s]`` finditer building the same four lists costs about 4k.
"""

from __future__ import annotations

import re
from functools import lru_cache
from itertools import chain, compress, count, islice, repeat
from collections.abc import Sequence
from operator import attrgetter
from typing import NamedTuple

import numpy as np

from streamtag.errors import DataError

__all__ = ["KINDS", "BatchTokenizer", "TokenBatch", "TokenKinds", "TokenList", "TokenTexts", "tokenize", "token_kind"]


class TokenList(NamedTuple):
    texts: list[str]  # token strings, exactly line[start:end]
    starts: list[int]  # character offsets into the line, [start, end)
    ends: list[int]
    kinds: list[str]  # one of KINDS


# ---------------------------------------------------------------------------------------------
# Building blocks. Kept as small named strings so the alternatives below read like a grammar.
# ---------------------------------------------------------------------------------------------

# Combining marks that str.isalnum() does not count as word characters but that sit inside words
# (NFD accents, Indic vowel signs, Hebrew/Arabic points, Thai/Lao marks, joiners, variation
# selectors). Without them a decomposed "é" or most Hindi words would be cut into pieces.
_MARKS = (
    "\u0300-\u036f\u0483-\u0489\u0591-\u05bd\u05bf\u05c1\u05c2\u05c4\u05c5\u05c7\u0610-\u061a"
    "\u064b-\u065f\u0670\u06d6-\u06dc\u06df-\u06e4\u06e7\u06e8\u06ea-\u06ed\u0900-\u0903"
    "\u093a-\u094f\u0951-\u0957\u0962\u0963\u0981-\u0983\u09bc-\u09d7\u0a01-\u0a03\u0a3c-\u0a51"
    "\u0a81-\u0a83\u0abc-\u0acd\u0b01-\u0b03\u0b3c-\u0b57\u0b82\u0bbe-\u0bcd\u0c00-\u0c04"
    "\u0c3e-\u0c56\u0c81-\u0c83\u0cbc-\u0cd6\u0d00-\u0d03\u0d3b-\u0d57\u0d81-\u0d83\u0dca-\u0ddf\u0df2\u0df3"
    "\u0e31\u0e34-\u0e3a\u0e47-\u0e4e\u0eb1\u0eb4-\u0ebc\u0ec8-\u0ecd\u0f71-\u0f84\u102b-\u103e"
    "\u1ab0-\u1aff\u1dc0-\u1dff\u200c\u200d\u20d0-\u20f0\ufe00-\ufe0f\ufe20-\ufe2f"
)
_LETTERS = r"[^\W\d_]"  # any unicode letter
_LETTER_RUN = rf"{_LETTERS}++(?:[{_MARKS}]++{_LETTERS}*+)*+"
_WORD_CHARS = rf"\w{_MARKS}"  # for use inside a [...] class
_WORD_CHAR = rf"[{_WORD_CHARS}]"  # boundaries use this, so a trailing mark never splits a name
# A name: word characters, inner dashes allowed (web-03, x86_64, ID47). Possessive: never gives back.
_NAME = rf"{_WORD_CHAR}++(?:-++{_WORD_CHAR}++)*+"

_HEX = "[0-9A-Fa-f]"
_H16 = f"{_HEX}{{1,4}}+"  # possessive: giving back a hex digit can never help
# Structured forms (addresses, timestamps, versions) use ASCII digits only, as their standards do.
_OCTET = r"(?>25[0-5]|2[0-4][0-9]|1[0-9][0-9]|[1-9]?[0-9])"  # longest valid octet first; atomic
_IPV4_ADDR = rf"{_OCTET}(?:\.{_OCTET}){{3}}"


def _ipv6_address() -> str:
    """IPv6 text forms, after the IPv6address rule of RFC 3986 section 3.2.2.

    Forms are ordered so that the one with the most groups after "::" is tried first, which makes the
    first match also the longest. Every repetition is bounded: constant work per start position.
    """
    ls32 = f"(?:{_IPV4_ADDR}|{_H16}:{_H16})"
    forms = [f"(?:{_H16}:){{6}}{ls32}", f"::(?:{_H16}:){{5}}{ls32}"]
    # "[ *n( h16 ":" ) h16 ] "::" (4-n)( h16 ":" ) ls32" for n = 0..4
    for extra_left in range(5):
        head = f"(?>{_H16}(?::{_H16}){{0,{extra_left}}})?"
        forms.append(f"{head}::(?:{_H16}:){{{4 - extra_left}}}{ls32}")
    forms.append(f"(?>{_H16}(?::{_H16}){{0,5}})?::{_H16}")
    forms.append(f"(?>{_H16}(?::{_H16}){{0,6}})?::")
    return "(?:" + "|".join(forms) + ")"


# The token would go on as a longer name (a word character, or '-' or '.' then one): used after
# ids, versions and words so that "deadbeef1.example" or "web--3.example" stays one host.
_NAME_GOES_ON = rf"{_WORD_CHAR}|-++{_WORD_CHAR}|\.{_WORD_CHAR}"
# After an address or number nothing may continue it: no word character, and no '.' (or ':' for
# IPv6) that is itself followed by a word character (that would be a longer dotted/colon name).
_END_IPV4 = rf"(?!{_WORD_CHAR}|\.{_WORD_CHAR})"
_END_IPV6 = rf"(?!{_WORD_CHAR}|[.:]{_WORD_CHAR})"
_END_NUM = rf"(?!{_WORD_CHAR}|\.\d)"

_URL_PLAIN = r"[^\s<>\"'`{}|\\^()\[\].,;:!?]"  # body characters that may also end a URL
_URL = (
    # Scheme (RFC 3986 section 3.1) bounded to 32 characters, so a failing attempt costs O(1).
    r"(?>[A-Za-z][A-Za-z0-9+.\-]{0,31}://)"
    # Body: anything but white space, quotes, angle/curly brackets; '[...]' host literals and
    # balanced '(...)' kept whole. '.,;:!?' only when more of the URL follows, so trailing
    # sentence punctuation stays out. All possessive: one pass, no backtracking.
    rf"(?:{_URL_PLAIN}++|[.,;:!?]++(?={_URL_PLAIN}|[\[(])"
    r"|\[[0-9A-Za-z:.%_~\-]{0,64}\]|\([^\s()<>\"']{0,64}\))*+"
)

_DOMAIN_LABEL = r"[^\W_][\w\-]{0,62}+"
_EMAIL = (
    # Local part at most 64 characters (RFC 5321 section 4.5.3.1.1), of the characters seen in
    # practice (word characters, '.', '+', '-'); RFC 5322 allows more, but "a=b@c" or "100%@x" in
    # a log are rarely addresses, and key=value must stay split.
    r"\w[\w.+\-]{0,63}+(?<!\.)@"
    # Domain: at least two labels, the last starting with a letter (so "SDID@32473" is not one),
    # or an address literal in brackets (RFC 5321 section 4.1.3).
    rf"(?:(?:{_DOMAIN_LABEL}\.){{1,16}}{_LETTERS}[\w\-]{{0,62}}+|\[[0-9A-Za-z:.]{{2,45}}\])"
)

_UUID = (
    # RFC 4122 section 3: 8-4-4-4-12 hex digits, optionally as a urn:uuid: URN
    rf"(?:[Uu][Rr][Nn]:[Uu][Uu][Ii][Dd]:)?"
    rf"{_HEX}{{8}}-{_HEX}{{4}}-{_HEX}{{4}}-{_HEX}{{4}}-{_HEX}{{12}}(?!{_NAME_GOES_ON})"
)

_FRACTION = r"(?:[.,][0-9]{1,9})?"
_OFFSET = r"(?:[Zz]|[+\-][0-2][0-9](?::?[0-5][0-9])?)?"
_TIME = rf"[0-2][0-9]:[0-5][0-9](?::[0-6][0-9]{_FRACTION})?"
_TIMESTAMP = (
    # RFC 3339 / ISO 8601 extended: date, optional 'T' time with fraction and offset.
    rf"[0-9]{{4}}-[01][0-9]-[0-3][0-9](?:[Tt]{_TIME}{_OFFSET})?(?!{_WORD_CHAR}|:[0-9])"
    # ISO 8601 basic: 20260301T120000Z.
    rf"|[0-9]{{8}}[Tt][0-9]{{6}}(?:[.,][0-9]{{1,9}})?{_OFFSET}(?!{_WORD_CHAR})"
    # Time alone (second token of 'YYYY-MM-DD HH:MM:SS'; syslog 'Oct 11 22:14:15').
    rf"|[0-2][0-9]:[0-5][0-9]:[0-6][0-9]{_FRACTION}{_OFFSET}(?!{_WORD_CHAR}|:{_WORD_CHAR})"
)

_IPV4 = rf"{_IPV4_ADDR}(?::[0-9]{{1,5}}|/[0-9]{{1,2}})?{_END_IPV4}"
# Guard first: the hex/colon run holds 3 to 9 colon-separated fields of at most 4 hex digits (the
# most any IPv6 text form has). It fails fast on words and on over-long runs like "1:1:1:...", which
# would otherwise send every start position through all nine forms.
_IPV6_GUARD = r"(?=[0-9A-Fa-f]{0,4}+(?::[0-9A-Fa-f]{0,4}+){2,8}+(?![:0-9A-Fa-f]))"
_IPV6 = rf"{_IPV6_GUARD}{_ipv6_address()}(?:%[\w.~\-]{{0,31}}[\w~\-])?(?:/[0-9]{{1,3}})?{_END_IPV6}"
_END_MAC = rf"(?![{_WORD_CHARS}:\-]|\.{_WORD_CHAR})"
_MAC = rf"{_HEX}{{2}}(?::{_HEX}{{2}}){{5}}{_END_MAC}|{_HEX}{{2}}(?:-{_HEX}{{2}}){{5}}{_END_MAC}"

_PATH_CHAR = r"[\w.+@%~\-/]"
_PATH_END = r"[\w+@%~\-/]"  # a path does not end with '.', so "see /var/log/x.log." drops the '.'
_WIN_CHAR = r"[\w.+@%~$#&!\-\\/]"
_WIN_END = r"[\w+@%~$#&!\-\\/]"
_PATH = (
    # Unix: /abs, ./rel, ../rel, ~/x, ~user/x, with at least one character after the first '/';
    # not after a word character (read/write stays three tokens).
    rf"(?<![{_WORD_CHARS}])(?:~[\w.\-]{{0,32}}+|\.\.?)?/{_PATH_CHAR}*{_PATH_END}"
    # Windows drive path C:\x or C:/x, and UNC \\server\share.
    rf"|(?<![{_WORD_CHARS}])[A-Za-z]:[\\/](?:{_WIN_CHAR}*{_WIN_END})?"
    rf"|\\\\[\w.\-]++\\(?:{_WIN_CHAR}*{_WIN_END})?"
)

_VERSION_SUFFIX = r"(?:[A-Za-z]++[0-9]*+)?(?:[\-+~][0-9A-Za-z]++(?:[.\-+][0-9A-Za-z]++){0,10})?"
_VERSION = (
    # v1, v1.2.3, or three or more dotted numbers; then pre-release / build parts (SemVer 2.0.0)
    r"(?:[vV][0-9]++(?:\.[0-9]++)*+|[0-9]++\.[0-9]++\.[0-9]++(?:\.[0-9]++)*+)"
    rf"{_VERSION_SUFFIX}(?!{_NAME_GOES_ON})"
)

_HEXID = (
    rf"0[xX]{_HEX}++(?!{_NAME_GOES_ON})"
    # Long hex id: at least 8 hex digits, at least one letter a-f and one decimal digit.
    rf"|(?=[0-9]*+[A-Fa-f])(?=[A-Fa-f]*+[0-9]){_HEX}{{8,}}+(?!{_NAME_GOES_ON})"
)

_NUMBER = (
    r"(?:(?<![\w.\-+])[\-+])?\d++(?:\.\d++)?+(?:[eE][\-+]?\d++)?+"
    # Unit: %, or a few letters (ms, MB, GiB, µs), optionally per-something (MB/s).
    rf"(?:%|{_LETTERS}{{1,6}}+(?:/{_LETTERS}{{1,3}}+)?)?{_END_NUM}"
)

_WORD = rf"{_LETTER_RUN}(?:['\u2019\-]{_LETTER_RUN})*+(?!{_NAME_GOES_ON}|['\u2019]{_WORD_CHAR})"
_HOST = rf"{_NAME}(?:\.{_NAME})++"
_IDENT = rf"{_NAME}(?:['\u2019]{_NAME})*+"

_PUNCT = (
    # Separator runs ("-----", "====", "...") are one token; other punctuation one character each.
    r"-{2,}+|={2,}+|\.{2,}+|\*{2,}+|#{2,}+|~{2,}+"
    r"|[!-/:-@\[-`{-~\u00a1\u00a7\u00ab\u00b6\u00b7\u00bb\u00bf\u2010-\u2027\u2030-\u205e"
    r"\u3001-\u3003\u3008-\u3011\u3014-\u301f\uff01-\uff0f\uff1a-\uff20\uff3b-\uff40\uff5b-\uff65]"
)

# Fast paths for the commonest kinds (about 85% of tokens in service logs). Each is tried first
# but accepts only what no rule of higher priority could claim: its look-ahead hands anything
# ambiguous on to the full rules below, so the result is the same as with the full rules alone
# (a test checks this). Without them a plain word or a bracket would first fail a dozen richer
# rules.

_FAST_WORD = (
    # Letters only, followed by a character that cannot continue any token: not a word character
    # and none of . - ' ’ + : @ (those lead on to hosts, dashed or quoted words, e-mail addresses,
    # URL schemes, IPv6/MAC/drive prefixes, and are left to the full rules). One class test: each
    # extra look-ahead costs sre several hundred instructions, and words are a third of all tokens.
    rf"{_LETTER_RUN}(?![{_WORD_CHARS}.\-'\u2019+:@])"
)
_FAST_PUNCT = r"[\[\](){},;\"'<>|!?&$^`@%]|=(?!=)|:(?!:)|-(?![\-\d])|\.(?![./])"
_FAST_NUMBER = (
    # Integer or decimal with an optional ASCII unit that has a letter past 'f' and does not start
    # with 'x' (so the token is never a hex id like 0x1f or 12ab34cd); not followed by anything
    # that would make it an address, a timestamp, a version or an e-mail local part. Possessive
    # throughout: it takes the longest reading or defers, never a shorter one.
    r"\d++(?:\.\d++)?+(?:%|(?![xX])(?=[a-fA-F]{0,5}+[g-zG-Z])[a-zA-Z]{1,6}+(?:/[^\W\d_]{1,3}+)?+)?+"
    rf"(?![{_WORD_CHARS}.:\-@+%])"
)
_FAST_HOST = (
    # Dotted name starting with a letter (not a 'v1.2' version), not the local part of an
    # e-mail address nor the scheme of a URL.
    # A name ends before a non-word character, so an e-mail local part or a scheme could only go
    # on through + - @ or a '.' or ':' followed by one of them.
    rf"(?=[^\W\d])(?![vV]\d){_NAME}(?:\.{_NAME})++(?![+\-@]|\.[.+\-@:]|:/)"
)
_FAST_IDENT = (
    # Name starting with an ASCII letter or '_', with a digit or underscore after its leading
    # letters (so never a plain word) and a letter past 'f' or an underscore (so never a hex id,
    # MAC or UUID): ID47, web-03, user_id.
    r"(?=[A-Za-z_])(?=[A-Za-z\-]*+[0-9_])(?=[0-9A-Fa-f\-]*+[G-Zg-z_])(?![vV][0-9])"
    rf"{_NAME}(?:['\u2019]{_NAME})*+"
    # not a dotted host, an e-mail local part, a URL scheme, an IPv6/drive prefix
    r"(?![.+\-:'\u2019@])"
)

# The full rules in priority order: the first alternative that matches at a position wins. Each
# names the characters it can start with: W a word character, O anything else. The pattern first
# dispatches on the class of the first character and then tries, in this same order, only the
# rules that can start there. (A finer split, digits apart from letters, was tried: it saves a few
# quick failures but duplicates more groups, and every match object carries all group marks; with
# 31 groups it outgrew Python's small-object allocator and cost more than it saved.)
_RULES = (
    # timestamps and IPv4 first: the commonest structured tokens, and only a date or address
    # directly followed by "@domain" could read otherwise (as an e-mail address)
    ("timestamp", _TIMESTAMP, "W"),
    ("ipv4", _IPV4, "W"),
    ("url", _URL, "W"),
    ("email", _EMAIL, "W"),
    ("uuid", _UUID, "W"),
    ("ipv6", _IPV6, "WO"),
    ("mac", _MAC, "W"),
    ("path", _PATH, "WO"),
    ("version", _VERSION, "W"),
    ("hex", _HEXID, "W"),
    ("number", _NUMBER, "WO"),
    ("word", _WORD, "W"),
    ("host", _HOST, "W"),
    ("ident", _IDENT, "W"),
    ("punct", _PUNCT, "O"),
    ("symbol", r"\S", "O"),  # anything else that is not white space, one character at a time
)
_FIRST_CHAR = {"W": r"(?=\w)", "O": ""}  # O last: no guard needed

# A kind may appear several times (fast path, and once per first-character class); the group name
# is the kind plus its index, and m.lastindex maps back to the kind.
_ALTERNATIVES = (
    [("word", _FAST_WORD), ("punct", _FAST_PUNCT), ("number", _FAST_NUMBER), ("host", _FAST_HOST),
     ("ident", _FAST_IDENT)],
    *[[(kind, body) for kind, body, starts in _RULES if cls in starts] for cls in "WO"],
)

KINDS: tuple[str, ...] = (
    "word",  # letters, inner apostrophes/dashes: failed, don't, do-nuts, café
    "ident",  # other names of word characters: ID47, user_id, web-03
    "number",  # 8710, -5, 12.5ms, 300MB, 98%
    "hex",  # 0x1f, deadbeefcafe1
    "ipv4",  # 192.0.2.1, 10.0.0.1:443, 10.0.0.0/8
    "ipv6",  # 2001:db8::1, ::ffff:192.0.2.1, fe80::1%eth0
    "mac",  # 00:1a:2b:3c:4d:5e
    "url",  # http://www.example.test/a?b=c
    "email",  # mary@x.test
    "path",  # /var/log/x.log, ./rel, ~/x, C:\Users\x, \\server\share
    "host",  # web-03.eu.example.test (any dotted name)
    "uuid",  # f81d4fae-7dec-11d0-a765-00a0c91e6bf6
    "timestamp",  # 2003-10-11T22:14:15.003Z, 2026-03-01, 12:00:00
    "version",  # v1.2.3, 2.0.1-rc1
    "punct",  # ( ) [ ] , : = " ... ----
    "symbol",  # any other single non-space character: NUL, ESC, BOM, emoji, lone surrogate
)
assert set(KINDS) == {kind for kind, _, _ in _RULES}


def _build_pattern(fast_paths: bool = True) -> tuple[re.Pattern, tuple]:
    """The token pattern and, per group number, the kind. Without fast paths: the same tokens,
    slower (kept for the test that proves the fast paths change nothing)."""
    group_kinds: list = [None]  # group 0 is the whole match
    branches = []
    guarded = list(zip(["", *_FIRST_CHAR.values()], _ALTERNATIVES))
    for guard, alternatives in guarded if fast_paths else guarded[1:]:
        named = []
        for kind, body in alternatives:
            named.append(f"(?P<{kind}_{len(group_kinds)}>{body})")
            group_kinds.append(kind)
        branches.append(guard + "(?:" + "|".join(named) + ")")
    # (?=\S) first: at white space every alternative would fail one by one; this fails once.
    pattern = re.compile(r"(?=\S)(?:" + "|".join(branches) + ")")
    assert pattern.groups == len(group_kinds) - 1  # no rule has inner capture groups
    return pattern, tuple(group_kinds)


_TOKEN_RE, _KIND_OF_GROUP = _build_pattern()
_finditer = _TOKEN_RE.finditer
_CHUNK = 4096  # matches held at once


def tokenize(line: str) -> TokenList:
    """Split ``line`` into tokens; see the module docstring for the guarantees."""
    if not isinstance(line, str):
        raise DataError(f"tokenize expects a decoded str line, got {type(line).__name__}")
    # Comprehensions over a materialised list of matches are measurably faster than one loop with
    # four appends (the per-token Python cost dominates tokenization time). Matches are taken a
    # chunk at a time because each match object holds all group marks (~450 bytes): a whole
    # 600k-token line at once peaked at 360 MB, in chunks at 60 MB (the result itself).
    found = _finditer(line)
    matches = list(islice(found, _CHUNK))
    texts = [m.group() for m in matches]
    starts = [m.start() for m in matches]
    ends = [m.end() for m in matches]
    kinds = [_KIND_OF_GROUP[m.lastindex] for m in matches]
    while len(matches) == _CHUNK:
        matches = list(islice(found, _CHUNK))
        texts += [m.group() for m in matches]
        starts += [m.start() for m in matches]
        ends += [m.end() for m in matches]
        kinds += [_KIND_OF_GROUP[m.lastindex] for m in matches]
    return TokenList(texts, starts, ends, kinds)


@lru_cache(maxsize=65536)
def token_kind(token: str) -> str:
    """Kind of an already-split token (e.g. one column of a column-format corpus).

    If the tokenizer would keep ``token`` whole, that kind. Otherwise (say "U.S." or "sshd[311]:")
    the kind of its longest piece, the first of equal length, so the token gets the kind of the part
    that carries most of it.
    """
    if not isinstance(token, str) or not token or token.isspace():
        raise DataError(f"token_kind expects a non-empty token, got {token!r}")
    best_kind, best_length = "symbol", 0
    for match in _finditer(token):
        length = match.end() - match.start()
        if length == len(token):
            return _KIND_OF_GROUP[match.lastindex]
        if length > best_length:
            best_kind, best_length = _KIND_OF_GROUP[match.lastindex], length
    return best_kind


# ---------------------------------------------------------------------------------------------
# Batches of lines, with a cache of space-separated pieces
# ---------------------------------------------------------------------------------------------
#
# Why cutting at ' ' is exact: no token contains white space, no part of the pattern can match a
# ' ' character, and the pattern has no anchors (^ $ \b \A \Z). So every look-around sees a
# neighbouring ' ' exactly as it sees the start or end of the string: both fail any attempt to read
# a character there. Hence tokenize(line) is the concatenation, over the pieces p of
# line.split(' '), of tokenize(p) shifted by the offset of p in the line. A test walks the parsed
# pattern to check the premise, and others compare the two paths on generated and standard text.
# Other white space (tab, NEL, ...) stays inside pieces and is handled by the pattern as usual.


class TokenBatch(NamedTuple):
    """Tokens of B lines, concatenated in line order (N tokens in all)."""

    texts: list[str]  # (N) token strings
    kinds: list[str]  # (N) one of KINDS
    starts: np.ndarray  # (N,) int64 character offsets into the token's own line
    ends: np.ndarray  # (N,) int64
    counts: np.ndarray  # (B,) int64 tokens per line
    # (N,) int64 per token the tokenizer's row of it (the row fixes text and kind) while that row stays
    # cached, else -1; valid only under ``generation``, which changes whenever rows are renumbered and
    # is never the same for two tokenizers of a process. None: no keys (built by hand, or an old path).
    keys: np.ndarray | None = None
    generation: int | None = None

    def per_line(self) -> list[TokenList]:
        """The batch cut back into one TokenList per line (for checks and inspection, not hot paths)."""
        bounds = np.concatenate(([0], np.cumsum(self.counts))).tolist()
        return [TokenList(self.texts[a:b], self.starts[a:b].tolist(), self.ends[a:b].tolist(), self.kinds[a:b])
                for a, b in zip(bounds[:-1], bounds[1:])]


class _LazyColumn(Sequence):
    """A column of a batch's tokens whose str items are made only when read (`TokenTexts`,
    `TokenKinds`): subclasses give ``__len__``, one item and ``pick``; slices and iteration go through
    ``pick``, and the column compares equal to the list of its items, either way round."""

    __slots__ = ()

    def _item(self, index: int) -> str:
        raise NotImplementedError

    def pick(self, indices) -> list[str]:
        raise NotImplementedError

    def __getitem__(self, index):
        if isinstance(index, slice):
            return self.pick(index)
        return self._item(index)

    def __iter__(self):
        return iter(self.pick(slice(None)))

    def __eq__(self, other):
        if isinstance(other, (list, tuple, type(self))):
            return list(self) == list(other)
        return NotImplemented

    __hash__ = None  # mutable-sequence-like: no hash, as a list

    def __repr__(self) -> str:
        return f"{type(self).__name__}({list(self)!r})"


class TokenTexts(_LazyColumn):
    """The texts of a batch's tokens (N), each cut from the batch's lines joined by ' ' when asked.

    Most consumers need only a few texts (the emission scorer those of types it has not met, the
    tagger those of doubtful lines), and a str per token costs about as much as finding the token.
    Indexing, slices, iteration and ``pick`` give str; it compares equal to the list of its texts."""

    __slots__ = ("joined", "batch_starts", "starts", "ends", "code_points")

    def __init__(self, joined: str, batch_starts: np.ndarray, starts: np.ndarray, ends: np.ndarray,
                 code_points: np.ndarray | None = None):
        self.joined = joined  # the batch's lines joined by ' '
        self.batch_starts = batch_starts  # (N,) each token's start in joined
        self.starts = starts  # (N,) start and end in its line: the length is ends - starts
        self.ends = ends
        self.code_points = code_points  # (C,) uint32 joined's code points, if at hand (the scorer reads them)

    def __len__(self) -> int:
        return len(self.batch_starts)

    def _item(self, index: int) -> str:
        start = int(self.batch_starts[index])
        return self.joined[start : start + int(self.ends[index] - self.starts[index])]

    def pick(self, indices) -> list[str]:
        """The texts of tokens ``indices`` (an int array, a list or a slice), in that order."""
        if not isinstance(indices, slice):
            indices = np.asarray(indices, dtype=np.int64)
        starts = self.batch_starts[indices]
        ends = starts + (self.ends[indices] - self.starts[indices])
        return list(map(self.joined.__getitem__, map(slice, starts.tolist(), ends.tolist())))


class TokenKinds(_LazyColumn):
    """The kinds of a batch's tokens (N), from their codes (N,) int8 (indices into KINDS); the str when
    asked. Compares equal to the list of its kinds."""

    __slots__ = ("codes",)

    def __init__(self, codes: np.ndarray):
        self.codes = codes

    def __len__(self) -> int:
        return len(self.codes)

    def _item(self, index: int) -> str:
        return KINDS[self.codes[index]]

    def pick(self, indices) -> list[str]:
        """The kinds of tokens ``indices`` (an int array, a list or a slice), in that order."""
        if not isinstance(indices, slice):
            indices = np.asarray(indices, dtype=np.int64)
        return _KIND_NAMES.take(self.codes[indices]).tolist()


_MAX_CACHED_PIECE = 256  # longer pieces are tokenized but not cached: a log of long unique runs
# (base64 blobs, minified JSON) must not fill memory, and such pieces rarely repeat anyway.
_ROWS_PER_PIECE = 8  # token rows kept per cached piece on average at most (service logs: about 2)
_ENTRY = np.dtype("<i4")  # a cache entry is three of these as bytes: first token row, number of rows,
_ENTRY_FIELDS = 3  # and the piece's length (so a batch's piece offsets need no pass over its text)
_MISSING = np.array([0, -1, 0], dtype=_ENTRY).tobytes()  # entry of a piece not in the cache
_GENERATIONS = count(1)  # row numberings of all tokenizers of the process: keys never collide
_get_lastindex = attrgetter("lastindex")
_group = re.Match.group
_start = re.Match.start


class BatchTokenizer:
    """Tokenize batches of lines exactly as ``tokenize`` does, tokenizing each distinct
    space-separated piece once and reusing it while it stays in the cache.

    With numba (the usual case) the pieces live in a compiled hash table (`_PieceTable`,
    `scan_kernels.lookup_kernel`): one kernel splits a batch, looks its pieces up and adds the new
    ones, the scanner tokenizes them (the pattern the pieces it is unsure of), and one kernel gathers
    every token's row and offsets; Python builds only the new tokens' texts and the batch's lists.
    Without numba (or with the scanner off at the first batch) the cache is the dict described next.

    The dict cache is a table of token rows (text, kind, start and end relative to the piece) and a dict
    from piece to its first row, number of rows and length, packed as 12 bytes so that a whole
    batch's look-ups join into one numpy array (the lengths give the pieces' offsets). A batch sends
    the pieces not seen yet through the compiled scanner, and those it is unsure of through the
    pattern (see `_tokenize_pieces`), then gathers every token's row with numpy: no Python step per
    token or per cached piece.
    """

    def __init__(self, cache_size: int = 100_000):
        if isinstance(cache_size, bool) or not isinstance(cache_size, int) or cache_size < 0:
            raise ValueError(f"cache_size must be a non-negative int, got {cache_size!r}")
        self.cache_size = cache_size
        self.max_rows = _ROWS_PER_PIECE * cache_size
        self.hits = 0  # pieces found in the cache (for benchmarks and stats)
        self.misses = 0  # pieces tokenized
        # The piece table of the compiled kernels (`_PieceTable`), chosen at the first batch; False:
        # the dict `_entries` and numpy (numba is missing, or the scanner was off at the start).
        self._table: _PieceTable | bool | None = None
        self._clear()

    def _clear(self) -> None:
        """Forget every piece. The row tables are kept (only their references to strings are
        dropped): they refill to the same size, and freeing and regrowing them would make the
        daemon's resident memory rise and fall with every refill instead of staying flat. The rows
        are numbered afresh, so the keys get a new generation."""
        self.generation = next(_GENERATIONS)
        self._entries: dict[str, bytes] = {}  # cached piece -> first row, rows (2 x int32)
        if getattr(self, "_table", None):
            self._table.clear()
        if hasattr(self, "_texts"):
            self._texts[: self._n_rows] = None
            self._kinds[: self._n_rows] = None
        else:
            self._texts = np.empty(4096, dtype=object)  # (rows,) token text
            self._kinds = np.empty(4096, dtype=object)  # (rows,) kind
            self._starts = np.zeros(4096, dtype=_ENTRY)  # (rows,) start in the piece
            self._ends = np.zeros(4096, dtype=_ENTRY)  # (rows,) end in the piece
            self._row_kinds = np.zeros(4096, dtype=np.int8)  # (rows,) kind code (piece table only)
        self._n_rows = 0  # rows in use: the cached pieces', then the current batch's others

    @property
    def cached_pieces(self) -> int:
        """Distinct pieces held in the cache (at most ``cache_size``)."""
        return self._table.n_pieces if self._table else len(self._entries)

    def tokenize_lines(self, lines: list[str], lazy: bool = False) -> TokenBatch:
        """Tokens of every line of ``lines``; per line the same as ``tokenize(line)``.

        ``lazy``: the batch's texts and kinds may be a `TokenTexts` and a `TokenKinds` (with the
        compiled piece table), which make a token's str only when asked for it: for consumers that
        read a few of them (the emission scorer takes them as they are)."""
        try:
            joined = " ".join(lines)
        except TypeError:
            raise DataError(f"tokenize expects a list of decoded str lines, got {_first_non_str(lines)}") from None
        if not lines:
            empty = np.zeros(0, dtype=np.int64)
            return TokenBatch([], [], empty, empty.copy(), empty.copy(), empty.copy(), self.generation)
        if self._table is None:
            self._table = _PieceTable(self.cache_size) if _scanner() is not None else False
        if self._table:
            kernels = _batch_kernels()
            if kernels is not None:
                return self._tokenize_with_table(lines, joined, kernels, lazy)
            self._table = False  # the kernels were switched off since: the dict from now on
            self._clear()
        # Joining with ' ' and splitting at ' ' gives each line's pieces in turn, line.count(' ') + 1
        # of them (a run of k spaces leaves k - 1 empty pieces), whatever else the lines hold.
        pieces = joined.split(" ")
        found = b"".join(map(self._entries.get, pieces, repeat(_MISSING)))
        entries = np.frombuffer(found, dtype=_ENTRY).reshape(len(pieces), _ENTRY_FIELDS)  # (P, 3)
        missing = entries[:, 1] < 0
        n_missing = int(np.count_nonzero(missing))
        kept_rows = self._n_rows
        if n_missing:
            entries = entries.copy()
            kept_rows = self._add_missing(pieces, entries, missing)
        self.misses += n_missing
        self.hits += len(pieces) - n_missing
        batch = self._gather(lines, entries, kept_rows)
        if self._n_rows > kept_rows:  # let go of this batch's pieces that are not cached
            self._texts[kept_rows : self._n_rows] = None
            self._kinds[kept_rows : self._n_rows] = None
            self._n_rows = kept_rows
        return batch

    def _tokenize_with_table(self, lines: list[str], joined: str, kernels, lazy: bool) -> TokenBatch:
        """`tokenize_lines` with the compiled piece table: one kernel splits the batch at ' ', looks
        every piece up and adds the new ones to the table; the new pieces are scanned (or matched
        by the pattern where the scanner is unsure) into new rows (offsets and kind, no str); one
        kernel gathers the tokens. Python makes the str of a token only when it is asked for."""
        table = self._table
        # A numpy copy: writable and aligned, the one signature the kernels are compiled for.
        code_points = np.frombuffer(joined.encode("utf-32-le", "surrogatepass"), dtype=np.uint32).copy()
        line_lengths = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
        if self._n_rows > self.max_rows:  # rows overflow: start afresh (as when the pieces overflow)
            self._clear()
        # Counted on the code points: str.count of one character cost ten times as much (~0.25 ms
        # for a batch of 1000 lines).
        n_pieces = int(np.count_nonzero(code_points == 32)) + 1
        misses = None
        scan_kernels = _scan_kernels()
        for may_clear in (table.n_pieces > 0, False):
            table.make_room(n_pieces, len(code_points), kernels)
            found = kernels.lookup(code_points, line_lengths, table.slots, table.arena, table.counts, self.cache_size,
                                   _MAX_CACHED_PIECE, may_clear)
            misses = found[-1] if misses is None else misses  # the pieces the cache did not hold
            if found[0] != scan_kernels.FULL:
                break
            # Clearing the whole cache when it is full keeps memory flat at the cost of one batch of
            # misses per refill; the pieces that matter come back at once. The lookup starts over.
            self._clear()
        _, first, n_rows, offsets, per_line, new_starts, new_lengths, new_slots, temp_starts, temp_lengths, _ = found
        if len(new_slots):
            new_first, new_rows = self._add_rows(joined, code_points, new_starts, new_lengths, kernels)
            kernels.resolve(table.slots, new_slots, new_first, new_rows)
        kept_rows = self._n_rows
        temp_first = temp_rows = _NO_ROWS
        if len(temp_starts):  # pieces too long to cache, or with no room: rows for this batch only
            temp_first, temp_rows = self._add_rows(joined, code_points, temp_starts, temp_lengths, kernels)
        line_starts = np.cumsum(line_lengths + 1) - (line_lengths + 1)  # (B,) in joined
        rows, starts, ends, batch_starts, kind_codes, counts = kernels.gather(
            first, n_rows, offsets, per_line, line_starts, table.slots, temp_first, temp_rows, self._starts,
            self._ends, self._row_kinds)
        texts = TokenTexts(joined, batch_starts, starts, ends, code_points)
        kinds = TokenKinds(kind_codes)
        if not lazy:
            texts, kinds = texts.pick(slice(None)), kinds.pick(slice(None))
        self.misses += misses
        self.hits += len(first) - misses
        self._n_rows = kept_rows  # the rows of pieces not cached are the next batch's to reuse
        return TokenBatch(texts, kinds, starts, ends, counts, _keys(rows, kept_rows), self.generation)

    def _add_rows(self, joined: str, code_points: np.ndarray, piece_starts: np.ndarray, piece_lengths: np.ndarray,
                  kernels) -> tuple[np.ndarray, np.ndarray]:
        """Tokenize the pieces joined[start:start + length] (K,) into new rows (offsets and kind
        code); return each piece's first row and number of rows (K,). The scanner takes the pieces
        it is sure of, the pattern the others (all of them when the scanner is off)."""
        self._reserve(int(piece_lengths.sum()))  # a piece has at most one token per character
        if _scanner() is not None:
            first, n_rows, added = kernels.scan_pieces(code_points, piece_starts, piece_lengths, self._starts,
                                                       self._ends, self._row_kinds, self._n_rows, kernels.kind_codes)
            self._n_rows += added
            unsure = n_rows < 0
        else:
            first = np.zeros(len(piece_starts), dtype=np.int64)
            n_rows = np.full(len(piece_starts), -1, dtype=np.int64)
            unsure = n_rows < 0
        if unsure.any():
            unsure_at = np.flatnonzero(unsure)
            starts = piece_starts[unsure_at]
            lengths = piece_lengths[unsure_at]
            pieces = list(map(joined.__getitem__, map(slice, starts.tolist(), (starts + lengths).tolist())))
            texts, kinds, token_starts, token_ends, counts = _match_pieces(pieces, lengths)
            added = slice(self._n_rows, self._n_rows + len(texts))
            self._starts[added] = token_starts
            self._ends[added] = token_ends
            self._row_kinds[added] = np.fromiter(map(_KIND_CODE.__getitem__, kinds), dtype=np.int8, count=len(kinds))
            first[unsure_at] = added.start + np.cumsum(counts) - counts
            n_rows[unsure_at] = counts
            self._n_rows = added.stop
        return first, n_rows

    def _add_missing(self, pieces: list[str], entries: np.ndarray, missing: np.ndarray) -> int:
        """Tokenize the pieces not in the cache, add their rows and fill in their ``entries``
        (P, 3); return the number of rows that stay in the cache after this batch."""
        missing_pieces = list(compress(pieces, missing.tolist()))
        distinct = list(dict.fromkeys(missing_pieces))
        piece_lengths = np.fromiter(map(len, distinct), dtype=np.int64, count=len(distinct))  # (D,)
        long = piece_lengths > _MAX_CACHED_PIECE
        n_short = len(distinct) - int(np.count_nonzero(long))
        if n_short < len(distinct):  # cacheable pieces first, so the others can be cut off after
            order = np.argsort(long, kind="stable")
            distinct = [distinct[i] for i in order.tolist()]
            piece_lengths = piece_lengths[order]
        texts, kinds, starts, ends, n_tokens = _tokenize_pieces(distinct, piece_lengths)
        n_rows = len(texts)
        n_short_rows = int(n_tokens[:n_short].sum())
        # Clearing the whole cache when it is full keeps memory flat at the cost of one batch of
        # misses per refill; the pieces that matter come back at once.
        if len(self._entries) + n_short > self.cache_size or self._n_rows + n_short_rows > self.max_rows:
            if self._entries:
                # Start afresh and look the whole batch up again: the entries found before the
                # clearing point at rows of the old tables.
                self._clear()
                missing[:] = True
                return self._add_missing(pieces, entries, missing)
        # A batch with more new pieces than the cache holds keeps as many as fit, not none.
        n_kept = min(n_short, self.cache_size - len(self._entries))
        rows_kept = np.cumsum(n_tokens[:n_kept])
        n_kept = int(np.searchsorted(rows_kept, self.max_rows - self._n_rows, side="right"))
        n_kept_rows = int(rows_kept[n_kept - 1]) if n_kept else 0
        first_row = self._n_rows
        self._reserve(n_rows)
        self._texts[first_row : first_row + n_rows] = texts
        self._kinds[first_row : first_row + n_rows] = kinds
        self._starts[first_row : first_row + n_rows] = starts
        self._ends[first_row : first_row + n_rows] = ends
        self._n_rows += n_rows
        new_entries = np.empty((len(distinct), _ENTRY_FIELDS), dtype=_ENTRY)  # (D, 3)
        new_entries[:, 0] = first_row + np.cumsum(n_tokens) - n_tokens
        new_entries[:, 1] = n_tokens
        new_entries[:, 2] = piece_lengths
        # Viewed as 12-byte void items, tolist gives one bytes object per entry (nothing stripped).
        new = dict(zip(distinct, new_entries.view(f"V{_ENTRY_FIELDS * _ENTRY.itemsize}").ravel().tolist()))
        filled = b"".join(map(new.__getitem__, missing_pieces))
        entries[missing] = np.frombuffer(filled, dtype=_ENTRY).reshape(-1, _ENTRY_FIELDS)
        self._entries.update(islice(new.items(), n_kept))
        return first_row + n_kept_rows

    def _reserve(self, more_rows: int) -> None:
        """Grow the row tables (doubling) to hold ``more_rows`` beyond those in use."""
        needed = self._n_rows + more_rows
        if needed > len(self._starts):
            size = max(needed, 2 * len(self._starts))
            self._starts = _grown(self._starts, size)
            self._ends = _grown(self._ends, size)
        # The piece table's rows hold a kind code and no str; the dict cache's rows hold both str.
        for name in ("_row_kinds",) if self._table else ("_texts", "_kinds"):
            if needed > len(getattr(self, name)):
                setattr(self, name, _grown(getattr(self, name), len(self._starts)))

    def _gather(self, lines: list[str], entries: np.ndarray, kept_rows: int) -> TokenBatch:
        """The batch from the pieces' entries (P, 3): their token rows, offsets shifted to the line;
        rows below ``kept_rows`` stay cached (they are the keys)."""
        n_tokens = entries[:, 1]  # (P,)
        ends = np.cumsum(n_tokens, dtype=np.int64)
        rows = np.arange(ends[-1]) + np.repeat(entries[:, 0] - (ends - n_tokens), n_tokens)  # (N,)
        piece_starts = _starts_of(entries[:, 2])  # (P,) in the batch's lines joined by ' '
        line_lengths = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
        line_starts = np.cumsum(line_lengths + 1) - (line_lengths + 1)  # (B,) in joined
        first_piece = np.searchsorted(piece_starts, line_starts)  # (B,) every line has a piece
        pieces_per_line = np.diff(first_piece, append=len(piece_starts))
        shift = np.repeat(piece_starts - np.repeat(line_starts, pieces_per_line), n_tokens)  # (N,)
        return TokenBatch(
            self._texts.take(rows).tolist(),
            self._kinds.take(rows).tolist(),
            self._starts.take(rows) + shift,
            self._ends.take(rows) + shift,
            np.add.reduceat(n_tokens.astype(np.int64), first_piece),
            _keys(rows, kept_rows),
            self.generation,
        )


def _keys(rows: np.ndarray, kept_rows: int) -> np.ndarray:
    """(N,) the rows (N,) that stay cached (below ``kept_rows``), -1 for the others: rows of pieces
    not cached are given to other pieces in the next batch, so they must never serve as keys."""
    return np.where(rows < kept_rows, rows, -1)


def _first_non_str(lines) -> str:
    """Type name of the first item of ``lines`` that is not a str, or of ``lines`` itself."""
    try:
        return next(type(line).__name__ for line in lines if not isinstance(line, str))
    except (TypeError, StopIteration):
        return type(lines).__name__


def _grown(array: np.ndarray, size: int) -> np.ndarray:
    bigger = np.zeros(size, dtype=array.dtype)
    bigger[: len(array)] = array
    return bigger


def _tokenize_pieces(pieces: list[str], lengths: np.ndarray) -> tuple[list, list, np.ndarray, np.ndarray, np.ndarray]:
    """Tokens of ``pieces`` (none containing ' ', lengths (P,)): texts (n) and kinds (n), starts and
    ends (n,) relative to their piece, tokens per piece (P,).

    The compiled scanner (`scan_kernels.scan`) takes the pieces it is sure of, the pattern the others
    (or all of them, if numba is not available). The scanner is tested to give exactly the pattern's
    tokens on every piece it does not leave unsure; the pattern stays the reference.
    """
    scan = _scanner()
    if scan is None:
        return _match_pieces(pieces, lengths)
    joined = " ".join(pieces)
    # A numpy copy: writable and aligned, the one signature the kernel is compiled for (numba
    # compiles another version, mid-stream, for a read-only or misaligned array).
    code_points = np.frombuffer(joined.encode("utf-32-le", "surrogatepass"), dtype=np.uint32).copy()
    starts, ends, kind_codes, unsure = scan(code_points)  # (n,) in joined; (P,)
    piece_starts = _starts_of(lengths)  # (P,) in joined
    if unsure.any():
        unsure_at = np.flatnonzero(unsure)
        pattern_texts, more_kinds, more_starts, more_ends, more_counts = _match_pieces(
            list(compress(pieces, unsure.tolist())), lengths[unsure_at])
        del pattern_texts  # cut again below with the others (a huge piece's texts are not held twice)
        shift = np.repeat(piece_starts[unsure_at], more_counts)
        # Both parts are in joined order; one stable sort by start puts every piece's tokens together.
        starts = np.concatenate((starts, more_starts + shift))
        order = np.argsort(starts, kind="stable")
        starts = starts[order]
        ends = np.concatenate((ends, more_ends + shift))[order]
        more_codes = np.fromiter(map(_KIND_CODE.__getitem__, more_kinds), dtype=np.int8, count=len(more_kinds))
        kind_codes = np.concatenate((kind_codes, more_codes))[order]
    # Every text is cut from joined once, in the final order (the pattern's own texts are the same).
    texts = list(map(joined.__getitem__, map(slice, starts.tolist(), ends.tolist())))
    kinds = _KIND_NAMES.take(kind_codes)
    token_piece = np.searchsorted(piece_starts, starts, side="right") - 1  # (n,)
    shift = piece_starts[token_piece]
    return texts, kinds, starts - shift, ends - shift, np.bincount(token_piece, minlength=len(pieces))


def _match_pieces(pieces: list[str], lengths: np.ndarray) -> tuple[list[str], list[str], np.ndarray, np.ndarray, np.ndarray]:
    """Tokens of ``pieces`` (none containing ' ', lengths (P,)) from one finditer of the pattern over
    them joined by ' '; the same results as `_tokenize_pieces`."""
    joined = " ".join(pieces)
    texts: list[str] = []
    kinds: list[str] = []
    starts = []
    found = _finditer(joined)
    while True:
        # In chunks for the reason given in tokenize: each match object holds all group marks.
        # One C-level map per field: every Python call on a match costs about as much as the
        # bookkeeping of a cached token, so a match gives its text, start and kind and no more.
        matches = list(islice(found, _CHUNK))
        texts += map(_group, matches)
        kinds += map(_KIND_OF_GROUP.__getitem__, map(_get_lastindex, matches))
        starts.append(np.fromiter(map(_start, matches), dtype=np.int64, count=len(matches)))
        if len(matches) < _CHUNK:
            break
    token_starts = np.concatenate(starts)  # (n,) in joined
    token_ends = token_starts + np.fromiter(map(len, texts), dtype=np.int64, count=len(texts))
    piece_starts = _starts_of(lengths)  # (P,) in joined
    token_piece = np.searchsorted(piece_starts, token_starts, side="right") - 1  # (n,)
    shift = piece_starts[token_piece]
    return texts, kinds, token_starts - shift, token_ends - shift, np.bincount(token_piece, minlength=len(pieces))


def _starts_of(lengths: np.ndarray) -> np.ndarray:
    """(P,) int64 offsets of pieces of these lengths (P,) in the pieces joined by ' '."""
    steps = lengths.astype(np.int64) + 1
    return np.cumsum(steps) - steps


class _PieceTable:
    """The arrays of the compiled piece table (see `scan_kernels.lookup_kernel`), grown before each
    batch so that every piece of it fits; bounded by the cache size."""

    def __init__(self, cache_size: int):
        self.cache_size = cache_size
        self.slots = _scan_kernels().new_slots(8)  # (S, SLOT_FIELDS) int64, S a power of two
        self.arena = np.zeros(0, dtype=np.uint32)  # (A,) the pieces' code points
        self.counts = np.zeros(2, dtype=np.int64)  # pieces, arena used

    @property
    def n_pieces(self) -> int:
        return int(self.counts[0])

    def clear(self) -> None:
        """Forget every piece (the arrays are kept, as the row tables are)."""
        self.slots[:, _scan_kernels().SLOT_START] = _scan_kernels().EMPTY
        self.counts[:] = 0

    def make_room(self, n_pieces: int, n_chars: int, kernels) -> None:
        """Grow the arrays to take ``n_pieces`` new pieces of ``n_chars`` characters in all."""
        cached, used = self.counts.tolist()
        most = min(self.cache_size, cached + n_pieces)
        chars = used + min(n_chars, (self.cache_size - cached) * _MAX_CACHED_PIECE)
        if chars > len(self.arena):
            self.arena = _grown(self.arena, max(chars, 2 * len(self.arena)))
        slots = len(self.slots)
        while slots < 2 * most:  # at most half full: short probes
            slots *= 2
        if slots > len(self.slots):
            grown = _scan_kernels().new_slots(slots)
            kernels.rehash(self.slots, grown)
            self.slots = grown


_NO_ROWS = np.zeros(0, dtype=np.int64)
_KIND_NAMES = np.array(KINDS, dtype=object)  # kind code (index into KINDS) -> kind
_KIND_CODE = {kind: code for code, kind in enumerate(KINDS)}
USE_SCANNER = True  # False: every new piece goes through the pattern (for tests and comparisons)


def _scanner():
    """The compiled scanner (`scan_kernels.scan`), loaded on first use by `crf.compiled` (numba takes
    a while to load, which commands that never tokenize a batch should not pay); None to use the
    pattern alone."""
    if not USE_SCANNER:
        return None
    from streamtag import crf

    return crf.compiled("scanner", module="scan_kernels")


def _batch_kernels():
    """The compiled kernels of the piece table (`scan_kernels.batch_kernels`), or None (numba is
    missing, or `crf.USE_KERNELS` is off)."""
    from streamtag import crf

    return crf.compiled("batch_kernels", module="scan_kernels")


def _scan_kernels():
    """The module `scan_kernels` (imported once the kernels are loaded; numba is slow to import)."""
    from streamtag import scan_kernels

    return scan_kernels
