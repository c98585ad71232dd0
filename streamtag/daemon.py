"""``streamtag watch``: follow files, tag every new line, write records, checkpoint; for months.

One main thread does reading, tagging and writing; a second thread only waits for the fsyncs and
the checkpoint of the last batch written (see below). The watchdog observer (``ChangeWatcher``) only
puts change hints into a queue; the loop waits on that queue with a short timeout and falls back
to polling. Signal handlers only set flags, which the loop reads between batches.

Durability, per batch (group commit): append the records to the output and review files, flush and
fsync both, then save the checkpoint (follower positions + output lengths) atomically. On start the
outputs are cut back to the lengths in the checkpoint and every file resumes at its checkpointed
offset. A crash at any moment therefore re-reads at most the batch that was not checkpointed and
the cut removes its records if they had been written: each input line is in the output exactly once
(common practice: at-least-once delivery + idempotent checkpoint = effectively once).

While the records of batch k are fsynced and its checkpoint saved (in the background thread, which
only waits for the disk), the main thread reads and tags batch k + 1; it writes nothing of batch
k + 1 until batch k's checkpoint has landed, and redoes in the foreground whatever failed there.

A failed write (disk full, EACCES, EIO) keeps the batch in hand, cuts the partial write back to the
last good length, and retries with exponential backoff; reading pauses and the checkpoint does not
advance until the batch is written.
"""

from __future__ import annotations

import argparse
import errno
import os
import queue
import signal
import sys
import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import orjson

from streamtag.batch import fewer_collections, keep_freed_memory, tag_and_encode
from streamtag.checkpoint import State, fsync_directory, load_state, recover_outputs, save_state, write_file_atomically
from streamtag.config import WatchConfig, load_watch_config
from streamtag.decode import decode_json, decode_lines
from streamtag.errors import ConfigError, ModelError, StreamtagError
from streamtag.follow import ChangeWatcher, Follower, LineBatch
from streamtag.model import Model, default_model_path, load_model
from streamtag.tagger import Tagger

STATE_FILE = "state.json"
STATS_FILE = "stats.json"
BACKOFF_FIRST_SECONDS = 0.1
BACKOFF_CAP_SECONDS = 5.0
MODEL_CHECK_SECONDS = 1.0
HINT_QUEUE_SIZE = 64  # one pending hint is enough to wake the loop; the watcher drops the rest
WAIT_SLICE_SECONDS = 0.1  # longest sleep between looks at the signal flags
# Tagging a sample proves a new model's labels and feature spec work before it is swapped in.
MODEL_PROBE_LINE = "gatewarden[311]: login failed for user kestrel from 10.4.7.21 port 2201 on host relay-07"

Log = Callable[[str], None]


def stderr_log(message: str) -> None:
    """One line on stderr (foreground daemon; a service manager adds its own timestamps)."""
    sys.stderr.write(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} streamtag: {message}\n")
    sys.stderr.flush()


# -- output files: append, fsync, cut back on failure --------------------------------------------


class OutputFile:
    """An append-only file whose last good length is known; a failed append is cut back to it.

    ``write`` and ``fsync`` have the signatures of ``os.write`` and ``os.fsync`` so a test can
    inject faults (ENOSPC, EIO) at the exact system call.
    """

    def __init__(self, path: str, mode: int, write=os.write, fsync=os.fsync) -> None:
        self.path = path
        self._write = write
        self._fsync = fsync
        self.fd = _open_append(path, mode)
        self.length = os.fstat(self.fd).st_size  # bytes known to be written and synced
        self._dirty = False  # a failed append may have left bytes past self.length

    def append(self, data: bytes) -> None:
        """Write all of ``data`` (not yet synced). On failure the file is cut back; raises OSError."""
        if self._dirty:
            self.cut_back()
        self._dirty = True
        view = memoryview(data)
        while view:
            written = self._write(self.fd, view)
            view = view[written:]

    def sync(self) -> None:
        self._fsync(self.fd)

    def commit(self, new_length: int) -> None:
        self.length = new_length
        self._dirty = False

    def cut_back(self) -> None:
        """Remove whatever a failed append left past the last good length."""
        os.ftruncate(self.fd, self.length)
        self._dirty = False

    def close(self) -> None:
        os.close(self.fd)


