"""Tests of streamtag.checkpoint: atomic state file, one-line errors, cutting outputs back.

References:
- RFC 8259 (JSON): the state file must be a JSON text; Python's json module (reference library)
  reads it back.
- POSIX.1-2017 rename(): replacing a file by rename is atomic - "a link named new shall remain
  visible to other threads throughout the renaming operation and refer either to the file referred to
  by new or old"; so a crash before the rename leaves the old state whole. ftruncate(): the file is
  cut to the length given. O_APPEND: every write goes to the end of the file.
- File modes: private files are 0600 (owner read/write), the POSIX permission bits S_IRUSR|S_IWUSR.
"""

from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
import textwrap

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamtag.checkpoint import (
    State,
    load_state,
    open_append,
    recover_outputs,
    save_state,
    write_file_atomically,
)
from streamtag.errors import DataError, StreamtagError

PRIVATE = stat.S_IRUSR | stat.S_IWUSR  # 0600


def sample_state(offset: int = 42) -> State:
    files = {
        "2049:1311:0a1b2c3d4e5f": {
            "path": "/srv/orrivask/app.log", "dev": 2049, "ino": 1311, "offset": offset,
            "line_no": 3, "head_len": 42, "head_hash": "00ff" * 8,
        }
    }
    return State(files=files, output_bytes=1200, review_bytes=300, model_id="st1-feed", extra={"lines": 3})


def test_save_and_load_round_trip_as_plain_json(tmp_path):
    path = tmp_path / "state" / "state.json"
    state = sample_state()
    save_state(path, state)
    assert load_state(path) == state
    # RFC 8259: a JSON text any JSON reader accepts (Python's json module as the reference).
    document = json.loads(path.read_text(encoding="utf-8"))
    assert document["version"] == 1 and document["output_bytes"] == 1200
    assert document["files"] == state.files


def test_state_file_is_private(tmp_path):
    path = tmp_path / "state.json"
    save_state(path, sample_state())
    assert stat.S_IMODE(path.stat().st_mode) == PRIVATE
    save_state(path, sample_state(), mode=0o640)
    assert stat.S_IMODE(path.stat().st_mode) == 0o640


def test_atomic_write_creates_folders_and_leaves_no_temp(tmp_path):
    path = tmp_path / "new" / "deeper" / "stats.json"
    write_file_atomically(path, b'{"lines": 1}', mode=0o640)
    write_file_atomically(str(path), b'{"lines": 2}', mode=0o640)  # str paths too
    assert json.loads(path.read_bytes()) == {"lines": 2}  # RFC 8259 / json module reads it back
    assert stat.S_IMODE(path.stat().st_mode) == 0o640  # the permission bits asked for, whatever the umask
    assert sorted(p.name for p in path.parent.iterdir()) == ["stats.json"]


def test_atomic_write_skips_a_temp_name_left_by_an_earlier_process(tmp_path):
    # A stale temp file under the next name (same process id after a restart) is not reused:
    # O_EXCL (POSIX open()) refuses it, the writer takes another name and the stale one stays as it was.
    from streamtag import checkpoint

    path = tmp_path / "state.json"
    upcoming = next(checkpoint._TEMPORARY_NUMBERS) + 1
    stale = tmp_path / f".state.json.{os.getpid()}.{upcoming}.tmp"
    stale.write_bytes(b"half")
    write_file_atomically(path, b"{}")
    assert path.read_bytes() == b"{}" and stale.read_bytes() == b"half"


def test_missing_state_is_none(tmp_path):
    assert load_state(tmp_path / "absent.json") is None


json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**53), 2**53) | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)


@settings(max_examples=25, deadline=None)  # each example fsyncs twice
@given(
    files=st.dictionaries(st.text(min_size=1, max_size=12), st.dictionaries(st.text(max_size=8), json_values, max_size=4)),
    output_bytes=st.integers(0, 2**62),
    review_bytes=st.integers(0, 2**62),
    model_id=st.none() | st.text(max_size=16),
)
def test_any_json_state_round_trips(tmp_path_factory, files, output_bytes, review_bytes, model_id):
    path = tmp_path_factory.mktemp("rt") / "state.json"
    state = State(files=files, output_bytes=output_bytes, review_bytes=review_bytes, model_id=model_id)
    save_state(path, state)
    assert load_state(path) == state
    assert json.loads(path.read_bytes())["files"] == files  # reference reader agrees


def test_crash_between_temp_write_and_rename_keeps_the_old_state(tmp_path):
    path = tmp_path / "state.json"
    old = sample_state(offset=10)
    save_state(path, old)
    # A real crash: a child process writes the new state and dies (os._exit, no clean-up handlers)
    # at the moment it would rename the temp file over the old state.
    child = textwrap.dedent(
        f"""
        import os
        from streamtag.checkpoint import State, save_state
        os.replace = lambda *args, **kwargs: os._exit(9)
        save_state({str(path)!r}, State(files={{}}, output_bytes=99999, review_bytes=0))
        """
    )
    result = subprocess.run([sys.executable, "-c", child], capture_output=True, timeout=120)
    assert result.returncode == 9
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    assert leftovers, "the crash should have left the written temp file behind"
    # POSIX rename atomicity: the old state is whole; the half-done temp file is cleaned up on load.
    assert load_state(path) == old
    assert [p.name for p in tmp_path.iterdir()] == ["state.json"]


