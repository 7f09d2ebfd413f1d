"""The head's append-only journal: every event the core accepts, written durably first.

Theory of operation. The scheduling core is deterministic, so its state is fully given by a
snapshot plus the events applied since. The head appends each batch of events to the journal
(one write and one fsync per batch) *before* it acts on them: before a segment is submitted,
before a result changes the ladder. After a crash, the head restores the last snapshot and
replays the journal's later entries; the core then stands exactly where it stood.

Format (docs/reliability.md): JSON Lines in ``journal/events-<first seq>.jsonl``. Every line
is one object with ``n`` (a sequence number, strictly increasing across files) and ``e`` (the
event kind); the rest are the event's fields. A torn last line (a crash mid-write) is
ignored; a damaged line anywhere else is an error that names the file and line. After each
snapshot the head starts a new file and deletes the files the snapshot covers.

The journal lives on a POSIX path (local disk or NFS): appending with fsync is what makes it
durable, and object stores cannot append.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from rungway.scheduler.store import StorageError
from rungway.scheduler.store.fs import translate

__all__ = ["Journal", "JournalCorrupt"]

PREFIX = "events-"
SUFFIX = ".jsonl"


class JournalCorrupt(StorageError):
    """A journal line other than the last could not be read."""


class Journal:
    """Append-only, fsynced JSON-lines journal in ``directory``."""

    def __init__(self, directory: str | Path, fsync: bool = True) -> None:
        self.directory = Path(directory)
        self.fsync = fsync
        self._file: Any = None
        self._path: Path | None = None
        self.seq = 0
        self.bytes_written = 0
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise translate(exc, str(self.directory), "creating") from exc
        for path in reversed(self.files()):  # the newest file that holds an entry gives the sequence
            last = self._last_seq_of(path)
            if last is not None:
                self.seq = last
                break

    def resume_after(self, covered_seq: int) -> None:
        """Number new entries after ``covered_seq``, the last entry a snapshot holds. Needed
        because a rotation may have deleted every file: the numbering must not start again
        from 1, or the next restart, replaying what follows the snapshot, would skip them."""
        self.seq = max(self.seq, covered_seq)

    def files(self) -> list[Path]:
        return sorted(self.directory.glob(f"{PREFIX}*{SUFFIX}"))

    def append(self, entries: list[dict[str, Any]]) -> None:
        """Write ``entries`` (each gets its sequence number ``n``) and make them durable."""
        if not entries:
            return
        if self._file is None:
            self._open_new()
        lines = []
        seq = self.seq
        for entry in entries:
            seq += 1
            entry["n"] = seq
            lines.append(json.dumps(entry, separators=(",", ":")))
        data = ("\n".join(lines) + "\n").encode()
        try:
            self._file.write(data)
            self._file.flush()
            if self.fsync:
                os.fsync(self._file.fileno())
        except OSError as exc:
            # A partial write leaves a torn tail; start a fresh file so that it stays the last line.
            self._close()
            raise translate(exc, str(self._path), "appending to") from exc
        self.seq = seq
        self.bytes_written += len(data)

    def _open_new(self) -> None:
        path = self.directory / f"{PREFIX}{self.seq + 1:012d}{SUFFIX}"
        try:
            # A file of this name can only hold a torn first entry of a head that died writing
            # it (a complete one would have set ``seq`` past it): start it over.
            self._file = open(path, "wb")  # noqa: SIM115 - kept open for appends
            if self.fsync:
                dir_fd = os.open(self.directory, os.O_RDONLY)
                try:
                    os.fsync(dir_fd)
                finally:
                    os.close(dir_fd)
        except OSError as exc:
            self._file = None
            raise translate(exc, str(path), "creating") from exc
        self._path = path

    def _close(self) -> None:
        if self._file is not None:
            try:
                self._file.close()
            except OSError:
                pass
        self._file = None

    def close(self) -> None:
        self._close()

    def rotate(self, covered_seq: int) -> None:
        """A snapshot now holds every entry up to ``covered_seq``: start a new file and delete
        the files whose entries are all covered."""
        self._close()
        files = self.files()
        following_files: list[Path | None] = [*files[1:], None]
        for current, following in zip(files, following_files[: len(files)], strict=True):
            if following is None:
                last = self._last_seq_of(current)
                if last is not None and last > covered_seq:
                    break
            elif int(following.name[len(PREFIX) : -len(SUFFIX)]) - 1 > covered_seq:
                break
            try:
                current.unlink()
            except OSError as exc:
                raise translate(exc, str(current), "deleting") from exc

    def _last_seq_of(self, path: Path) -> int | None:
        last = None
        for _n, entry in self._read_file(path, is_last=True):
            last = int(entry["n"])
        return last

    def entries_after(self, seq: int) -> Iterator[dict[str, Any]]:
        """Every entry with ``n > seq``, in order."""
        for n, entry in self._scan(seq):
            yield entry

    def _scan(self, seq: int) -> Iterator[tuple[int, dict[str, Any]]]:
        files = self.files()
        for index, path in enumerate(files):
            for n, entry in self._read_file(path, is_last=index == len(files) - 1):
                if n > seq:
                    yield n, entry

    def _read_file(self, path: Path, is_last: bool) -> Iterator[tuple[int, dict[str, Any]]]:
        try:
            lines = path.read_bytes().split(b"\n")
        except OSError as exc:
            raise translate(exc, str(path), "reading") from exc
        if lines and lines[-1] == b"":
            lines.pop()
        for number, raw in enumerate(lines, 1):
            try:
                entry = json.loads(raw)
                n = int(entry["n"])
            except (ValueError, KeyError, TypeError) as exc:
                if number == len(lines):  # a torn tail from a crash mid-append: never acted on
                    return
                raise JournalCorrupt(
                    f"{path}:{number}: unreadable journal line ({exc}); move the file aside to resume "
                    "from the last snapshot (the entries after it are lost)",
                    path=str(path),
                ) from exc
            yield n, entry
