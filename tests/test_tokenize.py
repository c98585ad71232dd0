"""Tests for streamtag.tokenize: offsets, kinds, standard text forms, properties and linear time.

Each check names its source. RFC examples are reproduced from memory (said so beside each one);
reference libraries (ipaddress, uuid, urllib.parse, email.utils, datetime) judge the results.
"""

from __future__ import annotations

import datetime
import email.utils
import gc
import ipaddress
import sys
import time
import unicodedata
import urllib.parse
import uuid
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag.errors import DataError
from streamtag.tokenize import KINDS, TokenList, token_kind, tokenize

SAMPLE = Path(__file__).parent / "data" / "tokenize_sample.log"


# ------------------------------------------------------------------------------------------------
# helpers
# ------------------------------------------------------------------------------------------------


def check_invariants(line: str, tokens: TokenList) -> None:
    """The contract in DEVELOPERS.md: in order, no overlap, in bounds, exact slices, no white space,
    every non-white-space character covered, kinds from KINDS."""
    texts, starts, ends, kinds = tokens
    assert len(texts) == len(starts) == len(ends) == len(kinds)
    covered = [False] * len(line)
    previous_end = 0
    for text, start, end, kind in zip(texts, starts, ends, kinds):
        assert 0 <= previous_end <= start < end <= len(line)
        assert text == line[start:end]
        assert not any(ch.isspace() for ch in text)
        assert kind in KINDS
        for i in range(start, end):
            covered[i] = True
        previous_end = end
    for i, ch in enumerate(line):
        assert covered[i] or ch.isspace(), f"character {ch!r} at {i} not in any token"


def ipaddress_accepts_ipv4(candidate: str) -> bool:
    """Whether Python's ipaddress takes ``candidate`` as an IPv4 address (it rejects octets over 255
    and leading zeros): the reference for what the tokenizer calls one."""
    try:
        ipaddress.IPv4Address(candidate)
    except ValueError:
        return False
    return True


def only_token(text: str) -> tuple[str, str]:
    """Tokenize text that must come out as exactly one token; return (token, kind)."""
    tokens = tokenize(text)
    assert tokens.texts == [text], f"{text!r} split as {tokens.texts}"
    return tokens.texts[0], tokens.kinds[0]


def token_at(tokens: TokenList, start: int, end: int) -> str:
    """Kind of the token that spans exactly [start, end); fails if there is none."""
    for s, e, kind in zip(tokens.starts, tokens.ends, tokens.kinds):
        if (s, e) == (start, end):
            return kind
    raise AssertionError(f"no token spans [{start}, {end}): {list(zip(tokens.starts, tokens.texts))}")


def pairs(line: str) -> list[tuple[str, str]]:
    tokens = tokenize(line)
    return list(zip(tokens.texts, tokens.kinds))


# ------------------------------------------------------------------------------------------------
# IPv6 (RFC 4291 section 2.2, RFC 5952 section 4), judged by ipaddress
# ------------------------------------------------------------------------------------------------

# RFC 4291 section 2.2, the three conventional text forms and their examples (from memory).
RFC4291_FORMS = [
    "ABCD:EF01:2345:6789:ABCD:EF01:2345:6789",  # 2.2 form 1, preferred x:x:x:x:x:x:x:x
    "2001:DB8:0:0:8:800:200C:417A",  # 2.2 form 1, leading zeros not needed
    "2001:DB8::8:800:200C:417A",  # 2.2 form 2, compressed unicast address
    "FF01:0:0:0:0:0:0:101",  # 2.2 form 2, multicast address, uncompressed
    "FF01::101",  # 2.2 form 2, multicast address, compressed
    "0:0:0:0:0:0:0:1",  # 2.2 form 2, loopback, uncompressed
    "::1",  # 2.2 form 2, loopback, compressed
    "0:0:0:0:0:0:0:0",  # 2.2 form 2, unspecified, uncompressed
    "::",  # 2.2 form 2, unspecified, compressed
    "0:0:0:0:0:0:13.1.68.3",  # 2.2 form 3, IPv4 in the low 32 bits
    "0:0:0:0:0:FFFF:129.144.52.38",  # 2.2 form 3
    "::13.1.68.3",  # 2.2 form 3, compressed
    "::FFFF:129.144.52.38",  # 2.2 form 3, compressed
]

# RFC 5952 section 4: (form as written, recommended form) pairs (from memory).
RFC5952_RECOMMENDED = [
    ("2001:0db8::0001", "2001:db8::1"),  # 4.1 leading zeros suppressed
    ("2001:db8:0:0:0:0:2:1", "2001:db8::2:1"),  # 4.2.1 shorten as much as possible
    ("2001:db8::0:1", "2001:db8::1"),  # 4.2.1
    ("2001:db8::1:1:1:1:1", "2001:db8:0:1:1:1:1:1"),  # 4.2.2 no '::' for one 16-bit 0 field
    ("2001:0:0:1:0:0:0:1", "2001:0:0:1::1"),  # 4.2.3 longest run of zeros is shortened
    ("2001:db8:0:0:1:0:0:1", "2001:db8::1:0:0:1"),  # 4.2.3 first of equal runs is shortened
    ("2001:DB8::1", "2001:db8::1"),  # 4.3 lower case
]

# RFC 5952 section 2.1: many text forms of one address (from memory).
RFC5952_SAME_ADDRESS = [
    "2001:db8:0:0:1:0:0:1",
    "2001:0db8:0:0:1:0:0:1",
    "2001:db8::1:0:0:1",
    "2001:db8::0:1:0:0:1",
    "2001:0db8::1:0:0:1",
    "2001:db8:0:0:1::1",
    "2001:db8:0000:0:1::1",
    "2001:DB8:0:0:1::1",
]


@pytest.mark.parametrize("form", RFC4291_FORMS)
def test_rfc4291_text_forms_are_one_ipv6_token(form):
    # RFC 4291 section 2.2 (from memory); ipaddress is the reference parser.
    text, kind = only_token(form)
    assert kind == "ipv6"
    ipaddress.ip_address(text)


