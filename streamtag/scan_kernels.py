r"""Compiled (numba) one-pass tokenizer for printable-ASCII pieces; the same tokens as `tokenize`.

`scan` walks a batch string (lines joined with ' ', as code points) piece by piece, a piece being a
maximal run between ' ' characters (the pieces of ``joined.split(' ')``). Cutting there is exact
(see the comment above `tokenize.BatchTokenizer`). Within a piece it does what the token pattern
does: at each position it tries the full rules of `tokenize._RULES` in their priority order (the
pattern's fast paths are proven not to change any token, so they are left out) and takes the
first that matches, with the regex's backtracking where a quantifier is not possessive. Each rule
below names the part of the pattern it follows and how its candidates are ordered.

Every rule is scanned but "symbol" (which a printable-ASCII piece never needs: each of its
characters is a word character or punctuation): timestamp, ipv4, url, email, uuid, ipv6, mac, path,
version, hex, number, word, host, ident, punct. A piece with any character outside printable ASCII
(0x21..0x7e: tab, controls, any non-ASCII character) or longer than `MAX_PIECE` characters is left
*unsure* and no tokens are given for it; the caller tokenizes unsure pieces with the pattern.

Exactness is checked against `tokenize` (tests/test_scan_kernels.py); being unsure is always
correct, it only costs speed.
"""

from __future__ import annotations

import threading
import warnings
from typing import NamedTuple

import numba
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

from streamtag.crf_kernels import _jit, _jit_cached, same_run
from streamtag.tokenize import KINDS

__all__ = ["MAX_PIECE", "RULES_SCANNED", "BatchKernels", "batch_kernels", "scan", "scanner"]

# Longer pieces (base64 blobs, minified JSON) are left to the pattern: rare in logs, and a bound on
# the piece keeps any rescanning inside a piece cheap whatever the input.
MAX_PIECE = 1024

RULES_SCANNED = ("timestamp", "ipv4", "uuid", "mac", "path", "version", "hex", "number", "word", "host",
                 "ident", "punct", "email", "ipv6", "url")

# Rule codes inside the kernel (indices into _KIND_CODES, which maps them to indices into KINDS;
# passed as an argument so the cached machine code never holds a stale order of KINDS).
_TIMESTAMP, _IPV4, _UUID, _MAC, _PATH, _VERSION, _HEX, _NUMBER, _WORD, _HOST, _IDENT, _PUNCT, _EMAIL, _IPV6, _URL = range(15)
_KIND_CODES = np.array([KINDS.index(rule) for rule in RULES_SCANNED], dtype=np.int8)
_UNSURE = -2  # a rule end meaning "leave the piece to the pattern" (no rule gives it today)
# Zero bytes after the string (see scan_kernel): the farthest fixed-offset read past a position is
# 45 characters (urn:uuid: and a UUID), and every scan stops at the first zero.
_PAD = 64

_SPACE, _DOT, _COLON, _DASH, _PLUS, _SLASH, _BACKSLASH, _TILDE = 32, 46, 58, 45, 43, 47, 92, 126
_APOSTROPHE, _PERCENT, _AT, _UNDERSCORE, _COMMA = 39, 37, 64, 95, 44
_TAB = 9


# ----------------------------------------------------------------------------------------------------
# The string is read through its address: helpers that took the array itself would touch its
# reference count at each call (atomic operations that cost more than most rules' work; measured
# 100-500 ns per token), and inlining them all at numba's level took minutes to compile.


@intrinsic
def _at(typingctx, address, index):
    """Byte `index` of the buffer at `address` (integers): one load, no bounds check. Only
    `scan_kernel` calls the rules, on its own padded buffer, which outlives every read."""
    if not (isinstance(address, types.Integer) and isinstance(index, types.Integer)):
        return None

    def codegen(context, builder, signature, args):
        address_value = context.cast(builder, args[0], signature.args[0], types.intp)
        index_value = context.cast(builder, args[1], signature.args[1], types.intp)
        pointer = builder.inttoptr(builder.add(address_value, index_value), ir.IntType(8).as_pointer())
        return builder.load(pointer)

    return types.uint8(address, index), codegen


# ----------------------------------------------------------------------------------------------------
# Characters (ASCII only: every piece scanned is printable ASCII, so \w is [A-Za-z0-9_], \d is
# [0-9], the pattern's letter class is [A-Za-z], and its combining marks never occur)


@_jit
def _is_digit(c):
    return 48 <= c <= 57


@_jit
def _is_letter(c):
    return 65 <= c <= 90 or 97 <= c <= 122


@_jit
def _is_word(c):
    return 48 <= c <= 57 or 65 <= c <= 90 or 97 <= c <= 122 or c == _UNDERSCORE


@_jit
def _is_alnum(c):
    return 48 <= c <= 57 or 65 <= c <= 90 or 97 <= c <= 122


@_jit
def _is_hex(c):
    return 48 <= c <= 57 or 65 <= c <= 70 or 97 <= c <= 102


@_jit
def _skip_digits(s, i):
    while _is_digit(_at(s, i)):
        i += 1
    return i


@_jit
def _skip_word(s, i):
    while _is_word(_at(s, i)):
        i += 1
    return i


@_jit
def _skip_letters(s, i):
    while _is_letter(_at(s, i)):
        i += 1
    return i


@_jit
def _skip_alnum(s, i):
    while _is_alnum(_at(s, i)):
        i += 1
    return i


@_jit
def _skip_hex(s, i):
    while _is_hex(_at(s, i)):
        i += 1
    return i


@_jit
def _digits_up_to(s, i, most):
    """Number of digits from i, at most `most` (a greedy {1,most} takes this many first)."""
    k = 0
    while k < most and _is_digit(_at(s, i + k)):
        k += 1
    return k


@_jit
def _name_goes_on(s, e):
    """_NAME_GOES_ON at e: a word character, '-'s then one, or '.' then one."""
    c = _at(s, e)
    if _is_word(c):
        return True
    if c == _DASH:
        while _at(s, e) == _DASH:
            e += 1
        return _is_word(_at(s, e))
    return c == _DOT and _is_word(_at(s, e + 1))


# ----------------------------------------------------------------------------------------------------
# timestamp: _TIMESTAMP's three forms. _FRACTION's {1,9} and the optional parts are greedy, so the
# candidates are tried longest first and the first one the closing look-ahead accepts wins.

_TS_DATE, _TS_BASIC, _TS_TIME = 0, 1, 2  # which closing look-ahead (form A, B, C of _TIMESTAMP)


@_jit
def _timestamp_end_ok(s, e, form):
    """(?!\\w|:[0-9]) after a date form, (?!\\w) after the basic form, (?!\\w|:\\w) after a time."""
    c = _at(s, e)
    if _is_word(c):
        return False
    if c == _COLON:
        after = _at(s, e + 1)
        if form == _TS_DATE and _is_digit(after):
            return False
        if form == _TS_TIME and _is_word(after):
            return False
    return True


@_jit
def _offset_then_end(s, q, form):
    """First accepted end after _OFFSET at q: 'Z', '+hh:mm', '+hhmm', '+hh' (in that order), none; -1."""
    c = _at(s, q)
    if c == 90 or c == 122:  # Z z
        if _timestamp_end_ok(s, q + 1, form):
            return q + 1
    elif (c == _PLUS or c == _DASH) and 48 <= _at(s, q + 1) <= 50 and _is_digit(_at(s, q + 2)):
        r = q + 3
        if (_at(s, r) == _COLON and 48 <= _at(s, r + 1) <= 53 and _is_digit(_at(s, r + 2))
                and _timestamp_end_ok(s, r + 3, form)):
            return r + 3
        if 48 <= _at(s, r) <= 53 and _is_digit(_at(s, r + 1)) and _timestamp_end_ok(s, r + 2, form):
            return r + 2
        if _timestamp_end_ok(s, r, form):
            return r
    if _timestamp_end_ok(s, q, form):
        return q
    return -1


@_jit
def _fraction_offset_then_end(s, q, form):
    """First accepted end after '(?:[.,][0-9]{1,9})?' then _OFFSET at q (9 digits down to 1, then none)."""
    c = _at(s, q)
    if c == _DOT or c == _COMMA:
        for digits in range(_digits_up_to(s, q + 1, 9), 0, -1):
            e = _offset_then_end(s, q + 1 + digits, form)
            if e >= 0:
                return e
    return _offset_then_end(s, q, form)


