"""The watch daemon: exactly once across crashes, clean stop, model swap, write faults, bad input.

External references named beside the checks:
- "exactly once" is common practice: at-least-once delivery + idempotent checkpoint = effectively
  once (the outputs are cut back to the checkpoint, the inputs resume at the checkpoint).
- POSIX signal(7) semantics: SIGKILL cannot be caught; SIGTERM/SIGINT/SIGHUP can.
- errno ENOSPC ("No space left on device") from write(2); EIO from fsync(2) (the data may not be
  on disk, so it must be written again).
- Unicode Standard, chapter 3 (U+FFFD substitution of maximal subparts, Table 3-8).
- ECMA-48, section 5.4: control sequences (CSI ... final byte).
- RFC 8259 (JSON): section 7, control characters in strings are escaped; a JSON text is an object
  only when it starts with "{".
- chmod(2): mode 0600 = owner read/write only.
"""

from __future__ import annotations

import errno
import json
import os
import random
import shutil
import signal
import stat
import subprocess
import threading
import time
from pathlib import Path

import orjson
import pytest

from daemon_support import (
    DaemonProcess, InProcessDaemon, build_tiny_model, count_lines, read_records, wait_until, write_config,
)
from streamtag.checkpoint import load_state
from streamtag.daemon import BatchWriter, LatencyHistogram, OutputFile
from streamtag.decode import decode_json, decode_text


# -- decoding ------------------------------------------------------------------------------------


def test_invalid_utf8_replaced_per_maximal_subpart_and_flagged():
    # Unicode Standard ch. 3, Table 3-8 (from memory): <61 F1 80 80 E1 80 C2 62 80 63 80 BF 64>
    # decodes to a FFFD FFFD FFFD b FFFD c FFFD FFFD d.
    line = decode_text(bytes([0x61, 0xF1, 0x80, 0x80, 0xE1, 0x80, 0xC2, 0x62, 0x80, 0x63, 0x80, 0xBF, 0x64]))
    assert line.text == "a\ufffd\ufffd\ufffdb\ufffdc\ufffd\ufffdd"
    assert line.flags == ["invalid_utf8"]
    assert not line.binary


def test_nul_bytes_become_spaces_and_are_flagged():
    line = decode_text(b"user\x00kestrel from relay-07")
    assert line.text == "user kestrel from relay-07"
    assert "nul_bytes" in line.flags
    # RFC 8259 section 7: the record must be valid JSON; Python's json module is the reference parser
    assert json.loads(orjson.dumps({"text": line.text}))["text"] == line.text


def test_terminal_escape_codes_kept_in_text_blanked_for_tagging():
    raw = b"\x1b[1;31mERROR\x1b[0m relay-07 \x1b]0;title\x07down"
    line = decode_text(raw)
    assert line.text == raw.decode()  # faithful
    assert "control_chars" in line.flags
    # ECMA-48 5.4: "ESC [ 1 ; 3 1 m" is one control sequence (parameters 0x30-0x3F, final 0x40-0x7E)
    assert line.tag_text == " " * 7 + "ERROR" + " " * 4 + " relay-07 " + " " * 10 + "down"
    assert len(line.tag_text) == len(line.text)  # offsets into tag_text are offsets into text
    # RFC 8259 section 7: ESC (U+001B) must be escaped in a JSON string
    assert b"\\u001b" in orjson.dumps(line.text)


def test_binary_line_is_flagged_not_tagged():
    rng = random.Random(7)
    data = bytes(rng.randrange(256) for _ in range(400)).replace(b"\n", b"")
    line = decode_text(data)
    assert line.binary and "binary" in line.flags
    json.loads(orjson.dumps({"text": line.text}))  # RFC 8259: still a valid JSON string


def test_plain_text_is_unchanged():
    line = decode_text("host brindle-04 up \u00e9t\u00e9\ttab".encode())
    assert (line.text, line.tag_text, line.flags, line.binary) == ("host brindle-04 up \u00e9t\u00e9\ttab",) * 2 + ([], False)


def test_json_text_at_dotted_field_and_other_fields_kept():
    # RFC 8259: an object with a nested object
    line = decode_json(b'{"ts": "2026-01-02T03:04:05Z", "event": {"message": "login failed", "level": 3}}',
                       "event.message")
    assert line.text == "login failed"
    assert line.fields == {"ts": "2026-01-02T03:04:05Z", "event": {"level": 3}}
    assert line.flags == []


