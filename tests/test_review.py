"""review: driven with scripted keys through a real stdin pipe; decisions, validation, resume, crash safety.

References: seqeval's get_entities (a reference implementation of CoNLL chunking) reads the spans back
out of the tags that corpus.read_jsonl makes of REVIEWED; str.index gives the expected offsets.
"""

from __future__ import annotations

import argparse
import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import orjson
import pytest
from seqeval.metrics.sequence_labeling import get_entities

from streamtag import review
from streamtag.corpus import read_jsonl

REPO = Path(__file__).resolve().parent.parent
LABELS = "account,host,netaddr"


def span(text: str, piece: str, label: str) -> dict:
    start = text.index(piece)
    return {"start": start, "end": start + len(piece), "label": label, "text": piece, "confidence": 0.41}


def queue_record(offset: int, text: str, spans: list[tuple[str, str]], runner: list[tuple[str, str]] | None) -> dict:
    return {
        "source": "/logs/auth.log", "offset": offset, "line": offset // 100 + 1, "text": text,
        "spans": [span(text, piece, label) for piece, label in spans],
        "confidence": 0.41, "model": "st1-test", "flags": [], "review": True,
        "reason": "confidence 0.410 below 0.5",
        "runner_up": None if runner is None else {
            "spans": [{k: v for k, v in span(text, p, label).items() if k != "confidence"} for p, label in runner],
            "probability": 0.3},
    }


# Invented lines: fictional accounts and hosts, addresses from RFC 5737 documentation ranges.
QUEUE = [
    queue_record(0, "login failed for kestrel from 192.0.2.14", [("kestrel", "account"), ("192.0.2.14", "netaddr")],
                 [("kestrel", "host"), ("192.0.2.14", "netaddr")]),
    queue_record(100, "sshd[311]: accepted key for marigold.fenn on vault-02",
                 [("marigold.fenn", "host")], [("marigold.fenn", "account"), ("vault-02", "host")]),
    queue_record(200, "cron[77]: job finished on brindle-04 for oskar.pell",
                 [("brindle-04", "account")], None),
    queue_record(300, "kernel: eth0 link up on relay-07", [("relay-07", "host")], None),
    queue_record(400, "app[9]: user tamsin.vey opened a file", [], None),
]


def write_queue(path: Path, records=QUEUE) -> Path:
    path.write_bytes(b"".join(orjson.dumps(r) + b"\n" for r in records))
    return path


def run_cli(queue: Path, out: Path, keys: str, *extra: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamtag.cli", "review", str(queue), "--out", str(out),
                           "--labels", LABELS, *extra], input=keys, cwd=REPO, capture_output=True, text=True,
                          timeout=60, env=env)


def entities(text: str, tokens_starts, tokens_ends, tags) -> set[tuple[int, int, str]]:
    """Character spans of the chunks seqeval finds in the tags."""
    return {(tokens_starts[first], tokens_ends[last], label) for label, first, last in get_entities(list(tags))}