@pytest.mark.parametrize("written, recommended", RFC5952_RECOMMENDED)
def test_rfc5952_forms_are_one_ipv6_token(written, recommended):
    # RFC 5952 section 4 (from memory); ipaddress prints the RFC 5952 form, so both must agree.
    for form in (written, recommended):
        text, kind = only_token(form)
        assert kind == "ipv6"
        assert ipaddress.ip_address(text).compressed == recommended


def test_rfc5952_same_address_forms():
    # RFC 5952 section 2.1 (from memory): all these name 2001:db8::1:0:0:1 (section 4.2.3 form).
    for form in RFC5952_SAME_ADDRESS:
        text, kind = only_token(form)
        assert kind == "ipv6"
        assert ipaddress.ip_address(text) == ipaddress.ip_address("2001:db8::1:0:0:1")


def test_rfc5952_mixed_notation_and_zone_and_prefix():
    # RFC 5952 section 5 (from memory): IPv4-mapped addresses are written ::ffff:192.0.2.1.
    text, kind = only_token("::ffff:192.0.2.1")
    assert kind == "ipv6" and ipaddress.ip_address(text).ipv4_mapped == ipaddress.ip_address("192.0.2.1")
    # RFC 4007 section 11 (from memory): zone index after '%'; ipaddress parses scope ids.
    text, kind = only_token("fe80::1%eth0")
    assert kind == "ipv6" and ipaddress.ip_address(text).scope_id == "eth0"
    # RFC 4291 section 2.3 prefix examples (from memory); ipaddress.ip_network reads them.
    for form in ("2001:0DB8:0000:CD30:0000:0000:0000:0000/60", "2001:0DB8::CD30:0:0:0:0/60", "2001:0DB8:0:CD30::/60"):
        text, kind = only_token(form)
        assert kind == "ipv6"
        assert ipaddress.ip_network(text) == ipaddress.ip_network("2001:db8:0:cd30::/60")


def test_ipv6_in_a_sentence_with_trailing_punctuation():
    # RFC 4291 section 2.2 addresses (from memory) inside prose; punctuation splits off (common practice).
    line = "Peers: 2001:DB8::8:800:200C:417A, ::1; (FF01::101) and ::FFFF:129.144.52.38. Done: ::."
    tokens = tokenize(line)
    check_invariants(line, tokens)
    got = [t for t, k in zip(tokens.texts, tokens.kinds) if k == "ipv6"]
    assert got == ["2001:DB8::8:800:200C:417A", "::1", "FF01::101", "::FFFF:129.144.52.38", "::"]
    for text in got:
        ipaddress.ip_address(text)
    assert pairs(line)[-2:] == [("::", "ipv6"), (".", "punct")]


@given(st.integers(min_value=0, max_value=2**128 - 1))
def test_any_ipv6_address_in_compressed_and_exploded_form(value):
    # ipaddress is the reference: every address it prints reads back as one ipv6 token.
    address = ipaddress.IPv6Address(value)
    for form in (address.compressed, address.exploded, address.compressed.upper()):
        text, kind = only_token(form)
        assert kind == "ipv6" and ipaddress.ip_address(text) == address


@given(st.text(alphabet="0123456789abcdefABCDEF:.", min_size=1, max_size=45))
def test_ipv6_kind_agrees_with_ipaddress(candidate):
    # ipaddress is the reference: a hex/colon/dot string is one ipv6 token if and only if
    # ipaddress reads it as an IPv6 address.
    try:
        valid = isinstance(ipaddress.ip_address(candidate), ipaddress.IPv6Address)
    except ValueError:
        valid = False
    tokens = tokenize(candidate)
    assert (tokens.texts == [candidate] and tokens.kinds == ["ipv6"]) == valid


# ------------------------------------------------------------------------------------------------
# IPv4 (RFC 5737 documentation addresses), judged by ipaddress
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("form", ["192.0.2.1", "198.51.100.7", "203.0.113.254", "0.0.0.0", "255.255.255.255"])
def test_ipv4_without_port(form):
    # RFC 5737 section 3 documentation ranges (from memory); ipaddress is the reference parser.
    text, kind = only_token(form)
    assert kind == "ipv4" and ipaddress.ip_address(text) == ipaddress.IPv4Address(form)


@pytest.mark.parametrize("form", ["192.0.2.1:8080", "198.51.100.7:443", "203.0.113.9:65535"])
def test_ipv4_with_port(form):
    # host:port is the usual log notation (common practice); ipaddress parses the address part.
    text, kind = only_token(form)
    address, port = text.rsplit(":", 1)
    assert kind == "ipv4"
    ipaddress.ip_address(address)
    assert 0 < int(port) <= 65535


def test_ipv4_in_key_value_and_sentence():
    # key=value splitting and sentence-final '.' (common practice); ipaddress checks the address.
    assert pairs("src=10.0.0.1 dst=192.0.2.1:53.") == [
        ("src", "word"), ("=", "punct"), ("10.0.0.1", "ipv4"),
        ("dst", "word"), ("=", "punct"), ("192.0.2.1:53", "ipv4"), (".", "punct"),
    ]
    ipaddress.ip_address("10.0.0.1")
    # CIDR prefix stays with the address (common practice); ipaddress.ip_network agrees.
    text, kind = only_token("192.0.2.0/24")
    assert kind == "ipv4" and ipaddress.ip_network(text).num_addresses == 256


@given(st.lists(st.integers(min_value=0, max_value=999), min_size=4, max_size=4), st.booleans())
def test_ipv4_kind_agrees_with_ipaddress(octets, zero_pad):
    # ipaddress is the reference: dotted quads are one ipv4 token exactly when ipaddress accepts
    # them (it rejects octets over 255 and leading zeros).
    candidate = ".".join(f"{o:03d}" if zero_pad else str(o) for o in octets)
    tokens = tokenize(candidate)
    assert (tokens.kinds == ["ipv4"]) == ipaddress_accepts_ipv4(candidate)
    check_invariants(candidate, tokens)


