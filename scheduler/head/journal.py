"""The head's append-only journal: every event the core accepts, written durably first.

Theory of operation. The scheduling core is deterministic, so its state is fully given by a
snapshot plus the events applied since. The head appends each batch of events to the journal
(one write and one fsync per batch) *before* it acts on them: before a segment is submitted,
before a result changes the ladder. After a crash, the head restores the last snapshot and
replays the journal's later entries; the core then stands exactly where it stood.

Format (docs/reliability.md): JSON Lines in ``journal/events-<first seq>.crc.jsonl``. Every
line is one object whose first member ``c`` is the CRC-32 (8 hex digits) of the rest of the
line, then ``n`` (a sequence number, one more than the line before, across files) and ``e``
(the event kind) and the event's fields. The CRC also covers the file's place
(``<search>/journal/<file name>``), so a line or file moved elsewhere does not verify.

Reading checks every line: its CRC, that its ``n`` follows the line before, that a file's
first ``n`` is the one its name says, and that no entry after the snapshot is missing
between two files. A torn last line (one without its newline: a crash mid-write, never
acted on, since the head acts only after the newline is fsynced) is ignored, and so is
damage to a line the snapshot already holds; anything else is a :class:`JournalCorrupt`
naming the file and line. It offers no cut of the file as a repair: the segments recorded
after a damaged line have run, and a head resumed from before it would run some of them
again under other attempt numbers, leaving a second result for a trial's rung. Files of the
old shape (``events-<first seq>.jsonl``, lines without ``c``, written before checksums) are
read as before, unverified, with the same order checks. After each snapshot the head starts a
new file and deletes the files the snapshot covers.

What a checksum cannot see: the last file cut short looks like a head that stopped there,
and the head resumes from its last whole line (what a crash mid-write leaves, too).

The journal lives on a POSIX path (local disk or NFS): appending with fsync is what makes it
durable, and object stores cannot append.
"""

from __future__ import annotations

import json
import os
import re
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from rungway.scheduler.store import StorageCorrupt
from rungway.scheduler.store.fs import translate

__all__ = ["Journal", "JournalCorrupt"]

PREFIX = "events-"
SUFFIX = ".crc.jsonl"  # every line carries its CRC
OLD_SUFFIX = ".jsonl"  # lines without one, written before checksums
_NAME = re.compile(r"events-(\d+)(\.crc)?\.jsonl")
_SEAL_HEAD = b'{"c":"'
_SEAL_LEN = 16  # {"c":"<8 hex>",


class JournalCorrupt(StorageCorrupt):
    """A journal line is damaged, out of order, or missing (only a torn last line is not)."""