@_jit
def _is_hh_mm(s, i):
    """[0-2][0-9]:[0-5][0-9] at i."""
    return (48 <= _at(s, i) <= 50 and _is_digit(_at(s, i + 1)) and _at(s, i + 2) == _COLON
            and 48 <= _at(s, i + 3) <= 53 and _is_digit(_at(s, i + 4)))


@_jit
def _is_seconds(s, i):
    """:[0-6][0-9] at i."""
    return _at(s, i) == _COLON and 48 <= _at(s, i + 1) <= 54 and _is_digit(_at(s, i + 2))


@_jit
def _match_timestamp(s, p):
    # Form A: [0-9]{4}-[01][0-9]-[0-3][0-9](?:[Tt]_TIME _OFFSET)?(?!\w|:[0-9])
    if (_digits_up_to(s, p, 4) == 4 and _at(s, p + 4) == _DASH and 48 <= _at(s, p + 5) <= 49
            and _is_digit(_at(s, p + 6)) and _at(s, p + 7) == _DASH
            and 48 <= _at(s, p + 8) <= 51 and _is_digit(_at(s, p + 9))):
        q = p + 10
        t = _at(s, q)
        if (t == 84 or t == 116) and _is_hh_mm(s, q + 1):  # T t
            minutes_end = q + 6
            if _is_seconds(s, minutes_end):
                e = _fraction_offset_then_end(s, minutes_end + 3, _TS_DATE)
                if e >= 0:
                    return e
            e = _offset_then_end(s, minutes_end, _TS_DATE)
            if e >= 0:
                return e
        if _timestamp_end_ok(s, q, _TS_DATE):
            return q
    # Form B: [0-9]{8}[Tt][0-9]{6}(?:[.,][0-9]{1,9})?_OFFSET(?!\w)
    if _digits_up_to(s, p, 8) == 8:
        t = _at(s, p + 8)
        if (t == 84 or t == 116) and _digits_up_to(s, p + 9, 6) == 6:
            e = _fraction_offset_then_end(s, p + 15, _TS_BASIC)
            if e >= 0:
                return e
    # Form C: [0-2][0-9]:[0-5][0-9]:[0-6][0-9]_FRACTION _OFFSET(?!\w|:\w)
    if _is_hh_mm(s, p) and _is_seconds(s, p + 5):
        return _fraction_offset_then_end(s, p + 8, _TS_TIME)
    return -1


# ----------------------------------------------------------------------------------------------------
# ipv4: _IPV4 = _OCTET(\._OCTET){3}(?::[0-9]{1,5}|/[0-9]{1,2})?_END_IPV4


@_jit
def _octet_end(s, i):
    """End of the atomic _OCTET at i (its first matching alternative, never given back), or -1."""
    c0 = _at(s, i)
    c1 = _at(s, i + 1)
    c2 = _at(s, i + 2)
    if c0 == 50 and c1 == 53 and 48 <= c2 <= 53:  # 25[0-5]
        return i + 3
    if c0 == 50 and 48 <= c1 <= 52 and _is_digit(c2):  # 2[0-4][0-9]
        return i + 3
    if c0 == 49 and _is_digit(c1) and _is_digit(c2):  # 1[0-9][0-9]
        return i + 3
    if 49 <= c0 <= 57 and _is_digit(c1):  # [1-9]?[0-9], the optional digit taken first
        return i + 2
    if _is_digit(c0):
        return i + 1
    return -1


@_jit
def _ipv4_end_ok(s, e):
    """_END_IPV4: (?!\\w|\\.\\w)."""
    c = _at(s, e)
    return not (_is_word(c) or (c == _DOT and _is_word(_at(s, e + 1))))


@_jit
def _match_ipv4(s, p):
    q = _octet_end(s, p)
    for _ in range(3):
        if q < 0 or _at(s, q) != _DOT:
            return -1
        q = _octet_end(s, q + 1)
    if q < 0:
        return -1
    c = _at(s, q)
    most = 5 if c == _COLON else 2 if c == _SLASH else 0  # :port or /prefix, longest first
    if most:
        for digits in range(_digits_up_to(s, q + 1, most), 0, -1):
            if _ipv4_end_ok(s, q + 1 + digits):
                return q + 1 + digits
    if _ipv4_end_ok(s, q):
        return q
    return -1


# ----------------------------------------------------------------------------------------------------
# url, e-mail: the quick tests first (true whenever the rule would match there), then the rules


@_jit
def _url_may_match(s, p):
    """_URL needs [A-Za-z][A-Za-z0-9+.\\-]{0,31}:// at p (exactly: the run cannot contain ':')."""
    if not _is_letter(_at(s, p)):
        return False
    j = p + 1
    while j - p <= 31:
        c = _at(s, j)
        if not (_is_alnum(c) or c == _PLUS or c == _DOT or c == _DASH):
            break
        j += 1
    return _at(s, j) == _COLON and _at(s, j + 1) == _SLASH and _at(s, j + 2) == _SLASH


@_jit
def _is_url_plain(c):
    """_URL_PLAIN for a printable-ASCII character (0 is the edge or a ' ', never in the class)."""
    return not (c == 0 or c == 60 or c == 62 or c == 34 or c == _APOSTROPHE or c == 96 or c == 123 or c == 125
                or c == 124 or c == _BACKSLASH or c == 94 or c == 40 or c == 41 or c == 91 or c == 93
                or _is_url_stop(c))


@_jit
def _is_url_stop(c):
    """[.,;:!?]: characters a URL takes only when more of it follows."""
    return c == _DOT or c == _COMMA or c == 59 or c == _COLON or c == 33 or c == 63


@_jit
def _match_url(s, p):
    """_URL at p: its end, or -1. The scheme's run cannot hold ':', so it ends at one place; the body
    (?:...)*+ is possessive and each of its parts ends at one place ('[...]' and '(...)' cannot
    hold their closing bracket): each round takes the first part that matches, until none does."""
    if not _url_may_match(s, p):
        return -1
    q = p + 1
    while not (_at(s, q) == _COLON and _at(s, q + 1) == _SLASH and _at(s, q + 2) == _SLASH):
        q += 1
    q += 3
    while True:
        c = _at(s, q)
        if _is_url_plain(c):
            q += 1
            while _is_url_plain(_at(s, q)):
                q += 1
        elif _is_url_stop(c):
            e = q + 1
            while _is_url_stop(_at(s, e)):
                e += 1
            after = _at(s, e)
            if not (_is_url_plain(after) or after == 91 or after == 40):
                return q
            q = e
        elif c == 91 or c == 40:  # '[' host literal, '(' balanced part: at most 64 inside
            k = 0
            while k <= 64:
                d = _at(s, q + 1 + k)
                if c == 91:
                    inside = _is_alnum(d) or d == _COLON or d == _DOT or d == _PERCENT or d == _UNDERSCORE \
                        or d == _TILDE or d == _DASH
                else:
                    inside = d != 0 and d != 40 and d != 41 and d != 60 and d != 62 and d != 34 and d != _APOSTROPHE
                if not inside:
                    break
                k += 1
            if k > 64 or _at(s, q + 1 + k) != (93 if c == 91 else 41):
                return q
            q += k + 2
        else:
            return q


@_jit
def _email_local_end(s, p):
    """The '@' that ends _EMAIL's local part \\w[\\w.+\\-]{0,63}+(?<!\\.)@ at p, or -1 (possessive:
    the run's end is fixed, so there is one place to try)."""
    if not _is_word(_at(s, p)):
        return -1
    j = p + 1
    while j - p <= 63:
        c = _at(s, j)
        if not (_is_word(c) or c == _DOT or c == _PLUS or c == _DASH):
            break
        j += 1
    return j if _at(s, j) == _AT and _at(s, j - 1) != _DOT else -1


