"""The batch decoder (``decode_lines``) against the per-line one (``decode_text``), on tricky bytes.

``decode_text`` is the reference path; ``decode_lines`` must give, for every line, exactly what it
gives (a plain ``str`` standing for ``DecodedLine(text, text, [])``). External references named
beside the checks:
- RFC 3629 (UTF-8): section 3 (byte ranges; C0, C1, F5..FF never appear; no surrogates), section 7
  (the worked example "A<NOT IDENTICAL TO><ALPHA>." = 41 E2 89 A2 CE 91 2E), section 10 (overlong
  forms such as C0 AF for "/" are invalid).
- ECMA-48 (5th ed.): section 5.4 (control sequences: CSI, parameter, intermediate and final bytes),
  section 8.3.89 (OSC), section 8.3.86 (NEL, the C1 control 08/05 = U+0085).
- Python's codecs (strict UTF-8 decoding) and ``unicodedata.category`` ("Cc") as general-purpose
  reference libraries.
"""

from __future__ import annotations

import unicodedata

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag.decode import DecodedLine, decode_lines, decode_text


def as_decoded(item) -> DecodedLine:
    """A plain line stands for DecodedLine(text, text, [])."""
    return DecodedLine(item, item, []) if isinstance(item, str) else item


def assert_same_as_per_line(datas: list[bytes]) -> list:
    fast = decode_lines(datas)
    assert len(fast) == len(datas)
    for data, item in zip(datas, fast):
        assert as_decoded(item) == decode_text(data), data
    return fast


PLAIN = [
    b"gatewarden[311]: login failed for user kestrel from 192.0.2.14 port 2201",
    b"relay-07 link up\ton nic0",  # TAB is white space, not a control (unicodedata: "Cc" but kept)
    "host brindle-04 up \u00e9t\u00e9 \u2262 \U0001f600".encode(),
    b"\x41\xe2\x89\xa2\xce\x91\x2e",  # RFC 3629 section 7: "A<NOT IDENTICAL TO><ALPHA>." is valid
    b"",  # an empty line
]


def test_plain_batch_comes_back_as_strings():
    fast = assert_same_as_per_line(PLAIN)
    assert all(type(item) is str for item in fast)
    # RFC 3629 section 7 worked example decodes to U+0041 U+2262 U+0391 U+002E
    assert fast[3] == "A\u2262\u0391."


@pytest.mark.parametrize("dirty", [
    b"\xc0\xaf etc/passwd",  # RFC 3629 section 10: overlong "/" is invalid
    b"surrogate \xed\xa0\x80 here",  # RFC 3629 section 3: U+D800 must not be encoded
    b"bytes \xf5\x80\x80\x80 and \xff",  # RFC 3629 section 3: F5..FF never appear
    b"cut short \xe2\x89",  # a sequence cut by the line end (as a byte cap may do)
    b"user\x00kestrel",  # NUL
    b"\x1b[1;31mERROR\x1b[0m relay-07",  # ECMA-48 5.4: CSI ... final byte
    b"\x1b]0;title\x07down",  # ECMA-48 8.3.89: OSC ... terminated by BEL
    b"\x1bMreverse index",  # ECMA-48: ESC Fe (0x40-0x5F), here RI
    "next\u0085line".encode(),  # ECMA-48 8.3.86: NEL is the C1 control U+0085 (UTF-8 C2 85)
    "not a control \u00a0 \u0100".encode(),  # C2 A0 and C4 80: outside C1 (unicodedata: "Zs", "Lu")
    b"carriage\rreturn inside",  # CR inside a line (a CRLF's CR at the end is cut by the follower)
    b"trailing CR\r",
    b"delete \x7f char",  # DEL is a C0-set control (unicodedata: "Cc")
    bytes(range(256)),  # every byte value: binary
])
def test_one_dirty_line_among_plain_ones(dirty):
    fast = assert_same_as_per_line(PLAIN + [dirty] + PLAIN)
    # the plain lines stay plain around the dirty one
    assert all(type(item) is str for i, item in enumerate(fast) if i != len(PLAIN))


def test_c1_controls_found_by_the_byte_scan_are_the_unicode_cc_ones():
    # unicodedata: U+0080..U+009F are "Cc"; U+00A0..U+00BF are not. Encoded, they share lead byte C2.
    for code in range(0x80, 0xC0):
        line = chr(code).encode()
        (item,) = decode_lines([b"plain " + line])
        is_control = unicodedata.category(chr(code)) == "Cc"
        assert (type(item) is not str) == is_control, hex(code)
        assert "control_chars" in as_decoded(item).flags if is_control else True


def test_empty_batch():
    assert decode_lines([]) == []


# Bytes that exercise every branch: ASCII, TAB, C0 controls, DEL, ESC and the ECMA-48 introducers,
# C2 lead bytes (C1 controls and not), other multi-byte starts, continuation and never-valid bytes.
_PIECES = st.sampled_from([
    b"a", b"Z", b"7", b" ", b"\t", b"\x00", b"\x01", b"\x1f", b"\x7f", b"\x1b", b"[", b"]", b"m", b"\x07",
    b"\\", b"\xc2", b"\x80", b"\x85", b"\x9f", b"\xa0", b"\xc3\xa9", b"\xe2\x89\xa2", b"\xf0\x9f\x98\x80",
    b"\xed\xa0\x80", b"\xc0", b"\xff", b"\r",
])
_LINES = st.lists(_PIECES, max_size=40).map(b"".join)


@settings(max_examples=300, deadline=None)
@given(st.lists(_LINES, max_size=12))
def test_any_batch_decodes_as_line_by_line(datas):
    assert_same_as_per_line(datas)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(max_size=30), max_size=12))
def test_any_valid_utf8_batch_decodes_as_line_by_line(texts):
    # Python's strict UTF-8 codec is the reference for what is valid (RFC 3629)
    datas = [text.encode("utf-8", "surrogatepass") for text in texts]
    assert_same_as_per_line(datas)
