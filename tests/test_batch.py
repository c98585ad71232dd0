"""The shared batch step: batch decoding + ``tag_decoded`` + ``encode_batch`` give the same bytes as
the per-line reference path (``decode_text``/``decode_json`` per line, ``make_record`` per line,
``make_review_record``, ``encode``), for plain, dirty and JSON lines.

External references named beside the checks:
- RFC 3629 (UTF-8) section 3: C0, C1 and F5..FF never appear in UTF-8; section 10: overlong forms
  (C0 AF) are invalid.
- ECMA-48 (5th ed.) section 5.4: CSI control sequences; section 8.3.89: OSC strings ended by BEL.
- RFC 8259 (JSON): section 2 (a JSON text), section 4 (objects; member order is kept, so bytes are
  compared), section 7 (an unterminated string is not JSON).
- RFC 5424 section 6 (syslog): lines end with LF; a CR before it is a CRLF line end (common practice).
"""

from __future__ import annotations

import gc
import platform
import subprocess
import sys
from pathlib import Path

import pytest

from daemon_support import build_tiny_model
from streamtag import records
from streamtag.batch import (GC_YOUNG_THRESHOLD, encode_batch, fewer_collections, keep_freed_memory, tag_and_encode,
                             tag_decoded)
from streamtag.decode import DecodedLine, decode_json, decode_lines, decode_text
from streamtag.model import load_model
from streamtag.tagger import TaggedLine, Tagger

THRESHOLD = 0.5

PLAIN = [
    b"gatewarden[311]: login failed for user kestrel from 192.0.2.14 port 2201",
    b"relay-07 mailferry[88]: connect from mailer.example.invalid[198.51.100.3]",
    b"netwatch: port nic0 link up on host brindle-04",
    b"",  # an empty line: no tokens, confidence 1
    b"app[2041]: user marigold.fenn opened /srv/data/reports/q3.csv",
]
DIRTY = [
    b"\xc0\xaf etc/passwd from relay-07",  # RFC 3629 section 10: overlong, invalid
    b"vault-02 \xff\xfe backup",  # RFC 3629 section 3: FF and FE never appear
    b"user\x00kestrel from 192.0.2.14",  # NUL
    b"\x1b[1;31mERROR\x1b[0m relay-07 \x1b]0;title\x07down",  # ECMA-48 5.4 and 8.3.89
    b"tasker[77]: job nightly\r finished",  # CR inside a line
    b"syslog line with its CRLF's CR\r",  # RFC 5424 section 6: a CRLF whose CR reached us
    bytes(range(1, 256)).replace(b"\n", b"") * 2,  # binary: recorded, not tagged
]
JSON = [
    b'{"ts": "2026-01-02T03:04:05Z", "message": "login failed for user kestrel", "level": 3}',
    b'{"message": "unterminated',  # RFC 8259 section 7: not JSON -> bad_json
    b'[1, 2, 3]',  # RFC 8259 section 2: JSON, but not an object -> bad_json
    b'{"msg": "elsewhere"}',  # no text field
    b'{"message": "relay-07 \\u001b[31mdown\\u001b[0m"}',  # an escape inside the JSON string
]


@pytest.fixture(scope="module")
def tagger(tmp_path_factory):
    path = tmp_path_factory.mktemp("model") / "tiny.stm"
    build_tiny_model(path)
    return Tagger(load_model(path))


def reference(tagger: Tagger, decoded: list[DecodedLine], read_flags) -> tuple[bytes, bytes, int]:
    """The per-line path as it was before batch decoding and batch records."""
    to_tag = [i for i, line in enumerate(decoded) if not line.binary]
    tagged = tagger.tag([decoded[i].tag_text for i in to_tag], review_below=THRESHOLD)
    results = [TaggedLine(text=line.text, spans=[], confidence=1.0, n_tokens=0) for line in decoded]
    for i, result in zip(to_tag, tagged):
        result.text = decoded[i].text
        results[i] = result
    output, review, n_review = [], [], 0
    for i, (line, result) in enumerate(zip(decoded, results)):
        doubtful = not line.binary and result.confidence < THRESHOLD
        record = records.make_record(result, tagger.model_id, doubtful, source="/var/log/app.log", offset=100 * i,
                                     line=i + 1, flags=list(read_flags[i]) + line.flags, fields=line.fields)
        output.append(record)
        if doubtful:
            n_review += 1
            review.append(records.make_review_record(record, result, THRESHOLD))
    return records.encode(output), records.encode(review), n_review