@pytest.mark.parametrize("raw", [b'{"message": "unterminated', b'[1, 2, 3]', b'"just a string"', b"plain text"])
def test_json_malformed_or_not_an_object_keeps_raw_text(raw):
    # RFC 8259 section 2/4: only a text starting with "{" is an object
    line = decode_json(raw, "message")
    assert line.text == raw.decode()
    assert "bad_json" in line.flags


def test_json_without_the_text_field():
    line = decode_json(b'{"msg": "elsewhere"}', "message")
    assert line.text == '{"msg": "elsewhere"}' and "no_text_field" in line.flags
    assert line.fields == {"msg": "elsewhere"}


# -- the writer: a failed append is cut back ---------------------------------------------------


def test_partial_write_then_enospc_is_cut_back(tmp_path):
    calls = {"n": 0}

    def flaky_write(fd, data):
        calls["n"] += 1
        if calls["n"] == 2:
            return os.write(fd, bytes(data[: len(data) // 2]))  # short write (write(2) may do this)
        if calls["n"] == 3:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))  # write(2): ENOSPC
        return os.write(fd, data)

    output = OutputFile(str(tmp_path / "out.jsonl"), 0o600, write=flaky_write)
    review = OutputFile(str(tmp_path / "review.jsonl"), 0o600)
    writer = BatchWriter(output, review)
    writer.write(b"first\n", b"")
    with pytest.raises(OSError) as caught:
        writer.write(b"second line\n", b"doubt\n")
    assert caught.value.errno == errno.ENOSPC
    assert (tmp_path / "out.jsonl").read_bytes() == b"first\n"  # cut back to the last good length
    assert (tmp_path / "review.jsonl").read_bytes() == b""
    writer.write(b"second line\n", b"doubt\n")  # retry lands once
    assert (tmp_path / "out.jsonl").read_bytes() == b"first\nsecond line\n"
    assert (tmp_path / "review.jsonl").read_bytes() == b"doubt\n"
    # chmod(2): created private
    assert stat.S_IMODE(os.stat(tmp_path / "out.jsonl").st_mode) == 0o600
    writer.close()


def test_latency_percentiles_match_numpy():
    import numpy as np

    rng = np.random.default_rng(3)
    values = rng.lognormal(mean=-4, sigma=1, size=20000)
    histogram = LatencyHistogram()
    histogram.add(values)
    # numpy.percentile ("inverted_cdf" = the nearest-rank definition) is the reference
    for q in (50, 99):
        reference = np.percentile(values, q, method="inverted_cdf")
        assert abs(histogram.percentile(q) / reference - 1) < 0.011  # buckets are 1 % wide


def test_latency_counts_stand_for_repeated_values():
    # One (latency, count) pair per read instead of one latency per line: numpy.repeat is the
    # reference for what the pairs stand for, numpy.percentile for the percentiles.
    import numpy as np

    rng = np.random.default_rng(4)
    values = rng.lognormal(mean=-4, sigma=1, size=300)
    counts = rng.integers(1, 50, size=300)
    paired, repeated = LatencyHistogram(), LatencyHistogram()
    paired.add(values, counts)
    repeated.add(np.repeat(values, counts))
    assert np.array_equal(paired.counts, repeated.counts)
    for q in (50, 99):
        reference = np.percentile(np.repeat(values, counts), q, method="inverted_cdf")
        assert abs(paired.percentile(q) / reference - 1) < 0.011  # buckets are 1 % wide


# -- end to end helpers -----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def model_paths(tmp_path_factory):
    directory = tmp_path_factory.mktemp("models")
    paths = {}
    for seed in (0, 1, 2):
        path = directory / f"model-{seed}.stm"
        paths[seed] = (path, build_tiny_model(path, seed=seed))
    return paths


@pytest.fixture(autouse=True)
def no_daemon_left_behind():
    yield
    DaemonProcess.kill_leftovers()
    InProcessDaemon.stop_leftovers()


def append_lines(path: Path, lines: list[str]) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, "".join(line + "\n" for line in lines).encode())
    finally:
        os.close(fd)


def numbered(prefix: str, first: int, count: int) -> list[str]:
    return [f"{prefix} {i:06d} login failed for kestrel from 192.0.2.{i % 250}"
            for i in range(first, first + count)]


def line_id(record: dict) -> int:
    return int(record["text"].split()[1])


