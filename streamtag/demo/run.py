"""`make demo`: the daemon on a live stream of invented log lines, with a summary that updates itself.

What it does, in order:

1. Makes a fresh demo folder (default ./demo-run/, private: directories 0700, files 0600) with an
   inbox, a daemon configuration, and nothing else. A folder left by an earlier demo (it holds the
   marker file MARKER) is cleared first; any other non-empty folder is refused.
2. Starts the daemon as a child process (`python -m streamtag watch --config FILE`) in a session of
   its own, so that Ctrl-C reaches only the demo, which then stops the daemon in order.
3. Feeds lines from `generate_stream` into inbox/app.log at a steady rate with bursts. Halfway it
   rotates the log the common way: app.log is renamed to app.log.1, the writer goes on writing
   through its open descriptor for a moment (as a program does until it is told to reopen), then
   creates a new app.log (log rotation by rename: common practice).
4. Reads the daemon's output and stats.json as they grow and shows lines fed, lines tagged, spans per
   label, lines sent to review, latency and the last tagged lines with their spans marked. On a
   terminal the summary is redrawn about twice a second with ECMA-48 control sequences (CUU to go
   back up, EL to clear a line, SGR for colour); elsewhere a progress line is printed every few
   seconds instead.
5. After --seconds (or on Ctrl-C) it stops feeding, waits for the daemon to catch up, stops it with
   SIGTERM (it must exit 0), checks that every fed line is in the output exactly once, and prints the
   totals, where the files are, and the commands to replay and review them.
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter, deque
from dataclasses import dataclass, field
from pathlib import Path
from random import Random
from typing import TextIO

import orjson

from streamtag.demo.generate import generate_stream
from streamtag.demo.scenario import LABELS
from streamtag.errors import StreamtagError
from streamtag.review import Screen, use_colour

MARKER = ".streamtag-demo"
LOG_NAME = "app.log"
ROTATED_NAME = "app.log.1"
TICK_SECONDS = 0.05            # feeding and reading granularity
REFRESH_SECONDS = 0.5          # live summary redraws
PROGRESS_SECONDS = 3.0         # plain progress lines when stdout is not a terminal
KEEP_WRITING_OLD_SECONDS = 1.0  # writing through the renamed file before reopening
CATCH_UP_SECONDS = 20.0        # longest wait for the daemon to tag the last fed lines
READY_SECONDS = 180.0          # longest wait for the daemon to start (a first run compiles kernels)
STOP_SECONDS = 30.0            # longest wait for the daemon to exit after SIGTERM
LAST_LINES = 5
LEAD_COLUMNS = 12              # text kept before the first span when a shown line must be cut


# ============================================================================ the demo folder ========

@dataclass(frozen=True)
class DemoPaths:
    root: Path
    inbox: Path
    config: Path
    output: Path
    review: Path
    state: Path
    daemon_log: Path

    @classmethod
    def under(cls, root: Path) -> "DemoPaths":
        root = root.absolute()
        return cls(root, root / "inbox", root / "streamtag.toml", root / "output.jsonl",
                   root / "review.jsonl", root / "state", root / "daemon.log")

    @property
    def stats(self) -> Path:
        return self.state / "stats.json"


def prepare_folder(root: Path) -> DemoPaths:
    """A fresh, private demo folder. Clears one left by an earlier demo; refuses any other content."""
    paths = DemoPaths.under(root)
    try:
        if paths.root.exists():
            if not paths.root.is_dir():
                raise StreamtagError(f"{paths.root} exists and is not a folder")
            if (paths.root / MARKER).exists():
                shutil.rmtree(paths.root)
            elif any(paths.root.iterdir()):
                raise StreamtagError(f"{paths.root} is not empty and was not made by the demo; choose another --dir")
        paths.root.mkdir(mode=0o700, parents=True, exist_ok=True)
        paths.inbox.mkdir(mode=0o700)
        paths.state.mkdir(mode=0o700)
        _write_private(paths.root / MARKER, b"made by python -m streamtag.demo.run; removed by the next demo run\n")
    except OSError as error:
        raise StreamtagError(f"cannot prepare the demo folder {paths.root}: {error.strerror or error}") from None
    return paths


def _write_private(path: Path, data: bytes) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        os.write(fd, data)
    finally:
        os.close(fd)


def _toml_string(text: str) -> str:
    # A JSON string without ASCII escaping is a valid TOML basic string: both escape '"', '\' and
    # control characters the same way (TOML 1.0 "String", RFC 8259 section 7).
    return orjson.dumps(text).decode("utf-8")


def write_config(paths: DemoPaths, threshold: float, model: str | None) -> None:
    """The daemon's configuration (keys as in config/streamtag.toml), absolute paths."""
    text = f"""# Written by the streamtag demo (python -m streamtag.demo.run).
[inputs]
paths = [{_toml_string(str(paths.inbox / '*.log'))}]
start_at = "beginning"
poll_interval_seconds = 0.25

[model]
path = {_toml_string(model or '')}

[output]
path = {_toml_string(str(paths.output))}
review_path = {_toml_string(str(paths.review))}
review_threshold = {threshold!r}

[batch]
max_wait_ms = 50

[state]
directory = {_toml_string(str(paths.state))}
stats_interval_seconds = 1.0
"""
    _write_private(paths.config, text.encode("utf-8"))


