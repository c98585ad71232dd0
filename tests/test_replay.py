"""replay: same records as tagging the lines directly, input order, 1 and 2 workers, compressed archives,
resume after SIGKILL byte-for-byte, refusal of changed arguments.

References outside the project: Python's gzip module (RFC 1952) decompresses the archives for the
expected offsets; offsets and line numbers are recomputed with bytes.split (byte offset of a line =
sum of the lengths of the lines before it plus their newlines: common practice for log offsets).
"""

from __future__ import annotations

import argparse
import bz2
import gzip
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import orjson
import pytest

from daemon_support import build_tiny_model
from streamtag import replay
from streamtag.errors import ConfigError, DataError
from streamtag.model import load_model
from streamtag.records import make_record
from streamtag.tagger import Tagger

REPO = Path(__file__).resolve().parent.parent

# Invented lines: fictional hosts and accounts, addresses from the documentation ranges (RFC 5737).
HOSTS = ["brindle-04", "vault-02", "relay-07.quillmoor.test", "web-03"]
ACCOUNTS = ["kestrel", "marigold.fenn", "oskar.pell", "tamsin.vey"]


def invented_lines(n: int, seed: int) -> list[str]:
    lines = []
    for i in range(n):
        k = (i * 7 + seed) % 97
        lines.append([
            f"sshd[{300 + k}]: login failed for user {ACCOUNTS[k % 4]} from 192.0.2.{k + 1} port {2000 + k}",
            f"kernel: eth{k % 3} link up on host {HOSTS[k % 4]}",
            f"app[{k}]: user {ACCOUNTS[(k + 1) % 4]} opened /srv/data/r{k}.csv on {HOSTS[(k + 2) % 4]}",
            f"cron[{k}]: job backup-{k} finished with code E40{k % 10} on {HOSTS[(k + 3) % 4]}",
            "",
        ][k % 5])
    return lines


@pytest.fixture(scope="module")
def model_path(tmp_path_factory) -> str:
    path = tmp_path_factory.mktemp("model") / "tiny.stm"
    build_tiny_model(path, seed=3)
    return str(path)