@_jit
def _match_email(s, p):
    """_EMAIL at p: its end, or -1.

    Domain: (?:_DOMAIN_LABEL\\.){1,16} then a letter and [\\w\\-]{0,62}+, or \\[[0-9A-Za-z:.]{2,45}\\]
    (no look-ahead after either). A label [^\\W_][\\w\\-]{0,62}+ is possessive, so each repetition
    ends at one place; the greedy {1,16} takes as many labels as it can and gives them back one at
    a time until the last part matches after them."""
    j = _email_local_end(s, p)
    if j < 0:
        return -1
    q = j + 1
    if _at(s, q) == 91:  # '[': an address literal; ']' is outside its class, so no giving back
        k = 0
        while k <= 45:
            c = _at(s, q + 1 + k)
            if not (_is_alnum(c) or c == _COLON or c == _DOT):
                break
            k += 1
        return q + 2 + k if 2 <= k <= 45 and _at(s, q + 1 + k) == 93 else -1
    # The last part matches after a label exactly when a letter follows it, so the labels given
    # back first are those after the last such place: the match ends after the last part there.
    last = -1
    n_labels = 0
    at = q
    while n_labels < 16 and _is_alnum(_at(s, at)):
        e = at + 1
        while e - at <= 62 and (_is_word(_at(s, e)) or _at(s, e) == _DASH):
            e += 1
        if _at(s, e) != _DOT:
            break
        n_labels += 1
        at = e + 1
        if _is_letter(_at(s, at)):
            last = at
    if last < 0:
        return -1
    e = last + 1
    while e - last <= 62 and (_is_word(_at(s, e)) or _at(s, e) == _DASH):
        e += 1
    return e


@_jit
def _ipv6_may_match(s, p):
    """_IPV6_GUARD holds at p and its hex/colon run has '::' or at least 6 colons (every IPv6 text
    form of RFC 3986 section 3.2.2 has one or the other; a MAC's five colons do not)."""
    q = p
    k = 0
    while k < 4 and _is_hex(_at(s, q)):
        q += 1
        k += 1
    fields = 0
    double_colon = False
    while fields < 8 and _at(s, q) == _COLON:
        if _at(s, q + 1) == _COLON:
            double_colon = True
        q += 1
        k = 0
        while k < 4 and _is_hex(_at(s, q)):
            q += 1
            k += 1
        fields += 1
    if fields < 2:
        return False
    c = _at(s, q)
    if c == _COLON or _is_hex(c):  # the guard's closing look-ahead fails
        return False
    return double_colon or fields >= 6


# IPv6 (_IPV6): the guard, then the nine forms of `tokenize._ipv6_address` in their order, each with
# its choices in the order the pattern tries them (an optional head first taken, then left out; the
# IPv4 reading of ls32 before h16:h16), then the zone, the prefix and the end test, each tried
# longest first. The first complete match is the pattern's.


@_jit
def _h16_end(s, i):
    """_H16 = [0-9A-Fa-f]{1,4}+ at i: its end, or -1."""
    k = 0
    while k < 4 and _is_hex(_at(s, i + k)):
        k += 1
    return i + k if k else -1


@_jit
def _h16_colons_end(s, i, count):
    """(?:_H16:){count} at i: its end, or -1 (possessive parts: one way to match)."""
    for _ in range(count):
        e = _h16_end(s, i)
        if e < 0 or _at(s, e) != _COLON:
            return -1
        i = e + 1
    return i


@_jit
def _ipv6_head_end(s, p, most):
    """(?>_H16(?::_H16){0,most}) at p: its end (as many parts as there are, up to most), or -1."""
    e = _h16_end(s, p)
    if e < 0:
        return -1
    for _ in range(most):
        if _at(s, e) != _COLON:
            break
        f = _h16_end(s, e + 1)
        if f < 0:
            break
        e = f
    return e


@_jit
def _ipv6_end_ok(s, e):
    """_END_IPV6: (?!\\w|[.:]\\w)."""
    c = _at(s, e)
    return not (_is_word(c) or ((c == _DOT or c == _COLON) and _is_word(_at(s, e + 1))))


@_jit
def _ipv6_prefix_then_end(s, z):
    """(?:/[0-9]{1,3})? then _END_IPV6 at z: the end, or -1 (the prefix's digits longest first)."""
    if _at(s, z) == _SLASH:
        for digits in range(_digits_up_to(s, z + 1, 3), 0, -1):
            if _ipv6_end_ok(s, z + 1 + digits):
                return z + 1 + digits
    return z if _ipv6_end_ok(s, z) else -1


@_jit
def _ipv6_suffix_end(s, a):
    """Zone (?:%[\\w.~\\-]{0,31}[\\w~\\-])?, prefix and end test after an address ending at a."""
    if _at(s, a) == _PERCENT:
        run = 0
        while run < 31:
            c = _at(s, a + 1 + run)
            if not (_is_word(c) or c == _DOT or c == _TILDE or c == _DASH):
                break
            run += 1
        for r in range(run, -1, -1):  # the greedy run gives back one character at a time
            c = _at(s, a + 1 + r)
            if _is_word(c) or c == _TILDE or c == _DASH:
                e = _ipv6_prefix_then_end(s, a + 2 + r)
                if e >= 0:
                    return e
    return _ipv6_prefix_then_end(s, a)


@_jit
def _ipv6_ls32_then_suffix(s, i):
    """ls32 at i (_IPV4_ADDR first, then _H16:_H16) and the suffix: the token's end, or -1."""
    q = _octet_end(s, i)
    for _ in range(3):
        if q < 0 or _at(s, q) != _DOT:
            q = -1
            break
        q = _octet_end(s, q + 1)
    if q >= 0:
        e = _ipv6_suffix_end(s, q)
        if e >= 0:
            return e
    q = _h16_colons_end(s, i, 1)
    if q >= 0:
        q = _h16_end(s, q)
        if q >= 0:
            return _ipv6_suffix_end(s, q)
    return -1


@_jit
def _match_ipv6(s, p):
    """_IPV6 at p: its end, or -1."""
    if not _ipv6_may_match(s, p):  # the guard fails, or no form can match
        return -1
    i = _h16_colons_end(s, p, 6)  # (H16:){6} ls32
    if i >= 0:
        e = _ipv6_ls32_then_suffix(s, i)
        if e >= 0:
            return e
    if _at(s, p) == _COLON and _at(s, p + 1) == _COLON:  # :: (H16:){5} ls32
        i = _h16_colons_end(s, p + 2, 5)
        if i >= 0:
            e = _ipv6_ls32_then_suffix(s, i)
            if e >= 0:
                return e
    for form in range(7):  # [head of 1 + form parts at most] '::' and what follows it
        for with_head in (True, False):
            h = p
            if with_head:
                h = _ipv6_head_end(s, p, form)
                if h < 0:
                    continue
            if not (_at(s, h) == _COLON and _at(s, h + 1) == _COLON):
                continue
            if form < 5:  # [head] :: (H16:){4 - form} ls32
                i = _h16_colons_end(s, h + 2, 4 - form)
                e = _ipv6_ls32_then_suffix(s, i) if i >= 0 else -1
            elif form == 5:  # [head] :: H16
                i = _h16_end(s, h + 2)
                e = _ipv6_suffix_end(s, i) if i >= 0 else -1
            else:  # [head] ::
                e = _ipv6_suffix_end(s, h + 2)
            if e >= 0:
                return e
    return -1


# ----------------------------------------------------------------------------------------------------
# uuid, mac, path


@_jit
def _uuid_body_end(s, q):
    """End of 8-4-4-4-12 hex digits at q, or -1."""
    for group in (8, 4, 4, 4, 12):
        for _ in range(group):
            if not _is_hex(_at(s, q)):
                return -1
            q += 1
        if group != 12:
            if _at(s, q) != _DASH:
                return -1
            q += 1
    return q


@_jit
def _is_urn_uuid(s, p):
    """[Uu][Rr][Nn]:[Uu][Uu][Ii][Dd]: at p."""
    letters = (117, 114, 110, 58, 117, 117, 105, 100, 58)  # urn:uuid: in lower case
    for k in range(9):
        c = _at(s, p + k)
        if c != letters[k] and not (letters[k] != 58 and c == letters[k] - 32):
            return False
    return True


