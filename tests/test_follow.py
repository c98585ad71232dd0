"""Tests of streamtag.follow on the real file system.

References used below:
- POSIX.1-2017, System Interfaces: rename() keeps the file (same inode) under the new name; unlink()
  removes a name, and "if one or more processes have the file open when the last link is removed ...
  the removal of the contents of the file shall be postponed until all references to the file are
  closed"; ftruncate()/truncate() cut a file to a length, and writes then continue at the file offset
  (O_APPEND: at the end). POSIX.1-2017 Base Definitions §4.5 (File Access Permissions): a process with
  appropriate privileges may be granted access regardless of the permission bits, which is why the
  chmod-000 check cannot work as root.
- Line ending: LF ends a line; a CR before it (CRLF) is part of the line ending (RFC 5234 Appendix B.1
  defines CRLF as the internet line ending) - common practice for log readers.
- Log rotation by rename + create, and by copy + truncate, are the two common practices for rotating
  logs (the rotated file is renamed to NAME.1, NAME.1 to NAME.2, ...).
- Model-based testing: hypothesis's RuleBasedStateMachine (hypothesis documentation, "Stateful
  testing") drives random sequences of actions and checks them against a simple model.
The expected lines are always computed from the bytes written, with Python's bytes.split as the
reference line splitter.
"""

from __future__ import annotations

import os
import queue
import shutil
import stat
import tempfile
from dataclasses import dataclass, field

import orjson
import pytest
from hypothesis import HealthCheck, event, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule

from streamtag.follow import FLAG_NO_NEWLINE, FLAG_TRUNCATED, ChangeWatcher, Follower, RawLine


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now

    def advance(self, seconds: float) -> None:
        self.now += seconds


def append(path, data: bytes) -> None:
    with open(path, "ab") as handle:
        handle.write(data)


def read_all(follower: Follower, polls: int = 1, batch: int = 10_000) -> list[RawLine]:
    """Poll, then read until nothing more comes (the daemon's loop, without tagging)."""
    out: list[RawLine] = []
    for _ in range(polls):
        follower.poll()
        while True:
            got = follower.read(batch)
            if not got:
                break
            out.extend(got)
    return out


def expected_lines(content: bytes) -> list[bytes]:
    """Reference: the complete lines of ``content`` by bytes.split (the last piece has no newline)."""
    return content.split(b"\n")[:-1]


def make_follower(inputs, clock=None, warnings=None, **kwargs) -> Follower:
    sink = warnings.append if warnings is not None else (lambda message: None)
    return Follower([str(p) for p in inputs], clock=clock or FakeClock(), on_warning=sink, **kwargs)


def lines_text(lines):
    return [line.data for line in lines]


# ---------------------------------------------------------------------------------- plain reading


def test_complete_lines_with_offsets_and_numbers(tmp_path):
    log = tmp_path / "app.log"
    content = b"alpha one\nbravo two\n\ncharlie\n"
    log.write_bytes(content)
    lines = read_all(make_follower([log]))
    assert lines_text(lines) == expected_lines(content)  # reference: bytes.split
    # start/end bracket each line including its newline; the next line starts at the previous end.
    for line in lines:
        assert content[line.start:line.end] == line.data + b"\n"
    assert [line.line_no for line in lines] == [1, 2, 3, 4]
    assert lines[-1].end == len(content)
    assert all(line.flags == () for line in lines)


def test_crlf_line_endings_are_stripped(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"one\r\ntwo\r\nthree\n")
    lines = read_all(make_follower([log]))
    # RFC 5234 Appendix B.1: CRLF is one line ending; the CR is not part of the text.
    assert lines_text(lines) == [b"one", b"two", b"three"]
    assert lines[0].end == 5


def test_lines_spanning_many_read_chunks(tmp_path):
    log = tmp_path / "app.log"
    content = b"".join(b"line %07d %s\n" % (i, b"x" * (i % 200)) for i in range(40_000))  # > 4 MiB
    log.write_bytes(content)
    follower = make_follower([log])
    follower.poll()
    got = []
    while batch := follower.read(777):  # odd batch size: lines cross chunk and batch edges
        got.extend(batch)
    assert lines_text(got) == expected_lines(content)
    assert [line.line_no for line in got] == list(range(1, 40_001))
    assert all(content[line.start:line.end] == line.data + b"\n" for line in got[::997])


