"""Tests for `make demo` (streamtag.demo.run): the daemon on a live stream, rotation, exactly-once output.

The end-to-end tests run the demo as a child process with stdout on a pipe (not a terminal), the way
`make demo` runs it in CI, and check its files with the standard library (json, os.stat) instead of
the demo's own counters.
"""

from __future__ import annotations

import io
import json
import os
import re
import signal
import stat
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest

from streamtag.demo import run as demo
from streamtag.demo.scenario import LABELS
from streamtag.errors import StreamtagError
from streamtag.model import default_model_path
from streamtag.review import Screen

REPO = Path(__file__).resolve().parents[1]
THRESHOLD = 0.8
# ECMA-48 (5th ed.) section 5.4: a control sequence is CSI (ESC [) parameter bytes 0x30-0x3F,
# intermediate bytes 0x20-0x2F and one final byte 0x40-0x7E.
CONTROL_SEQUENCE = re.compile(r"\x1b\[[\x30-\x3f]*[\x20-\x2f]*[\x40-\x7e]")
PLAIN_SPAN = re.compile(r"\[([^\[\]|]+)\|(" + "|".join(LABELS) + r")\]")


def _env(**changes: str | None) -> dict:
    env = dict(os.environ, PYTHONPATH=str(REPO), TERM="xterm")
    env.pop("NO_COLOR", None)
    for key, value in changes.items():
        if value is None:
            env.pop(key, None)
        else:
            env[key] = value
    return env


@pytest.fixture(scope="session")
def model_args(tmp_path_factory) -> list[str]:
    """The bundled model when it is there; otherwise a small averaged-perceptron model trained here."""
    if default_model_path().exists():
        return []
    from streamtag.corpus import write_jsonl
    from streamtag.demo.generate import generate_split_detailed

    folder = tmp_path_factory.mktemp("model")
    data = folder / "train.jsonl"
    write_jsonl(data, ((e.text, e.spans, 1.0) for e in generate_split_detailed("train", 800, seed=3)))
    completed = subprocess.run(
        [sys.executable, "-m", "streamtag", "train", "--method", "perceptron", "--epochs", "3", "--quiet",
         "--data", str(data), "--out", str(folder / "m.stm")],
        env=_env(), capture_output=True, text=True, check=False, cwd=REPO)
    assert completed.returncode == 0, completed.stderr
    return ["--model", str(folder / "m.stm")]


def _run_demo(folder: Path, model_args: list[str], seconds: str = "6", **env_changes) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamtag.demo.run", "--dir", str(folder), "--seconds", seconds,
         "--rate", "60", "--threshold", str(THRESHOLD), *model_args],
        env=_env(**env_changes), capture_output=True, text=True, check=False, cwd=REPO, timeout=180)


def _records(path: Path) -> list[dict]:
    # JSON Lines (one JSON text per line, common practice), parsed with the standard json module.
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def _fed_lines(folder: Path) -> Counter:
    """What the feeder wrote, read back from the inbox files themselves."""
    lines = Counter()
    for name in ("app.log.1", "app.log"):
        text = (folder / "inbox" / name).read_text(encoding="utf-8")
        assert text.endswith("\n")
        lines.update(text[:-1].split("\n"))
    return lines


@pytest.fixture(scope="module")
def finished_demo(tmp_path_factory, model_args) -> tuple[Path, subprocess.CompletedProcess]:
    folder = tmp_path_factory.mktemp("demo") / "demo-run"
    return folder, _run_demo(folder, model_args)


# ------------------------------------------------------------------------------- end to end ---------

def test_demo_exits_zero_and_says_where_things_are(finished_demo):
    folder, completed = finished_demo
    assert completed.returncode == 0, completed.stderr + completed.stdout
    assert "every fed line is in the output exactly once" in completed.stdout
    assert "exit 0" in completed.stdout
    for command in ("streamtag replay", "streamtag compare", "streamtag review"):
        assert command in completed.stdout
    assert str(folder / "review.jsonl") in completed.stdout or "review.jsonl" in completed.stdout


def test_every_fed_line_is_in_the_output_exactly_once(finished_demo):
    # Exactly-once delivery: the multiset of output texts equals the multiset of lines written
    # (common practice for log shippers: nothing lost, nothing repeated).
    folder, _ = finished_demo
    fed = _fed_lines(folder)
    records = _records(folder / "output.jsonl")
    assert sum(fed.values()) >= 200
    assert len(records) == sum(fed.values())
    assert Counter(record["text"] for record in records) == fed