def test_accept_runner_up_edit_skip_quit_then_resume(tmp_path):
    queue, out = write_queue(tmp_path / "queue.jsonl"), tmp_path / "reviewed.jsonl"
    keys = "\n".join([
        "a",                      # 1: accept as shown
        "r",                      # 2: take the runner-up
        "e", "- 1",               # 3: edit: drop the wrong span,
        "+ 26 36 host",           #    add brindle-04 by offsets,
        "= 1 host",               #    (relabel it: no change in label, still valid)
        "[oskar.pell|account]",   #    a re-typed line that is not the line: error, nothing changes
        "cron[77]: job finished on [brindle-04|host] for [oskar.pell|account]",  # the line with markup
        "ok",
        "s",                      # 4: skip
        "q",                      # quit before 5
    ]) + "\n"
    first = run_cli(queue, out, keys)
    assert first.returncode == 0, first.stderr
    assert "5 queued, 0 already decided, 5 to review" in first.stdout
    assert "error: without the markup the line differs" in first.stdout
    assert "3 decided (1 accepted, 1 runner-up, 1 edited), 1 skipped; run again to continue" in first.stdout

    decided = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert [d["decision"] for d in decided] == ["accepted", "runner_up", "edited"]
    assert [d["offset"] for d in decided] == [0, 100, 200]
    expected_spans = [
        {(17, 24, "account"), (30, 40, "netaddr")},
        {(QUEUE[1]["text"].index("marigold.fenn"), QUEUE[1]["text"].index("marigold.fenn") + 13, "account"),
         (QUEUE[1]["text"].index("vault-02"), QUEUE[1]["text"].index("vault-02") + 8, "host")},
        {(26, 36, "host"), (41, 51, "account")},
    ]
    assert [{(s["start"], s["end"], s["label"]) for s in d["spans"]} for d in decided] == expected_spans
    assert QUEUE[2]["text"][26:36] == "brindle-04" and QUEUE[2]["text"][41:51] == "oskar.pell"

    # REVIEWED is labelled JSON Lines that the training reader takes; seqeval reads the same spans back.
    sentences, stats = read_jsonl(out)
    assert stats.records == 3 and stats.misaligned == 0
    for sentence, spans in zip(sentences, expected_spans):
        assert entities(sentence.text, sentence.starts, sentence.ends, sentence.tags) == spans

    # Resume: the three decided lines are left out; the skipped one comes back first.
    second = run_cli(queue, out, "a\na\n")
    assert second.returncode == 0, second.stderr
    assert "5 queued, 3 already decided, 2 to review" in second.stdout
    decided = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert [d["offset"] for d in decided] == [0, 100, 200, 300, 400]
    assert decided[4]["spans"] == [] and decided[4]["decision"] == "accepted"
    third = run_cli(queue, out, "")
    assert "0 to review" in third.stdout and len(out.read_bytes().splitlines()) == 5
    assert out.stat().st_mode & 0o777 == 0o600


def test_invalid_spans_are_refused_and_the_prompt_returns(tmp_path):
    queue, out = write_queue(tmp_path / "queue.jsonl", [QUEUE[2]]), tmp_path / "reviewed.jsonl"
    keys = "\n".join([
        "r",                      # no runner-up for this line
        "x",                      # unknown command
        "e",
        "= 9 host",               # no such span number
        "- 1",
        "+ 26 36 person",         # unknown label
        "+ 27 36 host",           # does not start at a token boundary ("rindle-04")
        "+ 26 36 host",
        "ok",
    ]) + "\n"
    result = run_cli(queue, out, keys)
    assert result.returncode == 0, result.stderr
    assert "error: this line has no runner-up labelling" in result.stdout
    assert "error: unknown command 'x'" in result.stdout
    assert "unknown label 'person'" in result.stdout
    assert "does not start and end at token boundaries" in result.stdout
    assert "no span number '9'" in result.stdout
    decided = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert len(decided) == 1 and decided[0]["decision"] == "edited"
    assert [(s["start"], s["end"], s["label"]) for s in decided[0]["spans"]] == [(26, 36, "host")]


def test_overlapping_spans_cannot_be_saved(tmp_path):
    queue, out = write_queue(tmp_path / "queue.jsonl", [QUEUE[0]]), tmp_path / "reviewed.jsonl"
    keys = "e\n+ 13 24 host\nok\n- 2\nok\n"  # "for kestrel" overlaps "kestrel"; removing it makes it valid
    result = run_cli(queue, out, keys)
    assert "overlaps the span before it" in result.stdout
    decided = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert len(decided) == 1 and decided[0]["decision"] == "edited"
    assert [(s["start"], s["end"], s["label"]) for s in decided[0]["spans"]] == [(17, 24, "account"),
                                                                                 (30, 40, "netaddr")]


def test_each_decision_is_on_disk_before_the_next_prompt(tmp_path):
    queue, out = write_queue(tmp_path / "queue.jsonl"), tmp_path / "reviewed.jsonl"
    process = subprocess.Popen([sys.executable, "-m", "streamtag.cli", "review", str(queue), "--out", str(out),
                                "--labels", LABELS], stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL, cwd=REPO, text=True, start_new_session=True)
    try:
        process.stdin.write("a\n")
        process.stdin.flush()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and not (out.exists() and out.read_bytes().endswith(b"\n")):
            time.sleep(0.01)
    finally:
        os.killpg(process.pid, signal.SIGKILL)  # a crash while the reviewer waits at the next prompt
        process.wait()
        process.stdin.close()
    decided = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert [d["offset"] for d in decided] == [0]


