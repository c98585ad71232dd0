"""`streamtag replay`: tag archived logs with a model on every core, in input order, resumable.

Archives are files, directories (walked recursively, sorted), glob patterns, and gzip, bzip2 or xz
files (known by their magic bytes, not their names, so ``app.log.1.gz`` and a renamed one both work).
Each input line gives one output record with the same schema as the daemon's (``records.make_record``):
``source`` is the archive's absolute path and ``offset`` is the byte offset of the line's first byte.
For a compressed archive the offset counts bytes of the *decompressed* stream (an offset into
compressed bytes would point into the middle of a deflate block); ``line`` is the 1-based line
number. Lines are cut and flagged as the daemon's follower does (see ``read_lines``).

Work flow: the parent reads lines and cuts them into chunks of ``--chunk-lines`` lines (a chunk may
span archives); workers (a process pool, the model loaded once per worker by the pool initializer)
decode, tag and encode a chunk; the parent writes the chunks' bytes in input order. With
``--workers 1`` everything runs in the parent process.

Resuming: after each chunk the output (and review file) is fsynced, then the sidecar ``OUT.progress``
is replaced atomically. It holds a hash of the arguments that decide the output (archive paths and
sizes, model id, threshold, format, text field, line cap, chunk size, review path), the chunks done,
the byte lengths of output and review file, and the reading position (archive index, byte offset,
line number) after the last chunk. Run again with the same arguments and the files are cut back to the
recorded lengths (dropping a chunk written but not yet recorded) and reading seeks to that position,
so the result is byte-for-byte that of an uninterrupted run. Different arguments: a one-line error,
or ``--restart`` to start over. A finished replay keeps its sidecar with ``"complete": true``.
"""

from __future__ import annotations

import argparse
import bz2
import concurrent.futures as futures
import glob
import gzip
import hashlib
import lzma
import multiprocessing
import os
import signal
import sys
import time
import zlib
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import orjson

from streamtag.checkpoint import write_file_atomically
from streamtag.config import WatchConfig
from streamtag.errors import ConfigError, DataError
from streamtag.follow import FLAG_NO_NEWLINE, FLAG_TRUNCATED

PROGRESS_FORMAT = "streamtag-replay-progress"
PROGRESS_VERSION = 1
DEFAULT_CHUNK_LINES = 1024
# Compressed archives are known by their first bytes (RFC 1952 section 2.3.1 for gzip; the bzip2
# "BZh" header; the .xz stream header magic), not by their names.
COMPRESSION_MAGIC = ((b"\x1f\x8b", "gzip"), (b"BZh", "bzip2"), (b"\xfd7zXZ\x00", "xz"))
_DECOMPRESSORS = {
    "gzip": lambda raw: gzip.GzipFile(fileobj=raw, mode="rb"),
    "bzip2": lambda raw: bz2.BZ2File(raw, mode="rb"),
    "xz": lambda raw: lzma.LZMAFile(raw, mode="rb"),
}
FILE_MODE = 0o600
_DEFAULTS = WatchConfig()


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("archives", nargs="+", metavar="ARCHIVE",
                        help="file, directory, glob pattern; gzip, bzip2 and xz files are read decompressed")
    parser.add_argument("--model", metavar="MODEL", help="model file (default: the bundled model)")
    parser.add_argument("--output", required=True, metavar="OUT", help="output records (JSON Lines)")
    parser.add_argument("--review", metavar="FILE", help="also write review records of doubtful lines here")
    parser.add_argument("--threshold", type=float, default=_DEFAULTS.review_threshold,
                        help="lines with confidence below this are marked for review "
                             f"(default {_DEFAULTS.review_threshold:g})")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1,
                        help="processes tagging in parallel (default: all cores)")
    parser.add_argument("--format", choices=["lines", "json"], default="lines",
                        help="lines: each line is text; json: each line is an object holding the text")
    parser.add_argument("--text-field", default=_DEFAULTS.text_field, metavar="F",
                        help="dotted path to the text in a JSON line (default %(default)s)")
    parser.add_argument("--max-line-bytes", type=int, default=_DEFAULTS.max_line_bytes,
                        help="longer lines are cut and flagged 'truncated' (default %(default)s)")
    parser.add_argument("--max-tokens", type=int, default=_DEFAULTS.max_tokens,
                        help="longer lines are tagged in windows (default %(default)s)")
    parser.add_argument("--chunk-lines", type=int, default=DEFAULT_CHUNK_LINES,
                        help="lines per unit of work, write and fsync (default %(default)s)")
    parser.add_argument("--restart", action="store_true",
                        help="discard any earlier progress for OUT and start over")
    parser.add_argument("--quiet", action="store_true", help="no progress bar and no summary")