def test_failed_write_leaves_old_state_and_no_temp(tmp_path, monkeypatch):
    path = tmp_path / "state.json"
    old = sample_state()
    save_state(path, old)

    def failing_fsync(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", failing_fsync)
    with pytest.raises(OSError):
        write_file_atomically(path, b"{}")
    monkeypatch.undo()
    assert load_state(path) == old
    assert [p.name for p in tmp_path.iterdir()] == ["state.json"]


@pytest.mark.parametrize(
    ("content", "words"),
    [
        (b"", "not valid JSON"),
        (b'{"version": 1, "files": {', "not valid JSON"),  # cut short
        (b"\x00\x00\x00\x00", "not valid JSON"),  # zero-filled block after a power loss
        (b"[1, 2]", "not a JSON object"),
        (b'{"version": 7, "files": {}, "output_bytes": 0, "review_bytes": 0}', "version 7"),
        (b'{"files": {}, "output_bytes": 0, "review_bytes": 0}', "version None"),
        (b'{"version": 1, "files": [], "output_bytes": 0, "review_bytes": 0}', '"files"'),
        (b'{"version": 1, "files": {}, "output_bytes": -5, "review_bytes": 0}', '"output_bytes"'),
        (b'{"version": 1, "files": {}, "output_bytes": 0, "review_bytes": "12"}', '"review_bytes"'),
        (b'{"version": 1, "files": {}, "output_bytes": true, "review_bytes": 0}', '"output_bytes"'),
        (b'{"version": 1, "files": {"k": 3}, "output_bytes": 0, "review_bytes": 0}', "file entry"),
    ],
)
def test_corrupt_state_is_a_one_line_data_error(tmp_path, content, words):
    path = tmp_path / "state.json"
    path.write_bytes(content)
    with pytest.raises(DataError) as caught:
        load_state(path)
    message = str(caught.value)
    assert "\n" not in message
    assert str(path) in message and words in message
    assert "move it aside" in message  # says how to recover
    assert isinstance(caught.value, StreamtagError)


# ------------------------------------------------------------------------------ recover_outputs


def test_recover_cuts_outputs_back_to_recorded_lengths(tmp_path):
    output, review = tmp_path / "out.jsonl", tmp_path / "review.jsonl"
    committed_out, committed_review = b'{"line":1}\n{"line":2}\n', b'{"line":2}\n'
    output.write_bytes(committed_out + b'{"line":3}\n{"li')  # written after the checkpoint, then a crash
    review.write_bytes(committed_review + b'{"line":3}\n')
    state = State(files={}, output_bytes=len(committed_out), review_bytes=len(committed_review))
    recover_outputs(state, output, review)
    # POSIX ftruncate: exactly the recorded prefix remains.
    assert output.read_bytes() == committed_out
    assert review.read_bytes() == committed_review
    recover_outputs(state, output, review)  # idempotent: a crash during recovery is harmless
    assert output.read_bytes() == committed_out


def test_recover_without_state_leaves_outputs_alone(tmp_path):
    output = tmp_path / "out.jsonl"
    output.write_bytes(b"kept\n")
    recover_outputs(None, output, tmp_path / "review.jsonl")
    assert output.read_bytes() == b"kept\n"
    assert not (tmp_path / "review.jsonl").exists()


def test_recover_refuses_an_output_shorter_than_recorded(tmp_path):
    output = tmp_path / "out.jsonl"
    output.write_bytes(b"12345")
    with pytest.raises(DataError) as caught:
        recover_outputs(State(files={}, output_bytes=10, review_bytes=0), output, None)
    message = str(caught.value)
    assert "\n" not in message and str(output) in message and "removed" in message
    assert output.read_bytes() == b"12345"  # nothing was guessed or changed


def test_recover_refuses_a_missing_output_the_state_says_had_data(tmp_path):
    with pytest.raises(DataError, match="missing"):
        recover_outputs(State(files={}, output_bytes=0, review_bytes=8), tmp_path / "o", tmp_path / "r")


def test_recover_accepts_missing_outputs_recorded_empty(tmp_path):
    recover_outputs(State(files={}, output_bytes=0, review_bytes=0), tmp_path / "o", tmp_path / "r")
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------------------ open_append


def test_open_append_creates_private_file_and_parents(tmp_path):
    path = tmp_path / "deep" / "er" / "out.jsonl"
    with open_append(path) as handle:
        handle.write(b"one\n")
    assert stat.S_IMODE(path.stat().st_mode) == PRIVATE
    with open_append(path) as handle:
        handle.write(b"two\n")
    assert path.read_bytes() == b"one\ntwo\n"  # O_APPEND: written at the end


def test_open_append_writes_at_the_end_even_after_a_cut(tmp_path):
    path = tmp_path / "out.jsonl"
    path.write_bytes(b"keep\ndrop\n")
    handle = open_append(path)
    recover_outputs(State(files={}, output_bytes=5, review_bytes=0), path, None)
    handle.write(b"next\n")
    handle.close()
    assert path.read_bytes() == b"keep\nnext\n"  # O_APPEND writes at the current end, not a stale offset