# ------------------------------------------------------------------------------------------------
# RFC 5424 syslog messages
# ------------------------------------------------------------------------------------------------

BOM = "\ufeff"
# RFC 5424 section 6.5, Examples 1 to 4 (from memory). "BOM" in the RFC stands for U+FEFF.
RFC5424_EXAMPLES = [
    f"<34>1 2003-10-11T22:14:15.003Z mymachine.example.com su - ID47 - {BOM}'su root' failed for lonvick on /dev/pts/8",
    "<165>1 2003-08-24T05:14:15.000003-07:00 192.0.2.1 myproc 8710 - - %% It's time to make the do-nuts.",
    '<165>1 2003-10-11T22:14:15.003Z mymachine.example.com evntslog - ID47 [exampleSDID@32473 iut="3" '
    f'eventSource="Application" eventID="1011"] {BOM}An application event log entry...',
    '<165>1 2003-10-11T22:14:15.003Z mymachine.example.com evntslog - ID47 [exampleSDID@32473 iut="3" '
    'eventSource="Application" eventID="1011"][examplePriority@32473 class="high"]',
]
HEADER_FIELDS = ["PRI+VERSION", "TIMESTAMP", "HOSTNAME", "APP-NAME", "PROCID", "MSGID"]


@pytest.mark.parametrize("message", RFC5424_EXAMPLES)
def test_rfc5424_header_fields_are_single_tokens(message):
    # RFC 5424 section 6: HEADER = PRI VERSION SP TIMESTAMP SP HOSTNAME SP APP-NAME SP PROCID SP MSGID.
    # Split the header on SP and find each field (from TIMESTAMP on) as one token at its offsets.
    tokens = tokenize(message)
    check_invariants(message, tokens)
    offset = 0
    fields = {}
    for name, value in zip(HEADER_FIELDS, message.split(" ")):
        fields[name] = (value, offset, offset + len(value))
        offset += len(value) + 1
    for name in HEADER_FIELDS[1:]:
        value, start, end = fields[name]
        kind = token_at(tokens, start, end)
        if value == "-":  # RFC 5424 section 6: NILVALUE
            assert kind == "punct"
        elif name == "TIMESTAMP":
            assert kind == "timestamp"
            # RFC 5424 section 6.2.3 timestamps are RFC 3339; datetime reads them once Z -> +00:00.
            parsed = datetime.datetime.fromisoformat(value.replace("Z", "+00:00"))
            assert parsed.tzinfo is not None
        elif name == "HOSTNAME":
            assert kind in ("host", "ipv4")
        elif name == "PROCID":
            assert kind == "number"
        else:
            assert kind in ("word", "ident")
    # PRI "<34>" is '<', number, '>' and VERSION is a number (RFC 5424 section 6.2.1, 6.2.2).
    pri_version = fields["PRI+VERSION"][0]
    pri, version = pri_version[1:].split(">")
    assert tokens.texts[:4] == ["<", pri, ">", version]
    assert tokens.kinds[:4] == ["punct", "number", "punct", "number"]


def test_rfc5424_example_1_message_body():
    # RFC 5424 section 6.5 Example 1 (from memory): the BOM is its own symbol token, the quote and
    # the path split as in prose (common practice).
    got = pairs(RFC5424_EXAMPLES[0])
    assert got[-10:] == [
        (BOM, "symbol"), ("'", "punct"), ("su", "word"), ("root", "word"), ("'", "punct"),
        ("failed", "word"), ("for", "word"), ("lonvick", "word"), ("on", "word"), ("/dev/pts/8", "path"),
    ]


def test_rfc5424_structured_data_splits_into_names_and_values():
    # RFC 5424 section 6.3 (from memory): SD-ELEMENT = "[" SD-ID *(SP SD-PARAM) "]",
    # SD-PARAM = PARAM-NAME "=" %d34 PARAM-VALUE %d34. Brackets, '=' and quotes split (common practice).
    got = pairs(RFC5424_EXAMPLES[3])
    tail = got[got.index(("[", "punct")):]
    texts = [t for t, _ in tail]
    assert texts[:6] == ["[", "exampleSDID", "@", "32473", "iut", "="]
    assert texts[-6:] == ["class", "=", '"', "high", '"', "]"]
    assert ("eventSource", "word") in tail and ("Application", "word") in tail


RFC3339_STAMPS = [
    "1985-04-12T23:20:50.52Z",  # RFC 3339 section 5.8 (from memory)
    "1996-12-19T16:39:57-08:00",  # RFC 3339 section 5.8 (from memory)
    "1937-01-01T12:00:27.87+00:20",  # RFC 3339 section 5.8 (from memory)
    "2003-10-11T22:14:15.003Z",  # RFC 5424 section 6.2.3.1 (from memory)
    "2003-08-24T05:14:15.000003-07:00",  # RFC 5424 section 6.2.3.1 (from memory)
]


@pytest.mark.parametrize("stamp", RFC3339_STAMPS + ["2026-03-01T12:00:00.003Z"])
def test_rfc3339_timestamps(stamp):
    # One timestamp token each; datetime.fromisoformat is the reference reader.
    text, kind = only_token(stamp)
    assert kind == "timestamp"
    datetime.datetime.fromisoformat(text.replace("Z", "+00:00"))


def test_rfc3339_leap_second_stays_one_token():
    # RFC 3339 section 5.8 (from memory): 1990-12-31T23:59:60Z is valid (leap second); datetime
    # cannot hold it, so only the token shape is checked.
    assert only_token("1990-12-31T23:59:60Z") == ("1990-12-31T23:59:60Z", "timestamp")


def test_date_and_time_pair_is_two_timestamp_tokens():
    # ISO 8601 date and time written with a space (common practice in logs): two tokens, each
    # read by the datetime module.
    tokens = tokenize("2026-03-01 12:00:00,123 started")
    assert tokens.texts[:2] == ["2026-03-01", "12:00:00,123"]
    assert tokens.kinds[:2] == ["timestamp", "timestamp"]
    datetime.date.fromisoformat(tokens.texts[0])
    datetime.time.fromisoformat(tokens.texts[1].replace(",", "."))


