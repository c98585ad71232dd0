"""Find input files, know them by identity, and hand out their new complete lines.

A followed file is known by its identity, not its name: the device and inode numbers of the open file
plus its *head*: the first bytes of it that have been read so far, at most ``HEAD_BYTES``, grown as
reading goes on and compared with the file on every poll and before every chunk read. The state keeps
only a hash of the head and its length (the bytes may hold personal data). The file stays open
while it is followed, so a file renamed away by log rotation keeps being read through the same
descriptor; lines appended to it after the rename are not lost.

Each identity lives through *generations*: when a file is truncated (copy-truncate) or rewritten in
place, a new generation starts at offset 0 under a new ``file_key``. The key has the form
``"DEV:INO:GEN"`` where GEN is a random token made when the generation starts. A random token (rather
than a hash of the first bytes) keeps two generations apart even when both started empty, which is
exactly what happens when a file is deleted, its inode reused, and a new empty file created.

Rules (see ``Follower`` for details):

- New files are read from the beginning; ``start_at="end"`` applies only to the files found by the very
  first poll of a follower started without saved state.
- ``size < offset``: the file was truncated; read again from 0 (warning).
- The head bytes differ from the ones remembered: the file was rewritten in place (for example
  truncated and at once written past the old offset); read again from 0 (warning).
  Blind spot: a file truncated and rewritten with the very same first bytes (up to ``HEAD_BYTES``,
  or up to what had been read if less), and at least as long as before, cannot be told from the old
  one; its new lines past the old offset are read, the ones before it are not.
- A file no longer reachable by any input (renamed away) is read to its end; it is dropped once it has
  not grown for ``ROTATED_GRACE_POLLS`` polls and ``rotated_grace_seconds`` seconds. A deleted file
  (no links left) is dropped as soon as it has been read to its end.
- A last line without a newline is held until the newline comes; after ``idle_flush_seconds`` without
  growth it is handed out with the flag ``"no_newline"`` (and a later continuation becomes a line of
  its own). A line longer than ``max_line_bytes`` is cut to that length and flagged ``"truncated"``;
  the rest is skipped by scanning for the newline in chunks, never holding more of the line.

Only ``poll()`` looks for files; ``read()`` only reads from open descriptors, re-checking size and head
before it joins newly read bytes to a held partial line (a truncation between poll and read must not
glue two generations together). Neither raises for a problem with one file: the problem is reported
through ``on_warning`` (once per path until it is fixed) and retried on later polls.
"""

from __future__ import annotations

import glob
import hashlib
import logging
import os
import queue
import secrets
import stat
import time
from itertools import accumulate, repeat
from typing import Callable, Iterable, NamedTuple

HEAD_BYTES = 1024  # how much of a file's start identifies it (and reveals a rewrite)
CHUNK_BYTES = 1 << 20  # one pread; large reads keep the per-line cost low
ROTATED_GRACE_POLLS = 2  # a renamed-away file must stay unchanged this many polls...
ROTATED_GRACE_SECONDS = 5.0  # ...and this many seconds before it is dropped
# Compressed rotations are not text; a directory or glob input skips them (a plain path does not).
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".xz", ".zst", ".lz4", ".zip", ".z")

FLAG_TRUNCATED = "truncated"
FLAG_NO_NEWLINE = "no_newline"

_log = logging.getLogger("streamtag.follow")


class RawLine(NamedTuple):
    """One input line as found in a file (bytes, not yet decoded). Immutable.

    A named tuple rather than a frozen dataclass: a batch of them is built in one C loop
    (``_make_lines``), about twice as fast as filling a frozen dataclass's slots.
    """

    file_key: str  # "DEV:INO:GEN": identity of the file and of its current generation
    path: str  # the file's path as last seen
    start: int  # byte offset of the line's first byte
    end: int  # byte offset after the line's newline (the next line starts here)
    data: bytes  # the line without newline and trailing "\r", cut to max_line_bytes
    line_no: int  # 1-based line number within the generation
    flags: tuple[str, ...]  # FLAG_TRUNCATED, FLAG_NO_NEWLINE