@_jit
def _match_uuid(s, p):
    if _is_urn_uuid(s, p):  # the optional urn:uuid: prefix, taken first
        e = _uuid_body_end(s, p + 9)
        if e >= 0 and not _name_goes_on(s, e):
            return e
    e = _uuid_body_end(s, p)
    if e >= 0 and not _name_goes_on(s, e):
        return e
    return -1


@_jit
def _match_mac(s, p):
    """_MAC: six hex pairs joined by ':' (tried first) or by '-', then _END_MAC (?![\\w:\\-]|\\.\\w)."""
    for separator in (_COLON, _DASH):
        q = p
        ok = True
        for pair in range(6):
            if pair and _at(s, q) != separator:
                ok = False
                break
            q += 1 if pair else 0
            if not (_is_hex(_at(s, q)) and _is_hex(_at(s, q + 1))):
                ok = False
                break
            q += 2
        if ok:
            c = _at(s, q)
            if not (_is_word(c) or c == _COLON or c == _DASH or (c == _DOT and _is_word(_at(s, q + 1)))):
                return q
    return -1


@_jit
def _is_path_char(c):
    """_PATH_CHAR [\\w.+@%~\\-/]."""
    return _is_word(c) or c == _DOT or c == _PLUS or c == _AT or c == _PERCENT or c == _TILDE or c == _DASH or c == _SLASH


@_jit
def _is_win_char(c):
    """_WIN_CHAR [\\w.+@%~$#&!\\-\\\\/]."""
    return _is_path_char(c) or c == 36 or c == 35 or c == 38 or c == 33 or c == _BACKSLASH


@_jit
def _unix_tail_end(s, q):
    """End of _PATH_CHAR*_PATH_END at q: the greedy run gives back its trailing '.'s; -1 if all are."""
    end = -1
    while True:
        c = _at(s, q)
        if not _is_path_char(c):
            return end
        q += 1
        if c != _DOT:
            end = q


@_jit
def _windows_tail_end(s, q):
    """End after the optional (?:_WIN_CHAR*_WIN_END)? at q (q itself if it cannot match)."""
    end = q
    while True:
        c = _at(s, q)
        if not _is_win_char(c):
            return end
        q += 1
        if c != _DOT:
            end = q


@_jit
def _match_path(s, p):
    c0 = _at(s, p)
    if not _is_word(_at(s, p - 1)):  # the look-behind (?<![\w]) of the first two forms
        # Unix: (?:~[\w.\-]{0,32}+|\.\.?)?/_PATH_CHAR*_PATH_END, prefixes in the pattern's order.
        if c0 == _TILDE:
            j = p + 1
            while j - p <= 32:
                c = _at(s, j)
                if not (_is_word(c) or c == _DOT or c == _DASH):
                    break
                j += 1
            if _at(s, j) == _SLASH:
                e = _unix_tail_end(s, j + 1)
                if e >= 0:
                    return e
        elif c0 == _DOT:
            if _at(s, p + 1) == _DOT and _at(s, p + 2) == _SLASH:
                e = _unix_tail_end(s, p + 3)
                if e >= 0:
                    return e
            if _at(s, p + 1) == _SLASH:
                e = _unix_tail_end(s, p + 2)
                if e >= 0:
                    return e
        elif c0 == _SLASH:
            e = _unix_tail_end(s, p + 1)
            if e >= 0:
                return e
        # Windows drive: [A-Za-z]:[\\/](?:_WIN_CHAR*_WIN_END)?
        c2 = _at(s, p + 2)
        if _is_letter(c0) and _at(s, p + 1) == _COLON and (c2 == _BACKSLASH or c2 == _SLASH):
            return _windows_tail_end(s, p + 3)
    # UNC: \\\\[\w.\-]++\\(?:_WIN_CHAR*_WIN_END)?
    if c0 == _BACKSLASH and _at(s, p + 1) == _BACKSLASH:
        j = p + 2
        while True:
            c = _at(s, j)
            if not (_is_word(c) or c == _DOT or c == _DASH):
                break
            j += 1
        if j > p + 2 and _at(s, j) == _BACKSLASH:
            return _windows_tail_end(s, j + 1)
    return -1


# ----------------------------------------------------------------------------------------------------
# version, hex, number


@_jit
def _version_parts_end(s, q, iterations):
    """End after '[\\-+~][0-9A-Za-z]++' at q (the caller checked it) and `iterations` of
    '[.\\-+][0-9A-Za-z]++'; also returns how many iterations were possible (at most 10)."""
    e = _skip_alnum(s, q + 1)
    done = 0
    while done < iterations:
        c = _at(s, e)
        if not ((c == _DOT or c == _DASH or c == _PLUS) and _is_alnum(_at(s, e + 1))):
            break
        e = _skip_alnum(s, e + 1)
        done += 1
    return e, done


@_jit
def _match_version(s, p):
    c0 = _at(s, p)
    if c0 == 86 or c0 == 118:  # [vV][0-9]++(?:\.[0-9]++)*+
        if not _is_digit(_at(s, p + 1)):
            return -1
        q = _skip_digits(s, p + 1)
    elif _is_digit(c0):  # [0-9]++\.[0-9]++\.[0-9]++(?:\.[0-9]++)*+
        q = _skip_digits(s, p)
        for _ in range(2):
            if not (_at(s, q) == _DOT and _is_digit(_at(s, q + 1))):
                return -1
            q = _skip_digits(s, q + 1)
    else:
        return -1
    while _at(s, q) == _DOT and _is_digit(_at(s, q + 1)):
        q = _skip_digits(s, q + 1)
    # _VERSION_SUFFIX: (?:[A-Za-z]++[0-9]*+)? then (?:[\-+~][0-9A-Za-z]++(?:[.\-+][0-9A-Za-z]++){0,10})?,
    # both greedy: letters taken first, then the parts with 10 down to 0 repeats, then without.
    for with_letters in (True, False):
        if with_letters:
            if not _is_letter(_at(s, q)):
                continue
            q1 = _skip_digits(s, _skip_letters(s, q))
        else:
            q1 = q
        c = _at(s, q1)
        if (c == _DASH or c == _PLUS or c == _TILDE) and _is_alnum(_at(s, q1 + 1)):
            e, possible = _version_parts_end(s, q1, 10)
            for repeats in range(possible, -1, -1):
                if repeats < possible:
                    e, _ = _version_parts_end(s, q1, repeats)
                if not _name_goes_on(s, e):
                    return e
        if not _name_goes_on(s, q1):
            return q1
    return -1


@_jit
def _match_hex(s, p):
    c1 = _at(s, p + 1)
    if _at(s, p) == 48 and (c1 == 88 or c1 == 120) and _is_hex(_at(s, p + 2)):  # 0[xX]_HEX++
        e = _skip_hex(s, p + 2)
        if not _name_goes_on(s, e):
            return e
    # _HEX{8,}+ with at least one letter a-f and one digit (the two look-aheads of _HEXID)
    e = p
    letter = False
    digit = False
    while True:
        c = _at(s, e)
        if _is_digit(c):
            digit = True
        elif _is_hex(c):
            letter = True
        else:
            break
        e += 1
    if e - p >= 8 and letter and digit and not _name_goes_on(s, e):
        return e
    return -1


@_jit
def _number_end_ok(s, e):
    """_END_NUM: (?!\\w|\\.\\d)."""
    c = _at(s, e)
    return not (_is_word(c) or (c == _DOT and _is_digit(_at(s, e + 1))))