# -- archives ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Archive:
    path: str  # absolute path, the records' "source"
    size: int  # bytes on disk (compressed size for a compressed archive)
    compression: str | None  # "gzip", "bzip2", "xz" or None


def expand_archives(patterns: list[str], exclude: set[str]) -> list[Archive]:
    """Files named, found under directories or matched by globs; in the order given, each once.

    Files in ``exclude`` (our own output files, as real paths) are left out so that a directory
    holding the output can be replayed without reading what we write.
    """
    seen: set[str] = set()
    archives = []
    for pattern in patterns:
        for path in _paths_of(pattern):
            real = os.path.realpath(path)
            if real in seen or real in exclude or _is_temporary_of(real, exclude):
                continue
            seen.add(real)
            archives.append(_describe_archive(os.path.abspath(path)))
    if not archives:
        raise DataError("no archive files to replay")
    return archives


def _is_temporary_of(path: str, files: set[str]) -> bool:
    """A temp file left by an atomic write of one of ``files`` (".NAME.xxxx.tmp" beside it)."""
    folder, name = os.path.split(path)
    return name.endswith(".tmp") and any(
        os.path.dirname(f) == folder and name.startswith(f".{os.path.basename(f)}.") for f in files)


def _paths_of(pattern: str) -> list[str]:
    if os.path.isdir(pattern):
        found = []
        for folder, subfolders, files in os.walk(pattern):
            subfolders.sort()
            found.extend(os.path.join(folder, name) for name in sorted(files))
        return [p for p in found if os.path.isfile(p)]
    if os.path.isfile(pattern):
        return [pattern]
    matches = sorted(glob.glob(pattern, recursive=True)) if glob.has_magic(pattern) else []
    files = [p for m in matches for p in (_paths_of(m) if os.path.isdir(m) else [m]) if os.path.isfile(p)]
    if not files:
        raise DataError(f"{pattern}: no such file, directory or matching file")
    return files


def _describe_archive(path: str) -> Archive:
    try:
        with open(path, "rb") as handle:
            head = handle.read(6)
        size = os.stat(path).st_size
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from None
    compression = next((name for magic, name in COMPRESSION_MAGIC if head.startswith(magic)), None)
    return Archive(path, size, compression)


# -- reading lines ------------------------------------------------------------------------------------


@dataclass
class Position:
    """Where reading stands: archive index, byte offset in its (decompressed) stream, next line number."""

    archive: int = 0
    offset: int = 0
    line: int = 1


@dataclass
class Chunk:
    """Lines for one unit of work; all lists are parallel, one item per line."""

    sources: list[str] = field(default_factory=list)
    offsets: list[int] = field(default_factory=list)
    line_numbers: list[int] = field(default_factory=list)
    raw: list[bytes] = field(default_factory=list)
    flags: list[tuple[str, ...]] = field(default_factory=list)  # from reading: truncated, no_newline
    end: Position = field(default_factory=Position)  # where reading resumes after this chunk
    input_bytes_done: int = 0  # archive bytes consumed up to the chunk's end, for the progress bar


class _OpenArchive:
    """A binary stream of one archive plus the count of archive bytes consumed (compressed for gzip)."""

    def __init__(self, archive: Archive) -> None:
        try:
            self.raw = open(archive.path, "rb")
        except OSError as exc:
            raise DataError(f"{archive.path}: cannot read ({exc.strerror})") from None
        compression = archive.compression
        self.stream = _DECOMPRESSORS[compression](self.raw) if compression else self.raw

    def consumed(self) -> int:
        return self.raw.tell()

    def close(self) -> None:
        self.stream.close()
        self.raw.close()