def batch_path(tagger: Tagger, decoded, read_flags) -> tuple[bytes, bytes, int]:
    n = len(decoded)
    tagged = tag_decoded(tagger, decoded, THRESHOLD)
    return encode_batch(decoded, tagged, tagger.model_id, THRESHOLD, sources=["/var/log/app.log"] * n,
                        offsets=[100 * i for i in range(n)], line_numbers=list(range(1, n + 1)),
                        read_flags=read_flags)


def one_step(tagger, decoded, read_flags, review_below=THRESHOLD, want_review=True) -> tuple[bytes, bytes, int]:
    """``tag_and_encode``: plain batches through the compiled record writer."""
    n = len(decoded)
    return tag_and_encode(tagger, decoded, THRESHOLD, review_below, sources=["/var/log/app.log"] * n,
                          offsets=[100 * i for i in range(n)], line_numbers=list(range(1, n + 1)),
                          read_flags=read_flags, want_review=want_review)


@pytest.mark.parametrize("datas", [PLAIN, PLAIN + DIRTY, DIRTY, [DIRTY[3]] + PLAIN, []],
                         ids=["plain", "plain+dirty", "dirty", "one-escape", "empty"])
@pytest.mark.parametrize("with_read_flags", [False, True])
def test_tag_and_encode_equals_tagging_then_encoding(tagger, datas, with_read_flags):
    # the per-line reference (orjson's bytes of make_record, RFC 8259 section 4: member order counts)
    read_flags = [(("truncated",) if with_read_flags and i % 3 == 0 else ()) for i in range(len(datas))]
    slow = reference(tagger, [decode_text(data) for data in datas], read_flags)
    assert one_step(tagger, decode_lines(datas), read_flags) == slow
    assert one_step(tagger, [decode_text(data) for data in datas], read_flags) == slow


def test_tag_and_encode_on_the_bundled_model_with_reviews_and_split_lines():
    # many lines below the threshold (review records with reason and runner-up) and lines longer
    # than the token cap (decoded in windows, flagged "split"), against the per-line reference
    small = Tagger(load_model(None), max_tokens=8, window_overlap=3)
    datas = [line * (1 + i % 3) for i, line in enumerate(PLAIN * 4)] + [
        "Über-host ñandú-07 «quoted» 東京 relay\\path \"x\"".encode()]
    read_flags = [()] * len(datas)
    slow = reference(small, [decode_text(data) for data in datas], read_flags)
    assert slow[2] > 0 and b'"split"' in slow[0]  # the case is exercised
    assert one_step(small, decode_lines(datas), read_flags) == slow
    output, review, n_review = one_step(small, decode_lines(datas), read_flags, review_below=None, want_review=False)
    assert (output, review, n_review) == (slow[0], b"", slow[2])  # no described lines asked: no review bytes


@pytest.mark.parametrize("datas", [PLAIN, PLAIN + DIRTY, DIRTY, [DIRTY[3]] + PLAIN, []],
                         ids=["plain", "plain+dirty", "dirty", "one-escape", "empty"])
@pytest.mark.parametrize("with_read_flags", [False, True])
def test_text_batch_equals_per_line_reference(tagger, datas, with_read_flags):
    read_flags = [(("truncated",) if with_read_flags and i % 3 == 0 else ()) for i in range(len(datas))]
    fast = batch_path(tagger, decode_lines(datas), read_flags)
    slow = reference(tagger, [decode_text(data) for data in datas], read_flags)
    assert fast == slow  # RFC 8259 section 4: the bytes, member order included
    if datas:
        assert fast[0].count(b"\n") == len(datas)  # one record per input line


def test_plain_batch_takes_the_fast_path_and_reviews_are_counted(tagger):
    decoded = decode_lines(PLAIN * 20)
    assert all(type(item) is str for item in decoded)  # the fast path is what is being compared
    output, review, n_review = batch_path(tagger, decoded, [()] * len(decoded))
    assert review.count(b"\n") == n_review  # a review record per doubtful line (README "Output records")
    assert (output, review, n_review) == reference(tagger, [decode_text(d) for d in PLAIN * 20], [()] * 100)