def model_copy(source: Path, target: Path) -> None:
    """Replace ``target`` atomically (what save_model does), so the daemon never sees half a file."""
    temporary = target.with_suffix(".tmp-copy")
    temporary.write_bytes(source.read_bytes())
    os.replace(temporary, target)


# -- exactly once across SIGKILL --------------------------------------------------------------------


def test_exactly_once_across_sigkill_and_rotation(tmp_path, model_paths):
    """50,000 lines over 10 files (rotation by rename + create), 20+ SIGKILLs at random moments.

    Exactly once is common practice here: at-least-once delivery + idempotent checkpoint =
    effectively once. Every line must be in the output once, in file order, with its true line
    number; the review file must hold exactly the records marked for review.
    """
    total, per_file = 50_000, 5_000
    logs = tmp_path / "logs"
    logs.mkdir()
    live = logs / "app.log"
    # The glob also matches the rotated names, so a file renamed away while the daemon is down is
    # still found (as a deployment should be configured); identity, not name, keeps it one file.
    config = write_config(tmp_path, [str(logs / "app.log*")], model_paths[0][0],
                          output={"review_threshold": 0.3}, batch={"max_lines": 300, "max_wait_ms": 10})
    rng = random.Random(20261201)
    done = threading.Event()

    def writer():
        written = 0
        rotation = 0
        while written < total:
            chunk = min(rng.randint(20, 80), total - written, per_file - written % per_file)
            append_lines(live, numbered("L", written, chunk))
            written += chunk
            if written % per_file == 0 and written < total:
                rotation += 1
                os.rename(live, logs / f"app.log.{rotation}")  # rotation: rename, a new file appears
            time.sleep(0.05)  # about 1,000 lines/s
        done.set()

    writer_thread = threading.Thread(target=writer, daemon=True)
    writer_thread.start()
    kills = 0
    log_path = tmp_path / "daemon.log"
    output = tmp_path / "out" / "tagged.jsonl"
    while kills < 20 or not done.is_set():
        started = DaemonProcess(config, log_path).start()
        # Kill at a random moment of the daemon's work (not during its interpreter start-up).
        wait_until(lambda: started.log_text().count("watching ") > kills or not started.running(),
                   timeout=60, interval=0.02, what="daemon start")
        assert started.running(), started.log_text()[-2000:]
        time.sleep(rng.uniform(0.0, 1.5))
        started.kill()  # signal(7): SIGKILL cannot be caught: no clean-up runs
        kills += 1
    writer_thread.join()
    daemon = DaemonProcess(config, log_path).start()
    wait_until(lambda: daemon.log_text().count("watching ") > kills, timeout=60, what="last start")
    wait_until(lambda: count_lines(output) >= total, timeout=120, what="all lines in the output")
    assert daemon.stop() == 0, daemon.log_text()[-2000:]

    records = read_records(output)
    ids = [line_id(r) for r in records]
    assert len(ids) == total, f"{len(ids)} records for {total} lines after {kills} kills"
    assert sorted(ids) == list(range(total))  # each line exactly once
    by_file: dict[int, list[int]] = {}
    for record, i in zip(records, ids):
        by_file.setdefault(i // per_file, []).append(i)
        assert record["line"] == i % per_file + 1  # true line number within its file
    for file_index, file_ids in by_file.items():
        assert file_ids == sorted(file_ids), f"file {file_index} out of order"
    review = read_records(tmp_path / "out" / "review.jsonl")
    assert sorted(line_id(r) for r in review) == sorted(line_id(r) for r in records if r["review"])
    assert "Traceback" not in daemon.log_text()


# -- SIGTERM ----------------------------------------------------------------------------------------


def test_sigterm_finishes_the_batch_and_checkpoints(tmp_path, model_paths):
    logs = tmp_path / "logs"
    logs.mkdir()
    source = logs / "app.log"
    append_lines(source, numbered("T", 0, 4000))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    output = tmp_path / "out" / "tagged.jsonl"
    daemon = DaemonProcess(config, tmp_path / "daemon.log").start()
    wait_until(lambda: count_lines(output) >= 200, what="first records")
    assert daemon.stop() == 0, daemon.log_text()  # signal(7): SIGTERM is caught; clean exit
    state = load_state(str(tmp_path / "state" / "state.json"))
    # Everything written is checkpointed: the outputs are exactly as long as the state says.
    assert state.output_bytes == output.stat().st_size
    assert state.review_bytes == (tmp_path / "out" / "review.jsonl").stat().st_size
    records = read_records(output)
    (entry,) = state.files.values()
    last = records[-1]
    assert entry["offset"] == last["offset"] + len(last["text"].encode()) + 1  # after its newline
    assert "stopped: every line read is written and checkpointed" in daemon.log_text()
    # A restart continues where it stopped: all 4000 lines exactly once.
    daemon = DaemonProcess(config, tmp_path / "daemon.log").start()
    wait_until(lambda: daemon.log_text().count("watching ") == 2, what="restart")
    wait_until(lambda: count_lines(output) >= 4000, what="the rest after restart")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(output)] == list(range(4000))