def test_the_log_was_rotated_by_rename_and_both_files_were_read(finished_demo):
    # Log rotation by rename (common practice): app.log becomes app.log.1, the writer keeps writing
    # through its open descriptor for a moment, then a new app.log is created.
    folder, _ = finished_demo
    inbox = folder / "inbox"
    assert sorted(p.name for p in inbox.iterdir()) == ["app.log", "app.log.1"]
    assert os.stat(inbox / "app.log").st_ino != os.stat(inbox / "app.log.1").st_ino
    sources = Counter(os.path.basename(r["source"]) for r in _records(folder / "output.jsonl"))
    assert sources["app.log.1"] > 0 and sources["app.log"] > 0
    # Two files, so two first lines at byte offset 0 (offsets count within a file).
    assert sum(r["offset"] == 0 for r in _records(folder / "output.jsonl")) == 2


def test_review_file_is_a_non_empty_subset_below_the_threshold(finished_demo):
    folder, _ = finished_demo
    output = _records(folder / "output.jsonl")
    review = _records(folder / "review.jsonl")
    assert review
    def key(record: dict) -> tuple:
        return record["source"], record["offset"], record["text"]

    # the review queue holds exactly the output records marked for review, each below the threshold
    assert Counter(map(key, review)) == Counter(key(r) for r in output if r["review"])
    assert all(record["confidence"] < THRESHOLD for record in review)
    assert len(review) < len(output)


def test_plain_output_has_brackets_and_no_escape_codes(finished_demo):
    # Not a terminal: no ECMA-48 control sequences at all, spans shown as [text|label].
    folder, completed = finished_demo
    assert "\x1b" not in completed.stdout
    assert PLAIN_SPAN.search(completed.stdout)
    assert re.search(r"fed \d+ tagged \d+ review \d+", completed.stdout)   # a progress line
    # 80 columns, except where a (long temporary) path is printed
    assert max(len(line) for line in completed.stdout.splitlines() if str(folder.parent) not in line) <= 80


def test_demo_files_are_private(finished_demo):
    # Files holding log lines are mode 0600, folders 0700 (POSIX permission bits via os.stat).
    folder, _ = finished_demo
    for path in folder.rglob("*"):
        mode = stat.S_IMODE(os.stat(path).st_mode)
        assert mode == (0o700 if path.is_dir() else 0o600), (path, oct(mode))


def test_ctrl_c_stops_early_and_cleanly(tmp_path, model_args):
    # SIGINT (what the terminal sends on Ctrl-C, POSIX) stops feeding; the daemon is still stopped
    # with SIGTERM and the output is still exactly once.
    folder = tmp_path / "demo-run"
    process = subprocess.Popen(
        [sys.executable, "-m", "streamtag.demo.run", "--dir", str(folder), "--seconds", "120", "--rate", "60",
         *model_args], env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO)
    try:
        output = folder / "output.jsonl"
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not (output.exists() and output.stat().st_size > 0):
            time.sleep(0.2)
        process.send_signal(signal.SIGINT)
        stdout, stderr = process.communicate(timeout=120)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert process.returncode == 0, stderr + stdout
    assert "stopped early" in stdout and "exactly once" in stdout
    assert Counter(r["text"] for r in _records(output)) == _fed_lines_so_far(folder)


def _fed_lines_so_far(folder: Path) -> Counter:
    lines = Counter()
    for path in sorted((folder / "inbox").iterdir()):
        text = path.read_text(encoding="utf-8")
        lines.update(text[:-1].split("\n") if text else [])
    return lines


def test_a_folder_not_made_by_the_demo_is_refused(tmp_path):
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    with pytest.raises(StreamtagError) as caught:
        demo.prepare_folder(foreign)
    assert "\n" not in str(caught.value)
    assert (foreign / "notes.txt").read_text() == "keep me"


def test_an_earlier_demo_folder_is_made_fresh(tmp_path):
    paths = demo.prepare_folder(tmp_path / "demo-run")
    (paths.inbox / "app.log").write_text("old line\n")
    again = demo.prepare_folder(tmp_path / "demo-run")
    assert list(again.inbox.iterdir()) == []
    assert (again.root / demo.MARKER).exists()


# ------------------------------------------------------------------------------- the screen ---------

class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.mark.parametrize("environment, expected", [
    ({"TERM": "xterm-256color"}, True),
    ({"TERM": "xterm-256color", "NO_COLOR": "1"}, False),   # no-color.org: any value disables colour
    ({"TERM": "xterm-256color", "NO_COLOR": ""}, False),    # from memory: even an empty value counts
    ({"TERM": "dumb"}, False),                               # a dumb terminal has no SGR (common practice)
])
def test_colour_only_on_a_capable_terminal_without_no_color(monkeypatch, environment, expected):
    monkeypatch.delenv("NO_COLOR", raising=False)
    for key, value in environment.items():
        monkeypatch.setenv(key, value)
    assert demo.wants_colour(_Terminal()) is expected
    assert demo.wants_colour(io.StringIO()) is False