def read_lines(handle, offset: int, max_line_bytes: int) -> Iterator[tuple[int, bytes, tuple[str, ...], int]]:
    """(offset of the line, line bytes without line break, flags, offset after it) per line.

    Cut and flagged like the daemon's follower (``streamtag.follow``), so that replay and daemon give
    the same record for the same line: a trailing CR is dropped, a line longer than ``max_line_bytes``
    keeps its first bytes ("truncated"; the rest up to its newline is read and dropped in pieces, so
    memory stays bounded), and a last line without newline is a line ("no_newline").
    """
    while True:
        start = offset
        piece = handle.readline(max_line_bytes + 2)  # + newline + a CR that may precede it
        if not piece:
            return
        offset += len(piece)
        flags: tuple[str, ...] = ()
        if piece.endswith(b"\n"):
            body = piece[:-1]
        elif len(piece) < max_line_bytes + 2:
            body, flags = piece, (FLAG_NO_NEWLINE,)
        else:
            body, flags = piece, (FLAG_TRUNCATED,)
            while not piece.endswith(b"\n"):
                piece = handle.readline(1 << 20)
                if not piece:
                    flags = (FLAG_TRUNCATED, FLAG_NO_NEWLINE)
                    break
                offset += len(piece)
        if body.endswith(b"\r") and FLAG_TRUNCATED not in flags:
            body = body[:-1]
        if len(body) > max_line_bytes:
            body = body[:max_line_bytes]
            if FLAG_TRUNCATED not in flags:
                flags = (FLAG_TRUNCATED,) + flags
        yield start, body, flags, offset


class ArchiveReader:
    """Cuts the lines of all archives, from a position, into chunks of ``chunk_lines`` lines."""

    def __init__(self, archives: list[Archive], max_line_bytes: int, chunk_lines: int) -> None:
        self.archives = archives
        self.max_line_bytes = max_line_bytes
        self.chunk_lines = chunk_lines
        self.problems: list[str] = []  # damaged gzip archives, reported at the end

    def chunks(self, start: Position) -> Iterator[Chunk]:
        """Chunks from ``start`` on. Boundaries depend only on the start, so a resumed run cuts the
        same chunks as an uninterrupted one."""
        chunk = Chunk()
        bytes_before = sum(a.size for a in self.archives[: start.archive])
        for index in range(start.archive, len(self.archives)):
            archive = self.archives[index]
            first = start if index == start.archive else Position(index, 0, 1)
            line_number = first.line
            opened = _OpenArchive(archive)
            try:
                for line_start, body, flags, after in self._lines(opened, archive, first.offset):
                    chunk.sources.append(archive.path)
                    chunk.offsets.append(line_start)
                    chunk.line_numbers.append(line_number)
                    chunk.raw.append(body)
                    chunk.flags.append(flags)
                    line_number += 1
                    if len(chunk.raw) >= self.chunk_lines:
                        chunk.end = Position(index, after, line_number)
                        chunk.input_bytes_done = bytes_before + min(opened.consumed(), archive.size)
                        yield chunk
                        chunk = Chunk()
            finally:
                opened.close()
            bytes_before += archive.size
            chunk.end = Position(index + 1, 0, 1)
            chunk.input_bytes_done = bytes_before
        if chunk.raw:
            yield chunk

    def _lines(self, opened: _OpenArchive, archive: Archive, offset: int):
        """read_lines over one archive; a damaged gzip stream ends it early and is noted."""
        after = offset
        try:
            if offset:
                opened.stream.seek(offset)
            for item in read_lines(opened.stream, offset, self.max_line_bytes):
                after = item[3]
                yield item
        except (EOFError, OSError, zlib.error, lzma.LZMAError) as exc:
            if not archive.compression:
                raise DataError(f"{archive.path}: read error after byte {after} ({_one_line(exc)})") from None
            # The lines before the damage are kept; nothing after it can be read.
            self.problems.append(f"{archive.path}: compressed data damaged after byte {after} of the "
                                 f"decompressed stream ({_one_line(exc)}); the rest of it was skipped")


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return (text.splitlines()[0] if text else type(exc).__name__)[:200]


# -- tagging a chunk (in a worker process, or in the parent with one worker) ------------------------


@dataclass(frozen=True)
class TagSettings:
    """What a worker needs besides the lines: picklable, sent once to each worker."""

    model_path: str | None
    max_tokens: int
    window_overlap: int
    threshold: float
    want_review: bool
    input_format: str
    text_field: str


_worker: dict = {}  # per process: the Tagger and the settings, set by _init_worker


def _init_worker(settings: TagSettings, ignore_interrupt: bool) -> None:
    """Pool initializer: load the model once per worker process."""
    import gc

    from streamtag.batch import GC_YOUNG_THRESHOLD, keep_freed_memory
    from streamtag.model import load_model
    from streamtag.tagger import Tagger

    keep_freed_memory()
    if ignore_interrupt:
        # A pool worker: Ctrl-C goes to the whole process group; the parent alone decides how to
        # stop. The worker only tags, so it keeps the tagging loop's collector threshold for good.
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        gc.set_threshold(GC_YOUNG_THRESHOLD, *gc.get_threshold()[1:])
    _worker["tagger"] = Tagger(load_model(settings.model_path), max_tokens=settings.max_tokens,
                               window_overlap=settings.window_overlap)
    _worker["settings"] = settings