# ------------------------------------------------------------------------------------------------
# UUID (RFC 4122), URIs (RFC 3986), e-mail addresses (RFC 5322)
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "form",
    [
        "f81d4fae-7dec-11d0-a765-00a0c91e6bf6",  # RFC 4122 section 3 (from memory)
        "urn:uuid:f81d4fae-7dec-11d0-a765-00a0c91e6bf6",  # RFC 4122 section 3 URN form (from memory)
        "F81D4FAE-7DEC-11D0-A765-00A0C91E6BF6",  # RFC 4122 section 3: input is case-insensitive
    ],
)
def test_rfc4122_uuid(form):
    # uuid.UUID is the reference parser (it accepts the urn:uuid: prefix too).
    text, kind = only_token(form)
    assert kind == "uuid"
    assert uuid.UUID(text) == uuid.UUID("f81d4fae-7dec-11d0-a765-00a0c91e6bf6")


def test_uuid_in_key_value():
    # key=value splitting (common practice); uuid.UUID checks the value.
    tokens = tokenize("request_id=f81d4fae-7dec-11d0-a765-00a0c91e6bf6,")
    assert tokens.kinds == ["ident", "punct", "uuid", "punct"]
    uuid.UUID(tokens.texts[2])


# RFC 3986 section 1.1.2 examples (from memory).
RFC3986_WITH_AUTHORITY = [
    "ftp://ftp.is.co.za/rfc/rfc1808.txt",
    "http://www.ietf.org/rfc/rfc2396.txt",
    "ldap://[2001:db8::7]/c=GB?objectClass?one",
    "telnet://192.0.2.16:80/",
]
RFC3986_WITHOUT_AUTHORITY = [
    "mailto:John.Doe@example.com",
    "news:comp.infosystems.www.servers.unix",
    "tel:+1-816-555-1212",
    "urn:oasis:names:specification:docbook:dtd:xml:4.1.2",
]


@pytest.mark.parametrize("uri", RFC3986_WITH_AUTHORITY + ["http://a/b/c/d;p?q"])  # last: RFC 3986 section 5.4 base
def test_rfc3986_uris_with_authority_are_one_url_token(uri):
    # urllib.parse.urlsplit is the reference: the token's netloc is the URI's netloc.
    text, kind = only_token(uri)
    assert kind == "url"
    assert urllib.parse.urlsplit(text).netloc == urllib.parse.urlsplit(uri).netloc != ""


@pytest.mark.parametrize("uri", RFC3986_WITH_AUTHORITY)
def test_uri_in_prose_drops_trailing_punctuation(uri):
    # RFC 3986 Appendix C (from memory): URIs in text are often delimited by <> or quotes, and a
    # trailing '.' or ')' belongs to the prose (common practice).
    for line, expect_before, expect_after in [
        (f"see <{uri}>.", ["see", "<"], [">", "."]),
        (f"(see {uri}).", ["(", "see"], [")", "."]),
        (f'url="{uri}", next', ["url", "=", '"'], ['"', ",", "next"]),
    ]:
        tokens = tokenize(line)
        check_invariants(line, tokens)
        i = tokens.texts.index(uri)
        assert tokens.kinds[i] == "url"
        assert tokens.texts[:i] == expect_before and tokens.texts[i + 1 :] == expect_after


def test_rfc3986_uris_without_authority():
    # RFC 3986 section 1.1.2 (from memory): forms without '//' are not url tokens; the mailto
    # address is an e-mail token that email.utils reads back unchanged.
    for uri in RFC3986_WITHOUT_AUTHORITY:
        tokens = tokenize(uri)
        check_invariants(uri, tokens)
        assert "url" not in tokens.kinds
    tokens = tokenize(RFC3986_WITHOUT_AUTHORITY[0])
    assert tokens.texts == ["mailto", ":", "John.Doe@example.com"]
    assert tokens.kinds[2] == "email"
    assert email.utils.parseaddr(tokens.texts[2])[1] == "John.Doe@example.com"


# RFC 5322 Appendix A.1 header lines (from memory).
RFC5322_HEADERS = [
    "From: John Doe <jdoe@machine.example>",  # A.1.1
    "To: Mary Smith <mary@example.net>",  # A.1.1
    'From: "Joe Q. Public" <john.q.public@example.com>',  # A.1.2
    "To: Mary Smith <mary@x.test>, jdoe@example.org, Who? <one@y.test>",  # A.1.2
    'Cc: <boss@nil.test>, "Giant; \\"Big\\" Box" <sysservices@example.net>',  # A.1.2
    "From: Pete <pete@silly.example>",  # A.1.3
    "To: A Group:Ed Jones <c@a.test>,joe@where.test,John <jdoe@one.test>;",  # A.1.3
]


@pytest.mark.parametrize("header", RFC5322_HEADERS)
def test_rfc5322_addresses_are_email_tokens(header):
    # email.utils.getaddresses is the reference: the e-mail tokens are exactly the addresses it
    # finds in the header value.
    tokens = tokenize(header)
    check_invariants(header, tokens)
    found = [t for t, k in zip(tokens.texts, tokens.kinds) if k == "email"]
    value = header.split(":", 1)[1]
    expected = [address for _, address in email.utils.getaddresses([value]) if "@" in address]
    assert found == expected


def test_email_with_sentence_dot_and_plus_tag():
    # RFC 5321 section 4.1.2 (from memory): Dot-string local parts; a sentence-final '.' is prose
    # and a '+tag' is part of the local part (common practice).
    assert pairs("mail mary@x.test.") == [("mail", "word"), ("mary@x.test", "email"), (".", "punct")]
    assert only_token("john.q.public+logs@example.com")[1] == "email"
    # An RFC 5424 SD-ID (section 6.3.2, from memory) like exampleSDID@32473 is not an address.
    assert "email" not in tokenize("[exampleSDID@32473]").kinds


