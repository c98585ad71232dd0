"""Tests for streamtag.scan_kernels.scan: for every piece it does not leave unsure, exactly the tokens
of ``tokenize``.

The reference is ``tokenize`` itself (the project's token pattern), whose own tests judge it
against RFCs and reference libraries (tests/test_tokenize.py); its corpora (RFC examples, the sample
log) go through the scanner here too, with the demo stream, adversarial pieces and generated text.
A few checks also go straight to outside references: ipaddress for IPv4 octets, uuid for UUIDs,
datetime for RFC 3339 timestamps, and the SemVer 2.0.0 examples for versions.
"""

from __future__ import annotations

import datetime
import ipaddress
import uuid
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import test_tokenize as reference_corpora
from streamtag.demo.generate import generate_stream
from streamtag.scan_kernels import MAX_PIECE, RULES_SCANNED, scan
from streamtag.tokenize import KINDS, tokenize

SAMPLE = Path(__file__).parent / "data" / "tokenize_sample.log"


# ------------------------------------------------------------------------------------------------
# helpers
# ------------------------------------------------------------------------------------------------


def code_points(text: str) -> np.ndarray:
    return np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype=np.uint32)


def scanned(text: str) -> tuple[list[str], list[bool], list[list[tuple[int, int, str]]]]:
    """Pieces of text.split(' '), their unsure flags, and per piece the scanner's tokens (start and
    end relative to the piece, kind), after checking the shapes and dtypes of scan's results."""
    starts, ends, kinds, unsure = scan(code_points(text))
    pieces = text.split(" ")
    assert starts.dtype == ends.dtype == np.int64 and kinds.dtype == np.int8 and unsure.dtype == np.bool_
    assert starts.shape == ends.shape == kinds.shape and unsure.shape == (len(pieces),)
    piece_starts = np.cumsum([0] + [len(piece) + 1 for piece in pieces[:-1]])
    owner = np.searchsorted(piece_starts, starts, side="right") - 1
    tokens: list[list[tuple[int, int, str]]] = [[] for _ in pieces]
    for start, end, kind, piece in zip(starts.tolist(), ends.tolist(), kinds.tolist(), owner.tolist()):
        assert not unsure[piece], "a token in an unsure piece"
        tokens[piece].append((start - int(piece_starts[piece]), end - int(piece_starts[piece]), KINDS[kind]))
    return pieces, unsure.tolist(), tokens


def reference(piece: str) -> list[tuple[int, int, str]]:
    tokens = tokenize(piece)
    return list(zip(tokens.starts, tokens.ends, tokens.kinds))


def documented_reason_to_be_unsure(piece: str) -> bool:
    """What the module docstring allows as a reason for an unsure piece, read on the whole piece:
    a character outside printable ASCII, or more than MAX_PIECE characters (URLs, e-mail and IPv6
    addresses are scanned)."""
    return len(piece) > MAX_PIECE or any(not "!" <= ch <= "~" for ch in piece)


def in_contexts(piece: str) -> tuple[str, ...]:
    """A piece alone, with trailing punctuation, in brackets, as a value and beside itself: where the
    pattern's rules for a piece's edges and its neighbours meet."""
    return (piece, piece + ".", piece + ")", "(" + piece, "x=" + piece + ",", piece + " " + piece)


def assert_scan_agrees(text: str) -> list[bool]:
    """Every piece not unsure has exactly tokenize's tokens; unsure pieces only for a documented
    reason; the scan plus the pattern on the unsure pieces gives tokenize(text). Returns the flags."""
    pieces, unsure, tokens = scanned(text)
    for piece, piece_unsure, piece_tokens in zip(pieces, unsure, tokens):
        if piece_unsure:
            assert documented_reason_to_be_unsure(piece), piece
        else:
            assert piece_tokens == reference(piece), piece
    return unsure


def only_scanned_token(text: str) -> tuple[str, str]:
    """The one token the scanner gives for a piece that must be scanned and kept whole."""
    pieces, unsure, tokens = scanned(text)
    assert unsure == [False], f"{text!r} left unsure"
    assert len(tokens[0]) == 1 and tokens[0][0][:2] == (0, len(text)), f"{text!r} split as {tokens[0]}"
    assert tokens[0] == reference(text)
    return text, tokens[0][0][2]