@_jit
def _match_number(s, p):
    c0 = _at(s, p)
    d = p
    if c0 == _DASH or c0 == _PLUS:  # (?:(?<![\w.\-+])[\-+])? : without the sign \d cannot match at p
        before = _at(s, p - 1)
        if _is_word(before) or before == _DOT or before == _DASH or before == _PLUS:
            return -1
        d = p + 1
    if not _is_digit(_at(s, d)):
        return -1
    # \d++(?:\.\d++)?+(?:[eE][\-+]?\d++)?+ : possessive, one reading
    q = _skip_digits(s, d)
    if _at(s, q) == _DOT and _is_digit(_at(s, q + 1)):
        q = _skip_digits(s, q + 1)
    c = _at(s, q)
    if c == 69 or c == 101:  # e E
        sign = _at(s, q + 1)
        r = q + 2 if sign == _DASH or sign == _PLUS else q + 1
        if _is_digit(_at(s, r)):
            q = _skip_digits(s, r)
    # unit (?:%|[A-Za-z]{1,6}+(?:/[A-Za-z]{1,3}+)?)? : greedy, so with the unit first
    c = _at(s, q)
    if c == _PERCENT:
        if _number_end_ok(s, q + 1):
            return q + 1
    elif _is_letter(c):
        q2 = q
        while q2 - q < 6 and _is_letter(_at(s, q2)):
            q2 += 1
        if _at(s, q2) == _SLASH and _is_letter(_at(s, q2 + 1)):
            q3 = q2 + 1
            while q3 - q2 - 1 < 3 and _is_letter(_at(s, q3)):
                q3 += 1
            if _number_end_ok(s, q3):
                return q3
        if _number_end_ok(s, q2):
            return q2
    if _number_end_ok(s, q):
        return q
    return -1


# ----------------------------------------------------------------------------------------------------
# word, host, ident, punct


@_jit
def _match_word(s, p):
    """_WORD: letters, then ('|-)letters repeats (possessive), unless a name or 'x goes on."""
    if not _is_letter(_at(s, p)):
        return -1
    q = _skip_letters(s, p)
    while True:
        c = _at(s, q)
        if (c == _APOSTROPHE or c == _DASH) and _is_letter(_at(s, q + 1)):
            q = _skip_letters(s, q + 1)
        else:
            break
    if _name_goes_on(s, q) or (_at(s, q) == _APOSTROPHE and _is_word(_at(s, q + 1))):
        return -1
    return q


@_jit
def _name_end(s, i):
    """End of _NAME \\w++(?:-++\\w++)*+ at i (a word character)."""
    q = _skip_word(s, i)
    while _at(s, q) == _DASH:
        j = q
        while _at(s, j) == _DASH:
            j += 1
        if not _is_word(_at(s, j)):
            break
        q = _skip_word(s, j)
    return q


@_jit
def _match_host(s, p):
    """_HOST: _NAME(?:\\._NAME)++."""
    q = _name_end(s, p)
    dots = 0
    while _at(s, q) == _DOT and _is_word(_at(s, q + 1)):
        q = _name_end(s, q + 1)
        dots += 1
    return q if dots else -1


@_jit
def _match_ident(s, p):
    """_IDENT: _NAME(?:'_NAME)*+ ; always matches at a word character."""
    q = _name_end(s, p)
    while _at(s, q) == _APOSTROPHE and _is_word(_at(s, q + 1)):
        q = _name_end(s, q + 1)
    return q


@_jit
def _match_punct(s, p):
    """_PUNCT: a run of two or more of - = . * # ~, else one character (all ASCII punctuation)."""
    c = _at(s, p)
    if (c == _DASH or c == 61 or c == _DOT or c == 42 or c == 35 or c == _TILDE) and _at(s, p + 1) == c:
        q = p + 2
        while _at(s, q) == c:
            q += 1
        return q
    return p + 1


# ----------------------------------------------------------------------------------------------------
# fast paths: tokenize's _FAST_WORD, _FAST_PUNCT, _FAST_NUMBER, _FAST_HOST and _FAST_IDENT, tried first as the pattern tries
# them. Each accepts only what no rule of higher priority could claim (tokenize's tests check that
# they change no token), and spares the commonest tokens the walk through a dozen rules.


@_jit
def _fast_word_end(s, p):
    r"""_FAST_WORD [A-Za-z]++(?![\w.\-'+:@]) at p (a letter), or -1."""
    q = _skip_letters(s, p)
    c = _at(s, q)
    if _is_word(c) or c == _DOT or c == _DASH or c == _APOSTROPHE or c == _PLUS or c == _COLON or c == _AT:
        return -1
    return q


@_jit
def _is_fast_punct(s, p):
    r"""_FAST_PUNCT at p: [\[\](){},;"'<>|!?&$^`@%] or = : - . not starting a longer token."""
    c = _at(s, p)
    after = _at(s, p + 1)
    if c == 61:  # =(?!=)
        return after != 61
    if c == _COLON:
        return after != _COLON
    if c == _DASH:
        return after != _DASH and not _is_digit(after)
    if c == _DOT:
        return after != _DOT and after != _SLASH
    return (c == 91 or c == 93 or c == 40 or c == 41 or c == 123 or c == 125 or c == _COMMA or c == 59 or c == 34
            or c == _APOSTROPHE or c == 60 or c == 62 or c == 124 or c == 33 or c == 63 or c == 38 or c == 36
            or c == 94 or c == 96 or c == _AT or c == _PERCENT)


@_jit
def _fast_number_end(s, p):
    r"""_FAST_NUMBER at p (a digit), or -1: \d++(?:\.\d++)?+ then a unit that has a letter past 'f'
    and does not start with x (so never a hex id), possessive, then (?![\w.:\-@+%])."""
    q = _skip_digits(s, p)
    if _at(s, q) == _DOT and _is_digit(_at(s, q + 1)):
        q = _skip_digits(s, q + 1)
    c = _at(s, q)
    if c == _PERCENT:
        q += 1
    elif c != 88 and c != 120:  # (?![xX])
        k = q  # (?=[a-fA-F]{0,5}+[g-zG-Z])
        while k - q < 5 and _is_letter(_at(s, k)) and _is_hex(_at(s, k)):
            k += 1
        if _is_letter(_at(s, k)) and not _is_hex(_at(s, k)):
            j = q
            while j - q < 6 and _is_letter(_at(s, j)):
                j += 1
            q = j
            if _at(s, q) == _SLASH and _is_letter(_at(s, q + 1)):
                j = q + 1
                while j - q - 1 < 3 and _is_letter(_at(s, j)):
                    j += 1
                q = j
    c = _at(s, q)
    if (_is_word(c) or c == _DOT or c == _COLON or c == _DASH or c == _AT or c == _PLUS or c == _PERCENT):
        return -1
    return q


@_jit
def _fast_host_end(s, p):
    r"""_FAST_HOST at p (a letter or '_'), or -1: not v1..., a dotted name, then
    (?![+\-@]|\.[.+\-@:]|:/) (not an e-mail local part nor a URL scheme)."""
    c = _at(s, p)
    if (c == 86 or c == 118) and _is_digit(_at(s, p + 1)):
        return -1
    q = _match_host(s, p)
    if q < 0:
        return -1
    c = _at(s, q)
    after = _at(s, q + 1)
    if c == _PLUS or c == _DASH or c == _AT:
        return -1
    if c == _DOT and (after == _DOT or after == _PLUS or after == _DASH or after == _AT or after == _COLON):
        return -1
    if c == _COLON and after == _SLASH:
        return -1
    return q


@_jit
def _fast_ident_end(s, p):
    r"""_FAST_IDENT at p (a letter or '_'), or -1: a digit or '_' after the leading letters and
    dashes, a letter past 'f' or '_' after the leading hex digits and dashes, not v1..., then
    _IDENT and (?![.+\-:'@])."""
    k = p
    while _is_letter(_at(s, k)) or _at(s, k) == _DASH:
        k += 1
    if not (_is_digit(_at(s, k)) or _at(s, k) == _UNDERSCORE):
        return -1
    k = p
    while _is_hex(_at(s, k)) or _at(s, k) == _DASH:
        k += 1
    c = _at(s, k)
    if not ((_is_letter(c) and not _is_hex(c)) or c == _UNDERSCORE):
        return -1
    c = _at(s, p)
    if (c == 86 or c == 118) and _is_digit(_at(s, p + 1)):
        return -1
    q = _match_ident(s, p)
    c = _at(s, q)
    if c == _DOT or c == _PLUS or c == _DASH or c == _COLON or c == _APOSTROPHE or c == _AT:
        return -1
    return q


# ----------------------------------------------------------------------------------------------------
# dispatch in the pattern's order, and the kernel