# ============================================================================ the feeder ===========

def feed_schedule(seconds: float, rate: float, seed: int) -> list[int]:
    """Lines to write in each tick: a steady `rate` (lines/s) with a burst of 4x for 1 s now and then.

    Returns one count per tick of TICK_SECONDS, fractional lines carried over.
    """
    rng = Random(f"streamtag-demo-feed/{seed}")
    ticks = int(round(seconds / TICK_SECONDS))
    counts, carry = [], 0.0
    burst_until, next_burst = -1.0, rng.uniform(2.0, 5.0)
    for tick in range(ticks):
        now = tick * TICK_SECONDS
        if now >= next_burst:
            burst_until, next_burst = now + 1.0, now + rng.uniform(4.0, 8.0)
        per_second = rate * (4.0 if now < burst_until else rng.uniform(0.6, 1.2))
        carry += per_second * TICK_SECONDS
        counts.append(int(carry))
        carry -= int(carry)
    return counts


class Feeder:
    """Appends lines to inbox/app.log; rotates it once by rename."""

    def __init__(self, inbox: Path) -> None:
        self.inbox = inbox
        self.fd = self._create(LOG_NAME)
        self.fed = 0
        self.fed_per_file = Counter()
        self.current_name = LOG_NAME
        self.rotated_at: float | None = None     # seconds into the demo
        self.reopen_at: float | None = None

    def _create(self, name: str) -> int:
        return os.open(self.inbox / name, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o600)

    def write(self, texts: list[str]) -> None:
        if not texts:
            return
        data = "".join(text + "\n" for text in texts).encode("utf-8")
        view = memoryview(data)
        while view:                         # whole lines only: a short write is finished here
            written = os.write(self.fd, view)
            view = view[written:]
        self.fed += len(texts)
        self.fed_per_file[self.current_name] += len(texts)

    def rotate(self, now: float) -> None:
        """Rename app.log to app.log.1; keep writing to it until `reopen` (the writer's descriptor)."""
        os.rename(self.inbox / LOG_NAME, self.inbox / ROTATED_NAME)
        self.current_name = ROTATED_NAME
        self.rotated_at, self.reopen_at = now, now + KEEP_WRITING_OLD_SECONDS

    def reopen(self) -> None:
        os.close(self.fd)
        self.fd = self._create(LOG_NAME)
        self.current_name = LOG_NAME
        self.reopen_at = None

    def close(self) -> None:
        os.close(self.fd)


# ============================================================================ reading the daemon =====