# ------------------------------------------------------------------------------------------------
# the contract
# ------------------------------------------------------------------------------------------------


def test_empty_string_spaces_and_piece_flags():
    # Python Library Reference, str.split with a separator: a run of k spaces leaves k - 1 empty
    # pieces, and '' is one empty piece; scan gives one flag per piece of that split.
    for text in ["", " ", "   ", " a  b ", "a"]:
        pieces, unsure, tokens = scanned(text)
        assert len(unsure) == text.count(" ") + 1
        assert [t for piece_tokens in tokens for t in piece_tokens] == [
            t for piece in pieces for t in reference(piece)]


def test_kinds_are_indices_into_kinds_and_rules_exist():
    # The kinds the scanner names are tokenize's own (DEVELOPERS.md, tokenize contract).
    assert set(RULES_SCANNED) <= set(KINDS)
    starts, ends, kinds, unsure = scan(code_points("2026-03-01 10.0.0.1 x 5ms ( web-03.example"))
    assert [KINDS[k] for k in kinds.tolist()] == ["timestamp", "ipv4", "word", "number", "punct", "host"]
    assert not unsure.any()


def test_input_forms():
    # Any integer array of code points is taken (converted to uint32); a read-only buffer too
    # (np.frombuffer of bytes is read-only); a 2-D array is refused (numpy shape rules, common practice).
    text = "ts=12:00:00 ok"
    expected = scan(code_points(text).copy())
    for form in (code_points(text), code_points(text).astype(np.int64), list(code_points(text))):
        got = scan(np.asarray(form))
        assert all(np.array_equal(x, y) for x, y in zip(got, expected))
    with pytest.raises(ValueError):
        scan(np.zeros((2, 2), dtype=np.uint32))


def test_unsure_pieces_by_reason():
    # Each reason of the module docstring leaves its piece unsure and the others scanned:
    # non-ASCII and control characters (tab is white space to the pattern, Python re: \s), an
    # over-long piece. An e-mail address (RFC 5322 section 3.4.1 addr-spec), a URI (RFC 3986 section
    # 3) and an IPv6 address (RFC 4291 section 2.2) are scanned (all from memory).
    text = "ok caf\u00e9 a\tb mary@x.test http://a.test/ 2001:db8::1 " + "y" * (MAX_PIECE + 1) + " end"
    pieces, unsure, tokens = scanned(text)
    assert unsure == [False, True, True, False, False, False, True, False]
    assert tokens[4] == reference("http://a.test/") == [(0, 14, "url")]
    assert tokens[0] == reference("ok") and tokens[-1] == reference("end")
    assert tokens[3] == reference("mary@x.test") == [(0, 11, "email")]
    assert tokens[5] == reference("2001:db8::1") == [(0, 11, "ipv6")]


def test_ordinary_ascii_log_lines_are_fully_scanned():
    # RFC 5424 section 6 header fields (from memory) and the key=value style (common practice):
    # nothing in these lines calls for a rule that is not scanned, so no piece may be left unsure.
    lines = [
        "<34>1 2003-10-11T22:14:15.003Z mymachine.example.com su - ID47 - 'su root' failed on /dev/pts/8",
        'time="2025-02-03 21:37:56" lvl=ERROR app=tarnwatch node=vrask-ci15.ops.orrivask.test '
        'msg="mount of /srv/ombrevale/data/ledger.db on gworv11 failed: EACCES" dur=13533ms',
        "Feb  3 20:46:22 thwind13 kobbit-ingest[18778]: user nerio.dreeory added to group depot-leads",
        "conn 198.51.100.7:443 -> 10.0.0.0/8 mac=00:1a:2b:3c:4d:5e id=f81d4fae-7dec-11d0-a765-00a0c91e6bf6 "
        "build v1.2.3-rc1 hash 0x1f deadbeef12 took 12.5ms (98%) ----- done...",
    ]
    for line in lines:
        assert not any(assert_scan_agrees(line)), line