def _open_append(path: str, mode: int) -> int:
    """Open for append, creating the file (and its folder) private to the owner by default."""
    parent = os.path.dirname(os.path.abspath(path))
    os.makedirs(parent, mode=0o700, exist_ok=True)
    existed = os.path.exists(path)
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, mode)
    if not existed:
        # The umask may have taken bits from the configured mode; a file that already existed
        # keeps the mode its owner gave it. The new name must survive a crash with the data.
        os.fchmod(fd, mode)
        fsync_directory(parent)
    return fd


class BatchWriter:
    """Writes a batch to output and review together: both land, or both are cut back."""

    def __init__(self, output: OutputFile, review: OutputFile) -> None:
        self.output = output
        self.review = review

    def write(self, output_bytes: bytes, review_bytes: bytes) -> None:
        """Append and fsync both (see `append` and `sync`); raises OSError with both cut back."""
        self.append(output_bytes, review_bytes)
        self.sync(len(output_bytes), len(review_bytes))

    def append(self, output_bytes: bytes, review_bytes: bytes) -> None:
        """Write both, not yet synced. On failure both are cut back to their last good length."""
        try:
            for handle, data in ((self.output, output_bytes), (self.review, review_bytes)):
                if data:
                    handle.append(data)
        except OSError:
            self._cut_back()
            raise

    def sync(self, output_size: int, review_size: int) -> None:
        """fsync what `append` wrote (``output_size`` and ``review_size`` bytes), then count it as
        good. On failure both are cut back to their last good length, so the batch is written again."""
        files = ((self.output, output_size), (self.review, review_size))
        try:
            for handle, size in files:
                if size:
                    handle.sync()
        except OSError:
            self._cut_back()
            raise
        for handle, size in files:
            handle.commit(handle.length + size)

    def _cut_back(self) -> None:
        for handle in (self.output, self.review):
            try:
                handle.cut_back()
            except OSError:
                pass  # still dirty: cut again before the next attempt

    def close(self) -> None:
        self.output.close()
        self.review.close()


# -- latency and throughput statistics ------------------------------------------------------------


class LatencyHistogram:
    """Read-to-write latencies in log-spaced buckets: constant memory however long the daemon runs.

    Buckets are 1 % wide (relative), from 10 microseconds to about 1.6 hours, so a percentile is
    exact to within 1 %.
    """

    LOW = 1e-5
    RATIO = 1.01
    N_BUCKETS = 2000

    def __init__(self) -> None:
        self.counts = np.zeros(self.N_BUCKETS, dtype=np.int64)
        self._log_ratio = np.log(self.RATIO)

    def add(self, latencies: np.ndarray, counts: np.ndarray | None = None) -> None:
        """latencies (n,) seconds; ``counts`` (n,) how many lines had each latency (default: one each)."""
        index = np.floor(np.log(np.maximum(latencies, self.LOW) / self.LOW) / self._log_ratio).astype(np.int64)
        np.add.at(self.counts, np.minimum(index, self.N_BUCKETS - 1), 1 if counts is None else counts)

    def percentile(self, q: float) -> float | None:
        total = int(self.counts.sum())
        if total == 0:
            return None
        rank = int(np.ceil(q / 100.0 * total))
        bucket = int(np.searchsorted(np.cumsum(self.counts), max(rank, 1)))
        return self.LOW * self.RATIO ** (bucket + 0.5)  # bucket middle

    def clear(self) -> None:
        self.counts[:] = 0


@dataclass
class Stats:
    started: float
    interval_start: float
    lines: int = 0
    review: int = 0
    batches: int = 0
    write_failures: int = 0
    total_lines: int = 0
    total_review: int = 0
    latency: LatencyHistogram = field(default_factory=LatencyHistogram)


# -- the daemon -----------------------------------------------------------------------------------


@dataclass(slots=True)
class _Pending:
    """Lines read but not yet written, with the time each read happened and how many lines it gave
    (for latency: one pair per read, not one time per line)."""

    lines: LineBatch = field(default_factory=LineBatch)
    read_at: list = field(default_factory=list)
    read_counts: list = field(default_factory=list)
    started: float = 0.0

    def __len__(self) -> int:
        return len(self.lines)