def test_binary_and_nul_bytes_come_through_unchanged(tmp_path):
    log = tmp_path / "app.log"
    weird = bytes(b for b in range(256) if b != 0x0A)  # every byte but LF, NUL and invalid UTF-8 included
    content = weird + b"\n" + b"\x00\x00\n" + b"\xff\xfe bad utf8 \xc3\x28\n"
    log.write_bytes(content)
    lines = read_all(make_follower([log]))
    # Only the final CR of a line is a line-ending byte (CRLF); weird ends in 0xFF, so all bytes stay.
    assert lines_text(lines) == expected_lines(content)


def test_partial_line_is_held_until_its_newline_arrives(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"first\nsecond half")
    follower = make_follower([log])
    assert lines_text(read_all(follower)) == [b"first"]
    assert follower.snapshot()[next(iter(follower.snapshot()))]["offset"] == 6  # not past the partial line
    append(log, b" done\nthird\n")
    lines = read_all(follower)
    assert lines_text(lines) == [b"second half done", b"third"]
    assert lines[0].start == 6 and lines[0].flags == ()


def test_idle_partial_line_is_flushed_with_flag(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"complete\nno newline yet")
    clock = FakeClock()
    follower = make_follower([log], clock=clock, idle_flush_seconds=5.0)
    assert lines_text(read_all(follower)) == [b"complete"]
    clock.advance(4.0)
    assert read_all(follower) == []  # not idle long enough
    append(log, b" more")  # growth restarts the idle time
    assert read_all(follower) == []
    clock.advance(4.0)
    assert read_all(follower) == []
    clock.advance(1.5)
    flushed = read_all(follower)
    assert lines_text(flushed) == [b"no newline yet more"]
    assert flushed[0].flags == (FLAG_NO_NEWLINE,)
    assert flushed[0].end == log.stat().st_size
    # The continuation written later is a line of its own, starting where the flushed one ended.
    append(log, b" tail\nnext\n")
    later = read_all(follower)
    assert lines_text(later) == [b" tail", b"next"]
    assert later[0].start == flushed[0].end


def test_idle_flush_disabled_waits_for_the_newline(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"pending")
    clock = FakeClock()
    follower = make_follower([log], clock=clock, idle_flush_seconds=None)
    read_all(follower)
    clock.advance(10_000)
    assert read_all(follower) == []
    append(log, b"\n")
    assert lines_text(read_all(follower)) == [b"pending"]


@pytest.mark.parametrize("long_length", [300, 3 * 1024 * 1024 + 17])  # inside one chunk / across chunks
def test_line_over_the_cap_is_cut_and_flagged(tmp_path, long_length):
    log = tmp_path / "app.log"
    long_line = bytes(b"abcdefghij"[i % 10] for i in range(long_length))
    content = b"short one\n" + long_line + b"\nafter\nlast\n"
    log.write_bytes(content)
    lines = read_all(make_follower([log], max_line_bytes=100))
    assert lines_text(lines) == [b"short one", long_line[:100], b"after", b"last"]
    assert lines[1].flags == (FLAG_TRUNCATED,)
    assert lines[1].end == 10 + long_length + 1  # the skipped rest is accounted for in the offsets
    assert [line.flags for line in (lines[0], lines[2], lines[3])] == [(), (), ()]
    assert [line.line_no for line in lines] == [1, 2, 3, 4]


def test_read_batch_columns_hold_the_same_lines_as_read(tmp_path):
    # read() is read_batch() turned into RawLines; here the columns themselves are checked against
    # the bytes written, with bytes.split as the reference splitter and RFC 5234 B.1 CRLF endings.
    first, second = tmp_path / "a.log", tmp_path / "b.log"
    content = b"one\r\n" + b"L" * 300 + b"\nshort\n\n"
    first.write_bytes(content)
    second.write_bytes(b"other\npartial")
    clock = FakeClock()
    follower = make_follower([first, second], clock=clock, max_line_bytes=100, idle_flush_seconds=1.0)
    follower.poll()
    batch = follower.read_batch(100)
    clock.advance(5)  # the partial last line of b.log is flushed after the idle time
    follower.poll()
    batch.extend(follower.read_batch(100))
    by_path = {}
    for key, path, start, end, data, line_no, flags in zip(batch.keys, batch.paths, batch.starts, batch.ends,
                                                           batch.datas, batch.line_nos, batch.flags):
        by_path.setdefault(path, []).append((start, end, data, line_no, flags))
        assert key.count(":") == 2  # "DEV:INO:GEN"
    assert by_path[str(first)] == [
        (0, 5, b"one", 1, ()), (5, 306, b"L" * 100, 2, (FLAG_TRUNCATED,)), (306, 312, b"short", 3, ()),
        (312, 313, b"", 4, ()),
    ]
    assert by_path[str(second)] == [(0, 6, b"other", 1, ()), (6, 13, b"partial", 2, (FLAG_NO_NEWLINE,))]
    assert len(batch) == 6
    assert batch.raw_lines() == [RawLine(*row) for row in zip(batch.keys, batch.paths, batch.starts, batch.ends,
                                                               batch.datas, batch.line_nos, batch.flags)]