def head_digest(head: bytes) -> str:
    """Digest stored in the state instead of the head bytes themselves (they may hold personal data)."""
    return hashlib.blake2b(head, digest_size=16).hexdigest()


def _new_key(dev: int, ino: int) -> str:
    return f"{dev}:{ino}:{secrets.token_hex(6)}"


class _Followed:
    """Everything known about one open file. Invariant: ``offset`` is the start of a line."""

    __slots__ = (
        "key", "dev", "ino", "fd", "path", "offset", "line_no", "head",
        "lines", "line_index", "tail", "data_end", "has_cr", "longest",
        "long_head", "long_scan", "tail_mark", "tail_since",
        "size", "reachable", "deleted", "quiet_polls", "quiet_since", "finishing",
    )

    def __init__(self, key: str, dev: int, ino: int, fd: int, path: str, now: float) -> None:
        self.key, self.dev, self.ino, self.fd, self.path = key, dev, ino, fd, path
        self.size = 0
        self.reachable = True
        self.deleted = False
        self.quiet_polls = 0
        self.quiet_since = now
        self.finishing = False  # read the rest, partial last line included, then drop
        self.restart(key, offset=0, line_no=0, head=b"")

    def restart(self, key: str, offset: int, line_no: int, head: bytes) -> None:
        """Start reading at ``offset`` (a line start) with nothing buffered."""
        self.key = key
        self.offset = offset
        self.line_no = line_no
        self.head = head
        self.forget_buffer()

    def forget_buffer(self) -> None:
        self.lines: list[bytes] = []  # complete lines read ahead, without their newline
        self.line_index = 0  # next line of ``lines`` to hand out; it starts at ``offset``
        self.tail = b""  # bytes after the last newline read so far
        self.data_end = self.offset  # file position up to which data has been read
        self.has_cr = False
        self.longest = 0
        self.long_head: bytes | None = None  # first max_line_bytes of an over-long line at offset
        self.long_scan = 0  # no newline in [offset, long_scan) while long_head is set
        self.tail_mark = -1  # data end when the current partial tail was first seen
        self.tail_since = 0.0

    def held_bytes(self) -> bool:
        return bool(self.tail) or self.long_head is not None or self.line_index < len(self.lines)