def parse_args(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    replay.add_arguments(parser)
    return parser.parse_args(argv)


def write_archives(folder: Path) -> list[tuple[Path, bytes]]:
    """A plain file, a gzip file and a folder holding a bzip2 file; returns (path, decompressed bytes)."""
    folder.mkdir(parents=True, exist_ok=True)
    plain = ("\n".join(invented_lines(40, 1)) + "\n").encode()
    zipped = ("\n".join(invented_lines(55, 2)) + "\n").encode()
    inner = ("\n".join(invented_lines(23, 3)) + "\n").encode()
    (folder / "a.log").write_bytes(plain)
    (folder / "b.log.1.gz").write_bytes(gzip.compress(zipped))
    (folder / "sub").mkdir(exist_ok=True)
    (folder / "sub" / "c.log.bz2").write_bytes(bz2.compress(inner))
    return [(folder / "a.log", plain), (folder / "b.log.1.gz", zipped), (folder / "sub" / "c.log.bz2", inner)]


def reference_records(model_path: str, archives: list[tuple[Path, bytes]], threshold: float) -> list[dict]:
    """Tag every line directly in one batch; offsets and line numbers recomputed with bytes.split."""
    items = []
    for path, data in archives:
        offset = 0
        for number, raw in enumerate(data.split(b"\n")[:-1], start=1):
            items.append((str(path.resolve()), offset, number, raw.decode()))
            offset += len(raw) + 1
    tagger = Tagger(load_model(model_path))
    tagged = tagger.tag([text for *_, text in items])
    return [make_record(t, tagger.model_id, t.confidence < threshold, source, offset, line)
            for (source, offset, line, _), t in zip(items, tagged)]


def read_jsonl(path: Path) -> list[dict]:
    return [orjson.loads(line) for line in path.read_bytes().splitlines()]


def assert_same_records(actual: list[dict], expected: list[dict]) -> None:
    """Equal records; confidences within 2e-6 (a batch of another size may round the 6th digit apart)."""
    assert len(actual) == len(expected)
    for got, want in zip(actual, expected):
        got, want = dict(got), dict(want)
        assert got.pop("confidence") == pytest.approx(want.pop("confidence"), abs=2e-6)
        got_spans, want_spans = got.pop("spans"), want.pop("spans")
        assert got == want
        assert [(s["start"], s["end"], s["label"], s["text"]) for s in got_spans] == \
               [(s["start"], s["end"], s["label"], s["text"]) for s in want_spans]
        for a, b in zip(got_spans, want_spans):
            assert a["confidence"] == pytest.approx(b["confidence"], abs=2e-6)


@pytest.mark.parametrize("workers", [1, 2])
def test_replay_equals_direct_tagging_in_input_order(tmp_path, model_path, workers):
    archives = write_archives(tmp_path / "in")
    out, review = tmp_path / "out.jsonl", tmp_path / "review.jsonl"
    # The folder argument is walked in sorted order; chunks of 7 lines span archive boundaries.
    args = parse_args([str(archives[0][0]), str(archives[1][0]), str(tmp_path / "in" / "sub"), "--model", model_path,
                       "--output", str(out), "--review", str(review), "--threshold", "0.6",
                       "--workers", str(workers), "--chunk-lines", "7", "--quiet"])
    assert replay.run(args) == 0
    records = read_jsonl(out)
    expected = reference_records(model_path, archives, 0.6)
    assert_same_records(records, expected)
    # The review file holds exactly the lines marked for review, in order, each with a runner-up field.
    queued = read_jsonl(review)
    assert [(r["source"], r["offset"]) for r in queued] == \
           [(r["source"], r["offset"]) for r in records if r["review"]]
    assert queued and all("runner_up" in r and "reason" in r for r in queued)
    progress = orjson.loads(Path(str(out) + ".progress").read_bytes())
    assert progress["complete"] and progress["lines_done"] == len(expected)
    assert progress["output_bytes"] == out.stat().st_size and progress["review_bytes"] == review.stat().st_size
    assert out.stat().st_mode & 0o777 == 0o600  # logs hold personal data: private files


def test_one_and_two_workers_give_identical_bytes(tmp_path, model_path):
    write_archives(tmp_path / "in")
    outputs = []
    for workers in (1, 2):
        out = tmp_path / f"out{workers}.jsonl"
        review = tmp_path / f"review{workers}.jsonl"
        args = parse_args([str(tmp_path / "in"), "--model", model_path, "--output", str(out), "--review", str(review),
                           "--workers", str(workers), "--chunk-lines", "5", "--quiet"])
        replay.run(args)
        outputs.append((out.read_bytes(), review.read_bytes()))
    assert outputs[0] == outputs[1]


def test_gzip_offsets_count_decompressed_bytes(tmp_path, model_path):
    data = b"first line on brindle-04\r\nsecond: user kestrel\n\nlast line without newline"
    archive = tmp_path / "rotated.gz"
    archive.write_bytes(gzip.compress(data))
    out = tmp_path / "out.jsonl"
    replay.run(parse_args([str(archive), "--model", model_path, "--output", str(out), "--workers", "1", "--quiet"]))
    records = read_jsonl(out)
    plain = gzip.decompress(archive.read_bytes())  # reference decompressor (RFC 1952)
    assert [r["line"] for r in records] == [1, 2, 3, 4]
    for record in records:
        # The offset points at the line's first byte in the decompressed stream.
        assert plain[record["offset"]:].startswith(record["text"].encode())
        assert record["offset"] == 0 or plain[record["offset"] - 1:record["offset"]] == b"\n"
    assert [r["text"] for r in records] == ["first line on brindle-04", "second: user kestrel", "",
                                            "last line without newline"]
    assert records[-1]["flags"] == ["no_newline"] and records[0]["flags"] == []


def test_long_line_is_cut_and_flagged_and_offsets_stay_right(tmp_path, model_path):
    long_line = b"x" * 300
    data = b"short one\n" + long_line + b"\nafter the long one\n"
    archive = tmp_path / "long.log"
    archive.write_bytes(data)
    out = tmp_path / "out.jsonl"
    replay.run(parse_args([str(archive), "--model", model_path, "--output", str(out), "--workers", "1",
                           "--max-line-bytes", "100", "--quiet"]))
    records = read_jsonl(out)
    assert [r["offset"] for r in records] == [0, 10, 311]  # offsets by bytes.split: 0, 9+1, 10+300+1
    assert records[1]["text"] == "x" * 100 and "truncated" in records[1]["flags"]
    assert records[2]["text"] == "after the long one" and records[2]["flags"] == []


def test_damaged_gzip_keeps_lines_before_the_damage(tmp_path, model_path):
    lines = invented_lines(400, 5)
    data = ("\n".join(lines) + "\n").encode()
    packed = gzip.compress(data)
    archive = tmp_path / "cut.gz"
    archive.write_bytes(packed[: len(packed) // 2])  # truncated in the middle of the deflate stream
    out = tmp_path / "out.jsonl"
    with pytest.raises(DataError, match="damaged archive"):
        replay.run(parse_args([str(archive), "--model", model_path, "--output", str(out), "--workers", "1",
                               "--quiet"]))
    texts = [r["text"] for r in read_jsonl(out)]
    assert 0 < len(texts) < len(lines)
    assert texts == lines[: len(texts)]  # a prefix: nothing invented, nothing reordered


def test_json_input_takes_the_text_field_and_carries_the_rest(tmp_path, model_path):
    archive = tmp_path / "events.jsonl"
    archive.write_bytes(b'{"ts": "2031-04-01T10:00:00Z", "event": {"msg": "login for kestrel on vault-02"}}\n'
                        b"not json at all\n")
    out = tmp_path / "out.jsonl"
    replay.run(parse_args([str(archive), "--model", model_path, "--output", str(out), "--workers", "1",
                           "--format", "json", "--text-field", "event.msg", "--quiet"]))
    first, second = read_jsonl(out)
    assert first["text"] == "login for kestrel on vault-02"
    assert first["fields"] == {"ts": "2031-04-01T10:00:00Z"}
    assert second["text"] == "not json at all" and "bad_json" in second["flags"]


# -- resuming --------------------------------------------------------------------------------------------


def big_archive(folder: Path, n_lines: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "big.log.gz"
    path.write_bytes(gzip.compress(("\n".join(invented_lines(n_lines, 9)) + "\n").encode()))
    return path


def replay_command(archive: Path, model_path: str, out: Path, review: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "streamtag.cli", "replay", str(archive), "--model", model_path,
            "--output", str(out), "--review", str(review), "--chunk-lines", "100", "--quiet", *extra]


def run_and_kill_midway(command: list[str], progress: Path, min_chunks: int) -> None:
    """Start a replay in its own process group and SIGKILL the group once some chunks are recorded."""
    process = subprocess.Popen(command, cwd=REPO, start_new_session=True,
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline and process.poll() is None:
            try:
                if orjson.loads(progress.read_bytes())["chunks_done"] >= min_chunks:
                    break
            except (FileNotFoundError, orjson.JSONDecodeError):
                pass
            time.sleep(0.01)
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)  # the replay and its pool workers, which we started
        process.wait()
        process.stderr.close()


def test_resume_after_sigkill_gives_the_uninterrupted_bytes(tmp_path, model_path):
    archive = big_archive(tmp_path / "in", 3000)
    reference_out, reference_review = tmp_path / "ref.jsonl", tmp_path / "ref-review.jsonl"
    done = subprocess.run(replay_command(archive, model_path, reference_out, reference_review, "--workers", "2"),
                          cwd=REPO, capture_output=True)
    assert done.returncode == 0, done.stderr

    out, review = tmp_path / "out.jsonl", tmp_path / "review.jsonl"
    progress = Path(str(out) + ".progress")
    command = replay_command(archive, model_path, out, review, "--workers", "2")
    run_and_kill_midway(command, progress, min_chunks=3)
    state = orjson.loads(progress.read_bytes())
    assert not state["complete"], "the replay finished before it could be killed; use a bigger archive"
    assert 0 < state["output_bytes"] < reference_out.stat().st_size
    # As if a chunk had been written but its progress not yet recorded: resume must cut it away.
    with open(out, "ab") as handle:
        handle.write(b'{"half a record')
    again = subprocess.run(command, cwd=REPO, capture_output=True)
    assert again.returncode == 0, again.stderr
    assert out.read_bytes() == reference_out.read_bytes()
    assert review.read_bytes() == reference_review.read_bytes()


def interrupted_run(monkeypatch, argv: list[str], at_chunk: int) -> None:
    """A one-worker replay that gets Ctrl-C while tagging chunk number ``at_chunk``."""
    original = replay._tag_chunk
    calls = {"n": 0}

    def interrupting(chunk):
        calls["n"] += 1
        if calls["n"] == at_chunk:
            raise KeyboardInterrupt
        return original(chunk)

    monkeypatch.setattr(replay, "_tag_chunk", interrupting)
    with pytest.raises(KeyboardInterrupt):
        replay.run(parse_args(argv))
    monkeypatch.setattr(replay, "_tag_chunk", original)


def test_interrupted_in_process_then_resumed_with_other_worker_count(tmp_path, model_path, monkeypatch):
    archive = big_archive(tmp_path / "in", 700)
    reference = tmp_path / "ref.jsonl"
    replay.run(parse_args([str(archive), "--model", model_path, "--output", str(reference), "--workers", "1",
                           "--chunk-lines", "50", "--quiet"]))
    out = tmp_path / "out.jsonl"
    argv = [str(archive), "--model", model_path, "--output", str(out), "--chunk-lines", "50", "--quiet"]
    interrupted_run(monkeypatch, argv + ["--workers", "1"], at_chunk=5)
    assert orjson.loads(Path(str(out) + ".progress").read_bytes())["chunks_done"] == 4
    # --workers does not change the output, so it may differ between the runs.
    assert replay.run(parse_args(argv + ["--workers", "2"])) == 0
    assert out.read_bytes() == reference.read_bytes()


def test_changed_arguments_are_refused_unless_restart(tmp_path, model_path, monkeypatch):
    archive = big_archive(tmp_path / "in", 300)
    out = tmp_path / "out.jsonl"
    argv = [str(archive), "--model", model_path, "--output", str(out), "--workers", "1", "--chunk-lines", "50",
            "--quiet"]
    interrupted_run(monkeypatch, argv, at_chunk=3)
    with pytest.raises(ConfigError, match="--restart"):
        replay.run(parse_args(argv + ["--threshold", "0.9"]))
    assert replay.run(parse_args(argv + ["--threshold", "0.9", "--restart"])) == 0
    records = read_jsonl(out)
    assert len(records) == 300 and [r["line"] for r in records] == list(range(1, 301))


def test_finished_replay_is_not_repeated_and_foreign_output_is_kept(tmp_path, model_path):
    archive = big_archive(tmp_path / "in", 50)
    out = tmp_path / "out.jsonl"
    argv = [str(archive), "--model", model_path, "--output", str(out), "--workers", "1", "--quiet"]
    replay.run(parse_args(argv))
    before = out.read_bytes()
    assert replay.run(parse_args(argv)) == 0
    assert out.read_bytes() == before
    foreign = tmp_path / "precious.jsonl"
    foreign.write_bytes(b"someone else's data\n")
    with pytest.raises(ConfigError, match="already exists"):
        replay.run(parse_args([str(archive), "--model", model_path, "--output", str(foreign), "--quiet"]))
    assert foreign.read_bytes() == b"someone else's data\n"


def test_missing_archive_is_one_clear_error(tmp_path, model_path):
    with pytest.raises(DataError, match="no such file"):
        replay.run(parse_args([str(tmp_path / "nope*.log"), "--model", model_path,
                               "--output", str(tmp_path / "o.jsonl"), "--quiet"]))


def test_cli_reports_bad_progress_file_in_one_line(tmp_path, model_path):
    archive = big_archive(tmp_path / "in", 10)
    out = tmp_path / "out.jsonl"
    Path(str(out) + ".progress").write_bytes(b"{not json")
    result = subprocess.run([sys.executable, "-m", "streamtag.cli", "replay", str(archive), "--model", model_path,
                             "--output", str(out)], cwd=REPO, capture_output=True, text=True)
    assert result.returncode != 0
    assert result.stderr.count("\n") == 1 and "progress file is damaged" in result.stderr


def test_progress_bar_on_a_terminal_only(tmp_path, model_path):
    import pty

    archive = big_archive(tmp_path / "in", 200)
    primary, secondary = pty.openpty()  # stderr is a terminal (POSIX pseudo-terminal)
    def command(output: str) -> list[str]:
        return [sys.executable, "-m", "streamtag.cli", "replay", str(archive), "--model", model_path,
                "--output", str(tmp_path / output), "--workers", "1", "--chunk-lines", "50"]

    process = subprocess.Popen(command("tty.jsonl"), cwd=REPO, stderr=secondary, stdout=subprocess.DEVNULL)
    os.close(secondary)
    seen = b""
    while True:
        try:
            data = os.read(primary, 4096)
        except OSError:  # EIO once the process has closed the terminal
            break
        if not data:
            break
        seen += data
    os.close(primary)
    assert process.wait(timeout=60) == 0
    assert b"lines/s" in seen and b"ETA" in seen and b"100.0%" in seen
    # Not a terminal: no bar, only the summary line.
    piped = subprocess.run(command("pipe.jsonl"), cwd=REPO, capture_output=True, text=True)
    assert "ETA" not in piped.stderr and piped.stderr.startswith("replayed 200 lines")


def test_progress_bar_line_format():
    import io

    stream = io.StringIO()
    bar = replay.ProgressBar(stream, total_bytes=1000, start_bytes=0)
    bar.began -= 10.0  # as if 10 s had passed: 250 bytes in 10 s leaves 750 bytes, i.e. 30 s
    bar.update(250, 5000, force=True)
    line = stream.getvalue()
    assert " 25.0%" in line and "5,000 lines" in line and "ETA 00:30" in line


def test_own_output_files_in_a_replayed_folder_are_not_read(tmp_path, model_path):
    folder = tmp_path / "logs"
    folder.mkdir()
    (folder / "app.log").write_bytes(b"user kestrel on vault-02\n")
    out = folder / "tagged.jsonl"
    (folder / ".tagged.jsonl.progress.x1y2.tmp").write_bytes(b"{}")  # left by an interrupted atomic write
    replay.run(parse_args([str(folder), "--model", model_path, "--output", str(out), "--review",
                           str(folder / "review.jsonl"), "--workers", "1", "--quiet"]))
    assert [r["source"] for r in read_jsonl(out)] == [str(folder / "app.log")]