# ------------------------------------------------------------------------------------------------
# log conventions (common practice)
# ------------------------------------------------------------------------------------------------


def test_key_value_splits_into_key_equals_value():
    # key=value pairs (common practice in service logs); the value follows the same rules.
    assert pairs("user=alice src=10.0.0.1 took=12.5ms path=/var/log/x.log ok=true") == [
        ("user", "word"), ("=", "punct"), ("alice", "word"),
        ("src", "word"), ("=", "punct"), ("10.0.0.1", "ipv4"),
        ("took", "word"), ("=", "punct"), ("12.5ms", "number"),
        ("path", "word"), ("=", "punct"), ("/var/log/x.log", "path"),
        ("ok", "word"), ("=", "punct"), ("true", "word"),
    ]
    assert pairs('msg="disk full" host=web-03.eu.example.test') == [
        ("msg", "word"), ("=", "punct"), ('"', "punct"), ("disk", "word"), ("full", "word"), ('"', "punct"),
        ("host", "word"), ("=", "punct"), ("web-03.eu.example.test", "host"),
    ]


def test_brackets_quotes_and_trailing_punctuation_split():
    # Brackets, quotes and trailing punctuation are tokens of their own (common practice).
    assert tokenize("(host-1),").texts == ["(", "host-1", ")", ","]
    assert pairs("sshd[311]:") == [("sshd", "word"), ("[", "punct"), ("311", "number"), ("]", "punct"), (":", "punct")]
    assert tokenize("'quoted' \"double\" {brace} <angle>").texts == [
        "'", "quoted", "'", '"', "double", '"', "{", "brace", "}", "<", "angle", ">",
    ]
    # a sentence-final '.' after a host or a word is split off
    assert tokenize("connected to web-03.eu.example.test.").texts == ["connected", "to", "web-03.eu.example.test", "."]
    assert tokenize("It's done.").texts == ["It's", "done", "."]


def test_host_names_with_dashes_and_dots():
    # RFC 1123 section 2.1 (from memory): labels of letters, digits and hyphens.
    for name in ("web-03.eu.example.test", "mymachine.example.com", "a1.b-2.example"):
        assert only_token(name) == (name, "host")
    assert only_token("web-03") == ("web-03", "ident")


def test_unix_and_windows_paths():
    # Unix and Windows path notations (common practice).
    for path in ("/var/log/x.log", "./rel", "../up/x", "~/x", "~alice/notes.txt", "/dev/pts/8"):
        assert only_token(path) == (path, "path")
    for path in ("C:\\Users\\x", "C:\\Program_Files\\app.exe", "\\\\server\\share", "\\\\server\\share\\dir\\f.txt", "D:/data/x"):
        assert only_token(path) == (path, "path")
    assert tokenize("see /var/log/x.log.").texts == ["see", "/var/log/x.log", "."]
    assert tokenize("at /srv/app.py:42").texts == ["at", "/srv/app.py", ":", "42"]
    assert tokenize("read/write").texts == ["read", "/", "write"]  # not a path: no leading '/'


def test_hex_ids():
    # 0x-prefixed and long hex identifiers (common practice); int(..., 16) reads them.
    for text in ("0x1f", "0xDEADBEEF", "deadbeefcafe1", "3f9c2a7b10", "a765009c0e6bf6"):
        assert only_token(text) == (text, "hex")
        int(text, 16)
    assert only_token("deadbeefcafe") == ("deadbeefcafe", "word")  # no digit: an ordinary word
    assert only_token("12345678") == ("12345678", "number")  # no letter: a number


def test_numbers_with_decimals_and_units():
    # Quantities with units as written in logs (common practice); float() reads the numeric part.
    for text, numeric in (("12.5ms", "12.5"), ("300MB", "300"), ("98%", "98"), ("-5", "-5"), ("1.5GiB", "1.5"),
                          ("1e-3", "1e-3"), ("5MB/s", "5"), ("8710", "8710")):
        assert only_token(text) == (text, "number")
        float(numeric)
    assert tokenize("1,234").texts == ["1", ",", "234"]
    assert pairs("3.14.") == [("3.14", "number"), (".", "punct")]
    assert pairs("1-5") == [("1", "number"), ("-", "punct"), ("5", "number")]


def test_versions():
    # Semantic Versioning 2.0.0 section 9/10 (from memory) and 'v' prefixes (common practice).
    for text in ("v1.2.3", "2.0.1-rc1", "1.0.0-alpha.1", "1.0.0+build.5", "v2.0", "10.2.0.4.1"):
        assert only_token(text) == (text, "version")
    assert only_token("2.0") == ("2.0", "number")


def test_words_unicode_and_apostrophes():
    # Words are letters of any script, inner apostrophes allowed (common practice).
    for text in ("failed", "don't", "café", "naïve", "Ärger", "ünïcödé", "नमस्ते", "日本語", "cafe\u0301"):
        assert only_token(text) == (text, "word")
        # unicodedata: every character is a letter (L*) or a combining mark (M*), or the apostrophe
        assert all(unicodedata.category(c)[0] in "LM" for c in text.replace("'", ""))
    assert pairs("'su root'") == [("'", "punct"), ("su", "word"), ("root", "word"), ("'", "punct")]
    assert only_token("user_id") == ("user_id", "ident")
    assert only_token("ID47") == ("ID47", "ident")


def test_separator_runs():
    # Rules of '-', '=' and '.' are one token each (common practice for log banners).
    assert tokenize("---- == ... -- a").texts == ["----", "==", "...", "--", "a"]


def test_control_characters_are_symbol_tokens():
    # Control characters that are not white space (NUL, ESC, DEL, C1) become one-character symbol
    # tokens (unicodedata: category Cc); white-space controls (str.isspace) separate tokens.
    line = "a\x00b\x1b[0m red\x7f\x85c\x1fd\x9b"
    assert all(unicodedata.category(c) == "Cc" and not c.isspace() for c in "\x00\x1b\x7f\x9b")
    assert "\x85".isspace() and "\x1f".isspace()  # NEL and unit separator count as white space
    tokens = tokenize(line)
    check_invariants(line, tokens)
    assert pairs(line) == [
        ("a", "word"), ("\x00", "symbol"), ("b", "word"), ("\x1b", "symbol"), ("[", "punct"),
        ("0m", "number"), ("red", "word"), ("\x7f", "symbol"), ("c", "word"), ("d", "word"), ("\x9b", "symbol"),
    ]