@dataclass(slots=True)
class _Written:
    """A batch appended to the outputs, with what its checkpoint will record: the follower positions
    right after its lines and the model that tagged it. ``future`` is its fsync and checkpoint while
    they run beside the tagging of the next batch."""

    pending: _Pending
    output_bytes: bytes
    review_bytes: bytes
    n_review: int
    files: dict
    model_id: str
    future: Future | None = None
    durable_at: float = 0.0


class _DurabilityFault(Exception):
    """An fsync ("write") or checkpoint ("checkpoint") of a batch failed in the background."""

    def __init__(self, stage: str, error: OSError) -> None:
        super().__init__(stage)
        self.stage = stage
        self.error = error


class Daemon:
    """The watch loop. ``run()`` returns the exit code; ``request_stop``/``request_reload`` are
    what the signal handlers call (and what in-process tests call)."""

    def __init__(
        self,
        config: WatchConfig,
        log: Log = stderr_log,
        write: Callable[[int, Any], int] = os.write,
        fsync: Callable[[int], None] = os.fsync,
        clock: Callable[[], float] = time.monotonic,
        install_signals: bool = True,
    ) -> None:
        self.config = config
        self.log = log
        self._write = write
        self._fsync = fsync
        self.clock = clock
        self.install_signals = install_signals
        self.stop_requested = False
        self.reload_requested = False
        self.hints: queue.Queue = queue.Queue(maxsize=HINT_QUEUE_SIZE)
        self.state_path = os.path.join(config.state_dir, STATE_FILE)
        self.stats_path = os.path.join(config.state_dir, STATS_FILE)
        self.model_path = str(config.model_path) if config.model_path else str(default_model_path())
        self.checkpoints = 0  # number of checkpoints saved (tests and stats)
        self.saved_files: dict | None = None  # follower snapshot in the last saved checkpoint
        self.in_flight: _Written | None = None  # the batch whose fsync and checkpoint are running
        self._syncer: ThreadPoolExecutor | None = None

    # signal-safe: only set flags
    def request_stop(self, *_: Any) -> None:
        self.stop_requested = True

    def request_reload(self, *_: Any) -> None:
        self.reload_requested = True

    def run(self) -> int:
        try:
            return self._run()
        except StreamtagError as exc:
            self.log(str(exc))
            return exc.exit_code
        except OSError as exc:  # e.g. the output folder cannot be created: one line, not a traceback
            where = f"{exc.filename}: " if exc.filename else ""
            self.log(f"{where}{exc.strerror or exc}; stopped")
            return 1

    # -- start and stop ------------------------------------------------------------------------

    def _run(self) -> int:
        # Handlers first: a SIGTERM during a slow start (model load) then means "stop cleanly".
        previous_handlers = self._install_signal_handlers()
        try:
            return self._start_and_loop()
        finally:
            self._restore_signal_handlers(previous_handlers)

    def _start_and_loop(self) -> int:
        config = self.config
        if not config.inputs:
            raise ConfigError(f"{config.config_path or 'command line'}: inputs.paths: no input given (nothing to watch)")
        os.makedirs(config.state_dir, mode=0o700, exist_ok=True)
        self.tagger = self._load_tagger(self.model_path)
        self.model_signature = _file_signature(self.model_path)
        state = load_state(self.state_path)
        if state is not None:
            recover_outputs(state, config.output_path, config.review_path)
        elif _size(config.output_path) > 0:
            self.log(f"no checkpoint in {config.state_dir}: appending to the existing {config.output_path}")
        self.writer = BatchWriter(
            OutputFile(config.output_path, config.file_mode, self._write, self._fsync),
            OutputFile(config.review_path, config.file_mode, self._write, self._fsync),
        )
        try:
            self.follower = self._make_follower(state)
        except BaseException:
            self.writer.close()
            raise
        watcher = self._start_watcher()
        self.log(
            f"watching {len(config.inputs)} input pattern(s); model {self.tagger.model_id}; "
            f"output {config.output_path}; review {config.review_path} below {config.review_threshold:g}"
            + ("; resumed from checkpoint" if state is not None else "")
        )
        self._syncer = ThreadPoolExecutor(max_workers=1, thread_name_prefix="streamtag-sync")
        try:
            keep_freed_memory()
            with fewer_collections():
                return self._loop()
        finally:
            self._syncer.shutdown(wait=True)  # never close the files under a running fsync
            if watcher is not None:
                watcher.stop()
            self.follower.close()
            self.writer.close()

    def _make_follower(self, state: State | None) -> Follower:
        config = self.config
        return Follower(
            list(config.inputs),
            start_at=config.start_at,
            max_line_bytes=config.max_line_bytes,
            idle_flush_seconds=config.idle_flush_seconds,
            saved=state.files if state is not None else None,
            clock=self.clock,
            on_warning=self.log,
            # A directory or glob input may cover our own files: tagging them would feed back.
            exclude=[config.output_path, config.review_path, self.state_path, self.stats_path],
        )

    def _start_watcher(self) -> ChangeWatcher | None:
        try:
            watcher = ChangeWatcher(list(self.config.inputs), self.hints, on_warning=self.log)
            watcher.start()
            return watcher
        except Exception as exc:  # e.g. inotify watch limit: polling still finds every change
            self.log(f"change notices unavailable ({type(exc).__name__}: {exc}); polling every "
                     f"{self.config.poll_interval_seconds:g} s")
            return None

    def _install_signal_handlers(self) -> dict:
        if not self.install_signals or threading.current_thread() is not threading.main_thread():
            return {}
        previous = {}
        for signum, handler in ((signal.SIGTERM, self.request_stop), (signal.SIGINT, self.request_stop),
                                (signal.SIGHUP, self.request_reload)):
            previous[signum] = signal.signal(signum, handler)
        return previous

    @staticmethod
    def _restore_signal_handlers(previous: dict) -> None:
        for signum, handler in previous.items():
            signal.signal(signum, handler)

    # -- the loop ------------------------------------------------------------------------------

    def _loop(self) -> int:
        config = self.config
        now = self.clock()
        self.stats = Stats(started=now, interval_start=now)
        self.last_poll = -float("inf")
        self.next_model_check = now + MODEL_CHECK_SECONDS
        max_wait = config.batch_max_wait_ms / 1000.0
        pending = _Pending()
        self.follower.poll()
        # Positions of the files found now count from here on (start_at = "end" skips are kept).
        if not self._save_checkpoint_with_retry():
            return 1
        lines = LineBatch()
        while True:
            if self.stop_requested:
                return self._finish(pending)
            self._housekeeping()
            if not lines:  # the last read found nothing: wait for a change (or the batch deadline)
                if self._settle():
                    return 1
                deadline = pending.started + max_wait if len(pending) else self.last_poll + config.poll_interval_seconds
                hinted = self._wait_for_hint(deadline - self.clock())
                if hinted or len(pending) or self.clock() - self.last_poll >= config.poll_interval_seconds:
                    self.follower.poll()
                    self.last_poll = self.clock()
            lines = self._read_into(pending)
            if len(pending) and (len(pending) >= config.batch_max_lines or self.clock() - pending.started >= max_wait):
                exit_code = self._write_with_retry(pending, overlap=True)
                if exit_code:
                    return exit_code
                pending = _Pending()
            elif not len(pending) and not lines:
                self._checkpoint_if_moved()

    def _housekeeping(self) -> None:
        """Model file check (at most once a second, or on SIGHUP) and the stats line when due."""
        now = self.clock()
        # Lines are tagged when their batch is written, so a swap here is between batches.
        if self.reload_requested or now >= self.next_model_check:
            self._maybe_swap_model()
            self.next_model_check = now + MODEL_CHECK_SECONDS
        if now - self.stats.interval_start >= self.config.stats_interval_seconds:
            self._emit_stats()

    def _read_into(self, pending: _Pending) -> LineBatch:
        """Read as many lines as the batch has room for; remember when they were read."""
        room = self.config.batch_max_lines - len(pending)
        lines = self.follower.read_batch(room) if room > 0 else LineBatch()
        if lines:
            read_time = self.clock()
            if not len(pending):
                pending.started = read_time
            pending.lines.extend(lines)
            pending.read_at.append(read_time)
            pending.read_counts.append(len(lines))
        return lines

    def _finish(self, pending: _Pending) -> int:
        """Stop requested: write the batch in hand, checkpoint, last stats line."""
        exit_code = self._settle()
        if exit_code == 0:
            if len(pending):
                exit_code = self._write_with_retry(pending, overlap=False)
            else:
                exit_code = 0 if self._save_checkpoint_with_retry() else 1
        if exit_code == 0:
            self._emit_stats(final=True)
            self.log("stopped: every line read is written and checkpointed")
        return exit_code

    def _wait_for_hint(self, timeout: float) -> bool:
        """Sleep until a change hint, a signal flag or the timeout; drains the hint queue."""
        if timeout <= 0:
            return False
        deadline = self.clock() + timeout
        while not (self.stop_requested or self.reload_requested):
            remaining = deadline - self.clock()
            if remaining <= 0:
                return False
            try:
                self.hints.get(timeout=min(remaining, WAIT_SLICE_SECONDS))
            except queue.Empty:
                continue
            while True:
                try:
                    self.hints.get_nowait()
                except queue.Empty:
                    return True
        return False

    def _checkpoint_if_moved(self) -> None:
        """Idle: save positions that moved without lines (new file at its end, rotation, truncation)."""
        if self.in_flight is None and self.follower.snapshot() != self.saved_files:
            self._save_checkpoint_with_retry()

    # -- one batch ------------------------------------------------------------------------------

    def _write_with_retry(self, pending: _Pending, overlap: bool) -> int:
        """Tag, write (retrying until it lands), fsync and checkpoint a batch. 0, or 1 when stopped
        during a fault.

        With ``overlap`` the fsyncs and the checkpoint run in the background while the loop reads
        and tags the next batch (`_settle` waits for them before anything else is written). fsync
        waits for the disk, not the processor: on a disk where the four fsyncs of a batch (output,
        review, state file, its folder) took about 15 ms, they cost a fifth of the throughput when
        the loop waited for them. The order on disk is unchanged: records, then their checkpoint,
        and nothing of the next batch is written before that checkpoint has landed or failed.
        """
        record_bytes, review_bytes, n_review = self._encode_batch(pending.lines)
        batch = _Written(pending, record_bytes, review_bytes, n_review, self.follower.snapshot(),
                         self.tagger.model_id)
        exit_code = self._settle()
        if exit_code:
            return exit_code
        if not overlap:
            if not self._retry_write(batch, lambda: self.writer.write(record_bytes, review_bytes)):
                return 1
            return self._checkpoint_written(batch)
        if not self._retry_write(batch, lambda: self.writer.append(record_bytes, review_bytes)):
            return 1
        batch.future = self._syncer.submit(self._make_durable, batch)
        self.in_flight = batch
        return 0

    def _make_durable(self, batch: _Written) -> None:
        """In the background: fsync the batch's records, then save its checkpoint."""
        try:
            self.writer.sync(len(batch.output_bytes), len(batch.review_bytes))
        except OSError as exc:
            raise _DurabilityFault("write", exc) from None
        batch.durable_at = self.clock()
        try:
            self._checkpoint(batch.files, batch.model_id)
        except OSError as exc:
            raise _DurabilityFault("checkpoint", exc) from None

    def _settle(self) -> int:
        """Wait for the batch whose fsync and checkpoint run in the background; redo in the
        foreground, with the usual retries, whatever failed there. 0, or 1 when stopped meanwhile."""
        batch, self.in_flight = self.in_flight, None
        if batch is None:
            return 0
        try:
            batch.future.result()
        except _DurabilityFault as fault:
            if fault.stage == "write":  # the writer cut the batch back: write it again, whole
                self._log_write_fault(batch, fault.error, BACKOFF_FIRST_SECONDS)
                self._sleep(BACKOFF_FIRST_SECONDS)
                write_again = lambda: self.writer.write(batch.output_bytes, batch.review_bytes)  # noqa: E731
                if not self._retry_write(batch, write_again):
                    return 1
                return self._checkpoint_written(batch)
            self.log(f"checkpoint failed ({_reason(fault.error)}); retrying in {BACKOFF_FIRST_SECONDS:g} s")
            self._sleep(BACKOFF_FIRST_SECONDS)
            return self._checkpoint_written(batch)
        self._count_written(batch)
        return 0

    def _retry_write(self, batch: _Written, write: Callable[[], None]) -> bool:
        """Run ``write`` until it lands, backing off; False if a stop is requested during a fault."""
        delay = BACKOFF_FIRST_SECONDS
        while True:
            try:
                write()
                batch.durable_at = self.clock()
                return True
            except OSError as exc:
                if self.stop_requested:
                    self.log(f"stopping during a write fault ({_reason(exc)}): {len(batch.pending)} lines not "
                             "written; they are read again at the next start")
                    return False
                self._log_write_fault(batch, exc, delay)
                self._sleep(delay)
                delay = min(delay * 2, BACKOFF_CAP_SECONDS)

    def _log_write_fault(self, batch: _Written, exc: OSError, delay: float) -> None:
        self.stats.write_failures += 1
        self.log(f"write failed ({_reason(exc)}); holding {len(batch.pending)} lines, retrying in {delay:g} s")

    def _checkpoint_written(self, batch: _Written) -> int:
        """Checkpoint a batch whose records are synced (retrying), then count it. 0, or 1 when stopped."""
        if not self._save_checkpoint_with_retry(batch.files, batch.model_id):
            return 1
        self._count_written(batch)
        return 0

    def _count_written(self, batch: _Written) -> None:
        pending = batch.pending
        self.stats.latency.add(batch.durable_at - np.asarray(pending.read_at), np.asarray(pending.read_counts))
        self.stats.lines += len(pending)
        self.stats.review += batch.n_review
        self.stats.batches += 1

    def _save_checkpoint_with_retry(self, files: dict | None = None, model_id: str | None = None) -> bool:
        delay = BACKOFF_FIRST_SECONDS
        while True:
            try:
                self._checkpoint(files, model_id)
                return True
            except OSError as exc:
                if self.stop_requested:
                    # The outputs are ahead of the checkpoint; the next start cuts them back and
                    # reads those lines again, so nothing is lost or duplicated.
                    self.log(f"stopping during a checkpoint fault ({_reason(exc)})")
                    return False
                self.log(f"checkpoint failed ({_reason(exc)}); retrying in {delay:g} s")
                self._sleep(delay)
                delay = min(delay * 2, BACKOFF_CAP_SECONDS)

    def _checkpoint(self, files: dict | None = None, model_id: str | None = None) -> None:
        """Save the state: ``files`` (a follower snapshot; now if None) and the outputs' synced lengths."""
        files = self.follower.snapshot() if files is None else files
        state = State(
            files=files,
            output_bytes=self.writer.output.length,
            review_bytes=self.writer.review.length,
            model_id=model_id or self.tagger.model_id,
        )
        save_state(self.state_path, state, mode=self.config.file_mode)
        self.saved_files = files
        self.checkpoints += 1

    def _sleep(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while not self.stop_requested and time.monotonic() < deadline:
            time.sleep(min(WAIT_SLICE_SECONDS, max(0.0, deadline - time.monotonic())))

    def _encode_batch(self, lines: LineBatch) -> tuple[bytes, bytes, int]:
        """Lines read -> (output bytes, review bytes, number of review records)."""
        config = self.config
        if config.input_format == "json":
            decoded = [decode_json(data, config.text_field) for data in lines.datas]
        else:
            decoded = decode_lines(lines.datas)
        return tag_and_encode(
            self.tagger, decoded, config.review_threshold, config.review_threshold, sources=lines.paths,
            offsets=lines.starts, line_numbers=lines.line_nos, read_flags=lines.flags, log=self.log,
        )

    # -- model swap ----------------------------------------------------------------------------

    def _load_tagger(self, path: str) -> Tagger:
        """Load and probe a model; ModelError (one line) if it cannot tag."""
        model = load_model(path)
        return self._probe(model)

    def _probe(self, model: Model) -> Tagger:
        try:
            tagger = Tagger(model, max_tokens=self.config.max_tokens, window_overlap=self.config.window_overlap)
            tagger.tag([MODEL_PROBE_LINE], review_below=self.config.review_threshold)
        except StreamtagError:
            raise
        except Exception as exc:
            raise ModelError(f"{self.model_path}: model cannot tag ({type(exc).__name__}: {exc})") from None
        return tagger

    def _maybe_swap_model(self) -> None:
        signature = _file_signature(self.model_path)
        if not self.reload_requested and signature == self.model_signature:
            return
        reason = "reload requested" if self.reload_requested else "model file changed"
        self.reload_requested = False
        self.model_signature = signature
        try:
            tagger = self._load_tagger(self.model_path)
        except StreamtagError as exc:
            self.log(f"{reason}: new model refused, still tagging with {self.tagger.model_id}: {exc}")
            return
        if tagger.model_id == self.tagger.model_id:
            self.log(f"{reason}: model unchanged ({tagger.model_id})")
            return
        self.log(f"{reason}: now tagging with {tagger.model_id} (was {self.tagger.model_id})")
        self.tagger = tagger

    # -- statistics ----------------------------------------------------------------------------

    def _emit_stats(self, final: bool = False) -> None:
        stats = self.stats
        now = self.clock()
        elapsed = max(now - stats.interval_start, 1e-9)
        stats.total_lines += stats.lines
        stats.total_review += stats.review
        p50, p99 = stats.latency.percentile(50), stats.latency.percentile(99)
        payload = {
            "time": time.time(),
            "interval_seconds": round(elapsed, 3),
            "lines": stats.lines,
            "lines_per_second": round(stats.lines / elapsed, 1),
            "review_rate": round(stats.review / stats.lines, 4) if stats.lines else 0.0,
            "bytes_behind": int(self.follower.pending_bytes()),
            "latency_p50_ms": None if p50 is None else round(p50 * 1000, 2),
            "latency_p99_ms": None if p99 is None else round(p99 * 1000, 2),
            "batches": stats.batches,
            "write_failures": stats.write_failures,
            "total_lines": stats.total_lines,
            "total_review": stats.total_review,
            "uptime_seconds": round(now - stats.started, 1),
            "model": self.tagger.model_id,
            "final": final,
        }
        latency = ("-" if p50 is None else
                   f"p50 {payload['latency_p50_ms']:.1f} ms, p99 {payload['latency_p99_ms']:.1f} ms")
        self.log(
            f"stats: {payload['lines_per_second']:.1f} lines/s, review {100 * payload['review_rate']:.1f}%, "
            f"{payload['bytes_behind']} bytes behind, latency {latency}, model {payload['model']}"
        )
        try:
            write_file_atomically(self.stats_path, orjson.dumps(payload, option=orjson.OPT_INDENT_2), self.config.file_mode)
        except OSError as exc:
            self.log(f"cannot write {self.stats_path} ({_reason(exc)})")
        stats.interval_start = now
        stats.lines = stats.review = stats.batches = stats.write_failures = 0
        stats.latency.clear()


def _reason(exc: OSError) -> str:
    name = errno.errorcode.get(exc.errno or 0, "")
    return f"{name}: {exc.strerror}" if name and exc.strerror else str(exc)


def _file_signature(path: str) -> tuple | None:
    """(inode, size, mtime) to notice a replaced or rewritten model file; None if it is missing."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def _size(path: str) -> int:
    try:
        return os.stat(path).st_size
    except OSError:
        return 0


def run(config: WatchConfig, log: Log = stderr_log) -> int:
    """Run the daemon in the foreground until SIGTERM/SIGINT; returns the exit code."""
    return Daemon(config, log).run()


def main(argv: list[str] | None = None) -> int:
    """``python -m streamtag.daemon --config FILE``: the daemon without the rest of the CLI."""
    parser = argparse.ArgumentParser(prog="python -m streamtag.daemon", description="follow files and tag new lines")
    parser.add_argument("--config", metavar="FILE", help="TOML configuration (default: built-in defaults)")
    args = parser.parse_args(argv)
    try:
        config = load_watch_config(args.config, {})
    except StreamtagError as exc:
        sys.stderr.write(f"streamtag: {exc}\n")
        return exc.exit_code
    return run(config)


if __name__ == "__main__":
    raise SystemExit(main())