# ------------------------------------------------------------------------------------------------
# outside references
# ------------------------------------------------------------------------------------------------


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=999), min_size=4, max_size=4), st.booleans())
def test_ipv4_octets_agree_with_ipaddress(octets, zero_pad):
    # ipaddress is the reference: a dotted quad is one ipv4 token exactly when ipaddress accepts it
    # (it rejects octets over 255 and leading zeros); either way the scan equals tokenize.
    candidate = ".".join(f"{o:03d}" if zero_pad else str(o) for o in octets)
    pieces, unsure, tokens = scanned(candidate)
    assert unsure == [False]
    assert ([kind for _, _, kind in tokens[0]] == ["ipv4"]) == reference_corpora.ipaddress_accepts_ipv4(candidate)
    assert tokens[0] == reference(candidate)


@pytest.mark.parametrize("suffix, prefix_length", [(":8080", None), (":65535", None), ("/24", 24), ("/8", 8)])
def test_ipv4_port_and_prefix_stay_with_the_address(suffix, prefix_length):
    # RFC 5737 section 3 documentation address (from memory); host:port is common practice, and a
    # CIDR prefix (RFC 4632 section 3.1, from memory) is read by ipaddress.ip_network.
    text, kind = only_scanned_token("192.0.2.0" + suffix)
    assert kind == "ipv4"
    if prefix_length is not None:
        assert ipaddress.ip_network(text, strict=False).prefixlen == prefix_length


@settings(max_examples=100, deadline=None)
@given(st.integers(min_value=0, max_value=2**128 - 1), st.booleans())
def test_uuids_agree_with_uuid_module(value, upper):
    # RFC 4122 section 3 string form; uuid.UUID writes it and reads back the scanner's token.
    form = str(uuid.UUID(int=value))
    form = form.upper() if upper else form
    text, kind = only_scanned_token(form)
    assert kind == "uuid" and uuid.UUID(text).int == value


@pytest.mark.parametrize("stamp", reference_corpora.RFC3339_STAMPS)  # RFC 3339 / RFC 5424 examples
def test_rfc3339_timestamps(stamp):
    # One timestamp token each; datetime.fromisoformat is the reference reader.
    text, kind = only_scanned_token(stamp)
    assert kind == "timestamp"
    datetime.datetime.fromisoformat(text.replace("Z", "+00:00"))


@pytest.mark.parametrize(
    "form",
    # SemVer 2.0.0 sections 9 and 10 examples (from memory)
    ["1.0.0-alpha", "1.0.0-alpha.1", "1.0.0-0.3.7", "1.0.0-x.7.z.92", "1.0.0+20130313144700",
     "1.0.0-beta+exp.sha.5114f85", "1.0.0-alpha+001"],
)
def test_semver_examples_are_one_version_token(form):
    assert only_scanned_token(form) == (form, "version")


# Hand-made e-mail pieces around the pattern's bounds: a local part of 64 characters at most (RFC 5321
# section 4.5.3.1.1, from memory), labels of 63 (RFC 1035 section 2.3.4, from memory), address
# literals (RFC 5321 section 4.1.3, from memory), dots, dashes and digits where labels may not take them.
_LOCAL_64, _LABEL_63 = "l" + "o" * 63, "d" + "x" * 62
EMAIL_PIECES = [
    "mary@x.test", "<mary@x.test>:", "mary@x.test.", "mary@x.test..", "john.q.public+logs@example.com",
    "a@b", "a@b.", "a@b.c", "a@b.c.", "a@b.c.1", "a@b.1", "a@1.b", "a@1.2", "a@b.c-d", "a@b.-c", "a@-b.c",
    "a@b_c.d", "a@_b.c", "a@b.c_d", "a@b..c", "a.@b.c", ".a@b.c", "a..b@c.d", "a+@b.c", "+a@b.c", "-a@b.c",
    "_a@b.c", "a@@b.c", "a@b@c.d", "a@b.c@d.e", "2026-03-01@x.test", "10.0.0.1@x.test", "12:00:00@x.test",
    "SDID@32473", "[exampleSDID@32473]", "a@[192.0.2.1]", "a@[192.0.2.1]x", "a@[IPv6:2001:db8::1]", "a@[1]",
    "a@[12]", "a@[]", "a@[" + "1" * 45 + "]", "a@[" + "1" * 46 + "]", "a@[1.2", "a@[a-b]",
    _LOCAL_64 + "@x.test", "x" + _LOCAL_64 + "@x.test", _LOCAL_64[:-1] + ".@x.test",
    "a@" + _LABEL_63 + ".test", "a@" + _LABEL_63 + "x.test", "a@x." + _LABEL_63, "a@x." + _LABEL_63 + "yz",
    "a@" + "b." * 16 + "c", "a@" + "b." * 17 + "c", "a@" + "b." * 16 + "1", "a@" + "b." * 15 + "c.1",
    "id=mary@x.test,", "(mary@x.test)", "'mary@x.test'", "user:mary@x.test", "mary@x.test:8080", "a@b.c:d@e.f",
    "ERROR:glasquel:senbel.brennessa@thwelt19:HSP-439", "INFO:calvorin:nobody@web-kvux-5:ENOSPC",
]