def test_sigint_also_stops_cleanly(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("I", 0, 50))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    daemon = DaemonProcess(config, tmp_path / "daemon.log").start()
    wait_until(lambda: count_lines(tmp_path / "out" / "tagged.jsonl") >= 50, what="records")
    daemon.signal(signal.SIGINT)
    assert daemon.wait(60) == 0


# -- model swap -------------------------------------------------------------------------------------


def test_sighup_swaps_the_model_and_refuses_a_corrupt_one(tmp_path, model_paths):
    (path_a, id_a), (path_b, id_b), (path_c, id_c) = model_paths[0], model_paths[1], model_paths[2]
    live_model = tmp_path / "current.stm"
    model_copy(path_a, live_model)
    source = tmp_path / "app.log"
    config = write_config(tmp_path, [str(source)], live_model)
    output = tmp_path / "out" / "tagged.jsonl"
    daemon = DaemonProcess(config, tmp_path / "daemon.log").start()

    append_lines(source, numbered("A", 0, 100))
    wait_until(lambda: count_lines(output) >= 100, what="batch A")
    model_copy(path_b, live_model)
    daemon.signal(signal.SIGHUP)
    wait_until(lambda: f"now tagging with {id_b}" in daemon.log_text(), what="swap to B")
    append_lines(source, numbered("B", 100, 100))
    wait_until(lambda: count_lines(output) >= 200, what="batch B")

    # A corrupt model: the bytes of B with the middle damaged (the model id no longer matches).
    damaged = bytearray(path_c.read_bytes())
    damaged[len(damaged) // 2: len(damaged) // 2 + 64] = b"\0" * 64
    temporary = tmp_path / "damaged.tmp"
    temporary.write_bytes(bytes(damaged))
    os.replace(temporary, live_model)
    daemon.signal(signal.SIGHUP)
    wait_until(lambda: "new model refused" in daemon.log_text(), what="refusal")
    append_lines(source, numbered("C", 200, 100))
    wait_until(lambda: count_lines(output) >= 300, what="batch C")

    # A change of the file alone (no signal) is noticed too.
    model_copy(path_c, live_model)
    wait_until(lambda: f"now tagging with {id_c}" in daemon.log_text(), what="swap to C on file change")
    append_lines(source, numbered("D", 300, 100))
    wait_until(lambda: count_lines(output) >= 400, what="batch D")
    assert daemon.stop() == 0

    models = {}
    for record in read_records(output):
        models.setdefault(record["text"].split()[0], set()).add(record["model"])
    assert models == {"A": {id_a}, "B": {id_b}, "C": {id_b}, "D": {id_c}}
    refusal = [line for line in daemon.log_text().splitlines() if "new model refused" in line]
    assert len(refusal) == 1 and str(live_model) in refusal[0]  # one line naming the file


# -- write faults -----------------------------------------------------------------------------------


def test_enospc_holds_the_batch_and_the_checkpoint(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("W", 0, 300))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    disk_full = threading.Event()
    disk_full.set()

    def write(fd, data):
        if disk_full.is_set():
            os.write(fd, bytes(data[: max(1, len(data) // 3)]))  # part lands, then the disk is full
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))  # write(2): ENOSPC
        return os.write(fd, data)

    daemon = InProcessDaemon(config, write=write).start()
    wait_until(lambda: daemon.log_text().count("write failed (ENOSPC") >= 3, what="retries")
    output = tmp_path / "out" / "tagged.jsonl"
    state_path = str(tmp_path / "state" / "state.json")
    assert output.stat().st_size == 0  # every partial write was cut back
    held = load_state(state_path)
    assert held.output_bytes == 0 and all(entry["offset"] == 0 for entry in held.files.values())
    append_lines(source, numbered("W", 300, 200))  # lines keep coming during the fault
    time.sleep(0.5)
    assert load_state(state_path).files == held.files  # the checkpoint did not advance
    disk_full.clear()
    wait_until(lambda: count_lines(output) >= 500, what="records after the fault")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(output)] == list(range(500))  # no loss, no duplicate
    assert load_state(state_path).output_bytes == output.stat().st_size


def test_fsync_fault_in_the_background_writes_the_batch_again(tmp_path, model_paths):
    # The fsyncs of a batch run beside the tagging of the next one; a failed fsync must still cut
    # the batch back, hold the checkpoint and write the batch again, whole, before anything newer.
    source = tmp_path / "app.log"
    append_lines(source, numbered("F", 0, 200))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    disk_failing = threading.Event()

    def fsync(fd):
        if disk_failing.is_set():
            raise OSError(errno.EIO, os.strerror(errno.EIO))  # fsync(2): EIO
        return os.fsync(fd)

    daemon = InProcessDaemon(config, fsync=fsync).start()
    output = tmp_path / "out" / "tagged.jsonl"
    state_path = str(tmp_path / "state" / "state.json")
    wait_until(lambda: count_lines(output) >= 200, what="first records")
    wait_until(lambda: load_state(state_path).output_bytes == output.stat().st_size, what="first checkpoint")
    disk_failing.set()
    append_lines(source, numbered("F", 200, 100))
    wait_until(lambda: daemon.log_text().count("write failed (EIO") >= 2, what="retries")
    held = load_state(state_path)
    assert output.stat().st_size == held.output_bytes  # the unsynced batch was cut back
    append_lines(source, numbered("F", 300, 100))  # lines keep coming during the fault
    time.sleep(0.5)
    assert load_state(state_path).files == held.files  # the checkpoint did not advance
    disk_failing.clear()
    wait_until(lambda: count_lines(output) >= 400, what="records after the fault")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(output)] == list(range(400))  # no loss, no duplicate
    assert load_state(state_path).output_bytes == output.stat().st_size


def test_checkpoint_fault_pauses_reading_and_loses_nothing(tmp_path, model_paths, monkeypatch):
    import streamtag.daemon as daemon_module

    source = tmp_path / "app.log"
    append_lines(source, numbered("K", 0, 100))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    state_full = threading.Event()
    real_save = daemon_module.save_state

    def save_state(path, state, mode=0o600):
        if state_full.is_set():
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))  # write(2): ENOSPC
        return real_save(path, state, mode=mode)

    monkeypatch.setattr(daemon_module, "save_state", save_state)
    daemon = InProcessDaemon(config).start()
    output = tmp_path / "out" / "tagged.jsonl"
    wait_until(lambda: count_lines(output) >= 100, what="first records")
    state_full.set()
    append_lines(source, numbered("K", 100, 100))
    wait_until(lambda: daemon.log_text().count("checkpoint failed (ENOSPC") >= 2, what="checkpoint retries")
    held = count_lines(output)
    append_lines(source, numbered("K", 200, 100))
    time.sleep(0.5)
    assert count_lines(output) == held  # until the checkpoint lands, nothing more is read
    state_full.clear()
    wait_until(lambda: count_lines(output) >= 300, what="records after the fault")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(output)] == list(range(300))
    assert load_state(str(tmp_path / "state" / "state.json")).output_bytes == output.stat().st_size