def test_long_line_growing_without_newline_then_completed(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"x" * 5000)
    follower = make_follower([log], max_line_bytes=64, idle_flush_seconds=None)
    assert read_all(follower) == []
    append(log, b"y" * 2_000_000)
    assert read_all(follower) == []
    append(log, b"z\nnext\n")
    lines = read_all(follower)
    assert lines_text(lines) == [b"x" * 64, b"next"]
    assert lines[0].flags == (FLAG_TRUNCATED,) and lines[0].end == 5000 + 2_000_000 + 2


def test_several_files_are_read_fairly_and_in_order(tmp_path):
    logs = [tmp_path / f"svc{i}.log" for i in range(3)]
    for index, log in enumerate(logs):
        log.write_bytes(b"".join(b"svc%d line %d\n" % (index, n) for n in range(1000)))
    follower = make_follower([tmp_path / "*.log"])
    follower.poll()
    first = follower.read(30)
    per_file = {}
    for line in first:
        per_file.setdefault(line.path, []).append(line.line_no)
    assert sorted(len(v) for v in per_file.values()) == [10, 10, 10]  # an equal share each
    rest = []
    while batch := follower.read(100):
        rest.extend(batch)
    everything = first + rest
    for index, log in enumerate(logs):
        numbers = [line.line_no for line in everything if line.path == str(log)]
        assert numbers == list(range(1, 1001))  # each file's lines once, in order


# ---------------------------------------------------------------------------------- rotation etc.


def test_rotation_rename_create_keeps_reading_the_renamed_file(tmp_path):
    log = tmp_path / "app.log"
    clock = FakeClock()
    follower = make_follower([log], clock=clock)
    writer = open(log, "ab", buffering=0)
    writer.write(b"a1\na2\n")
    assert lines_text(read_all(follower)) == [b"a1", b"a2"]
    # Rotation: rename, then create. The writer still holds the renamed file (POSIX rename keeps the
    # inode) and appends two more lines to it before it reopens the new file.
    os.rename(log, tmp_path / "app.log.1")
    writer.write(b"a3\n")
    log.write_bytes(b"b1\n")
    writer.write(b"a4\n")
    writer.close()
    lines = read_all(follower)
    old = [line for line in lines if line.path.endswith("app.log.1")]
    new = [line for line in lines if line.path.endswith("app.log")]
    assert lines_text(old) == [b"a3", b"a4"] and [line.line_no for line in old] == [3, 4]
    assert lines_text(new) == [b"b1"] and new[0].start == 0 and new[0].line_no == 1
    assert old[0].file_key != new[0].file_key
    # The renamed file is dropped only after the grace period without growth.
    assert len(follower.snapshot()) == 2
    for _ in range(4):
        clock.advance(3.0)
        read_all(follower)
    assert [entry["path"] for entry in follower.snapshot().values()] == [str(log)]


def test_renamed_file_appended_to_during_grace_is_read(tmp_path):
    log = tmp_path / "app.log"
    clock = FakeClock()
    follower = make_follower([log], clock=clock)
    log.write_bytes(b"one\n")
    read_all(follower)
    os.rename(log, tmp_path / "app.log.1")
    clock.advance(1.0)
    read_all(follower)
    append(tmp_path / "app.log.1", b"two\nthree")  # late write by a slow writer, last line partial
    clock.advance(1.0)
    assert lines_text(read_all(follower)) == [b"two"]
    for _ in range(4):
        clock.advance(3.0)
        got = read_all(follower)
        if got:
            # The partial last line is handed out before the file is dropped, not lost.
            assert lines_text(got) == [b"three"] and got[0].flags == (FLAG_NO_NEWLINE,)
    assert follower.snapshot() == {}


def test_copy_truncate_reads_again_from_the_start(tmp_path):
    log = tmp_path / "app.log"
    warnings = []
    follower = make_follower([log], warnings=warnings)
    log.write_bytes(b"old 1\nold 2\nold 3\n")
    before = read_all(follower)
    shutil.copyfile(log, tmp_path / "app.log.1")
    os.truncate(log, 0)  # POSIX truncate: same inode, length 0
    append(log, b"new 1\n")  # shorter than the offset already reached
    after = read_all(follower)
    assert lines_text(after) == [b"new 1"]
    assert after[0].start == 0 and after[0].line_no == 1
    assert after[0].file_key != before[0].file_key  # a new generation of the same inode
    assert after[0].file_key.split(":")[:2] == before[0].file_key.split(":")[:2]
    assert any("truncated" in message for message in warnings)