def _tag_chunk(chunk: Chunk) -> tuple[bytes, bytes, int]:
    """Chunk -> (output bytes, review bytes, lines sent to review), exactly as the daemon builds them."""
    # Imported here: the CLI imports this module to build its parser, and these pull in numpy/scipy.
    from streamtag.batch import tag_and_encode
    from streamtag.decode import decode_json, decode_lines

    tagger = _worker["tagger"]
    settings: TagSettings = _worker["settings"]
    if settings.input_format == "json":
        decoded = [decode_json(raw, settings.text_field) for raw in chunk.raw]
    else:
        decoded = decode_lines(chunk.raw)
    return tag_and_encode(tagger, decoded, settings.threshold, settings.threshold if settings.want_review else None,
                          sources=chunk.sources, offsets=chunk.offsets, line_numbers=chunk.line_numbers,
                          read_flags=chunk.flags, want_review=settings.want_review)


# -- the progress sidecar ----------------------------------------------------------------------------


def progress_path(output: str) -> str:
    return output + ".progress"


def arguments_digest(archives: list[Archive], model_id: str, args: argparse.Namespace, review: str | None) -> str:
    """Hash of everything that decides the output bytes (not --workers: it changes nothing)."""
    decisive = {
        "archives": [[a.path, a.size] for a in archives],
        "model": model_id,
        "threshold": args.threshold,
        "review": review,
        "format": args.format,
        "text_field": args.text_field,
        "max_line_bytes": args.max_line_bytes,
        "max_tokens": args.max_tokens,
        "chunk_lines": args.chunk_lines,
    }
    return hashlib.sha256(orjson.dumps(decisive, option=orjson.OPT_SORT_KEYS)).hexdigest()


@dataclass
class Progress:
    arguments: str
    model: str
    chunks_done: int = 0
    lines_done: int = 0
    review_lines: int = 0
    output_bytes: int = 0
    review_bytes: int = 0
    position: Position = field(default_factory=Position)
    complete: bool = False

    def to_json(self) -> bytes:
        document = {
            "format": PROGRESS_FORMAT,
            "version": PROGRESS_VERSION,
            "arguments": self.arguments,
            "model": self.model,
            "chunks_done": self.chunks_done,
            "lines_done": self.lines_done,
            "review_lines": self.review_lines,
            "output_bytes": self.output_bytes,
            "review_bytes": self.review_bytes,
            "position": {"archive": self.position.archive, "offset": self.position.offset,
                         "line": self.position.line},
            "complete": self.complete,
        }
        return orjson.dumps(document, option=orjson.OPT_INDENT_2 | orjson.OPT_APPEND_NEWLINE)


def load_progress(path: str) -> Progress | None:
    """The sidecar, or None if there is none. DataError if it is unreadable or not ours."""
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise DataError(f"{path}: cannot read replay progress ({exc.strerror})") from None
    try:
        document = orjson.loads(data)
        if document.get("format") != PROGRESS_FORMAT or document.get("version") != PROGRESS_VERSION:
            raise ValueError("not a replay progress file of this version")
        position = document["position"]
        progress = Progress(
            arguments=str(document["arguments"]), model=str(document["model"]),
            chunks_done=int(document["chunks_done"]), lines_done=int(document["lines_done"]),
            review_lines=int(document["review_lines"]), output_bytes=int(document["output_bytes"]),
            review_bytes=int(document["review_bytes"]),
            position=Position(int(position["archive"]), int(position["offset"]), int(position["line"])),
            complete=bool(document["complete"]),
        )
    except (orjson.JSONDecodeError, ValueError, KeyError, TypeError, AttributeError) as exc:
        raise DataError(f"{path}: replay progress file is damaged ({_one_line(exc)}); "
                        "use --restart to start over") from None
    return progress


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]