def test_unfinished_last_record_is_cut_off_on_start(tmp_path):
    queue, out = write_queue(tmp_path / "queue.jsonl"), tmp_path / "reviewed.jsonl"
    run_cli(queue, out, "a\nq\n")
    with open(out, "ab") as handle:
        handle.write(b'{"text": "half a rec')  # as if a crash had cut a write in two
    result = run_cli(queue, out, "a\nq\n")
    assert "cut an unfinished record" in result.stdout
    sentences, stats = read_jsonl(out)
    assert stats.records == 2


def session(queue_items, out: Path, keys: str, colour: bool) -> str:
    """In-process run with injected streams (no tty: commands are echoed)."""
    parser = argparse.ArgumentParser()
    review.add_arguments(parser)
    queue = write_queue(out.parent / "q.jsonl", queue_items)
    args = parser.parse_args([str(queue), "--out", str(out), "--labels", LABELS,
                              "--color", "always" if colour else "never"])
    stdout = io.StringIO()
    review.run(args, stdin=io.StringIO(keys), stdout=stdout)
    return stdout.getvalue()


def test_plain_brackets_without_colour_and_ansi_with_it(tmp_path):
    plain = session([QUEUE[3]], tmp_path / "a.jsonl", "q\n", colour=False)
    assert "kernel: eth0 link up on [relay-07|host]" in plain and "\x1b[" not in plain
    coloured = session([QUEUE[3]], tmp_path / "b.jsonl", "q\n", colour=True)
    assert "\x1b[1;" in coloured and "[relay-07|host]" not in coloured


def test_no_color_variable_turns_colour_off(monkeypatch):
    class FakeTerminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    monkeypatch.delenv("NO_COLOR", raising=False)
    assert review.use_colour("auto", FakeTerminal())
    monkeypatch.setenv("NO_COLOR", "1")  # no-color.org convention: present means no colour
    assert not review.use_colour("auto", FakeTerminal())
    assert not review.use_colour("auto", io.StringIO())


def test_control_characters_in_log_text_do_not_reach_the_terminal(tmp_path):
    text = "user kestrel \x1b]0;pwned\x07 on vault-02"
    item = queue_record(0, text, [("kestrel", "account")], None)
    shown = session([item], tmp_path / "c.jsonl", "q\n", colour=False)
    assert "\x1b]0;" not in shown and "\x07" not in shown


def test_markup_with_brackets_in_the_line():
    text = "sshd[311]: accepted key for marigold.fenn on vault-02"
    typed = "sshd[311]: accepted key for [marigold.fenn|account] on [vault-02|host]"
    spans = review.parse_markup(typed, text, {"account", "host", "netaddr"})
    assert [(text[s:e], label) for s, e, label in spans] == [("marigold.fenn", "account"), ("vault-02", "host")]
    with pytest.raises(ValueError, match="differs"):
        review.parse_markup("sshd[311]: accepted key for [marigold.fen|account]n on vault-02x", text, {"account"})


def test_labels_come_from_the_model_when_not_given(tmp_path):
    from daemon_support import build_tiny_model  # a model with the types account, host, netaddr

    model = tmp_path / "tiny.stm"
    build_tiny_model(model)
    queue, out = write_queue(tmp_path / "queue.jsonl", [QUEUE[3]]), tmp_path / "reviewed.jsonl"
    result = subprocess.run([sys.executable, "-m", "streamtag.cli", "review", str(queue), "--out", str(out),
                             "--model", str(model)], input="e\n= 1 person\n= 1 netaddr\nok\n", cwd=REPO,
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert "unknown label 'person' (known: account, host, netaddr)" in result.stdout
    assert orjson.loads(out.read_bytes())["spans"][0]["label"] == "netaddr"