@_jit
def _write_tokens(buffer, s, p, stop, kind_codes, starts, ends, kinds, n):
    """The tokens of buffer[p:stop] (one piece; a 0 in it, a tab, ends a token as ' ' does) from row
    n on: start and end (less one: the buffer's leading 0) and kind. Returns the next free row, or
    -1 if a match is unsure (the pattern then decides the whole piece; rows from n are left to reuse)."""
    while p < stop:
        if buffer[p] == 0:
            p += 1
            continue
        rule, e = _match(s, p)
        if e == _UNSURE:
            return -1
        starts[n] = p - 1
        ends[n] = e - 1
        kinds[n] = kind_codes[rule]
        n += 1
        p = e
    return n


@_jit
def _match(s, p):
    """(rule, end) of the token at p: the first rule of tokenize._RULES that matches."""
    c = _at(s, p)
    if _is_letter(c) or c == _UNDERSCORE:
        e = _fast_word_end(s, p) if c != _UNDERSCORE else -1
        if e >= 0:
            return _WORD, e
        e = _fast_host_end(s, p)
        if e >= 0:
            return _HOST, e
        e = _fast_ident_end(s, p)
        if e >= 0:
            return _IDENT, e
    elif _is_digit(c):
        e = _fast_number_end(s, p)
        if e >= 0:
            return _NUMBER, e
    elif _is_fast_punct(s, p):
        return _PUNCT, p + 1
    if _is_word(c):  # the pattern's (?=\w) branch
        e = _match_timestamp(s, p)
        if e >= 0:
            return _TIMESTAMP, e
        e = _match_ipv4(s, p)
        if e >= 0:
            return _IPV4, e
        e = _match_url(s, p)
        if e >= 0:
            return _URL, e
        e = _match_email(s, p)
        if e >= 0:
            return _EMAIL, e
        e = _match_uuid(s, p)
        if e >= 0:
            return _UUID, e
        e = _match_ipv6(s, p)
        if e >= 0:
            return _IPV6, e
        e = _match_mac(s, p)
        if e >= 0:
            return _MAC, e
        e = _match_path(s, p)
        if e >= 0:
            return _PATH, e
        e = _match_version(s, p)
        if e >= 0:
            return _VERSION, e
        e = _match_hex(s, p)
        if e >= 0:
            return _HEX, e
        e = _match_number(s, p)
        if e >= 0:
            return _NUMBER, e
        e = _match_word(s, p)
        if e >= 0:
            return _WORD, e
        e = _match_host(s, p)
        if e >= 0:
            return _HOST, e
        return _IDENT, _match_ident(s, p)
    e = _match_ipv6(s, p)  # the other branch: ipv6, path, number, punct
    if e >= 0:
        return _IPV6, e
    e = _match_path(s, p)
    if e >= 0:
        return _PATH, e
    e = _match_number(s, p)
    if e >= 0:
        return _NUMBER, e
    return _PUNCT, _match_punct(s, p)


@_jit_cached
def scan_kernel(cp, kind_codes):
    """(starts (n,), ends (n,), kinds (n,) int8, unsure (P,) bool) of the batch string cp (C,)
    uint32; see `scan`."""
    size = cp.shape[0]
    # The string as bytes (1 + C + _PAD,): byte i + 1 is character i, 0 for ' ' and for the
    # edges. No rule matches a 0, so every scan stops there as the pattern stops at a ' ' or
    # the edge of the string, and no read needs a bounds check. Other characters than printable
    # ASCII make their piece unsure (and read as DEL, which no rule here matches either).
    buffer = np.zeros(size + 1 + _PAD, dtype=np.uint8)
    n_pieces = 1
    for i in range(size):
        if cp[i] == _SPACE:
            n_pieces += 1
    unsure = np.zeros(n_pieces, dtype=np.bool_)
    piece = 0
    for i in range(size):
        c = cp[i]
        if c == _SPACE:
            piece += 1
        elif 0x21 <= c <= 0x7E:
            buffer[i + 1] = c
        else:
            buffer[i + 1] = 0x7F
            unsure[piece] = True
    s = np.intp(buffer.ctypes.data)  # read by _at; buffer stays alive to the end
    starts = np.empty(size, dtype=np.int64)
    ends = np.empty(size, dtype=np.int64)
    kinds = np.empty(size, dtype=np.int8)
    n = 0
    piece = 0
    a = 1
    for i in range(1, size + 2):
        if i <= size and buffer[i] != 0:
            continue
        # the piece is buffer[a:i]
        if not unsure[piece] and i - a > MAX_PIECE:
            unsure[piece] = True
        if not unsure[piece]:
            written = _write_tokens(buffer, s, a, i, kind_codes, starts, ends, kinds, n)
            if written < 0:
                unsure[piece] = True
            else:
                n = written
        piece += 1
        a = i + 1
    return starts[:n].copy(), ends[:n].copy(), kinds[:n].copy(), unsure


# ----------------------------------------------------------------------------------------------------
# The batch tokenizer's piece cache: a hash table of pieces (open addressing over the pieces' code
# points), and the kernels that look up a batch's pieces, scan the new ones and gather the tokens.
# `tokenize.BatchTokenizer` owns the arrays and grows them before each call (a kernel never
# allocates table space, so the table's memory is the caller's to bound).

_FNV_OFFSET = np.uint64(14695981039346656037)  # 64-bit FNV-1a (common practice for short keys)
_FNV_PRIME = np.uint64(1099511628211)
# Fields of a slot of the piece table (slots (S, 4) int64): the piece's hash, where its code points
# start in the arena (EMPTY: a free slot), its length << 32 | (rows + ROWS_BIAS), its first token
# row. Everything a lookup needs but the key itself sits in one 32-byte slot, so a hit costs the
# slot's cache line and the key's (the table outgrows the caches: a miss each).
SLOT_HASH, SLOT_START, SLOT_SIZE, SLOT_FIRST = range(4)
SLOT_FIELDS = 4
EMPTY = -1
ROWS_BIAS = 2  # rows are stored + 2 so that UNRESOLVED and TEMPORARY stay non-negative
UNRESOLVED = -1  # rows of a piece added this batch and not tokenized yet; in a piece's n_rows: see lookup
TEMPORARY = -2  # a piece's n_rows: tokenized for this batch only (too long to cache, or no room)
FULL = 1  # lookup's status: a new piece found no room; clear the cache and look the batch up again
# Pieces ahead whose slot `lookup_kernel` asks the memory for, and (half as far) whose key.
_SLOT_AHEAD = 16
_KEY_AHEAD = 8


@intrinsic
def _prefetch(typingctx, array, index):
    """Hint that array[index] will be read soon (LLVM's prefetch, for reading, kept in every cache
    level). No effect on any result; an index past the array is never read."""
    if not (isinstance(array, types.Array) and isinstance(index, types.Integer)):
        return None
    signature = types.void(array, index)

    def codegen(context, builder, sig, args):
        array_type = sig.args[0]
        made = context.make_array(array_type)(context, builder, args[0])
        item = context.cast(builder, args[1], sig.args[1], types.intp)
        zero = context.get_constant(types.intp, 0)
        pointer = cgutils.get_item_pointer(context, builder, array_type, made, [item] + [zero] * (array_type.ndim - 1))
        byte_pointer = ir.IntType(8).as_pointer()
        int32 = ir.IntType(32)
        prefetch = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(ir.VoidType(), [byte_pointer, int32, int32, int32]), "llvm.prefetch.p0")
        builder.call(prefetch, [builder.bitcast(pointer, byte_pointer), int32(0), int32(3), int32(1)])
        return context.get_dummy_value()

    return signature, codegen


@_jit
def _hash_of(cp, a, b):
    h = _FNV_OFFSET
    for i in range(a, b):
        h = (h ^ np.uint64(cp[i])) * _FNV_PRIME
    return h


@_jit
def _first_slot(h, mask):
    # FNV's low bits are weak for short keys that differ in their last character only: fold the
    # high half in before masking.
    return np.int64((h ^ (h >> np.uint64(29))) & np.uint64(mask))


@_jit
def _find(cp, a, b, h, slots, arena):
    """The slot of cp[a:b] in the table, and whether the piece is there (else the slot is the free
    one where it would go)."""
    mask = slots.shape[0] - 1
    i = _first_slot(h, mask)
    length = b - a
    signed_hash = np.int64(h)
    while True:
        start = slots[i, SLOT_START]
        if start == EMPTY:
            return i, False
        if (slots[i, SLOT_HASH] == signed_hash and (slots[i, SLOT_SIZE] >> 32) == length
                and same_run(arena, start, cp, a, length)):
            return i, True
        i = (i + 1) & mask