class _OutputFile:
    """An output file opened for appending from a known length (what the progress file recorded)."""

    def __init__(self, path: str, length: int) -> None:
        self.path = path
        try:
            self.fd = os.open(path, os.O_WRONLY | os.O_CREAT, FILE_MODE)
        except OSError as exc:
            raise DataError(f"{path}: cannot open for writing ({exc.strerror})") from None
        size = os.fstat(self.fd).st_size
        if size < length:
            os.close(self.fd)
            raise DataError(f"{path}: shorter ({size} bytes) than the replay progress records ({length}); "
                            "use --restart to start over")
        os.ftruncate(self.fd, length)  # drop a chunk written after the last recorded progress
        os.lseek(self.fd, length, os.SEEK_SET)
        self.length = length

    def append(self, data: bytes) -> None:
        if data:
            _write_all(self.fd, data)
            self.length += len(data)

    def sync(self) -> None:
        os.fsync(self.fd)

    def close(self) -> None:
        os.close(self.fd)


# -- progress bar -----------------------------------------------------------------------------------


class ProgressBar:
    """One line on a terminal: bar, share of archive bytes, lines, lines/s and ETA (at most 5 updates/s)."""

    WIDTH = 24

    def __init__(self, stream, total_bytes: int, start_bytes: int) -> None:
        self.stream = stream
        self.total = max(total_bytes, 1)
        self.start_bytes = start_bytes
        self.began = time.monotonic()
        self.last_draw = 0.0

    def update(self, done_bytes: int, lines: int, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self.last_draw < 0.2:
            return
        self.last_draw = now
        elapsed = max(now - self.began, 1e-9)
        share = min(done_bytes / self.total, 1.0)
        filled = int(share * self.WIDTH)
        byte_rate = (done_bytes - self.start_bytes) / elapsed
        eta = (self.total - done_bytes) / byte_rate if byte_rate > 0 else None
        self.stream.write(f"\r\x1b[2K[{'#' * filled}{'.' * (self.WIDTH - filled)}] {share * 100:5.1f}%  "
                          f"{lines:,} lines  {lines / elapsed:,.0f} lines/s  ETA {_clock(eta)}")
        self.stream.flush()

    def finish(self) -> None:
        self.stream.write("\n")
        self.stream.flush()


def _clock(seconds: float | None) -> str:
    if seconds is None:
        return "--:--"
    seconds = int(seconds + 0.5)
    hours, rest = divmod(seconds, 3600)
    return f"{hours}:{rest // 60:02d}:{rest % 60:02d}" if hours else f"{rest // 60:02d}:{rest % 60:02d}"


# -- the command -------------------------------------------------------------------------------------


def _check_options(args: argparse.Namespace) -> None:
    if not 0.0 <= args.threshold <= 1.0:
        raise ConfigError("--threshold must be between 0 and 1")
    for name, low in (("workers", 1), ("chunk_lines", 1), ("max_line_bytes", 64), ("max_tokens", 2)):
        if getattr(args, name) < low:
            raise ConfigError(f"--{name.replace('_', '-')} must be at least {low}")


def run(args: argparse.Namespace) -> int:
    from streamtag.model import load_model

    _check_options(args)
    output = os.path.abspath(args.output)
    review = os.path.abspath(args.review) if args.review else None
    sidecar = progress_path(output)
    if review == output:
        raise ConfigError("--review must name another file than --output")
    own_files = {os.path.realpath(p) for p in (output, sidecar, review) if p}
    archives = expand_archives(args.archives, own_files)
    model = load_model(args.model)
    digest = arguments_digest(archives, model.model_id, args, review)
    progress = _starting_progress(args, output, review, sidecar, digest, model.model_id)
    if progress is None:
        return 0
    settings = TagSettings(args.model, args.max_tokens, _DEFAULTS.window_overlap, args.threshold, review is not None, args.format,
                           args.text_field)
    reader = ArchiveReader(archives, args.max_line_bytes, args.chunk_lines)
    stderr_bar = None
    if not args.quiet and sys.stderr.isatty():
        done = sum(a.size for a in archives[: progress.position.archive])
        stderr_bar = ProgressBar(sys.stderr, sum(a.size for a in archives), done)
    began, lines_before = time.monotonic(), progress.lines_done
    _replay(reader, settings, args.workers, output, review, sidecar, progress, stderr_bar)
    if not args.quiet:
        _summary(progress, archives, output, args.workers, time.monotonic() - began, lines_before)
    for problem in reader.problems:
        print(f"streamtag: warning: {problem}", file=sys.stderr)
    if reader.problems:
        raise DataError(f"{len(reader.problems)} damaged archive(s); the lines before the damage were replayed")
    return 0


def _starting_progress(args, output: str, review: str | None, sidecar: str, digest: str,
                       model_id: str) -> Progress | None:
    """The progress to continue from (fresh or resumed), or None when there is nothing to do."""
    existing = None if args.restart else load_progress(sidecar)
    if existing is None:
        if not args.restart:
            for path in (output, review):
                if path and os.path.exists(path) and os.path.getsize(path) > 0:
                    raise ConfigError(f"{path} already exists and is not from an interrupted replay; "
                                      "choose another file or pass --restart to overwrite it")
        return Progress(arguments=digest, model=model_id)
    if existing.arguments != digest:
        raise ConfigError(f"{sidecar}: the unfinished replay into {output} had other archives, model or "
                          "options; run it again as it was, or pass --restart to start over")
    if existing.complete:
        if not args.quiet:
            print(f"replay into {output} is already complete ({existing.lines_done:,} lines); "
                  "pass --restart to run it again", file=sys.stderr)
        return None
    if not args.quiet:
        print(f"resuming replay into {output} after {existing.lines_done:,} lines", file=sys.stderr)
    return existing


def _replay(reader: ArchiveReader, settings: TagSettings, workers: int, output: str, review: str | None,
            sidecar: str, progress: Progress, bar: ProgressBar | None) -> None:
    out = _OutputFile(output, progress.output_bytes)
    queue = _OutputFile(review, progress.review_bytes) if review else None
    try:
        write_file_atomically(sidecar, progress.to_json(), FILE_MODE)
        results = _tagged_chunks(reader.chunks(progress.position), settings, workers)
        try:
            for chunk, (out_bytes, review_bytes, n_review) in results:
                out.append(out_bytes)
                out.sync()
                if queue is not None:
                    queue.append(review_bytes)
                    queue.sync()
                # Outputs are durable before the progress that names their length.
                progress.chunks_done += 1
                progress.lines_done += len(chunk.raw)
                progress.review_lines += n_review
                progress.output_bytes = out.length
                progress.review_bytes = queue.length if queue else 0
                progress.position = chunk.end
                write_file_atomically(sidecar, progress.to_json(), FILE_MODE)
                if bar is not None:
                    bar.update(chunk.input_bytes_done, progress.lines_done)
        except KeyboardInterrupt:
            if bar is not None:
                bar.finish()
            print(f"streamtag: replay stopped after {progress.lines_done:,} lines; "
                  "run the same command again to resume", file=sys.stderr)
            raise
        finally:
            results.close()
        progress.complete = True
        write_file_atomically(sidecar, progress.to_json(), FILE_MODE)
        if bar is not None:
            bar.update(bar.total, progress.lines_done, force=True)
            bar.finish()
    finally:
        out.close()
        if queue is not None:
            queue.close()


def _tagged_chunks(chunks: Iterator[Chunk], settings: TagSettings, workers: int):
    """(chunk, tagging result) in input order; in this process for one worker, else in a pool."""
    if workers == 1:
        from streamtag.batch import fewer_collections

        _init_worker(settings, ignore_interrupt=False)
        with fewer_collections():
            for chunk in chunks:
                yield chunk, _tag_chunk(chunk)
        return
    context = multiprocessing.get_context("fork" if "fork" in multiprocessing.get_all_start_methods() else None)
    pool = futures.ProcessPoolExecutor(workers, mp_context=context, initializer=_init_worker,
                                       initargs=(settings, True))
    in_flight: deque = deque()
    window = 2 * workers  # enough to keep every worker busy while the parent writes; bounds memory
    try:
        for chunk in chunks:
            in_flight.append((chunk, pool.submit(_tag_chunk, chunk)))
            if len(in_flight) >= window:
                done_chunk, future = in_flight.popleft()
                yield done_chunk, future.result()
        while in_flight:
            done_chunk, future = in_flight.popleft()
            yield done_chunk, future.result()
    finally:
        pool.shutdown(wait=not in_flight, cancel_futures=True)


def _summary(progress: Progress, archives: list[Archive], output: str, workers: int, seconds: float,
             lines_before: int) -> None:
    lines = progress.lines_done - lines_before
    rate = lines / seconds if seconds > 0 else 0.0
    print(f"replayed {lines:,} lines from {len(archives)} archive(s) in {seconds:.1f}s ({rate:,.0f} lines/s, "
          f"{workers} worker(s)); {progress.review_lines:,} of {progress.lines_done:,} marked for review "
          f"-> {output}", file=sys.stderr)