def test_start_at_end_skips_old_lines_once(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("E", 0, 50))
    config = write_config(tmp_path, [str(source)], model_paths[0][0], inputs={"start_at": "end"})
    output = tmp_path / "out" / "tagged.jsonl"
    daemon = InProcessDaemon(config).start()
    wait_until(lambda: (tmp_path / "state" / "state.json").exists(), what="first checkpoint")
    append_lines(source, numbered("E", 50, 10))
    wait_until(lambda: count_lines(output) >= 10, what="new lines")
    assert daemon.stop() == 0
    append_lines(source, numbered("E", 60, 10))  # written while stopped: must not be skipped
    daemon = InProcessDaemon(config).start()
    wait_until(lambda: count_lines(output) >= 20, what="lines written while stopped")
    assert daemon.stop() == 0
    records = read_records(output)
    assert [line_id(r) for r in records] == list(range(50, 70))
    assert [r["line"] for r in records] == list(range(51, 71))  # true line numbers in the file


def test_own_files_inside_an_input_directory_are_not_tagged(tmp_path, model_paths):
    logs = tmp_path / "logs"
    logs.mkdir()
    append_lines(logs / "app.log", numbered("O", 0, 20))
    config = write_config(tmp_path, [str(logs)], model_paths[0][0],
                          output={"path": str(logs / "tagged.jsonl"), "review_path": str(logs / "review.jsonl")},
                          state={"directory": str(logs / "state")})
    daemon = InProcessDaemon(config).start()
    wait_until(lambda: count_lines(logs / "tagged.jsonl") >= 20, what="records")
    time.sleep(1.0)  # a few more polls: a feedback loop would show as more records
    assert daemon.stop() == 0
    records = read_records(logs / "tagged.jsonl")
    assert len(records) == 20 and {r["source"] for r in records} == {str(logs / "app.log")}