@_jit_cached
def lookup_kernel(cp, line_lengths, slots, arena, table_counts, cache_size, max_cached, may_clear):
    """Look up every piece of a batch string and add the new ones to the table.

    cp (C,) uint32: the batch's B lines joined by ' '; line_lengths (B,) int64, B >= 1. The table:
    slots (S, SLOT_FIELDS) int64 (S a power of two; see SLOT_*), arena (A,) uint32 of the pieces'
    code points, table_counts [pieces, arena used]; the caller makes room for every piece of the
    batch (S >= 2 min(cache_size, pieces + C + 1), A >= used + C).

    Returns (status, first, n_rows, offsets, per_line, new_starts, new_lengths, new_slots,
    temp_starts, temp_lengths, misses): per piece of ``cp`` split at ' ' (P,) its first token row and
    number of rows; or n_rows UNRESOLVED and first its slot (a piece new to the table: its rows are
    the caller's to find), or n_rows TEMPORARY and first its index among the temporary pieces;
    each piece's offset in its line (P,) and pieces per line (B,). The new pieces put in the table
    (start in cp, length, slot) and the temporary ones (start, length), in batch order; misses counts
    the pieces not found. A new piece that finds the table full (cache_size pieces) is temporary,
    and if ``may_clear`` the status is FULL: the caller is to clear the table and look up again.

    The pieces are split and hashed first; then each is looked up while the slots of the pieces
    _SLOT_AHEAD further on, and the keys of those _KEY_AHEAD on, are asked of memory (a lookup is
    otherwise two waits for memory in a row).
    """
    size = cp.shape[0]
    n_pieces = 1
    for i in range(size):
        if cp[i] == 32:
            n_pieces += 1
    bounds = np.empty(n_pieces + 1, dtype=np.int64)  # piece p is cp[bounds[p]:bounds[p + 1] - 1]
    hashes = np.empty(n_pieces, dtype=np.uint64)
    mask = slots.shape[0] - 1
    p = 0
    a = 0
    for i in range(size + 1):
        if i < size and cp[i] != 32:
            continue
        bounds[p] = a
        hashes[p] = _hash_of(cp, a, i)
        p += 1
        a = i + 1
    bounds[n_pieces] = size + 1
    first = np.empty(n_pieces, dtype=np.int64)
    n_rows = np.empty(n_pieces, dtype=np.int64)
    offsets = np.empty(n_pieces, dtype=np.int64)
    per_line = np.zeros(line_lengths.shape[0], dtype=np.int64)
    new_starts = np.empty(n_pieces, dtype=np.int64)
    new_lengths = np.empty(n_pieces, dtype=np.int64)
    new_slots = np.empty(n_pieces, dtype=np.int64)
    temp_starts = np.empty(n_pieces, dtype=np.int64)
    temp_lengths = np.empty(n_pieces, dtype=np.int64)
    n_new = 0
    n_temp = 0
    misses = 0
    n_cached = table_counts[0]
    arena_before = table_counts[1]
    arena_used = arena_before
    line = 0
    line_start = 0
    line_end = line_lengths[0]
    status = 0
    for p in range(n_pieces):
        if p + _SLOT_AHEAD < n_pieces:
            _prefetch(slots, _first_slot(hashes[p + _SLOT_AHEAD], mask))
        if p + _KEY_AHEAD < n_pieces:
            start = slots[_first_slot(hashes[p + _KEY_AHEAD], mask), SLOT_START]
            if start >= 0:
                _prefetch(arena, start)
        a = bounds[p]
        i = bounds[p + 1] - 1
        while a > line_end:  # the piece starts a later line (every line has at least one piece)
            line += 1
            line_start = line_end + 1
            line_end = line_start + line_lengths[line]
        per_line[line] += 1
        offsets[p] = a - line_start
        length = i - a
        if length == 0:
            first[p] = 0
            n_rows[p] = 0
            continue
        h = hashes[p]
        slot, found = _find(cp, a, i, h, slots, arena)
        if found:
            if slots[slot, SLOT_START] >= arena_before:  # added by this batch
                misses += 1
            rows = (slots[slot, SLOT_SIZE] & 0xFFFFFFFF) - ROWS_BIAS
            if rows >= 0:
                first[p] = slots[slot, SLOT_FIRST]
                n_rows[p] = rows
            else:
                first[p] = slot
                n_rows[p] = UNRESOLVED
            continue
        misses += 1
        if length <= max_cached and n_cached >= cache_size and may_clear:
            status = FULL  # the caller starts over; the lookups go on only to count misses
        if length <= max_cached and n_cached < cache_size and status != FULL:
            slots[slot, SLOT_HASH] = np.int64(h)
            slots[slot, SLOT_START] = arena_used
            slots[slot, SLOT_SIZE] = (length << 32) | (UNRESOLVED + ROWS_BIAS)
            slots[slot, SLOT_FIRST] = 0
            for j in range(length):
                arena[arena_used + j] = cp[a + j]
            arena_used += length
            new_starts[n_new] = a
            new_lengths[n_new] = length
            new_slots[n_new] = slot
            n_new += 1
            first[p] = slot
            n_rows[p] = UNRESOLVED
            n_cached += 1
        else:
            temp_starts[n_temp] = a
            temp_lengths[n_temp] = length
            first[p] = n_temp
            n_rows[p] = TEMPORARY
            n_temp += 1
    table_counts[0] = n_cached
    table_counts[1] = arena_used
    return (status, first, n_rows, offsets, per_line, new_starts[:n_new].copy(), new_lengths[:n_new].copy(),
            new_slots[:n_new].copy(), temp_starts[:n_temp].copy(), temp_lengths[:n_temp].copy(), misses)


@_jit_cached
def resolve_kernel(slots, new_slots, first, n_rows):
    """Record the rows of the pieces added in slots new_slots (K,): first (K,) and n_rows (K,) each."""
    for k in range(new_slots.shape[0]):
        slot = new_slots[k]
        slots[slot, SLOT_FIRST] = first[k]
        slots[slot, SLOT_SIZE] = (slots[slot, SLOT_SIZE] >> 32 << 32) | (n_rows[k] + ROWS_BIAS)


@_jit_cached
def rehash_kernel(old_slots, slots):
    """Put the pieces of ``old_slots`` into ``slots`` (S, SLOT_FIELDS), all free, by their hashes."""
    mask = slots.shape[0] - 1
    for k in range(old_slots.shape[0]):
        if old_slots[k, SLOT_START] == EMPTY:
            continue
        i = _first_slot(np.uint64(old_slots[k, SLOT_HASH]), mask)
        while slots[i, SLOT_START] != EMPTY:
            i = (i + 1) & mask
        for field in range(SLOT_FIELDS):
            slots[i, field] = old_slots[k, field]


@_jit_cached
def scan_pieces_kernel(cp, piece_starts, piece_lengths, row_starts, row_ends, row_kinds, first_row, kind_codes):
    """Tokens of the pieces cp[start:start + length] (K,), as rows first_row, first_row + 1, ...

    Writes each token's start and end in its piece and its kind (index into KINDS) to row_starts,
    row_ends and row_kinds (the caller has room for one row per character). Returns first (K,) and
    n_rows (K,) per piece (n_rows -1: unsure, no rows; see `scan`) and the number of rows written.
    Unlike `scan`, a tab inside a piece is no reason to be unsure: no part of the pattern can read
    white space (tests/test_tokenize_batch.py checks this for ' ' and tab), so a tab separates the
    tokens around it exactly as ' ' does, and the piece is scanned as the runs between its tabs.
    """
    n_given = piece_starts.shape[0]
    first = np.empty(n_given, dtype=np.int64)
    n_rows = np.empty(n_given, dtype=np.int64)
    # One piece at a time in a zero-padded buffer, as scan_kernel reads it (a 0 before the piece and
    # at least _PAD after it).
    buffer = np.zeros(1 + MAX_PIECE + _PAD, dtype=np.uint8)
    s = np.intp(buffer.ctypes.data)  # read by _at; buffer stays alive to the end
    n = first_row
    for j in range(n_given):
        a = piece_starts[j]
        length = piece_lengths[j]
        sure = length <= MAX_PIECE
        if sure:
            for q in range(length):
                c = cp[a + q]
                if c == _TAB:  # white space: it ends a token as ' ' does (a 0, as between scan's pieces)
                    buffer[1 + q] = 0
                    continue
                if c < 0x21 or c > 0x7E:
                    sure = False
                    break
                buffer[1 + q] = c
        t0 = n
        if sure:
            for q in range(1 + length, 1 + length + _PAD):
                buffer[q] = 0
            written = _write_tokens(buffer, s, 1, 1 + length, kind_codes, row_starts, row_ends, row_kinds, n)
            if written < 0:
                sure = False
            else:
                n = written
        if sure:
            first[j] = t0
            n_rows[j] = n - t0
        else:
            first[j] = 0
            n_rows[j] = -1
    return first, n_rows, n - first_row