def test_truncate_then_write_more_than_before_is_caught_by_the_head(tmp_path):
    log = tmp_path / "app.log"
    warnings = []
    follower = make_follower([log], warnings=warnings)
    log.write_bytes(b"first generation line\n")
    read_all(follower)
    # Truncate and at once write more than before: size >= old offset, so only the changed first
    # bytes reveal the rewrite.
    new_content = b"second generation, line one\nsecond generation, line two\n"
    with open(log, "r+b") as handle:
        handle.truncate(0)
        handle.write(new_content)
    assert os.path.getsize(log) > len(b"first generation line\n")
    lines = read_all(follower)
    assert lines_text(lines) == expected_lines(new_content)
    assert lines[0].start == 0
    assert any("rewritten" in message for message in warnings)


def test_truncation_between_poll_and_read_does_not_glue_generations(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"gen one line\nheld partial")
    follower = make_follower([log])
    assert lines_text(read_all(follower)) == [b"gen one line"]
    with open(log, "r+b") as handle:  # after poll(), before the next read()
        handle.truncate(0)
        handle.write(b"gen two, a longer first line\nand a second\n")
    lines = follower.read(100)  # no poll() in between
    # The held partial line of the old content must not be joined to the new content's bytes.
    assert lines_text(lines) == [b"gen two, a longer first line", b"and a second"]
    assert lines[0].start == 0


def test_delete_and_recreate_reads_the_new_file_from_the_start(tmp_path):
    log = tmp_path / "app.log"
    follower = make_follower([log])
    log.write_bytes(b"gone 1\n")
    first = read_all(follower)
    log.unlink()
    assert read_all(follower) == []
    assert follower.snapshot() == {}  # deleted and read to its end: dropped
    log.write_bytes(b"again 1\nagain 2\n")
    second = read_all(follower)
    assert lines_text(second) == [b"again 1", b"again 2"]
    assert second[0].start == 0 and second[0].file_key != first[0].file_key


def test_file_deleted_while_being_read_is_read_to_its_end(tmp_path):
    log = tmp_path / "app.log"
    content = b"".join(b"row %d\n" % i for i in range(5000))
    log.write_bytes(content)
    follower = make_follower([log])
    follower.poll()
    part = follower.read(100)
    log.unlink()  # POSIX unlink: contents stay while a descriptor is open
    rest = read_all(follower)
    assert lines_text(part + rest) == expected_lines(content)
    read_all(follower)
    assert follower.snapshot() == {}


def test_missing_and_vanishing_inputs_do_not_raise(tmp_path):
    follower = make_follower([tmp_path / "nothing.log", tmp_path / "nodir" / "*.log", tmp_path / "gone"])
    assert read_all(follower) == []
    (tmp_path / "nothing.log").write_bytes(b"late\n")
    assert lines_text(read_all(follower)) == [b"late"]


def test_files_appearing_after_start_are_read_from_the_beginning(tmp_path):
    existing = tmp_path / "a.log"
    existing.write_bytes(b"old 1\nold 2\nhalf")
    follower = make_follower([tmp_path], start_at="end")
    assert read_all(follower) == []  # start_at=end: what was there at the first start is skipped
    append(existing, b" done\nnew\n")
    later = tmp_path / "b.log"
    later.write_bytes(b"b 1\nb 2\n")
    lines = read_all(follower)
    by_path = {}
    for line in lines:
        by_path.setdefault(line.path, []).append(line)
    # The partial line at the start is taken whole once complete; line numbers count the skipped lines.
    assert lines_text(by_path[str(existing)]) == [b"half done", b"new"]
    assert [line.line_no for line in by_path[str(existing)]] == [3, 4]
    assert lines_text(by_path[str(later)]) == [b"b 1", b"b 2"]  # appeared later: from the beginning