def test_marked_line_fits_the_width_and_never_cuts_a_span():
    text = "Feb  3 11:08:48 gwurv-mq12 ulvadesk: ENOSPC while ulvadesk read /srv/ulvadesk/data/ledger.db for Duvessa"
    spans, position = [], 0
    for piece, label in (("gwurv-mq12", "host"), ("ulvadesk", "service"), ("ENOSPC", "errcode"),
                         ("ulvadesk", "service"), ("/srv/ulvadesk/data/ledger.db", "filepath"), ("Duvessa", "org")):
        start = text.index(piece, position)
        spans.append((start, start + len(piece), label))
        position = start + len(piece)
    for width in (40, 60, 79, 200):
        plain = demo.fit_marked(Screen(io.StringIO(), False, list(LABELS)), text, spans, width)
        assert len(plain) <= width
        for inner, label in PLAIN_SPAN.findall(plain):
            assert (inner, label) in {(text[s:e], lab) for s, e, lab in spans}
        coloured = demo.fit_marked(Screen(io.StringIO(), True, list(LABELS)), text, spans, width)
        # SGR (ECMA-48 section 8.3.117, from memory) sequences take no columns.
        assert len(CONTROL_SEQUENCE.sub("", coloured)) <= width
    assert demo.fit_marked(Screen(io.StringIO(), False, list(LABELS)), text, spans, 200).count("[") == 6


def test_a_line_whose_spans_lie_far_right_is_shown_from_shortly_before_them():
    text = '{"ts": "2025-02-04T15:53:33+05:30", "level": "info", "service": "vaskmux", "msg": "ok\tdone"}'
    start = text.index("vaskmux")
    plain = demo.fit_marked(Screen(io.StringIO(), False, list(LABELS)), text, [(start, start + 7, "service")], 50)
    assert len(plain) <= 50 and plain.startswith("…")
    assert "[vaskmux|service]" in plain
    assert "\t" not in plain and "\ufffd" not in plain    # a tab is shown as one space


def test_live_screen_redraws_in_place_with_ecma48_sequences():
    # CUU = CSI n A (cursor up n lines), EL = CSI K (erase to end of line), ED = CSI J (erase below):
    # ECMA-48 sections 8.3.22, 8.3.41 and 8.3.39 (section numbers from memory).
    out = io.StringIO()
    screen = demo.LiveScreen(out)
    screen.draw(["one", "two", "three"])
    first = out.getvalue()
    assert first == "one\x1b[K\ntwo\x1b[K\nthree\x1b[K\n"
    screen.draw(["four", "five"])
    second = out.getvalue()[len(first):]
    assert second.startswith("\x1b[3A\r")
    assert second.endswith("\x1b[J")
    assert CONTROL_SEQUENCE.sub("", second).replace("\r", "") == "four\nfive\n"


def test_summary_fits_80_columns():
    feeder = demo.Feeder.__new__(demo.Feeder)          # no files needed to render the summary
    feeder.fed, feeder.rotated_at = 123456, 15.0
    tally = demo.Tally(tagged=123000, review=7000, model="st1-" + "f" * 24, p50_ms=12.5, p99_ms=140.25)
    tally.spans.update({label: 99999 for label in LABELS})
    tally.add([{"text": "x" * 300, "spans": [{"start": 0, "end": 5, "label": "host"}], "source": "/a/app.log"}])
    lines = demo.summary_lines(tally, feeder, 12.0, 30.0, 0.8, Screen(io.StringIO(), False, list(LABELS)), 79)
    assert max(len(line) for line in lines) <= 79
    assert any("host 100000" in line for line in lines) and any("org 99999" in line for line in lines)


def test_feed_schedule_has_the_rate_and_bursts():
    counts = demo.feed_schedule(30.0, 100.0, seed=7)
    assert counts == demo.feed_schedule(30.0, 100.0, seed=7)          # a pure function of its arguments
    per_second = [sum(counts[i:i + 20]) for i in range(0, len(counts), 20)]
    assert len(per_second) == 30
    assert 80 <= sorted(per_second)[len(per_second) // 2] <= 130        # steady part near the rate
    assert max(per_second) >= 3 * min(per_second)                      # bursts stand out