def test_lone_surrogates_do_not_crash():
    # surrogateescape decoding (PEP 383) leaves lone surrogates in str; they become symbol tokens.
    line = b"ok \xff\xfe end".decode("utf-8", "surrogateescape")
    tokens = tokenize(line)
    check_invariants(line, tokens)
    assert tokens.kinds == ["word", "symbol", "symbol", "word"]


@pytest.mark.slow
def test_every_code_point_alone_is_one_token_or_white_space():
    # Python's str.isspace defines white space; every other code point (surrogates excluded) must
    # come out as exactly one one-character token, so no rule hides white space or drops a character.
    chars = [chr(c) for c in range(sys.maxunicode + 1) if not 0xD800 <= c <= 0xDFFF]
    for i in range(0, len(chars), 4096):
        chunk = chars[i : i + 4096]
        line = " ".join(chunk)
        tokens = tokenize(line)
        expected = [c for c in chunk if not c.isspace()]
        assert tokens.texts == expected
        assert tokens.starts == [2 * j for j, c in enumerate(chunk) if not c.isspace()]


@pytest.mark.parametrize("n_tokens", [4095, 4096, 4097, 8192, 20001])
def test_long_lines_across_match_chunks(n_tokens):
    # Matches are gathered in chunks of 4096; token counts around and past that boundary must keep
    # the contract and lose nothing (each "ab," is a word and a comma).
    line = ("ab," * (n_tokens // 2 + 1))[: 3 * (n_tokens // 2) + (n_tokens % 2) * 2]
    tokens = tokenize(line)
    check_invariants(line, tokens)
    assert len(tokens.texts) == n_tokens
    assert tokens.texts[-1] == ("ab" if n_tokens % 2 else ",")


def test_bad_input_is_a_data_error():
    # DEVELOPERS.md ground rules: bad input raises a StreamtagError subclass with a one-line message.
    with pytest.raises(DataError) as error:
        tokenize(b"bytes, not str")
    assert "\n" not in str(error.value)
    with pytest.raises(DataError):
        token_kind("")
    assert tokenize("") == TokenList([], [], [], [])
    assert tokenize(" \t ") == TokenList([], [], [], [])


def test_token_kind_matches_tokenize_and_handles_composites():
    # DEVELOPERS.md: token_kind gives the kind of an already-split token, so it must agree with
    # tokenize on every token tokenize produced; a composite takes the kind of its longest piece.
    for line in SAMPLE.read_text(encoding="utf-8").splitlines()[:300]:
        tokens = tokenize(line)
        for text, kind in zip(tokens.texts, tokens.kinds):
            assert token_kind(text) == kind
    assert token_kind("U.S.") == "host"
    assert token_kind("sshd[311]:") == "word"


def test_kinds_list():
    # DEVELOPERS.md (tokenize.py contract) names these kinds.
    assert len(set(KINDS)) == len(KINDS)
    assert {"word", "number", "ipv4", "ipv6", "url", "email", "path", "host", "uuid", "hex", "timestamp",
            "version", "punct", "symbol"} <= set(KINDS)


def test_sample_log_lines_keep_the_contract():
    # Our fictional sample lines: contract holds on every line, and kinds are all from KINDS.
    lines = SAMPLE.read_text(encoding="utf-8").splitlines()
    assert len(lines) >= 1000
    seen = set()
    for line in lines:
        tokens = tokenize(line)
        check_invariants(line, tokens)
        seen.update(tokens.kinds)
    assert {"timestamp", "ipv4", "ipv6", "host", "path", "url", "email", "uuid", "hex", "mac", "version"} <= seen


# ------------------------------------------------------------------------------------------------
# properties (hypothesis)
# ------------------------------------------------------------------------------------------------

LOG_FRAGMENTS = [
    "a", "Z", "é", "\u0301", "1", "9", "0x", "f", ".", ":", "::", "-", "_", "'", '"', "/", "\\", "~", "@",
    "%", "=", "(", ")", "[", "]", ",", " ", "\t", "\x00", "\x1b", "\ufeff", "http://", "urn:uuid:",
    "192.0.2.1", "2001:db8::", "ffff:", "v1.2", "-rc1", "2026-03-01", "T12:00:00", "Z", ".5ms", "%",
    "C:\\", "\\\\", "web-03", ".example", "mary@x", "deadbeef", "\u2019", "😀", "\u00a0", "\u3000",
]


@settings(max_examples=400)
@given(st.text())
def test_property_arbitrary_text(line):
    # The contract in DEVELOPERS.md (check_invariants) on hypothesis' default text, which includes
    # control characters and all planes except surrogates.
    check_invariants(line, tokenize(line))


@settings(max_examples=400)
@given(st.lists(st.sampled_from(LOG_FRAGMENTS), max_size=40).map("".join))
def test_property_log_like_text(line):
    # The contract in DEVELOPERS.md on fragments that trigger every rule, glued in random order.
    check_invariants(line, tokenize(line))


# ------------------------------------------------------------------------------------------------
# linear time (ratio only: 100k characters must cost about 10x what 10k cost)
# ------------------------------------------------------------------------------------------------

ADVERSARIAL_MOTIFS = [
    "a.", ":", "%", "/", "\\", "1", "1.", "a-", "::1:", "a@", "http://", "1:", "ffff:", "a'", "v1+",
    "a@b.", "/.", "a1.", "-1", "1.1-", "~", "./", "C:\\", "\\\\a", "(", "[", "http://[", "http://(",
    "12:00:00:", "2026-03-01T", "deadbeef1", "x@y.z.", "urn:uuid:", "\x00", "\u0301", "a'b-",
    "a.a.a.a.a.a.a.a.a.a.a.a.a.a.a.a.a.a@", "1.2.3-a.", "%%a", "::ffff:1.", "a b", "0x",
    "http://a.b/c. ",
]


def _best_of_3(line: str, repeats: int, function=tokenize) -> float:
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        for _ in range(repeats):
            function(line)
        best = min(best, (time.perf_counter() - start) / repeats)
    return best


def _cost_ratio(motif: str, function=tokenize) -> float:
    """Cost of a 100k-character line over that of a 10k-character one, both made of ``motif``.

    Best of 3 runs each (the short line repeated 10 times per run to smooth out timer noise). On a
    busy machine one measurement can be spoilt by preemption, so a ratio over the limit is measured
    again, up to three times: a quadratic pattern fails every time (about 100x), noise does not.
    """
    short = (motif * (10_000 // len(motif) + 1))[:10_000]
    long = (motif * (100_000 // len(motif) + 1))[:100_000]
    gc_was_enabled = gc.isenabled()
    gc.disable()
    try:
        ratio = float("inf")
        for _ in range(3):
            ratio = min(ratio, _best_of_3(long, 1, function) / _best_of_3(short, 10, function))
            if ratio < LINEAR_RATIO_LIMIT:
                break
        return ratio
    finally:
        if gc_was_enabled:
            gc.enable()


LINEAR_RATIO_LIMIT = 25  # linear: about 10; quadratic: about 100


def test_ratio_check_catches_quadratic_cost():
    # The measurement itself must tell quadratic from linear: copying every 100th suffix of the
    # line costs O(n^2), so 10x the length costs about 100x.
    def quadratic(line):
        return [line[i:] for i in range(0, len(line), 100)]

    assert _cost_ratio("a.", quadratic) > LINEAR_RATIO_LIMIT


@pytest.mark.slow
@pytest.mark.parametrize("motif", ADVERSARIAL_MOTIFS)
def test_linear_time_on_adversarial_lines(motif):
    # A backtracking pattern that is quadratic on some input costs 100x for 10x the length; a
    # linear one about 10x. Ratio only, never an absolute time.
    ratio = _cost_ratio(motif)
    assert ratio < LINEAR_RATIO_LIMIT, f"{motif!r}: 100k chars cost {ratio:.1f}x 10k chars"


@pytest.mark.slow
def test_linear_time_on_mixed_adversarial_line():
    # All motifs interleaved: rules that fail late at many start positions would show here.
    ratio = _cost_ratio("".join(ADVERSARIAL_MOTIFS))
    assert ratio < LINEAR_RATIO_LIMIT, f"mixed: 100k chars cost {ratio:.1f}x 10k chars"


# ------------------------------------------------------------------------------------------------
# fast paths are an optimisation only
# ------------------------------------------------------------------------------------------------


def _tokens_without_fast_paths(line: str) -> list[tuple[int, int, str]]:
    from streamtag.tokenize import _build_pattern

    global _SLOW_PATTERN
    if _SLOW_PATTERN is None:
        _SLOW_PATTERN = _build_pattern(fast_paths=False)
    pattern, kind_of_group = _SLOW_PATTERN
    return [(m.start(), m.end(), kind_of_group[m.lastindex]) for m in pattern.finditer(line)]


_SLOW_PATTERN = None
# Pieces near the edges of the fast paths: units, e-mail and scheme continuations, double dashes,
# a-f-only MAC/UUID shapes, a non-ASCII digit after 'V'.
FAST_PATH_EDGES = [
    "@", "+", "v", "V", "ms", "MB", "GiB", "%", ":/", "e3", "0", "--", "aa-bb-cc-dd-ee-ff", "deadbeef-",
    "\u0dea", "\u0967", "12.", "+0000", "/s", "/\u00e9", "xn--", "_", "ab", "g",
]


def _tokens(line: str) -> list[tuple[int, int, str]]:
    tokens = tokenize(line)
    return list(zip(tokens.starts, tokens.ends, tokens.kinds))


def test_fast_paths_change_nothing_on_sample_lines():
    # The full rules alone are the reference; the fast paths must give the same tokens and kinds.
    for line in SAMPLE.read_text(encoding="utf-8").splitlines():
        assert _tokens(line) == _tokens_without_fast_paths(line), line


@settings(max_examples=1000)
@given(st.lists(st.sampled_from(LOG_FRAGMENTS + FAST_PATH_EDGES), max_size=30).map("".join))
def test_fast_paths_change_nothing_on_log_like_text(line):
    # Same reference as above, on hypothesis-built text around the fast paths' edges.
    assert _tokens(line) == _tokens_without_fast_paths(line)


# ------------------------------------------------------------------------------------------------
# batches: the compiled scanner is an optimisation only
# ------------------------------------------------------------------------------------------------
# BatchTokenizer sends the pieces it has not cached to the compiled scanner (scan_kernels, numba)
# and the pieces the scanner leaves unsure to the pattern. The reference everywhere below is
# tokenize(line), the pattern alone, which the tests above judge against RFCs and reference
# libraries; the batch must equal it line by line with the scanner on and off.

import streamtag.tokenize as tokenize_module  # noqa: E402
from streamtag.tokenize import BatchTokenizer  # noqa: E402


@pytest.fixture(params=[True, False], ids=["scanner", "pattern-only"])
def scanner(request, monkeypatch):
    monkeypatch.setattr(tokenize_module, "USE_SCANNER", request.param)
    return request.param


def _batch_per_line(tokenizer: BatchTokenizer, lines: list[str]) -> list[TokenList]:
    return tokenizer.tokenize_lines(lines).per_line()


def test_batches_of_the_sample_log_equal_tokenize(scanner):
    # Reference: tokenize per line. Batches of 64 through a 500-piece cache that fills and clears.
    lines = SAMPLE.read_text(encoding="utf-8").splitlines()
    tokenizer = BatchTokenizer(cache_size=500)
    for i in range(0, len(lines), 64):
        batch = lines[i : i + 64]
        assert _batch_per_line(tokenizer, batch) == [tokenize(line) for line in batch]
    assert tokenizer.misses > 0


# Pieces the scanner takes (timestamps, integers, IPv4 with punctuation, key=value) next to pieces it
# leaves to the pattern (IPv6, e-mail, URL, non-ASCII, tab): the documentation addresses of
# RFC 5737 section 3 and RFC 3849, the example names of RFC 2606, RFC 3339 time stamps (section 5.8
# example "1985-04-12T23:20:50.52Z", from memory).
MIXED_PIECES = [
    "04:49:37", "2025-02-15T12:27:21.510905Z", "1985-04-12T23:20:50.52Z", "23366", "198.51.100.7,",
    '"203.0.113.194"}', "192.0.2.1:443:", "pid=25783", "dur=15682ms", "ts=2025-02-15T12:27:21Z",
    "[03/Feb/2025:11:00:14", "2001:db8::1", "2001:db8:0:0:1:0:0:1", "<ann@example.com>:",
    "http://www.example.org/a?b=c", "café=1", "x\t=2", "\u00e9t\u00e9", "😀1", "\udcff", "", "::",
    "0x1F", "v1.2.3", "web-03.example.net.", "/var/log/x.log.", "f81d4fae-7dec-11d0-a765-00a0c91e6bf6",
]


@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(st.sampled_from(MIXED_PIECES + LOG_FRAGMENTS + FAST_PATH_EDGES), max_size=12)
                .map(" ".join), min_size=1, max_size=8), st.sampled_from([0, 4, 100_000]))
def test_property_batches_mixing_scanned_and_unsure_pieces(lines, cache_size):
    # Reference: tokenize per line, with the scanner and without it (hypothesis builds the lines;
    # a cache of 0 or 4 pieces keeps most pieces new, so they go through the scanner each time).
    for use_scanner in (True, False):
        tokenize_module.USE_SCANNER = use_scanner
        try:
            tokenizer = BatchTokenizer(cache_size)
            for _ in range(2):  # the second time, cached and new pieces meet in one batch
                assert _batch_per_line(tokenizer, lines) == [tokenize(line) for line in lines]
        finally:
            tokenize_module.USE_SCANNER = True


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(max_size=30), min_size=1, max_size=5))
def test_property_batches_of_arbitrary_text_with_the_scanner(lines):
    # Reference: tokenize per line, on hypothesis' default text (all planes, control characters):
    # whatever the scanner leaves unsure, the offsets must still be counted in code points.
    assert _batch_per_line(BatchTokenizer(), lines) == [tokenize(line) for line in lines]


def test_mixed_batch_kinds_agree_with_reference_libraries(scanner):
    # Reference: tokenize per line, and for address and time tokens Python's ipaddress (RFC 4291
    # and RFC 791 text forms) and datetime (RFC 3339 section 5.6 as ISO 8601 extended format).
    lines = [" ".join(MIXED_PIECES[i:] + MIXED_PIECES[:i]) for i in range(len(MIXED_PIECES))]
    batch = BatchTokenizer().tokenize_lines(lines)
    assert batch.per_line() == [tokenize(line) for line in lines]
    kinds = dict(zip(batch.texts, batch.kinds))
    for address in ("198.51.100.7", "203.0.113.194", "2001:db8::1", "2001:db8:0:0:1:0:0:1"):
        expected = "ipv4" if ipaddress.ip_address(address).version == 4 else "ipv6"
        assert kinds[address] == expected, address
    assert kinds["192.0.2.1:443"] == "ipv4"  # address with port, RFC 3986 section 3.2.3 authority form
    for stamp in ("2025-02-15T12:27:21.510905Z", "1985-04-12T23:20:50.52Z", "2025-02-15T12:27:21Z"):
        datetime.datetime.fromisoformat(stamp.replace("Z", "+00:00"))  # a valid RFC 3339 time (datetime)
        assert kinds[stamp] == "timestamp", stamp
    assert kinds["04:49:37"] == "timestamp"  # RFC 3339 section 5.6 partial-time
    assert kinds["23366"] == kinds["25783"] == "number"  # common practice: a run of digits is a number


def test_scanner_takes_the_common_new_pieces(monkeypatch):
    # Design check (DEVELOPERS.md, tokenize.py: the batch path equals tokenize): timestamps, numbers,
    # IPv4 addresses with punctuation, key=value pieces, an IPv6 address (RFC 3849 documentation
    # prefix), an e-mail address and a URL (RFC 3986 section 3) never reach the pattern; a non-ASCII
    # word does. The tokens still equal tokenize per line.
    sent_to_pattern = []
    original = tokenize_module._match_pieces

    def spy(pieces, lengths):
        sent_to_pattern.extend(pieces)
        return original(pieces, lengths)

    monkeypatch.setattr(tokenize_module, "_match_pieces", spy)
    if tokenize_module._scanner() is None:
        pytest.skip("numba is not available: every piece goes through the pattern")
    lines = ['04:49:37 2025-02-15T12:27:21.510905Z 23366 "198.51.100.7"} pid=25783 dur=15682ms',
             "2001:db8::1 ts=2025-02-15T12:27:21Z [03/Feb/2025:11:00:14 <mary@x.test>: http://x.test/a caf\u00e9"]
    assert _batch_per_line(BatchTokenizer(), lines) == [tokenize(line) for line in lines]
    assert sent_to_pattern == ["caf\u00e9"]


def test_batch_without_numba_uses_the_pattern(monkeypatch):
    # Reference: tokenize per line. A process where numba cannot be imported (the loader found
    # nothing) still tokenizes every batch, with the pattern alone.
    from streamtag import crf

    monkeypatch.setitem(crf._loaded, ("scan_kernels", "scanner"), False)
    assert tokenize_module._scanner() is None
    lines = [" ".join(MIXED_PIECES), "plain words only", ""]
    assert _batch_per_line(BatchTokenizer(), lines) == [tokenize(line) for line in lines]