# -- bad input --------------------------------------------------------------------------------------


def test_bad_bytes_are_flagged_and_recorded(tmp_path, model_paths):
    source = tmp_path / "mixed.log"
    rng = random.Random(11)
    binary = bytes(rng.randrange(256) for _ in range(300)).replace(b"\n", b"")
    huge = b"relay-07 " + b"x" * 5000
    lines = [
        b"ok 1 host brindle-04 up",
        b"utf8 user \xff\xfe kestrel",
        b"nul abc\x00def",
        b"\x1b[31mERROR\x1b[0m relay-07 down",
        binary,
        huge,
        b"ok 2 after the bad ones",
    ]
    source.write_bytes(b"\n".join(lines) + b"\n")
    config = write_config(tmp_path, [str(source)], model_paths[0][0], inputs={"max_line_bytes": 1024})
    daemon = InProcessDaemon(config).start()
    output = tmp_path / "out" / "tagged.jsonl"
    wait_until(lambda: count_lines(output) >= len(lines), what="records")
    assert daemon.stop() == 0
    records = read_records(output)  # RFC 8259: every record parses
    assert [r["line"] for r in records] == list(range(1, len(lines) + 1))
    flags = [set(r["flags"]) for r in records]
    assert flags[0] == set()
    assert "invalid_utf8" in flags[1] and "\ufffd" in records[1]["text"]
    assert "nul_bytes" in flags[2] and records[2]["text"] == "nul abc def"
    assert "control_chars" in flags[3] and records[3]["text"].startswith("\x1b[31m")
    assert "binary" in flags[4] and records[4]["spans"] == []
    assert "truncated" in flags[5] and len(records[5]["text"].encode()) == 1024
    assert flags[6] == set() and records[6]["text"] == "ok 2 after the bad ones"
    for record in records:  # spans point into the recorded text
        for span in record["spans"]:
            assert record["text"][span["start"]:span["end"]] == span["text"]


def test_binary_file_does_not_stall_the_stream(tmp_path, model_paths):
    rng = random.Random(5)
    blob = bytes(rng.randrange(256) for _ in range(200_000))
    (tmp_path / "blob.bin").write_bytes(blob)
    append_lines(tmp_path / "after.log", ["after 000001 the binary file"])
    config = write_config(tmp_path, [str(tmp_path / "blob.bin"), str(tmp_path / "after.log")],
                          model_paths[0][0], inputs={"max_line_bytes": 4096, "idle_flush_seconds": 0.2})
    daemon = InProcessDaemon(config).start()
    output = tmp_path / "out" / "tagged.jsonl"
    expected = blob.count(b"\n") + (0 if blob.endswith(b"\n") else 1) + 1  # + the held last part
    wait_until(lambda: count_lines(output) >= expected, what="records of the binary file")
    assert daemon.stop() == 0
    records = read_records(output)
    assert len(records) == expected
    assert any(r["text"] == "after 000001 the binary file" for r in records)
    from_blob = [r for r in records if r["source"].endswith("blob.bin")]
    assert sum("binary" in r["flags"] for r in from_blob) > len(from_blob) // 2