def _first_seq(path: Path) -> int:
    match = _NAME.fullmatch(path.name)
    assert match is not None, path
    return int(match.group(1))


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
        """The journal's files, in the order of their first entries."""
        found = [path for path in self.directory.glob(f"{PREFIX}*{OLD_SUFFIX}") if _NAME.fullmatch(path.name)]
        # Of two files that start at the same entry, the old-shape one was written first (by an
        # earlier rungway whose head died writing its first entry).
        return sorted(found, key=lambda path: (_first_seq(path), path.name.endswith(SUFFIX)))

    def _salt(self, path: Path) -> int:
        """The CRC of the file's place, which every line's CRC continues from."""
        return zlib.crc32(f"{self.directory.parent.name}/{self.directory.name}/{path.name}\n".encode())

    def append(self, entries: list[dict[str, Any]]) -> None:
        """Write ``entries`` (each gets its sequence number ``n``) and make them durable."""
        if not entries:
            return
        if self._file is None:
            self._open_new()
        lines = []
        seq = self.seq
        salt = self._salt(self._path)
        for entry in entries:
            seq += 1
            entry["n"] = seq
            body = json.dumps(entry, separators=(",", ":")).encode()
            lines.append(b'{"c":"%08x",' % zlib.crc32(body, salt) + body[1:])
        data = b"\n".join(lines) + b"\n"
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
            elif _first_seq(following) - 1 > covered_seq:
                break
            try:
                current.unlink()
            except OSError as exc:
                raise translate(exc, str(current), "deleting") from exc

    def _last_seq_of(self, path: Path) -> int | None:
        """The number of the file's last whole entry (its whole file is checked when replayed)."""
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise translate(exc, str(path), "reading") from exc
        lines = data.split(b"\n")[:-1]  # a torn tail, if any, was never acted on
        if not lines:
            return None
        if not path.name.endswith(SUFFIX) or _sealed(lines[-1], zlib.crc32(b"{", self._salt(path))):
            try:
                return int(json.loads(lines[-1])["n"])
            except (ValueError, KeyError, TypeError):
                pass
        # A damaged last line still holds its number, one per line: replay reports the damage.
        return _first_seq(path) + len(lines) - 1

    def entries_after(self, seq: int) -> Iterator[dict[str, Any]]:
        """Every entry with ``n > seq``, in order; all of them are checked before the first is
        yielded (a :class:`JournalCorrupt` names the damaged file and line)."""
        for n, entry in self._scan(seq):
            if n > seq:
                yield entry

    def _scan(self, seq: int) -> list[tuple[int, dict[str, Any]]]:
        merged: list[tuple[int, dict[str, Any]]] = []
        expected: int | None = None  # the number the next file's first entry must not exceed
        previous: tuple[Path, int] | None = None  # the file before, and its number of whole lines
        for path in self.files():
            entries, lines = self._read_file(path, covered=seq)
            start = entries[0][0] if entries else _first_seq(path)
            while merged and merged[-1][0] >= start:
                merged.pop()  # written by an append that failed, then written again in this file
            if expected is not None and previous is not None and start > expected and start > seq + 1:
                raise self._corrupt(
                    previous[0], previous[1] + 1,
                    f"the file stops before entry {expected} but the next one, {path.name}, starts with entry "
                    f"{start}: entries {expected} to {start - 1} are missing (this file was cut short)")
            merged.extend(entries)
            expected = entries[-1][0] + 1 if entries else start  # an empty file: its first entry was torn
            previous = (path, lines)
        return merged

    def _corrupt(self, path: Path, number: int, what: str) -> JournalCorrupt:
        # No cut of the file is offered as a repair: the segments recorded after the damage have
        # run, and a head resumed from before it would run some again under new attempt
        # numbers, leaving two results for one trial and rung in the measurements.
        return JournalCorrupt(
            f"{path}:{number}: {what}. The head cannot resume this search from its journal: the entries from "
            "here on cannot be replayed, and the segments they recorded have run. Its results so far stay "
            f"readable (trials.parquet, measurements/). Put back a copy of {path.name} if you have one; "
            "otherwise run the spec again under another name",
            path=str(path),
        )

    def _read_file(self, path: Path, covered: int = 0) -> tuple[list[tuple[int, dict[str, Any]]], int]:
        """The file's entries as (n, entry), checked, and its number of whole lines; a torn last
        line is left out. A line whose place says the snapshot holds its entry (``covered``) is
        never replayed: damage there is passed over, and the line left out."""
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise translate(exc, str(path), "reading") from exc
        lines = data.split(b"\n")
        try:  # parsed as text: json.loads of bytes would guess their encoding line by line
            texts: list[str] | list[bytes] = data.decode("utf-8").split("\n")
        except UnicodeDecodeError:
            texts = lines  # a damaged byte somewhere: its line is reported below
        tail = lines.pop()  # what follows the last newline: b"" unless a write was torn
        sealed = path.name.endswith(SUFFIX)
        start = zlib.crc32(b"{", self._salt(path))  # every line's CRC covers "{" + what follows its seal
        first = _first_seq(path)
        if sealed and tail and _sealed(tail[:-1], start) and first + len(lines) > covered:
            # A whole line followed by one more byte: its newline was damaged, not torn off.
            raise self._corrupt(path, len(lines) + 1, "its line ends in a damaged byte instead of a newline")
        entries: list[tuple[int, dict[str, Any]]] = []
        expected = first
        loads = json.loads
        for number, raw in enumerate(lines, 1):
            try:
                if sealed and not _sealed(raw, start):
                    raise self._corrupt(path, number, "journal line damaged (it does not match its CRC)")
                try:
                    entry = loads(texts[number - 1])  # a sealed line is JSON too: its seal is member "c"
                    n = int(entry["n"])
                except (ValueError, KeyError, TypeError) as exc:
                    raise self._corrupt(path, number, f"unreadable journal line ({exc})") from None
                if n != expected:
                    raise self._corrupt(path, number, f"entry {n} where entry {expected} belongs (lines out of "
                                                      "order, or the file was renamed)")
            except JournalCorrupt:
                if expected > covered:
                    raise
                expected += 1  # the snapshot holds this entry: it is not needed
                continue
            if sealed:
                del entry["c"]
            entries.append((n, entry))
            expected = n + 1
        return entries, len(lines)


def _sealed(raw: bytes, start: int) -> bool:
    """Whether a journal line matches its CRC (``start``: the CRC of the file's place and ``{``)."""
    return (raw[:_SEAL_LEN - 10] == _SEAL_HEAD and raw[_SEAL_LEN - 2 : _SEAL_LEN] == b'",'
            and b"%08x" % zlib.crc32(raw[_SEAL_LEN:], start) == raw[_SEAL_LEN - 10 : _SEAL_LEN - 2])