def test_directory_and_glob_inputs_skip_compressed_fifos_and_excluded(tmp_path):
    (tmp_path / "a.log").write_bytes(b"a\n")
    (tmp_path / "a.log.2.gz").write_bytes(b"\x1f\x8b binary\n")
    (tmp_path / "out.jsonl").write_bytes(b"{}\n")
    os.mkfifo(tmp_path / "pipe")  # opening a FIFO for reading would block: it must be skipped
    sub = tmp_path / "sub"
    sub.mkdir()
    (sub / "deep.log").write_bytes(b"deep\n")
    flat = read_all(make_follower([tmp_path], exclude=[tmp_path / "out.jsonl"]))
    assert sorted(lines_text(flat)) == [b"a"]
    deep = read_all(make_follower([tmp_path / "**" / "*.log"]))
    assert sorted(lines_text(deep)) == [b"a", b"deep"]
    recursive = read_all(make_follower([tmp_path], recursive=True, exclude=[tmp_path / "out.jsonl"]))
    assert sorted(lines_text(recursive)) == [b"a", b"deep"]


# ---------------------------------------------------------------------------------- permissions


def _root_ignores_permissions(path) -> bool:
    try:
        with open(path, "rb"):
            return True
    except PermissionError:
        return False


def test_permission_denied_warns_and_retries(tmp_path):
    log = tmp_path / "secret.log"
    log.write_bytes(b"hidden\n")
    os.chmod(log, 0)
    try:
        if _root_ignores_permissions(log):
            pytest.skip("running with privileges that bypass permission bits (POSIX §4.5); "
                        "see the injected-EACCES test below")
        warnings = []
        follower = make_follower([log], warnings=warnings)
        assert read_all(follower) == []
        assert read_all(follower) == []
        assert len([m for m in warnings if "permission denied" in m]) == 1  # said once, not every poll
        os.chmod(log, stat.S_IRUSR | stat.S_IWUSR)
        assert lines_text(read_all(follower)) == [b"hidden"]
    finally:
        os.chmod(log, stat.S_IRUSR | stat.S_IWUSR)