def test_json_batch_equals_per_line_reference(tagger):
    decoded = [decode_json(data, "message") for data in JSON]
    fresh = [decode_json(data, "message") for data in JSON]
    assert batch_path(tagger, decoded, [()] * len(JSON)) == reference(tagger, fresh, [()] * len(JSON))


def test_mixed_plain_strings_and_decoded_lines(tagger):
    # replay and tag may pass DecodedLine objects, the daemon plain strings: both in one batch
    datas = PLAIN + DIRTY
    mixed = [decode_text(d) if i % 2 else item for i, (d, item) in enumerate(zip(datas, decode_lines(datas)))]
    assert batch_path(tagger, mixed, [()] * len(datas)) == reference(tagger, [decode_text(d) for d in datas],
                                                                      [()] * len(datas))


def test_a_failing_batch_is_tagged_line_by_line(tagger):
    class Flaky:
        model_id = tagger.model_id

        def tag(self, lines, review_below=None):
            if len(lines) > 1 or "kestrel" in lines[0]:
                raise RuntimeError("injected")
            return tagger.tag(lines, review_below)

    logged = []
    results = tag_decoded(Flaky(), decode_lines(PLAIN), THRESHOLD, logged.append)
    assert len(logged) == 1 and "one by one" in logged[0]
    assert results[0].flags == ["tag_error"] and results[0].text == PLAIN[0].decode()
    assert all(result.flags != ["tag_error"] for result in results[1:])
    # tag_and_encode with a tagger that fails (this one has no tag_batch at all): the same fallback
    n = len(PLAIN)
    output, _, _ = tag_and_encode(Flaky(), decode_lines(PLAIN), THRESHOLD, THRESHOLD, ["/x"] * n, list(range(n)),
                                  list(range(n)), [()] * n, log=logged.append)
    assert len(logged) == 2 and output.count(b"\n") == n and b'"tag_error"' in output.split(b"\n")[0]


def test_fewer_collections_raises_the_young_threshold_and_restores_it():
    # Python's gc module documents get_threshold/set_threshold as (gen0, gen1, gen2) counts.
    before = gc.get_threshold()
    with pytest.raises(RuntimeError):
        with fewer_collections():
            assert gc.get_threshold() == (GC_YOUNG_THRESHOLD, *before[1:])
            raise RuntimeError("a failing batch")
    assert gc.get_threshold() == before


# Allocates and frees batch-sized buffers (3.2 MB twice, 0.4 MB, 6.4 MB) 20 times, as a tagging loop does,
# and prints the page faults (getrusage(2) ru_minflt: faults served without I/O) those cycles took.
FAULTS_SCRIPT = """
import resource, sys
import numpy as np
from streamtag.batch import keep_freed_memory
if sys.argv[1] == "keep":
    assert keep_freed_memory()
def cycle():
    a = np.ones(400_000); b = np.ones(400_000); c = np.ones(50_000); del a; d = np.ones(800_000); del b, c, d
cycle()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(20):
    cycle()
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="mallopt is glibc's")
def test_keep_freed_memory_reuses_batch_buffers_instead_of_faulting_in_new_pages():
    # glibc manual ("Malloc Tunable Parameters"): mallopt returns 1 on success; M_MMAP_THRESHOLD and
    # M_TRIM_THRESHOLD decide what is mapped afresh and what is given back. A 4 KiB page is touched
    # once per fault (common practice), so 20 cycles of ~10 MB of fresh pages fault tens of thousands
    # of times; kept memory, hardly ever.
    root = str(Path(__file__).resolve().parent.parent)

    def faults(mode: str) -> int:
        done = subprocess.run([sys.executable, "-c", FAULTS_SCRIPT, mode], capture_output=True, text=True,
                              cwd=root, env={"PYTHONPATH": root, "PATH": "/usr/bin:/bin"}, check=True)
        return int(done.stdout.split()[-1])

    assert faults("keep") < 500
    assert faults("default") > 5_000  # the case the setting is for is real here
    assert keep_freed_memory() is True