def test_json_input(tmp_path, model_paths):
    source = tmp_path / "events.jsonl"
    lines = [
        b'{"ts": 1, "event": {"message": "login failed for kestrel", "level": "warn"}}',
        b'{"ts": 2, "event": {"message": "unterminated',
        b'{"ts": 3, "other": "no text here"}',
        b'["an", "array"]',
    ]
    source.write_bytes(b"\n".join(lines) + b"\n")
    config = write_config(tmp_path, [str(source)], model_paths[0][0],
                          inputs={"format": "json", "text_field": "event.message"})
    daemon = InProcessDaemon(config).start()
    output = tmp_path / "out" / "tagged.jsonl"
    wait_until(lambda: count_lines(output) >= 4, what="records")
    assert daemon.stop() == 0
    records = read_records(output)
    assert records[0]["text"] == "login failed for kestrel"
    assert records[0]["fields"] == {"ts": 1, "event": {"level": "warn"}}
    assert "bad_json" in records[1]["flags"] and records[1]["text"] == lines[1].decode()  # raw kept
    assert "no_text_field" in records[2]["flags"] and records[2]["fields"] == {"ts": 3, "other": "no text here"}
    assert "bad_json" in records[3]["flags"]  # RFC 8259: an array is not an object


def test_file_deleted_while_being_read(tmp_path, model_paths):
    source = tmp_path / "doomed.log"
    append_lines(source, numbered("X", 0, 20_000))
    config = write_config(tmp_path, [str(source)], model_paths[0][0], batch={"max_lines": 100})
    daemon = InProcessDaemon(config).start()
    output = tmp_path / "out" / "tagged.jsonl"
    wait_until(lambda: count_lines(output) >= 100, what="first records")
    source.unlink()  # the open descriptor still reads the file to its end
    wait_until(lambda: count_lines(output) >= 20_000, timeout=120, what="the rest of the deleted file")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(output)] == list(range(20_000))


def test_permission_denied_is_logged_and_retried(tmp_path, model_paths):
    source = tmp_path / "locked.log"
    append_lines(source, numbered("P", 0, 10))
    source.chmod(0)
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    # Without CAP_DAC_OVERRIDE (capabilities(7)) even root gets EACCES on a mode-000 file.
    daemon = DaemonProcess(config, tmp_path / "daemon.log", obey_file_modes=True).start()
    wait_until(lambda: "permission denied" in daemon.log_text(), what="the warning")
    time.sleep(0.5)
    assert daemon.running()
    assert count_lines(tmp_path / "out" / "tagged.jsonl") == 0
    source.chmod(0o644)
    wait_until(lambda: count_lines(tmp_path / "out" / "tagged.jsonl") >= 10, what="records once readable")
    assert daemon.stop() == 0
    assert [line_id(r) for r in read_records(tmp_path / "out" / "tagged.jsonl")] == list(range(10))
    warnings = [line for line in daemon.log_text().splitlines() if "permission denied" in line]
    assert len(warnings) == 1  # logged once, retried quietly


def test_unwritable_output_folder_is_one_line(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("U", 0, 3))
    locked = tmp_path / "locked"
    locked.mkdir(mode=0o500)  # no write permission for anyone without CAP_DAC_OVERRIDE
    config = write_config(tmp_path, [str(source)], model_paths[0][0],
                          output={"path": str(locked / "sub" / "out.jsonl")})
    daemon = DaemonProcess(config, tmp_path / "daemon.log", obey_file_modes=True).start()
    assert daemon.wait(60) == 1
    lines = daemon.log_text().strip().splitlines()
    assert len(lines) == 1 and "Permission denied" in lines[0] and "Traceback" not in lines[0]


# -- files, stats -----------------------------------------------------------------------------------


def test_created_files_are_private_and_stats_are_written(tmp_path, model_paths):
    old_umask = os.umask(0o022)  # a common default umask; the files must still be 0600
    try:
        source = tmp_path / "app.log"
        append_lines(source, numbered("S", 0, 300))
        config = write_config(tmp_path, [str(source)], model_paths[0][0],
                              state={"stats_interval_seconds": 0.3})
        daemon = InProcessDaemon(config).start()
        wait_until(lambda: count_lines(tmp_path / "out" / "tagged.jsonl") >= 300, what="records")
        wait_until(lambda: "stats:" in daemon.log_text(), what="a stats line")
        assert daemon.stop() == 0
    finally:
        os.umask(old_umask)
    for name in ("out/tagged.jsonl", "out/review.jsonl", "state/state.json", "state/stats.json"):
        # chmod(2): 0600 = owner read/write only
        assert stat.S_IMODE(os.stat(tmp_path / name).st_mode) == 0o600, name
    stats = json.loads((tmp_path / "state" / "stats.json").read_text())
    assert stats["final"] is True
    assert stats["total_lines"] == 300
    assert {"lines_per_second", "review_rate", "bytes_behind", "latency_p50_ms", "latency_p99_ms"} <= stats.keys()
    line = next(line for line in daemon.logs if line.startswith("stats:"))
    assert "lines/s" in line and "p99" in line and "bytes behind" in line