class JsonLinesTail:
    """New complete lines of a file that grows (the daemon appends whole records)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.offset = 0
        self.partial = b""

    def read(self) -> list[dict]:
        try:
            with open(self.path, "rb") as handle:
                handle.seek(self.offset)
                data = handle.read()
        except FileNotFoundError:
            return []
        self.offset += len(data)
        lines = (self.partial + data).split(b"\n")
        self.partial = lines.pop()
        return [orjson.loads(line) for line in lines if line.strip()]


@dataclass
class Tally:
    """What the daemon has written so far."""

    tagged: int = 0
    review: int = 0
    spans: Counter = field(default_factory=Counter)
    texts: Counter = field(default_factory=Counter)
    sources: Counter = field(default_factory=Counter)
    last: deque = field(default_factory=lambda: deque(maxlen=LAST_LINES))
    model: str = "-"
    p50_ms: float | None = None
    p99_ms: float | None = None
    interval_p50s: list = field(default_factory=list)
    interval_p99s: list = field(default_factory=list)
    stats_time: float | None = None

    def add(self, records: list[dict]) -> None:
        for record in records:
            self.tagged += 1
            self.review += bool(record.get("review"))
            self.spans.update(span["label"] for span in record.get("spans", ()))
            self.texts[record.get("text", "")] += 1
            self.sources[os.path.basename(record.get("source") or "-")] += 1
            self.model = record.get("model") or self.model
            if record.get("spans"):
                self.last.append(record)

    def read_stats(self, path: Path) -> None:
        """Latency of the daemon's last statistics interval (stats.json is replaced atomically)."""
        try:
            stats = orjson.loads(path.read_bytes())
        except (OSError, orjson.JSONDecodeError):
            return
        if stats.get("time") == self.stats_time:
            return
        self.stats_time = stats.get("time")
        if stats.get("latency_p50_ms") is not None:
            self.p50_ms, self.p99_ms = stats["latency_p50_ms"], stats["latency_p99_ms"]
            self.interval_p50s.append(self.p50_ms)
            self.interval_p99s.append(self.p99_ms)


# ============================================================================ the screen ============

def wants_live_screen(stream: TextIO) -> bool:
    return _isatty(stream) and os.environ.get("TERM", "") != "dumb"


def wants_colour(stream: TextIO) -> bool:
    # NO_COLOR convention (no-color.org): any value disables colour; a dumb terminal has no SGR.
    return use_colour("auto", stream) and os.environ.get("TERM", "") != "dumb"