@pytest.mark.parametrize("piece", EMAIL_PIECES)
def test_email_pieces_are_scanned_as_the_pattern_reads_them(piece):
    # tokenize (the pattern, whose e-mail rule tests/test_tokenize.py checks with email.utils) is the
    # reference; none of these pieces gives the scanner a reason to be unsure.
    for text in (piece, piece + ".", piece + ">", "<" + piece, "x=" + piece + ","):
        assert not any(assert_scan_agrees(text)), text


_EMAIL_CHARS = st.sampled_from("ab1_.-+")
_LABEL = st.text(alphabet="ab1_-", min_size=0, max_size=66)


@settings(max_examples=1500, deadline=None)
@given(st.text(alphabet="ab1_.-+", min_size=0, max_size=68), st.lists(_LABEL, max_size=18),
       st.sampled_from(["", ".", "..", "]", ":x", "@y.z", ".1", "-"]), st.booleans())
def test_property_generated_email_pieces(local, labels, tail, literal):
    # Reference: tokenize, on address-like pieces whose local part, label count and label lengths
    # straddle the pattern's bounds (64, 16 labels, 63; RFC 5321 sections 4.5.3.1.1 and 4.1.3).
    domain = "[" + ".".join(labels)[:50].replace("_", ":") + "]" if literal else ".".join(labels)
    assert not any(assert_scan_agrees(local + "@" + domain + tail))


@settings(max_examples=400, deadline=None)
@given(st.integers(min_value=0, max_value=2**128 - 1), st.sampled_from(["compressed", "exploded", "mapped"]),
       st.sampled_from(["", "%eth0", "%1", "/64", "%eth0/48", "/129", "%", "%-", "%a.", "/", "/1234"]),
       st.sampled_from(["", ".", ",", ")", ":", ":x", ".x", "x", "]:443", "::", "-1"]))
def test_ipv6_addresses_agree_with_ipaddress(value, form, suffix, tail):
    # ipaddress writes the RFC 5952 (compressed), full (exploded) and IPv4-mapped (RFC 4291 section
    # 2.5.5.2) forms; the scanner gives tokenize's tokens, and a whole address token reads back.
    address = ipaddress.IPv6Address(value)
    if form == "mapped":
        address = ipaddress.IPv6Address(f"::ffff:{ipaddress.IPv4Address(value & 0xFFFFFFFF)}")
    text = str(address) if form != "exploded" else address.exploded
    for piece in (text + suffix + tail, "[" + text + suffix + tail, "ip=" + text + suffix + tail):
        pieces, unsure, tokens = scanned(piece)
        assert unsure == [False], piece
        assert tokens[0] == reference(piece), piece
    pieces, unsure, tokens = scanned(text + suffix + tail)
    start, end, kind = tokens[0][0]
    if suffix in ("", "%eth0", "%1", "/64", "%eth0/48") and tail in ("", ".", ",", ")"):
        assert kind == "ipv6", text + suffix + tail       # nothing after it reads as more address
    if kind == "ipv6":
        assert start == 0
        assert ipaddress.IPv6Address((text + suffix + tail)[:end].split("%")[0].split("/")[0]) == address