def test_permission_denied_injected_warns_and_retries(tmp_path, monkeypatch):
    # As root, chmod 000 does not deny reading (POSIX §4.5), so make open() fail with EACCES the way
    # the kernel does for an unprivileged reader, for this one path only.
    log = tmp_path / "secret.log"
    log.write_bytes(b"hidden\n")
    real_open = os.open
    denied = {str(log)}

    def guarded_open(path, flags, *args, **kwargs):
        if os.fspath(path) in denied:
            raise PermissionError(13, "Permission denied", os.fspath(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", guarded_open)
    warnings = []
    follower = make_follower([log], warnings=warnings)
    assert read_all(follower, polls=3) == []
    assert [m for m in warnings if "permission denied" in m] == [f"permission denied reading {log}; will retry"]
    denied.clear()
    assert lines_text(read_all(follower)) == [b"hidden"]


# ---------------------------------------------------------------------------------- resume


def snapshot_roundtrip(follower: Follower) -> dict:
    """The snapshot as it comes back from the state file (JSON)."""
    return orjson.loads(orjson.dumps(follower.snapshot()))


def read_then_stop(log, content: bytes) -> tuple[list[RawLine], dict]:
    """Write ``content``, read all of it, take the snapshot and stop: (lines read, saved state)."""
    log.write_bytes(content)
    follower = make_follower([log])
    lines = read_all(follower)
    saved = snapshot_roundtrip(follower)
    follower.close()
    return lines, saved


def test_resume_continues_after_the_last_line_read(tmp_path):
    log = tmp_path / "app.log"
    content = b"".join(b"entry %d\n" % i for i in range(10))
    log.write_bytes(content)
    follower = make_follower([log])
    follower.poll()
    first = follower.read(4)
    saved = snapshot_roundtrip(follower)
    follower.read(3)  # read after the snapshot, never committed: must come again
    del follower  # crash: no close()
    append(log, b"entry 10\n")
    resumed = make_follower([log], saved=saved)
    rest = read_all(resumed)
    assert lines_text(first + rest) == expected_lines(content + b"entry 10\n")
    assert rest[0].line_no == 5 and rest[0].file_key == first[0].file_key


def test_resume_finds_a_file_rotated_while_stopped(tmp_path):
    log = tmp_path / "app.log"
    first, saved = read_then_stop(log, b"a1\na2\n")
    append(log, b"a3\n")
    os.rename(log, tmp_path / "app.log.1")  # rotated while streamtag was stopped
    append(tmp_path / "app.log.1", b"a4\n")
    log.write_bytes(b"b1\n")
    resumed = make_follower([log], saved=saved)
    lines = read_all(resumed)
    old = [line for line in lines if line.file_key == first[0].file_key]
    assert lines_text(old) == [b"a3", b"a4"] and old[0].path == str(tmp_path / "app.log.1")
    assert [line.line_no for line in old] == [3, 4]
    assert lines_text([line for line in lines if line.file_key != first[0].file_key]) == [b"b1"]


def test_resume_after_truncation_while_stopped_reads_from_zero(tmp_path):
    log = tmp_path / "app.log"
    _, saved = read_then_stop(log, b"long first line\nsecond line\n")
    with open(log, "r+b") as handle:
        handle.truncate(0)
        handle.write(b"x\n")
    warnings = []
    lines = read_all(make_follower([log], saved=saved, warnings=warnings))
    assert lines_text(lines) == [b"x"] and lines[0].start == 0
    assert any("changed while streamtag was stopped" in message for message in warnings)


def test_resume_with_same_inode_but_other_first_bytes_reads_from_zero(tmp_path):
    log = tmp_path / "app.log"
    _, saved = read_then_stop(log, b"original 1\noriginal 2\n")
    replacement = b"replaced 1\nreplaced 2\nreplaced 3\n"  # same inode, longer, other head
    with open(log, "r+b") as handle:
        handle.truncate(0)
        handle.write(replacement)
    lines = read_all(make_follower([log], saved=saved))
    assert lines_text(lines) == expected_lines(replacement)


def test_resume_drops_a_file_that_is_gone_with_a_warning(tmp_path):
    log = tmp_path / "app.log"
    _, saved = read_then_stop(log, b"a\n")
    log.unlink()
    warnings = []
    resumed = make_follower([log], saved=saved, warnings=warnings)
    assert resumed.snapshot() == {}
    assert any("is gone" in message for message in warnings)


def test_snapshot_offsets_and_pending_bytes(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"12345\n" * 10 + b"part")
    follower = make_follower([log])
    follower.poll()
    follower.read(3)
    entry = next(iter(follower.snapshot().values()))
    assert entry["offset"] == 18 and entry["line_no"] == 3
    assert entry["ino"] == log.stat().st_ino and entry["dev"] == log.stat().st_dev
    assert follower.pending_bytes() == 64 - 18


# ---------------------------------------------------------------------------------- change watcher


def test_change_watcher_hints_on_append(tmp_path):
    log = tmp_path / "app.log"
    log.write_bytes(b"")
    hints: queue.Queue = queue.Queue(maxsize=8)
    watcher = ChangeWatcher([str(tmp_path / "*.log")], hints)
    assert watcher.directories() == {str(tmp_path): False}
    watcher.start()
    try:
        append(log, b"new\n")
        hinted = hints.get(timeout=20)  # waits for the observer thread, not a timing assertion
        assert hinted in (str(log), str(tmp_path))
    finally:
        watcher.stop()


# ---------------------------------------------------------------------------------- state machine


@dataclass
class Generation:
    """One stretch of content of one inode: what was written, in the order written."""

    ident: int
    ino: int
    content: bytearray = field(default_factory=bytearray)
    lossy: bool = False  # its unread part may be lost (truncated/deleted unseen/unreachable)


NAMES = ("app.log", "app.log.1", "app.log.2")
IDLE_SECONDS = 5.0
MAX_LINE_BYTES = 24  # small, so that some written lines (8-byte tag + up to 30 bytes) are cut


class FollowerMachine(RuleBasedStateMachine):
    """Random file actions against a model of what was written (see the module docstring).

    The model keeps, per generation, the exact bytes written. After every step the lines handed out
    must be, per file_key, a gap-free run of that generation's lines from offset 0, and no generation
    may be read under two keys (no duplicates). After a drain, every generation that the rules do not
    allow to lose data must have been read to its last byte. A crash rolls the handed-out lines back
    to those before the last commit (snapshot), like the daemon's output being cut back.
    """

    def __init__(self) -> None:
        super().__init__()
        self.dir = tempfile.mkdtemp(prefix="streamtag-follow-")
        self.clock = FakeClock()
        self.counter = 0
        self.generations: list[Generation] = []
        self.at: dict[str, Generation] = {}  # name -> generation currently on disk there
        self.emitted: list[RawLine] = []
        self.committed: list[RawLine] = []
        self.saved: dict | None = None
        self.follower: Follower | None = None
        self.inputs: list[str] = []

    # -- helpers

    def path(self, name: str) -> str:
        return os.path.join(self.dir, name)

    def reachable(self, name: str) -> bool:
        return self.glob_mode or name == "app.log"

    def followed_inodes(self) -> set[int]:
        return {entry["ino"] for entry in self.follower.snapshot().values()}

    def new_generation(self, name: str) -> Generation:
        fd = os.open(self.path(name), os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.close(fd)
        generation = Generation(len(self.generations), os.stat(self.path(name)).st_ino)
        self.generations.append(generation)
        self.at[name] = generation
        return generation

    def write(self, name: str, data: bytes) -> None:
        generation = self.at[name]
        if not self.reachable(name) and generation.ino not in self.followed_inodes():
            generation.lossy = True  # nobody will look at this file any more (dropped or never seen)
        fd = os.open(self.path(name), os.O_WRONLY | os.O_APPEND)
        try:
            os.write(fd, data)
        finally:
            os.close(fd)
        generation.content += data

    def unique_line(self, width: int) -> bytes:
        self.counter += 1
        return b"L%06d:" % self.counter + (b"abcdefghijklmnopqrstuvwxyz0123"[:width])

    def remove(self, name: str) -> None:
        generation = self.at.pop(name)
        if generation.ino not in self.followed_inodes():
            generation.lossy = True
        os.unlink(self.path(name))

    def collect(self, lines: list[RawLine]) -> None:
        self.emitted.extend(lines)

    # -- set-up

    @initialize(glob_mode=st.booleans())
    def start(self, glob_mode):
        self.glob_mode = glob_mode
        self.inputs = [self.path("app.log*") if glob_mode else self.path("app.log")]
        self.new_generation("app.log")
        self.follower = self.make_follower(None)

    def make_follower(self, saved):
        return Follower(self.inputs, saved=saved, clock=self.clock, idle_flush_seconds=IDLE_SECONDS,
                        max_line_bytes=MAX_LINE_BYTES, on_warning=lambda message: None)

    def teardown(self):
        if self.follower is not None:
            self.follower.close()
        shutil.rmtree(self.dir, ignore_errors=True)

    # -- writer actions

    @rule(name=st.sampled_from(NAMES), count=st.integers(1, 4), width=st.integers(0, 30))
    def append_lines(self, name, count, width):
        if name not in self.at:
            if name != "app.log":
                return
            self.new_generation(name)  # a logger re-creates its file when it finds it gone
        self.write(name, b"".join(self.unique_line(width) + b"\n" for _ in range(count)))

    @rule(name=st.sampled_from(NAMES), width=st.integers(0, 30))
    def append_half_line(self, name, width):
        if name in self.at:
            self.write(name, self.unique_line(width))  # completed by the next append to this file

    @rule()
    def rotate_by_rename(self):
        if "app.log.2" in self.at:
            self.remove("app.log.2")
        for old, new in (("app.log.1", "app.log.2"), ("app.log", "app.log.1")):
            if old in self.at:
                generation = self.at.pop(old)
                os.rename(self.path(old), self.path(new))
                self.at[new] = generation
                if not self.reachable(new) and generation.ino not in self.followed_inodes():
                    generation.lossy = True  # renamed away before it was ever seen
        self.new_generation("app.log")

    @rule()
    def rotate_by_copy_truncate(self):
        if "app.log" not in self.at:
            return
        if "app.log.2" in self.at:
            self.remove("app.log.2")
        if "app.log.1" in self.at:
            self.at["app.log.2"] = self.at.pop("app.log.1")
            os.rename(self.path("app.log.1"), self.path("app.log.2"))
        source = self.at["app.log"]
        copy = self.new_generation("app.log.1")
        shutil.copyfile(self.path("app.log"), self.path("app.log.1"))
        copy.content += source.content
        copy.lossy = not self.glob_mode  # a copy under an unreachable name is never read
        self.truncate("app.log", b"")

    @rule(count=st.integers(1, 6))
    def truncate_then_write_more(self, count):
        if "app.log" not in self.at:
            return
        old_size = len(self.at["app.log"].content)
        data = b""
        while len(data) <= old_size or count > 0:
            data += self.unique_line(10) + b"\n"
            count -= 1
        self.truncate("app.log", data)

    def truncate(self, name: str, data: bytes) -> None:
        """Cut the file to 0 and write ``data`` at once (no poll in between): a new generation."""
        old = self.at[name]
        old.lossy = True  # copy-truncate by nature loses what was not read before the cut
        generation = Generation(len(self.generations), old.ino)
        self.generations.append(generation)
        self.at[name] = generation
        with open(self.path(name), "r+b") as handle:
            handle.truncate(0)
            handle.write(data)
        generation.content += data

    @rule(name=st.sampled_from(NAMES))
    def delete(self, name):
        if name in self.at:
            self.remove(name)

    @rule()
    def recreate(self):
        if "app.log" not in self.at:
            self.new_generation("app.log")

    # -- follower actions

    @rule(batch=st.integers(1, 40))
    def poll_and_read(self, batch):
        self.follower.poll()
        self.collect(self.follower.read(batch))

    @rule(batch=st.integers(1, 40))
    def read_without_poll(self, batch):
        self.collect(self.follower.read(batch))

    @rule(seconds=st.sampled_from([0.5, 2.0, 6.0]))
    def pause(self, seconds):
        self.clock.advance(seconds)

    @rule(batch=st.integers(1, 40))
    def daemon_cycle(self, batch):
        """The daemon's loop: poll, read a batch, (write it,) checkpoint."""
        self.poll_and_read(batch)
        self.commit()

    @rule()
    def commit(self):
        self.saved = orjson.loads(orjson.dumps(self.follower.snapshot()))
        self.committed = list(self.emitted)

    @rule()
    def crash_and_restart(self):
        self.follower = None  # dropped without close(), like a killed process
        self.emitted = list(self.committed)  # only what was committed counts
        self.follower = self.make_follower(self.saved)
        restored = self.followed_inodes()
        event(f"restart: {min(len(restored), 3)}+ file(s) resumed from the snapshot")
        for generation in self.generations:
            on_disk = any(g is generation for g in self.at.values())
            name = next((n for n, g in self.at.items() if g is generation), None)
            if not on_disk or (not self.reachable(name) and generation.ino not in restored):
                generation.lossy = True

    @rule()
    def drain(self):
        """Give the follower time (idle flush, grace) and read everything; nothing may be missing."""
        for _ in range(6):
            self.follower.poll()
            while lines := self.follower.read(1000):
                self.collect(lines)
            self.clock.advance(IDLE_SECONDS / 2 + 0.1)
        ends = self.lines_per_generation()
        complete = [g for g in self.generations if not g.lossy and g.content]
        event(f"drain: {min(len(complete), 4)}+ generation(s) must be complete")
        lossy = [g for g in self.generations if g.lossy and g.content]
        event(f"drain: {min(len(lossy), 4)}+ generation(s) may have lost lines")
        for generation in complete:
            assert ends.get(generation.ident) == len(generation.content), (
                f"generation {generation.ident} (inode {generation.ino}) read to "
                f"{ends.get(generation.ident)} of {len(generation.content)} bytes"
            )

    # -- the check

    def generation_of(self, line: RawLine) -> Generation:
        ino = int(line.file_key.split(":")[1])
        matches = [g for g in self.generations if g.ino == ino and self.matches(g, line)]
        assert len(matches) == 1, f"line {line} matches {len(matches)} generations"
        return matches[0]

    @staticmethod
    def matches(generation: Generation, line: RawLine) -> bool:
        piece = bytes(generation.content[line.start:line.end])
        if FLAG_NO_NEWLINE in line.flags:
            body, complete = piece, True
        else:
            body, complete = piece[:-1], piece.endswith(b"\n")
        if not complete or b"\n" in body:
            return False
        if FLAG_TRUNCATED in line.flags:
            return len(body) > MAX_LINE_BYTES and line.data == body[:MAX_LINE_BYTES]
        return len(body) <= MAX_LINE_BYTES and line.data == body

    @invariant()
    def lines_are_exact_gap_free_and_once(self) -> None:
        self.lines_per_generation()

    def lines_per_generation(self) -> dict[int, int]:
        """Every key reads one generation, gap-free from 0, each line exactly as written.

        Returns generation -> offset reached.
        """
        by_key: dict[str, list[RawLine]] = {}
        for line in self.emitted:
            by_key.setdefault(line.file_key, []).append(line)
        key_of_generation: dict[int, str] = {}
        ends: dict[int, int] = {}
        for key, lines in by_key.items():
            assert lines[0].start == 0, f"{key} starts at {lines[0].start}"
            generation = self.generation_of(lines[0])
            assert key_of_generation.setdefault(generation.ident, key) == key, (
                f"generation {generation.ident} read under two keys (duplicates)"
            )
            for previous, line in zip(lines, lines[1:]):
                assert line.start == previous.end, f"gap or repeat between {previous} and {line}"
            for number, line in enumerate(lines, 1):
                assert line.line_no == number
                assert self.matches(generation, line), f"{line} differs from what was written"
            ends[generation.ident] = lines[-1].end
        return ends


FollowerMachine.TestCase.settings = settings(
    # Moderate by default to keep the suite quick; STREAMTAG_STATEFUL_EXAMPLES=5000 for a deep run.
    max_examples=int(os.environ.get("STREAMTAG_STATEFUL_EXAMPLES", "150")),
    stateful_step_count=40,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much],
)
test_follower_state_machine = FollowerMachine.TestCase