def test_configured_file_mode(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("M", 0, 10))
    config = write_config(tmp_path, [str(source)], model_paths[0][0], output={"file_mode": "0640"})
    old_umask = os.umask(0o022)
    try:
        daemon = InProcessDaemon(config).start()
        wait_until(lambda: count_lines(tmp_path / "out" / "tagged.jsonl") >= 10, what="records")
        assert daemon.stop() == 0
    finally:
        os.umask(old_umask)
    assert stat.S_IMODE(os.stat(tmp_path / "out" / "tagged.jsonl").st_mode) == 0o640  # chmod(2)


def test_corrupt_state_file_is_refused_with_one_line(tmp_path, model_paths):
    source = tmp_path / "app.log"
    append_lines(source, numbered("C", 0, 5))
    config = write_config(tmp_path, [str(source)], model_paths[0][0])
    (tmp_path / "state").mkdir()
    (tmp_path / "state" / "state.json").write_bytes(b'{"version": 1, "files": {')  # cut short
    daemon = InProcessDaemon(config).start()
    daemon.thread.join(60)
    # Guessing positions could lose or repeat lines: refuse, say which file, touch nothing.
    assert daemon.exit_code == 1  # DataError: the project's exit code 1
    assert len(daemon.logs) == 1 and str(tmp_path / "state" / "state.json") in daemon.logs[0]
    assert not (tmp_path / "out" / "tagged.jsonl").exists()


def test_missing_model_is_one_line_and_exit_1(tmp_path):
    source = tmp_path / "app.log"
    append_lines(source, ["x 000000"])
    config = write_config(tmp_path, [str(source)], tmp_path / "no-such-model.stm")
    daemon = DaemonProcess(config, tmp_path / "daemon.log").start()
    assert daemon.wait(60) == 1  # ModelError: the project's exit code 1
    text = daemon.log_text().strip().splitlines()
    assert len(text) == 1 and "no-such-model.stm" in text[0] and "Traceback" not in text[0]


# -- the sample service unit ------------------------------------------------------------------------

SERVICE_UNIT = Path(__file__).resolve().parent.parent / "config" / "streamtag.service"


def unit_settings() -> dict[str, list[str]]:
    """[Service] settings of the sample unit (systemd.syntax(7): "Key=value" lines, '#' comments)."""
    settings: dict[str, list[str]] = {}
    section = None
    for line in SERVICE_UNIT.read_text().splitlines():
        line = line.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            section = line
            continue
        key, _, value = line.partition("=")
        if section == "[Service]":
            settings.setdefault(key, []).append(value)
    return settings


def test_service_unit_confines_the_daemon():
    settings = unit_settings()
    # systemd.exec(5): the sandboxing directives the deployment relies on
    assert settings["User"][0] not in ("root", "0")
    assert settings["NoNewPrivileges"] == ["yes"]
    assert settings["PrivateNetwork"] == ["yes"]
    assert settings["ProtectSystem"] == ["strict"]  # all read-only but what is named writable
    assert settings["ReadOnlyPaths"][0].strip()
    assert settings["UMask"] == ["0077"]  # chmod(2)/umask(2): new files owner-only
    assert settings["StateDirectory"] == ["streamtag"]
    assert settings["ExecReload"][0].endswith("kill -HUP $MAINPID")  # signal(7): SIGHUP = model reload
    assert settings["KillSignal"] == ["SIGTERM"]
    assert " watch --config " in settings["ExecStart"][0]


@pytest.mark.skipif(not shutil.which("systemd-analyze"), reason="systemd-analyze is not installed")
def test_service_unit_passes_systemd_analyze(tmp_path):
    # systemd-analyze verify (the reference parser) reports unknown or malformed settings
    unit = tmp_path / "streamtag.service"
    unit.write_text(SERVICE_UNIT.read_text())
    result = subprocess.run(["systemd-analyze", "verify", str(unit)], capture_output=True, text=True, timeout=60)
    problems = [line for line in (result.stdout + result.stderr).splitlines()
                if "is not executable" not in line and line.strip()]  # the sample's paths do not exist here
    assert problems == []