# RFC 4291 section 2.2 text forms and RFC 5952 section 4 examples (from memory), with edges of the
# pattern's forms: heads of 1..7 parts, '::' at either end, IPv4 tails, zone and prefix bounds.
IPV6_PIECES = [
    "ABCD:EF01:2345:6789:ABCD:EF01:2345:6789", "2001:DB8:0:0:8:800:200C:417A", "2001:DB8::8:800:200C:417A",
    "FF01::101", "::1", "::", "0:0:0:0:0:0:13.1.68.3", "0:0:0:0:0:FFFF:129.144.52.38", "::13.1.68.3",
    "::FFFF:129.144.52.38", "2001:db8::1:0:0:1", "2001:0db8::0001", "2001:db8:0:0:0:0:2:1", "2001:db8::2:1",
    "1:2:3:4:5:6:7:8", "1:2:3:4:5:6:7::", "1:2:3:4:5:6::8", "1:2:3:4:5::7:8", "1:2:3:4::6:7:8",
    "1:2:3::5:6:7:8", "1:2::4:5:6:7:8", "1::3:4:5:6:7:8", "::2:3:4:5:6:7:8", "1:2:3:4:5:6:7:8:9",
    "1:2:3:4:5:6:7", "1::2::3", ":::", "1:::2", "12345::1", "1:2:3:4:5:6:1.2.3.4", "1:2:3:4:5::1.2.3.4",
    "1::1.2.3.4", "::1.2.3.256", "::1.2.3", "::1.2.3.4.5", "::1.2.3.4:5", "1::2:3:4:5:6:1.2.3.4",
    "fe80::1%eth0", "fe80::1%", "fe80::1%.", "fe80::1%a.b", "fe80::1%a.", "fe80::1%" + "z" * 31,
    "fe80::1%" + "z" * 32, "fe80::1%" + "z" * 33, "fe80::1%eth0/64", "2001:db8::/32", "2001:db8::/1234",
    "2001:db8::/", "2001:db8::1/64.", "2001:db8::1.", "2001:db8::1:", "2001:db8::1:x", "2001:db8::1.x",
    "2001:db8::1_", "2001:db8::g", "::ffff", "::ffff:", "ab::cd::", "a:b", "a:b:c", "00:1a:2b:3c:4d:5e",
    "00:1a:2b:3c:4d:5e:6f", "dead:beef::", "[2001:db8::1]:443", "::1]:8080", "1:2:3:4:5:6::1.2.3.4",
    "0000:0000:0000:0000:0000:0000:0000:0001", "1:2:3:4:5:6:7:8/128%x", "::1%a~b-c_d", "1::%z",
]


@pytest.mark.parametrize("piece", IPV6_PIECES)
def test_ipv6_pieces_are_scanned_as_the_pattern_reads_them(piece):
    # tokenize (the pattern, tested against ipaddress in tests/test_tokenize.py) is the reference.
    for text in in_contexts(piece):
        assert not any(assert_scan_agrees(text)), text


@settings(max_examples=2000, deadline=None)
@given(st.text(alphabet="0123456789abcdefABCDEF::::::..%/_-~gx", max_size=48))
def test_property_ipv6_alphabet(text):
    # Reference: tokenize, on runs of hex digits, colons, dots, zones and prefixes, where the
    # pattern's nine IPv6 forms backtrack into each other.
    assert not any(assert_scan_agrees(text))


# URL pieces (RFC 3986 section 3 syntax, from memory) around the pattern's bounds: a scheme of 32
# characters at most, '[...]' host literals and '(...)' parts of 64 at most, trailing punctuation.
URL_PIECES = [
    "http://a.test/", "https://portal.orrivask.example/tickets/6044)", "HTTP://STATUS.ORRIVASK.EXAM",
    "(http://a.test/x)", "<http://a.test/x>", '"http://a.test/x"', "http://a.test/x.", "http://a.test/x...",
    "http://a.test/x.,y", "http://a.test/x?a=1&b=2#frag", "http://a.test/x?", "http://a.test/x?!",
    "http://[2001:db8::1]:8080/x", "http://[2001:db8::1", "http://a.test/wiki/X_(y)", "http://a.test/(a(b)c)",
    "http://a.test/(" + "z" * 64 + ")", "http://a.test/(" + "z" * 65 + ")", "http://a.test/[" + "1" * 64 + "]",
    "http://a.test/[" + "1" * 65 + "]", "http://a.test/(x", "http://a.test/[x]", "http://a.test/[x/]",
    "http://a.test/.[x]", "http://a.test/.(x)", "http://a.test/:(", "http://", "http:///", "http://.",
    "a" * 32 + "://x", "a" * 33 + "://x", "1a://x", "a+b-c.d://x", "x=http://a.test/,", "mailto:a@b.c",
    "urn:uuid:f81d4fae-7dec-11d0-a765-00a0c91e6bf6", "ftp://user:pw@host.test:21/a;type=i", "a:/b", "a:/",
    "http://a.test/{x}", "http://a.test/a|b", "http://a.test/a\\b", "http://a.test/a^b", "http://a.test/a`b",
]