@_jit_cached
def gather_kernel(first, n_rows, offsets, per_line, line_starts, slots, temp_first, temp_rows, row_starts,
                  row_ends, row_kinds):
    """Every token of a batch from its pieces (P,) (see lookup_kernel; the UNRESOLVED ones now
    resolved in ``slots``, the TEMPORARY ones by temp_first / temp_rows): rows (N,), starts and ends
    (N,) in the token's line, starts (N,) in the batch string (lines joined by ' ', line b from
    line_starts[b]), kinds (N,) int8, tokens per line (B,)."""
    n_pieces = first.shape[0]
    total = 0
    for p in range(n_pieces):
        r = n_rows[p]
        if r == UNRESOLVED:
            r = (slots[first[p], SLOT_SIZE] & 0xFFFFFFFF) - ROWS_BIAS
        elif r == TEMPORARY:
            r = temp_rows[first[p]]
        total += r
    rows = np.empty(total, dtype=np.int64)
    starts = np.empty(total, dtype=np.int64)
    ends = np.empty(total, dtype=np.int64)
    batch_starts = np.empty(total, dtype=np.int64)
    kinds = np.empty(total, dtype=np.int8)
    counts = np.zeros(per_line.shape[0], dtype=np.int64)
    t = 0
    p = 0
    for line in range(per_line.shape[0]):
        line_first = t
        line_start = line_starts[line]
        for _ in range(per_line[line]):
            f = first[p]
            r = n_rows[p]
            if r == UNRESOLVED:
                r = (slots[f, SLOT_SIZE] & 0xFFFFFFFF) - ROWS_BIAS
                f = slots[f, SLOT_FIRST]
            elif r == TEMPORARY:
                r = temp_rows[f]
                f = temp_first[f]
            shift = offsets[p]
            for q in range(f, f + r):
                rows[t] = q
                starts[t] = row_starts[q] + shift
                ends[t] = row_ends[q] + shift
                batch_starts[t] = starts[t] + line_start
                kinds[t] = row_kinds[q]
                t += 1
            p += 1
        counts[line] = t - line_first
    return rows, starts, ends, batch_starts, kinds, counts


_LOAD_LOCK = threading.Lock()
_loaded = None


def _load():
    """`scan_kernel`, compiled (from numba's cache if it can be read, else compiled afresh, silently:
    a corrupt or read-only cache must not stop tagging)."""
    global scan_kernel, _loaded
    with _LOAD_LOCK, warnings.catch_warnings():
        if _loaded is None:
            warnings.simplefilter("ignore", numba.NumbaWarning)
            sample = np.frombuffer("a 1".encode("utf-32-le"), dtype=np.uint32)
            try:
                scan_kernel(sample, _KIND_CODES)
            except Exception:  # noqa: BLE001 - a cache fault; a real compile error recurs below and is raised
                scan_kernel = _jit(scan_kernel.py_func)
                scan_kernel(sample, _KIND_CODES)
            _loaded = scan_kernel
    return _loaded


def scanner():
    """`scan`, its kernel compiled or loaded from the cache first (the loader `crf.compiled` calls);
    the batch kernels too (see `batch_kernels`), so that one call compiles the whole module."""
    _load()
    batch_kernels()
    return scan


class BatchKernels(NamedTuple):
    """The compiled kernels of `tokenize.BatchTokenizer`'s piece table."""

    lookup: object  # lookup_kernel
    resolve: object  # resolve_kernel
    rehash: object  # rehash_kernel
    scan_pieces: object  # scan_pieces_kernel
    gather: object  # gather_kernel
    kind_codes: np.ndarray  # scan_pieces' last argument


_batch_loaded = None
_BATCH_KERNELS = ("lookup_kernel", "resolve_kernel", "rehash_kernel", "scan_pieces_kernel", "gather_kernel")


def batch_kernels() -> BatchKernels:
    """The batch kernels, compiled or loaded from the cache (a loader for `crf.compiled`; a corrupt
    or read-only cache makes them compile afresh, silently)."""
    global _batch_loaded
    with _LOAD_LOCK, warnings.catch_warnings():
        if _batch_loaded is None:
            warnings.simplefilter("ignore", numba.NumbaWarning)
            try:
                _try_batch_kernels()
            except Exception:  # noqa: BLE001 - a cache fault; a real compile error recurs below and is raised
                globals().update((name, _jit(globals()[name].py_func)) for name in _BATCH_KERNELS)
                _try_batch_kernels()
            _batch_loaded = BatchKernels(*(globals()[name] for name in _BATCH_KERNELS), _KIND_CODES)
    return _batch_loaded


def new_slots(size: int) -> np.ndarray:
    """An empty piece table of ``size`` slots (a power of two): (size, SLOT_FIELDS) int64."""
    slots = np.zeros((size, SLOT_FIELDS), dtype=np.int64)
    slots[:, SLOT_START] = EMPTY
    return slots


def _try_batch_kernels() -> None:
    """Run each batch kernel once on a tiny table with the argument types the tokenizer uses."""
    cp = np.frombuffer("a 1".encode("utf-32-le"), dtype=np.uint32).copy()
    slots = new_slots(8)
    arena = np.zeros(8, dtype=np.uint32)
    counts = np.zeros(2, dtype=np.int64)
    found = lookup_kernel(cp, np.array([3], dtype=np.int64), slots, arena, counts, 4, 256, False)
    rehash_kernel(slots, new_slots(16))
    row_starts = np.zeros(8, dtype=np.int32)
    row_ends = np.zeros(8, dtype=np.int32)
    row_kinds = np.zeros(8, dtype=np.int8)
    first, n_rows, _ = scan_pieces_kernel(cp, found[5], found[6], row_starts, row_ends, row_kinds, 0, _KIND_CODES)
    resolve_kernel(slots, found[7], first, n_rows)
    empty = np.zeros(0, dtype=np.int64)
    gather_kernel(found[1], found[2], found[3], found[4], np.zeros(1, dtype=np.int64), slots, empty, empty,
                  row_starts, row_ends, row_kinds)


def scan(code_points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Tokens of a batch string, in one compiled pass.

    code_points (C,) uint32: the batch string (lines joined with ' '), one code point per character,
    e.g. ``np.frombuffer(joined.encode('utf-32-le', 'surrogatepass'), dtype=np.uint32)``.

    Returns starts (n,) int64 and ends (n,) int64, the tokens' offsets in the string, kinds (n,) int8
    (indices into `tokenize.KINDS`), and unsure (P,) bool, one flag per piece of ``joined.split(' ')``
    (P = number of ' ' + 1, empty pieces included). The tokens are those of the pieces not unsure,
    in order; for each such piece they are exactly ``tokenize(piece)``, shifted by its offset. The
    pieces marked unsure have no tokens here: tokenize them with the pattern (see the module
    docstring for when a piece is unsure).
    """
    cp = np.ascontiguousarray(code_points, dtype=np.uint32)
    if cp.ndim != 1:
        raise ValueError(f"scan expects a 1-D array of code points, got shape {cp.shape}")
    if not cp.flags.writeable:  # numba compiles a separate version for read-only arrays
        cp = cp.copy()
    return _load()(cp, _KIND_CODES)