def _isatty(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def fit_marked(screen: Screen, text: str, spans: list[tuple[int, int, str]], width: int) -> str:
    """The line with its spans marked, cut so that it takes at most `width` columns.

    The plain marking '[text|label]' is 3 + len(label) wider than the text; the coloured one is
    narrower, so fitting the plain one is enough for both. A span is never cut in half. When the
    first span lies far to the right (a JSON line's keys, a long header), the view starts shortly
    before it, so the line shows what was found.
    """
    text = text.replace("\t", " ")      # same length: offsets stay right; a tab would show as '\ufffd'
    first = min((start for start, _, _ in spans), default=0)
    if first > width // 2:
        skip = first - LEAD_COLUMNS
        text = "…" + text[skip + 1:]
        spans = [(start - skip, end - skip, label) for start, end, label in spans]
    room, position, kept = width - 1, 0, []
    cut = len(text)
    for start, end, label in sorted(spans):
        if start - position > room:
            cut = position + room
            break
        room -= start - position
        cost = end - start + 3 + len(label)
        if cost > room:
            cut = start
            break
        room -= cost
        kept.append((start, end, label))
        position = end
    else:
        if len(text) - position > room:
            cut = position + room
    if cut >= len(text):
        return screen.marked(text, kept)
    return screen.marked(text[:cut], kept) + "…"


def _spans_of(record: dict) -> list[tuple[int, int, str]]:
    return [(span["start"], span["end"], span["label"]) for span in record.get("spans", ())]


def _wrap_items(items: list[str], width: int, first: str, indent: str) -> list[str]:
    lines, current = [], first
    for item in items:
        if len(current) + len(item) + 2 > width and current.strip():
            lines.append(current.rstrip())
            current = indent
        current += item + "  "
    lines.append(current.rstrip())
    return lines


def _ms(value: float | None) -> str:
    return "-" if value is None else f"{value:.1f} ms"


def summary_lines(tally: Tally, feeder: Feeder, elapsed: float, seconds: float, threshold: float,
                  screen: Screen, width: int) -> list[str]:
    review_share = f"{100 * tally.review / tally.tagged:.1f}%" if tally.tagged else "-"
    rotation = ("rotation: not yet" if feeder.rotated_at is None else
                f"rotated {LOG_NAME} -> {ROTATED_NAME} at {feeder.rotated_at:.1f} s")
    lines = [
        f"streamtag demo  {elapsed:5.1f} s of {seconds:g} s   model {tally.model}"[:width],
        f"fed     {feeder.fed:6d} lines   {rotation}"[:width],
        f"tagged  {tally.tagged:6d} lines   review {tally.review} ({review_share}, below {threshold:g})"[:width],
        f"latency p50 {_ms(tally.p50_ms)}   p99 {_ms(tally.p99_ms)}   (daemon, last second)"[:width],
    ]
    items = [f"{label} {tally.spans.get(label, 0)}" for label in LABELS]
    lines += _wrap_items(items, width, "spans   ", "        ")
    lines.append("last tagged lines:")
    recent = list(tally.last)
    for record in recent:
        lines.append("  " + fit_marked(screen, record["text"], _spans_of(record), width - 2))
    lines += [""] * (LAST_LINES - len(recent))
    return lines


class LiveScreen:
    """Redraws the summary in place: CUU (CSI n A) back to its first line, each line ended by EL
    (CSI K) so shorter text leaves nothing behind (ECMA-48 sections 8.3.22 and 8.3.41)."""

    def __init__(self, out: TextIO) -> None:
        self.out = out
        self.height = 0

    def draw(self, lines: list[str]) -> None:
        up = f"\x1b[{self.height}A\r" if self.height else ""
        self.out.write(up + "".join(line + "\x1b[K\n" for line in lines))
        if len(lines) < self.height:        # clear what the taller last frame left below
            self.out.write("\x1b[J")
        self.out.flush()
        self.height = len(lines)


def progress_line(tally: Tally, feeder: Feeder, elapsed: float) -> str:
    share = f"{100 * tally.review / tally.tagged:.1f}%" if tally.tagged else "-"
    return (f"{elapsed:5.1f}s fed {feeder.fed} tagged {tally.tagged} review {tally.review} ({share}) "
            f"p50 {_ms(tally.p50_ms)} p99 {_ms(tally.p99_ms)}")


# ============================================================================ the run ==============

class _StopFlag:
    """Set by SIGINT/SIGTERM: the loop notices it between ticks and winds down in order."""

    def __init__(self) -> None:
        self.set = False

    def __call__(self, *_) -> None:
        self.set = True


def start_daemon(paths: DemoPaths, model: str | None) -> subprocess.Popen:
    command = [sys.executable, "-m", "streamtag", "watch", "--config", str(paths.config)]
    if model:
        command += ["--model", model]
    log_fd = os.open(paths.daemon_log, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    try:
        # A session of its own: the terminal's Ctrl-C goes to the demo, which stops the daemon itself.
        return subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=log_fd, stderr=log_fd,
                                start_new_session=True)
    finally:
        os.close(log_fd)


def stop_daemon(daemon: subprocess.Popen) -> int:
    if daemon.poll() is None:
        daemon.send_signal(signal.SIGTERM)
        try:
            daemon.wait(STOP_SECONDS)
        except subprocess.TimeoutExpired:
            daemon.kill()
            daemon.wait()
            raise StreamtagError(f"the daemon did not stop within {STOP_SECONDS:g} s of SIGTERM; killed it")
    return daemon.returncode


def _last_log_line(path: Path) -> str:
    try:
        lines = [line for line in path.read_text(encoding="utf-8", errors="replace").splitlines() if line.strip()]
    except OSError:
        return ""
    return lines[-1] if lines else ""


@dataclass
class Outcome:
    fed_texts: Counter
    tally: Tally
    daemon_exit: int
    stopped_early: bool
    elapsed: float


class _DemoRun:
    """One run: the feeder, the daemon, and what is shown. `run()` feeds, shows, winds down."""

    def __init__(self, paths: DemoPaths, seconds: float, rate: float, seed: int, threshold: float,
                 model: str | None, out: TextIO) -> None:
        self.paths, self.seconds, self.threshold, self.model, self.out = paths, seconds, threshold, model, out
        self.schedule = feed_schedule(seconds, rate, seed)
        self.stream = [line["text"] for line in generate_stream(sum(self.schedule), seed)]
        live = wants_live_screen(out)
        self.live_screen = LiveScreen(out) if live else None
        self.marks = Screen(out, wants_colour(out), list(LABELS))
        self.width = max(40, min(shutil.get_terminal_size((80, 24)).columns, 120) - 1) if live else 79
        self.tail, self.tally, self.fed_texts = JsonLinesTail(paths.output), Tally(), Counter()
        self.stop = _StopFlag()
        self.tick = self.position = 0
        self.next_refresh, self.next_progress = 0.0, PROGRESS_SECONDS

    def run(self) -> Outcome:
        write_config(self.paths, self.threshold, self.model)
        self.feeder = Feeder(self.paths.inbox)
        daemon = start_daemon(self.paths, self.model)
        previous = {signum: signal.signal(signum, self.stop) for signum in (signal.SIGINT, signal.SIGTERM)}
        self.out.write(f"streamtag demo: feeding about {self._rate_text()} for {self.seconds:g} s "
                       f"(Ctrl-C stops early)\nfolder {self.paths.root}\n")
        self.out.flush()
        try:
            self._wait_until_ready(daemon)
            elapsed = self._feed(daemon)
            self._catch_up(daemon, elapsed)
        finally:
            exit_code = stop_daemon(daemon)
            for signum, handler in previous.items():
                signal.signal(signum, handler)
        self.tally.add(self.tail.read())
        self.tally.read_stats(self.paths.stats)
        return Outcome(self.fed_texts, self.tally, exit_code, self.stop.set, elapsed)

    def _wait_until_ready(self, daemon: subprocess.Popen) -> None:
        """Feed only once the daemon says it is watching: on a machine's first run it compiles its
        kernels (up to a minute), and lines fed meanwhile would all pile up for the catch-up."""
        deadline = time.monotonic() + READY_SECONDS
        told = False
        while time.monotonic() < deadline and daemon.poll() is None and not self.stop.set:
            try:
                if b"watching " in Path(self.paths.daemon_log).read_bytes():
                    return
            except OSError:
                pass
            if not told and time.monotonic() > deadline - READY_SECONDS + 2:
                self.out.write("starting the daemon (a first run compiles its kernels, up to a minute) ...\n")
                self.out.flush()
                told = True
            time.sleep(0.1)

    def _rate_text(self) -> str:
        return f"{sum(self.schedule) / max(self.seconds, 1e-9):.0f} lines/s"

    def _feed(self, daemon: subprocess.Popen) -> float:
        """Feed on schedule until its end or a stop request; returns the seconds fed."""
        started = time.monotonic()
        while self.tick < len(self.schedule) and not self.stop.set:
            elapsed = time.monotonic() - started
            self._write_due(elapsed)
            self._rotate_if_due(elapsed)
            if daemon.poll() is not None:
                raise StreamtagError(f"the daemon stopped early (exit {daemon.returncode}): "
                                     f"{_last_log_line(self.paths.daemon_log) or 'see ' + str(self.paths.daemon_log)}")
            self.tally.add(self.tail.read())
            self._show(elapsed)
            time.sleep(max(0.0, started + self.tick * TICK_SECONDS - time.monotonic()))
        if self.feeder.reopen_at is not None:
            self.feeder.reopen()
        self.feeder.close()
        return time.monotonic() - started

    def _write_due(self, elapsed: float) -> None:
        # Every tick whose time has come (more than one after a slow pass), so the rate holds.
        while self.tick < len(self.schedule) and self.tick * TICK_SECONDS <= elapsed:
            batch = self.stream[self.position:self.position + self.schedule[self.tick]]
            self.feeder.write(batch)
            self.fed_texts.update(batch)
            self.position += len(batch)
            self.tick += 1

    def _rotate_if_due(self, elapsed: float) -> None:
        if self.feeder.rotated_at is None and elapsed >= self.seconds / 2:
            self.feeder.rotate(elapsed)
        elif self.feeder.reopen_at is not None and elapsed >= self.feeder.reopen_at:
            self.feeder.reopen()

    def _show(self, elapsed: float) -> None:
        if elapsed >= self.next_refresh:
            self.tally.read_stats(self.paths.stats)
            self.next_refresh = elapsed + REFRESH_SECONDS
            if self.live_screen:
                self._draw(elapsed)
        if not self.live_screen and elapsed >= self.next_progress:
            self.next_progress = elapsed + PROGRESS_SECONDS
            self.out.write(progress_line(self.tally, self.feeder, elapsed) + "\n")
            if self.tally.last:
                record = self.tally.last[-1]
                self.out.write("  " + fit_marked(self.marks, record["text"], _spans_of(record), self.width - 2) + "\n")
            self.out.flush()

    def _draw(self, elapsed: float) -> None:
        self.live_screen.draw(summary_lines(self.tally, self.feeder, elapsed, self.seconds, self.threshold,
                                            self.marks, self.width))

    def _catch_up(self, daemon: subprocess.Popen, elapsed: float) -> None:
        """Wait (bounded) until the daemon has written a record for every fed line."""
        self.out.write(("stopped early" if self.stop.set else "feeding done") + f" after {elapsed:.1f} s; "
                       "waiting for the daemon to tag the last lines ...\n")
        self.out.flush()
        deadline = time.monotonic() + CATCH_UP_SECONDS
        while self.tally.tagged < self.feeder.fed and time.monotonic() < deadline and daemon.poll() is None:
            time.sleep(TICK_SECONDS)
            self.tally.add(self.tail.read())
        self.tally.read_stats(self.paths.stats)
        if self.live_screen:
            self._draw(elapsed)


def run_demo(paths: DemoPaths, seconds: float, rate: float, seed: int, threshold: float,
             model: str | None, out: TextIO) -> Outcome:
    """Feed, show, stop the daemon; the caller checks and reports the outcome."""
    return _DemoRun(paths, seconds, rate, seed, threshold, model, out).run()


def _shown(path: Path) -> str:
    """A path as the user would type it: relative to the working directory when inside it."""
    try:
        return str(path.relative_to(Path.cwd()))
    except ValueError:
        return str(path)


def report(outcome: Outcome, paths: DemoPaths, threshold: float, model: str | None, out: TextIO) -> list[str]:
    """Prints the totals and the next commands; returns the problems found (empty: all good)."""
    tally = outcome.tally
    missing = outcome.fed_texts - tally.texts
    extra = tally.texts - outcome.fed_texts
    problems = []
    if outcome.daemon_exit != 0:
        problems.append(f"the daemon exited with {outcome.daemon_exit} (see {_shown(paths.daemon_log)})")
    if missing:
        problems.append(f"{sum(missing.values())} fed lines are missing from the output")
    if extra:
        problems.append(f"{sum(extra.values())} output records are duplicates or were never fed")
    fed = sum(outcome.fed_texts.values())
    share = f"{100 * tally.review / tally.tagged:.1f}%" if tally.tagged else "-"
    sources = ", ".join(f"{name} {count}" for name, count in sorted(tally.sources.items()))
    p50s, p99s = sorted(tally.interval_p50s), tally.interval_p99s
    latency = (f"median p50 {p50s[len(p50s) // 2]:.1f} ms, worst p99 {max(p99s):.1f} ms over "
               f"{len(p50s)} one-second intervals" if p50s else "no statistics interval finished")
    inbox, output, review = _shown(paths.inbox), _shown(paths.output), _shown(paths.review)
    replayed, reviewed = _shown(paths.root / "replayed.jsonl"), _shown(paths.root / "reviewed.jsonl")
    model_option = f" --model {_shown(Path(model))}" if model else ""
    lines = [
        "",
        f"fed      {fed} lines in {outcome.elapsed:.1f} s (log rotated once: {LOG_NAME} -> {ROTATED_NAME})",
        f"tagged   {tally.tagged} records ({sources})",
        f"model    {tally.model}",
        f"review   {tally.review} lines ({share})",
        *_wrap_items([f"{label} {tally.spans.get(label, 0)}" for label in LABELS], 79, "spans    ", "         "),
        f"latency  {latency}",
        f"daemon   stopped with SIGTERM, exit {outcome.daemon_exit}",
        ("check    every fed line is in the output exactly once" if not (missing or extra) else
         f"check    FAILED: {sum(missing.values())} fed lines missing, {sum(extra.values())} records extra"),
        "",
        f"output   {output}",
        f"review   {review}",
        f"inputs   {inbox}/ ({LOG_NAME}, {ROTATED_NAME})",
        f"daemon   {_shown(paths.config)} (config), {_shown(paths.daemon_log)} (its log)",
        "",
        "next: tag the inbox again, compare, review the doubtful lines",
        f"  .venv/bin/streamtag replay {inbox} --threshold {threshold:g}{model_option} --output {replayed}",
        f"  .venv/bin/streamtag compare {output} {replayed}",
        f"  .venv/bin/streamtag review {review}{model_option} --out {reviewed}",
    ]
    out.write("\n".join(lines) + "\n")
    out.flush()
    return problems


def main(argv: list[str] | None = None, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    parser = argparse.ArgumentParser(prog="python -m streamtag.demo.run",
                                     description="Run the daemon on a live stream of invented log lines.")
    parser.add_argument("--dir", default="demo-run", help="demo folder (made fresh; default: ./demo-run)")
    parser.add_argument("--seconds", type=float, default=30.0, help="how long to feed lines (default 30)")
    parser.add_argument("--rate", type=float, default=100.0, help="lines per second between bursts (default 100)")
    parser.add_argument("--threshold", type=float, default=0.8, help="review threshold (default 0.8)")
    parser.add_argument("--model", help="model file (default: the model bundled with streamtag)")
    parser.add_argument("--seed", type=int, default=7, help="seed of the generated stream (default 7)")
    args = parser.parse_args(argv)
    try:
        if not 1.0 <= args.seconds <= 3600.0:
            raise StreamtagError(f"--seconds must lie in [1, 3600], got {args.seconds:g}")
        if not 1.0 <= args.rate <= 5000.0:
            raise StreamtagError(f"--rate must lie in [1, 5000], got {args.rate:g}")
        if not 0.0 <= args.threshold <= 1.0:
            raise StreamtagError(f"--threshold must lie in [0, 1], got {args.threshold:g}")
        model = str(Path(args.model).absolute()) if args.model else None
        paths = prepare_folder(Path(args.dir))
        outcome = run_demo(paths, args.seconds, args.rate, args.seed, args.threshold, model, out)
        problems = report(outcome, paths, args.threshold, model, out)
    except StreamtagError as error:
        print(f"streamtag demo: {error}", file=sys.stderr)
        return error.exit_code
    except OSError as error:
        print(f"streamtag demo: {error.strerror or error}: {error.filename or ''}".rstrip(": "), file=sys.stderr)
        return 1
    except KeyboardInterrupt:       # Ctrl-C before the daemon was started: nothing to stop
        print("streamtag demo: interrupted", file=sys.stderr)
        return 130
    if problems:
        print(f"streamtag demo: {problems[0]}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