@pytest.mark.parametrize("piece", URL_PIECES)
def test_url_pieces_are_scanned_as_the_pattern_reads_them(piece):
    # tokenize (the pattern, tested against urllib.parse in tests/test_tokenize.py) is the reference.
    for text in in_contexts(piece):
        assert not any(assert_scan_agrees(text)), text


@settings(max_examples=2000, deadline=None)
@given(st.text(alphabet="ab1:/.,;!?()[]<>\"'{}|^`%_~-=&#@", max_size=40))
def test_property_url_alphabet(text):
    # Reference: tokenize, on text after a scheme, where the URL body's parts and its trailing
    # punctuation rule meet.
    assert not any(assert_scan_agrees("http://" + text))


# ------------------------------------------------------------------------------------------------
# corpora of tokenize's own tests, the sample log and the demo stream
# ------------------------------------------------------------------------------------------------


def test_rfc_corpora_of_tokenize_tests():
    # RFC 5424 section 6.5 examples, RFC 3986 section 1.1.2 URIs, RFC 5322 appendix A.1 headers,
    # RFC 4291 / RFC 5952 IPv6 forms (all from memory, as tests/test_tokenize.py says beside them).
    corpus = (reference_corpora.RFC5424_EXAMPLES + reference_corpora.RFC3986_WITH_AUTHORITY
              + reference_corpora.RFC3986_WITHOUT_AUTHORITY + reference_corpora.RFC5322_HEADERS
              + reference_corpora.RFC4291_FORMS + [w for pair in reference_corpora.RFC5952_RECOMMENDED for w in pair]
              + reference_corpora.RFC5952_SAME_ADDRESS)
    flags = []
    for line in corpus:
        flags += assert_scan_agrees(line)
    assert flags.count(False) > len(flags) // 2  # most pieces of these lines are scanned


def test_sample_log():
    # tests/data/tokenize_sample.log, whose tokens tests/test_tokenize.py checks against the RFCs.
    text = SAMPLE.read_text(encoding="utf-8")
    flags = []
    for line in text.splitlines():
        flags += assert_scan_agrees(line)
    assert sum(flags) < 0.1 * len(flags)


def test_demo_stream_in_one_batch():
    # The demo stream (invented lines of every shape the demo model knows), joined with ' ' as a
    # batch; few pieces may be unsure (e-mail addresses, URLs, IPv6, non-ASCII names).
    lines = [record["text"] for record in generate_stream(2000, seed=3)]
    unsure = assert_scan_agrees(" ".join(lines))
    assert sum(unsure) < 0.05 * len(unsure)