class Follower:
    """Follow files named by ``inputs`` (paths, globs, directories) and read their new lines.

    ``saved`` is a ``snapshot()`` from an earlier run: each file in it is found again by identity (at
    its saved path, else among the files in the same directory, e.g. ``app.log.1``, else among the
    inputs) and resumed at its offset.
    """

    def __init__(
        self,
        inputs: Iterable[str],
        start_at: str = "beginning",
        max_line_bytes: int = 65536,
        idle_flush_seconds: float | None = 5.0,
        saved: dict | None = None,
        clock: Callable[[], float] = time.monotonic,
        on_warning: Callable[[str], None] | None = None,
        recursive: bool = False,
        exclude: Iterable[str] = (),
        rotated_grace_seconds: float = ROTATED_GRACE_SECONDS,
    ) -> None:
        if start_at not in ("beginning", "end"):
            raise ValueError(f"start_at must be 'beginning' or 'end', not {start_at!r}")
        if max_line_bytes < 1:
            raise ValueError("max_line_bytes must be at least 1")
        self._inputs = [os.fspath(p) for p in inputs]
        self._max_line = max_line_bytes
        self._idle = idle_flush_seconds if idle_flush_seconds else None
        self._clock = clock
        self._warn_sink = on_warning or _log.warning
        self._recursive = recursive
        self._exclude = {os.path.realpath(p) for p in exclude}
        self._grace_seconds = rotated_grace_seconds
        self._files: dict[tuple[int, int], _Followed] = {}
        self._warned: set[str] = set()  # per-path problems already reported (reported again once fixed)
        self._rr = 0  # round-robin start, so no file is always served first
        self._start_at_end_once = start_at == "end" and saved is None
        if saved:
            self._restore(saved)

    # ------------------------------------------------------------------ discovery

    def poll(self) -> None:
        """Find new files, check every followed one (rotation, truncation, rewrite, deletion)."""
        now = self._clock()
        reachable: set[tuple[int, int]] = set()
        for path in self._candidate_paths():
            ident = self._discover(path, now)
            if ident is not None:
                reachable.add(ident)
        self._start_at_end_once = False
        for ident, followed in self._files.items():
            followed.reachable = ident in reachable
        self._find_renamed([f for f in self._files.values() if not f.reachable])
        for followed in list(self._files.values()):
            self._check(followed, now)

    def _find_renamed(self, unreachable: list[_Followed]) -> None:
        """Learn the new names of renamed-away files (rotation keeps them in their directory)."""
        by_directory: dict[str, list[_Followed]] = {}
        for followed in unreachable:
            by_directory.setdefault(os.path.dirname(followed.path) or ".", []).append(followed)
        for directory, files in by_directory.items():
            wanted = {(f.dev, f.ino): f for f in files}
            inodes = {ino for _dev, ino in wanted}
            try:
                with os.scandir(directory) as entries:
                    for entry in entries:
                        if entry.inode() not in inodes:  # no stat call for the other entries
                            continue
                        st = entry.stat(follow_symlinks=False)
                        followed = wanted.get((st.st_dev, st.st_ino))
                        if followed is not None:
                            followed.path = entry.path
            except OSError:
                continue

    def _candidate_paths(self) -> list[str]:
        """Paths named by the inputs right now (dict keeps order and drops repeats)."""
        found: dict[str, None] = {}
        for pattern in self._inputs:
            if glob.has_magic(pattern):
                # "**" in a pattern asks for recursion by itself.
                for path in sorted(glob.glob(pattern, recursive=True)):
                    if not path.endswith(COMPRESSED_SUFFIXES) and not os.path.isdir(path):
                        found[path] = None
            elif os.path.isdir(pattern):
                for path in self._directory_files(pattern):
                    found[path] = None
            else:
                found[pattern] = None
        if self._exclude:
            return [p for p in found if os.path.realpath(p) not in self._exclude]
        return list(found)

    def _directory_files(self, directory: str) -> list[str]:
        paths = []
        try:
            walker = os.walk(directory) if self._recursive else [(directory, [], os.listdir(directory))]
            for folder, _dirs, names in walker:
                for name in sorted(names):
                    if not name.endswith(COMPRESSED_SUFFIXES):
                        paths.append(os.path.join(folder, name))
        except OSError as error:
            self._warn_once(directory, f"cannot list directory {directory}: {error.strerror}")
        return paths

    def _discover(self, path: str, now: float) -> tuple[int, int] | None:
        """Identity of the regular file at ``path`` (opening it if new); None if there is none."""
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return None
        except OSError as error:
            self._warn_once(path, f"cannot look at {path}: {error.strerror}; will retry")
            return None
        if not stat.S_ISREG(st.st_mode):
            return None
        ident = (st.st_dev, st.st_ino)
        followed = self._files.get(ident)
        if followed is not None:
            followed.path = path
            return ident
        followed = self._open_new(path, now)
        return None if followed is None else (followed.dev, followed.ino)

    def _open_fd(self, path: str) -> int | None:
        try:
            # O_NONBLOCK: a FIFO slipping in between stat and open must not hang the loop.
            fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC | os.O_NONBLOCK)
        except FileNotFoundError:
            return None
        except PermissionError:
            self._warn_once(path, f"permission denied reading {path}; will retry")
            return None
        except OSError as error:
            self._warn_once(path, f"cannot open {path}: {error.strerror}; will retry")
            return None
        if path in self._warned:
            self._warned.discard(path)
            self._warn(f"{path} is readable now")
        return fd

    def _open_new(self, path: str, now: float) -> _Followed | None:
        fd = self._open_fd(path)
        if fd is None:
            return None
        try:
            st = os.fstat(fd)  # the identity of what was opened, not of what stat saw a moment before
        except OSError:
            os.close(fd)
            return None
        ident = (st.st_dev, st.st_ino)
        if not stat.S_ISREG(st.st_mode) or ident in self._files:
            os.close(fd)
            return self._files.get(ident)
        followed = _Followed(_new_key(*ident), st.st_dev, st.st_ino, fd, path, now)
        followed.size = st.st_size
        if self._start_at_end_once and st.st_size:
            self._skip_to_end(followed, st.st_size)
        self._files[ident] = followed
        return followed

    def _skip_to_end(self, followed: _Followed, size: int) -> None:
        """Start after the last complete line; count the lines skipped so line numbers stay true."""
        try:
            offset = _after_last_newline(followed.fd, size)
            lines = _count_newlines(followed.fd, offset)
            head = os.pread(followed.fd, min(HEAD_BYTES, offset), 0)
        except OSError as error:
            self._warn(f"cannot read {followed.path}: {error.strerror}; reading it from the start")
            return
        followed.restart(followed.key, offset=offset, line_no=lines, head=head)

    # ------------------------------------------------------------------ checks

    def _check(self, followed: _Followed, now: float) -> None:
        try:
            st = os.fstat(followed.fd)
        except OSError as error:
            self._warn(f"cannot look at {followed.path} any more ({error.strerror}); no longer following it")
            self._drop(followed)
            return
        size = st.st_size
        if self._same_content(followed, size) and size < followed.data_end:
            followed.forget_buffer()  # read-ahead beyond the offset is gone; read it again
        followed.deleted = st.st_nlink == 0
        if size != followed.size:
            followed.size = size
            followed.quiet_polls = 0
            followed.quiet_since = now
        else:
            followed.quiet_polls += 1
        if followed.reachable and not followed.deleted:
            followed.finishing = False
            return
        grace_over = (
            followed.quiet_polls >= ROTATED_GRACE_POLLS and now - followed.quiet_since >= self._grace_seconds
        )
        if not (followed.deleted or grace_over):
            followed.finishing = False  # still being written to after the rename: wait
        elif followed.offset >= size and not followed.held_bytes():
            self._drop(followed)  # everything in it has been handed out
        else:
            followed.finishing = True  # read() hands out the rest, a partial last line too

    def _same_content(self, followed: _Followed, size: int) -> bool:
        """False (and a new generation from offset 0) if the file was truncated or rewritten."""
        if size < followed.offset:
            self._warn(
                f"{followed.path} was truncated (size {size} < offset {followed.offset}); "
                "reading it again from the start"
            )
        elif not self._head_intact(followed, size):
            self._warn(f"{followed.path} was rewritten (its first bytes changed); reading it again from the start")
        else:
            return True
        self._new_generation(followed)
        return False

    def _changed_under_us(self, followed: _Followed) -> bool:
        """Check made by read() before joining new bytes to bytes read earlier.

        A truncation between poll() and read() would otherwise glue the old generation's partial
        line to the new generation's bytes. Costs an fstat and a small pread per chunk read.
        """
        return not self._same_content(followed, os.fstat(followed.fd).st_size)

    def _head_intact(self, followed: _Followed, size: int) -> bool:
        """True if the file still starts with the remembered head; extends the head when possible."""
        known = len(followed.head)
        wanted = min(HEAD_BYTES, followed.data_end, size)
        if known == 0 and wanted == 0:
            return True
        try:
            current = os.pread(followed.fd, max(known, wanted), 0)
        except OSError:
            return True  # unreadable now: keep going, read() will report
        if current[:known] != followed.head:
            return False
        if wanted > known:
            followed.head = current[:wanted]
        return True

    def _new_generation(self, followed: _Followed) -> None:
        followed.restart(_new_key(followed.dev, followed.ino), offset=0, line_no=0, head=b"")

    def _drop(self, followed: _Followed) -> None:
        self._files.pop((followed.dev, followed.ino), None)
        try:
            os.close(followed.fd)
        except OSError:
            pass

    # ------------------------------------------------------------------ reading

    def read(self, max_lines: int) -> list[RawLine]:
        """Up to ``max_lines`` new complete lines, shared fairly between files, in order within each."""
        return self.read_batch(max_lines).raw_lines()

    def read_batch(self, max_lines: int) -> "LineBatch":
        """What ``read`` returns, by column: no object per line (the daemon's way to read)."""
        out = LineBatch()
        files = list(self._files.values())
        if not files or max_lines <= 0:
            return out
        self._rr = (self._rr + 1) % len(files)
        active = files[self._rr:] + files[: self._rr]
        now = self._clock()
        while active and len(out) < max_lines:
            share = max(1, (max_lines - len(out)) // len(active))
            still_active = []
            for followed in active:
                wanted = min(share, max_lines - len(out))
                if wanted <= 0:
                    break
                got = self._read_file(followed, wanted, now, out)
                if got == wanted:
                    still_active.append(followed)
            active = still_active
        return out

    def _read_file(self, followed: _Followed, limit: int, now: float, out: "LineBatch") -> int:
        """Add up to ``limit`` lines of one file to ``out``; how many were added."""
        before = len(out)
        try:
            self._read_lines(followed, before + limit, now, out)
        except OSError as error:
            # The descriptor stays valid even if the file was deleted; this is an I/O error proper.
            self._warn(f"cannot read {followed.path}: {error.strerror}; will retry")
            followed.forget_buffer()  # lines already added stay: the offset is past them
        return len(out) - before

    def _read_lines(self, followed: _Followed, until: int, now: float, out: "LineBatch") -> None:
        while len(out) < until:
            if followed.line_index < len(followed.lines):
                self._take_buffered(followed, until - len(out), out)
            elif followed.long_head is not None:
                if not self._scan_long_line(followed, now, out):
                    break
            elif len(followed.tail) > self._max_line:
                followed.long_head = followed.tail[: self._max_line]
                followed.long_scan = followed.data_end
                followed.tail = b""
            elif not self._fill(followed):
                self._maybe_flush_tail(followed, now, out)
                break

    def _fill(self, followed: _Followed) -> bool:
        """Read the next chunk after what is buffered; False at end of file."""
        position = followed.data_end
        data = os.pread(followed.fd, CHUNK_BYTES, position)
        if not data:
            return False
        if self._changed_under_us(followed):
            return True  # new generation: the caller reads again from offset 0
        if len(followed.head) < HEAD_BYTES and position == len(followed.head):
            followed.head += data[: HEAD_BYTES - position]
        followed.data_end = position + len(data)
        block = followed.tail + data if followed.tail else data
        lines = block.split(b"\n")
        followed.tail = lines.pop()
        followed.lines = lines
        followed.line_index = 0
        # Per-chunk checks keep the per-line loop free of work that is rarely needed.
        followed.has_cr = b"\r\n" in block
        followed.longest = max(map(len, lines)) if lines else 0
        return True

    def _take_buffered(self, followed: _Followed, limit: int, out: "LineBatch") -> None:
        first = followed.line_index
        batch = followed.lines[first: first + limit]
        followed.line_index = first + len(batch)
        bounds = list(accumulate(map(_PLUS_NEWLINE, map(len, batch)), initial=followed.offset))
        flags: list[tuple[str, ...]] | None = None  # None: no line flagged
        if followed.has_cr:
            batch = [line[:-1] if line.endswith(b"\r") else line for line in batch]
        if followed.longest > self._max_line:
            cap = self._max_line
            flags = [(FLAG_TRUNCATED,) if len(line) > cap else () for line in batch]
            batch = [line[:cap] for line in batch]
        out.add_run(followed.key, followed.path, bounds, batch, followed.line_no + 1, flags)
        followed.offset = bounds[-1]
        followed.line_no += len(batch)

    def _scan_long_line(self, followed: _Followed, now: float, out: "LineBatch") -> bool:
        """Skip the rest of an over-long line; True once its newline was found and the line emitted."""
        data = os.pread(followed.fd, CHUNK_BYTES, followed.long_scan)
        if not data:
            self._maybe_flush_tail(followed, now, out)
            return False
        if self._changed_under_us(followed):
            return True
        newline = data.find(b"\n")
        if newline < 0:
            followed.long_scan += len(data)
            followed.data_end = followed.long_scan
            return True
        end = followed.long_scan + newline + 1
        self._emit(followed, followed.long_head or b"", end, (FLAG_TRUNCATED,), out)
        # Keep the rest of the chunk: it starts at the new offset.
        followed.long_head = None
        rest = data[newline + 1:]
        followed.data_end = end
        followed.tail = b""
        followed.lines, followed.line_index = [], 0
        if rest:
            followed.data_end = end + len(rest)
            lines = rest.split(b"\n")
            followed.tail = lines.pop()
            followed.lines = lines
            followed.has_cr = b"\r\n" in rest
            followed.longest = max(map(len, lines)) if lines else 0
        return True

    def _maybe_flush_tail(self, followed: _Followed, now: float, out: "LineBatch") -> None:
        """At end of file: hand out a partial last line once it has been idle long enough."""
        pending = followed.long_head if followed.long_head is not None else followed.tail
        if not pending and followed.long_head is None:
            return
        mark = followed.long_scan if followed.long_head is not None else followed.data_end
        if not followed.finishing:
            if followed.tail_mark != mark:
                followed.tail_mark, followed.tail_since = mark, now
                return
            if self._idle is None or now - followed.tail_since < self._idle:
                return
        if followed.long_head is not None:
            flags: tuple[str, ...] = (FLAG_TRUNCATED, FLAG_NO_NEWLINE)
            data = followed.long_head
        else:
            flags = (FLAG_NO_NEWLINE,)
            data = pending[:-1] if pending.endswith(b"\r") else pending
        self._emit(followed, data, mark, flags, out)
        followed.long_head = None
        followed.tail = b""
        followed.data_end = mark
        followed.tail_mark = -1

    def _emit(self, followed: _Followed, data: bytes, end: int, flags: tuple[str, ...], out: "LineBatch") -> None:
        followed.line_no += 1
        out.add(followed.key, followed.path, followed.offset, end, data, followed.line_no, flags)
        followed.offset = end

    # ------------------------------------------------------------------ state

    def snapshot(self) -> dict:
        """JSON-ready state of every followed file, keyed by file_key; offsets are after the last line read."""
        return {
            followed.key: {
                "path": followed.path,
                "dev": followed.dev,
                "ino": followed.ino,
                "offset": followed.offset,
                "line_no": followed.line_no,
                "head_len": len(followed.head),
                "head_hash": head_digest(followed.head),
            }
            for followed in self._files.values()
        }

    def _restore(self, saved: dict) -> None:
        now = self._clock()
        reachable = set(self._candidate_paths())
        for key, entry in saved.items():
            try:
                dev, ino = int(entry["dev"]), int(entry["ino"])
                path, offset, line_no = str(entry["path"]), int(entry["offset"]), int(entry["line_no"])
                head_len, head_hash = int(entry["head_len"]), str(entry["head_hash"])
            except (KeyError, TypeError, ValueError):
                self._warn(f"saved state for {key!r} is malformed; ignoring it")
                continue
            if (dev, ino) in self._files:
                continue
            found = self._find_saved(path, dev, ino, head_len, head_hash, reachable)
            if found is None:
                self._warn(f"{path} (followed before) is gone; its unread lines, if any, cannot be read")
                continue
            fd, found_path, size, head = found
            followed = _Followed(str(key), dev, ino, fd, found_path, now)
            followed.size = size
            if head is None or size < offset:
                self._warn(f"{found_path} changed while streamtag was stopped; reading it again from the start")
                followed.restart(_new_key(dev, ino), offset=0, line_no=0, head=b"")
            else:
                followed.restart(str(key), offset=offset, line_no=line_no, head=head)
            self._files[(dev, ino)] = followed

    def _find_saved(
        self, path: str, dev: int, ino: int, head_len: int, head_hash: str, reachable: set[str]
    ) -> tuple[int, str, int, bytes | None] | None:
        """Open the saved file: (fd, path, size, head or None if it changed) or None if not found.

        At its saved path or among the inputs, the same dev+ino with a different head is the same
        path's file rewritten (or a new file on a reused inode): read from 0. Under any other name in
        the directory, it counts only if the head matches (an unrelated file may reuse the inode).
        """
        places = [path] + [p for p in reachable if p != path] + _same_directory_files(path)
        for candidate in dict.fromkeys(places):
            try:
                st = os.stat(candidate)
            except OSError:
                continue
            if (st.st_dev, st.st_ino) != (dev, ino) or not stat.S_ISREG(st.st_mode):
                continue
            fd = self._open_fd(candidate)
            if fd is None:
                continue
            try:
                st = os.fstat(fd)
                head = os.pread(fd, head_len, 0)
            except OSError:
                os.close(fd)
                continue
            same_head = len(head) == head_len and head_digest(head) == head_hash
            if (st.st_dev, st.st_ino) == (dev, ino) and (same_head or candidate == path or candidate in reachable):
                return fd, candidate, st.st_size, head if same_head else None
            os.close(fd)
        return None

    def pending_bytes(self) -> int:
        """Bytes not yet handed out (file size at the last poll minus offset, summed), for statistics."""
        return sum(max(0, f.size - f.offset) for f in self._files.values())

    def followed_paths(self) -> list[str]:
        """Paths of the files followed now (for statistics and messages)."""
        return [f.path for f in self._files.values()]

    def close(self) -> None:
        for followed in list(self._files.values()):
            self._drop(followed)

    def __enter__(self) -> "Follower":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __del__(self) -> None:
        # A follower dropped without close() (as after a crash) must not leak descriptors.
        for followed in getattr(self, "_files", {}).values():
            try:
                os.close(followed.fd)
            except OSError:
                pass

    # ------------------------------------------------------------------ warnings

    def _warn(self, message: str) -> None:
        try:
            self._warn_sink(message)
        except Exception:  # a broken sink must not stop the reading
            _log.warning(message)

    def _warn_once(self, path: str, message: str) -> None:
        if path not in self._warned:
            self._warned.add(path)
            self._warn(message)


_PLUS_NEWLINE = (1).__add__  # a C-level callable: no Python frame per line
_NO_FLAGS: tuple[str, ...] = ()


class LineBatch:
    """Lines by column: line i is (keys[i], paths[i], starts[i], ends[i], datas[i], line_nos[i],
    flags[i]), the fields of ``RawLine`` in its order.

    The follower fills columns (list.extend, C loops) instead of making an object per line: making
    the RawLines and taking their columns apart again cost the daemon about 0.4 us per line, ten
    times what the columns cost (measured over 512 demo lines). ``raw_lines()`` makes them when wanted.
    """

    __slots__ = ("keys", "paths", "starts", "ends", "datas", "line_nos", "flags")

    def __init__(self) -> None:
        self.keys: list[str] = []
        self.paths: list[str] = []
        self.starts: list[int] = []
        self.ends: list[int] = []
        self.datas: list[bytes] = []
        self.line_nos: list[int] = []
        self.flags: list[tuple[str, ...]] = []

    def __len__(self) -> int:
        return len(self.datas)

    def _columns(self) -> tuple[list, ...]:
        return self.keys, self.paths, self.starts, self.ends, self.datas, self.line_nos, self.flags

    def add(self, key: str, path: str, start: int, end: int, data: bytes, line_no: int,
            flags: tuple[str, ...]) -> None:
        for column, value in zip(self._columns(), (key, path, start, end, data, line_no, flags)):
            column.append(value)

    def add_run(self, key: str, path: str, bounds: list[int], datas: list[bytes], first_line_no: int,
                flags: Iterable[tuple[str, ...]] | None) -> None:
        """Consecutive lines of one file: line i spans [bounds[i], bounds[i + 1])."""
        n = len(datas)
        self.keys.extend(repeat(key, n))
        self.paths.extend(repeat(path, n))
        self.starts.extend(bounds[:-1])
        self.ends.extend(bounds[1:])
        self.datas.extend(datas)
        self.line_nos.extend(range(first_line_no, first_line_no + n))
        self.flags.extend(repeat(_NO_FLAGS, n) if flags is None else flags)

    def extend(self, other: "LineBatch") -> None:
        for column, more in zip(self._columns(), other._columns()):
            column.extend(more)

    def raw_lines(self) -> list[RawLine]:
        # tuple.__new__ over the zipped columns runs in C loops: no Python frame per line.
        return list(map(tuple.__new__, repeat(RawLine, len(self)), zip(*self._columns())))


assert RawLine._fields == ("file_key", "path", "start", "end", "data", "line_no", "flags")


def _same_directory_files(path: str) -> list[str]:
    """Every entry in ``path``'s directory (where rotation renames files to)."""
    directory = os.path.dirname(path) or "."
    try:
        return [os.path.join(directory, name) for name in sorted(os.listdir(directory))]
    except OSError:
        return []


def _after_last_newline(fd: int, size: int) -> int:
    """Offset just after the last newline before ``size`` (0 if none)."""
    position = size
    while position > 0:
        start = max(0, position - CHUNK_BYTES)
        data = os.pread(fd, position - start, start)
        newline = data.rfind(b"\n")
        if newline >= 0:
            return start + newline + 1
        position = start
    return 0


def _count_newlines(fd: int, end: int) -> int:
    total = 0
    position = 0
    while position < end:
        data = os.pread(fd, min(CHUNK_BYTES, end - position), position)
        if not data:
            break
        total += data.count(b"\n")
        position += len(data)
    return total


# ---------------------------------------------------------------------- change notices

# Writes, renames, deletions, closes after writing and attribute changes (a file made readable).
# Not "opened"/"closed_no_write": the follower's own reads cause those.
_CHANGE_EVENTS = frozenset({"created", "modified", "moved", "deleted", "closed", "attrib"})


class ChangeWatcher:
    """Puts "something changed at PATH" hints into ``hint_queue`` from watchdog's observer thread.

    The observer thread does nothing else: all reading stays in the main loop, which waits on the
    queue with a timeout (so polling still works where change notices do not, e.g. network file
    systems). Pass a bounded queue: one pending hint is enough to wake the loop, so hints that do not
    fit are dropped. Events from merely opening or reading a file are ignored, or the follower's own
    reads would wake it again.
    """

    def __init__(
        self,
        inputs: Iterable[str],
        hint_queue: "queue.Queue[str]",
        recursive: bool = False,
        on_warning: Callable[[str], None] | None = None,
    ) -> None:
        self._inputs = [os.fspath(p) for p in inputs]
        self._queue = hint_queue
        self._recursive = recursive
        self._warn = on_warning or _log.warning
        self._observer = None

    def directories(self) -> dict[str, bool]:
        """Existing directories to watch -> recursive?"""
        watch: dict[str, bool] = {}
        for pattern in self._inputs:
            if glob.has_magic(pattern):
                base, recursive = _glob_base(pattern), "**" in pattern
            elif os.path.isdir(pattern):
                base, recursive = pattern, self._recursive
            else:
                base, recursive = os.path.dirname(pattern) or ".", False
            if os.path.isdir(base):
                watch[base] = watch.get(base, False) or recursive
            else:
                self._warn(f"{base} does not exist (yet); relying on polling for {pattern}")
        return watch

    def start(self) -> None:
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer

        hint_queue = self._queue

        class _Hints(FileSystemEventHandler):
            def on_any_event(self, event) -> None:  # runs on the observer thread
                if event.event_type in _CHANGE_EVENTS:
                    try:
                        hint_queue.put_nowait(os.fsdecode(event.src_path))
                    except queue.Full:
                        pass

        observer = Observer()
        handler = _Hints()
        for directory, recursive in self.directories().items():
            try:
                observer.schedule(handler, directory, recursive=recursive)
            except OSError as error:
                self._warn(f"cannot watch {directory} ({error.strerror}); relying on polling")
        observer.daemon = True
        observer.start()
        self._observer = observer

    def stop(self) -> None:
        if self._observer is not None:
            self._observer.stop()
            self._observer.join(timeout=5.0)
            self._observer = None


def _glob_base(pattern: str) -> str:
    """Longest leading directory of ``pattern`` without wildcards ("." or "/" at least)."""
    parts = pattern.split(os.sep)
    fixed = []
    for part in parts[:-1]:
        if glob.has_magic(part):
            break
        fixed.append(part)
    if fixed == [""]:
        return os.sep
    return os.sep.join(fixed) or "."