# Pieces around every scanned rule's edges (from the rules' own standards and log practice, common
# practice): octets 255/256 and leading zeros, out-of-range times, short versions, hex ids of 7 and 8
# digits, units, signs, dashes, separator runs and trailing punctuation.
ADVERSARIAL = [
    "255.255.255.255", "256.1.1.1", "1.1.1.256", "01.2.3.4", "1.2.3.04", "10.0.0.1:123456", "10.0.0.1:",
    "10.0.0.1/", "10.0.0.1/123", "10.0.0.1.5", "10.0.0.1.a", "10.0.0.1a", "1.2.3.4-5", "25:61:61", "23:59:60",
    "23:59:61.", "24:00:00+25", "12:00:00Z", "12:00:00z1", "12:00:00+0100", "12:00:00+01:00", "12:00:00+01:0",
    "12:00:00:00", "12:00:00:x", "12:00:00.1234567890", "12:00:00,5", "12:00", "2026-03-01T12:00", "2026-13-01",
    "2026-03-01T12:00:00.Z", "2026-03-01T1", "2026-03-01:5", "2026-03-01:x", "20260301T120000Z",
    "20260301T120000.5+01", "20260301T12000", "1.2.3", "1.2", "1.2.3.", "1.2.3-", "1.2.3-rc1", "1.2.3rc1",
    "1.2.3a1-b", "1.2.3-a.b.c.d.e.f.g.h.i.j.k.l.m", "1.2.3-a.b.c.d.e.f.g.h.i.j.k.l", "v1", "v1.2", "V2x",
    "v1.", "v1-", "v", "v1.2.3-rc.1+build.5", "0x1f", "0x1g", "0x", "0X1F.", "0x1f-a", "deadbeef", "deadbee1",
    "eadbee1", "12345678", "1234567a", "deadbeef1.example", "abcdef12-", "-5", "+5", "a-5", "a+5", "5-5", "-5.5",
    "1e5", "1e+5", "1e-", "1E5x", "5ms", "5msabcd", "5abcdefg", "5MB/s", "5MB/sec", "5MB/secs", "5MB/s1", "5MB/", "5%", "5%%", "5.5.",
    "5.5.5", "12.5ms.", "--", "---", "==", "...", "..", ".", "**", "##", "~~", "~/x", "~user/x", "~/.", "./x",
    "../x", "./.", "/", "/.", "/a.", "/a/", "a/b", "C:\\x", "c:/x", "C:", "C:\\", "aC:\\x", "\\\\srv\\share",
    "\\\\srv", "\\\\\\x", "don't", "do-nuts", "do--nuts", "a'", "a'1", "a'b'c", "x86_64", "_x", "web-03.",
    "web-03.example.", "a.b", "a..b", "a.-b", "a-.b", "ID47", "00:1a:2b:3c:4d:5e", "00-1a-2b-3c-4d-5e",
    "00:1a:2b:3c:4d:5e:", "00:1a:2b:3c:4d", "00-1a-2b-3c-4d-5e-", "00:1a:2b:3c:4d:5e.x", "aa:bb:cc:dd:ee:ff",
    "urn:uuid:f81d4fae-7dec-11d0-a765-00a0c91e6bf6", "URN:UUID:F81D4FAE-7DEC-11D0-A765-00A0C91E6BF6",
    "urn:uuid:f81d4fae-7dec-11d0-a765-00a0c91e6bf", "f81d4fae-7dec-11d0-a765-00a0c91e6bf6-x",
    "f81d4fae-7dec-11d0-a765-00a0c91e6bf6.", "(x)", "[1]", "x:", "x,", "x.", "x;", '"x"', "'x'", "a=b", "k=v,",
    "a:b", "a:b:c", "1:2:3", "1::", "::", ":::", "a-", "-a", "a--", "--a", "a_-b", "1-2-3", "2026-03-01-",
]


@pytest.mark.parametrize("piece", ADVERSARIAL)
def test_adversarial_pieces(piece):
    # tokenize (the project's pattern, itself tested against RFCs) is the reference for each piece,
    # alone and with trailing punctuation and a neighbour piece.
    for text in in_contexts(piece):
        assert_scan_agrees(text)


# ------------------------------------------------------------------------------------------------
# generated text (hypothesis)
# ------------------------------------------------------------------------------------------------

# Weighted towards log text: digits and the separators of addresses, times, versions and paths
# come several times, letters a-f (hex) more than others.
LOG_ALPHABET = ("0123456789" * 4 + ".:-_=,[]()\"'+/@" * 2 + "abcdef" * 2 + "ABCDEFxXvVTtZzmsgk%~\\#*!?;<>&$ ")
FRAGMENTS = ADVERSARIAL + reference_corpora.LOG_FRAGMENTS + reference_corpora.FAST_PATH_EDGES + list(LOG_ALPHABET)


@settings(max_examples=1500, deadline=None)
@given(st.text(alphabet=LOG_ALPHABET, max_size=60))
def test_property_log_alphabet(text):
    # Reference: tokenize, piece by piece.
    assert_scan_agrees(text)


@settings(max_examples=1500, deadline=None)
@given(st.lists(st.sampled_from(FRAGMENTS), max_size=12).map("".join))
def test_property_log_fragments(text):
    # Reference: tokenize, on fragments that start and end every rule, glued in random order.
    assert_scan_agrees(text)


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=40))
def test_property_arbitrary_text(text):
    # Reference: tokenize, on hypothesis' default text (all planes, controls): such pieces are unsure.
    assert_scan_agrees(text)
