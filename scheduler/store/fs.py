"""Where the store's bytes go: resolving a root, atomic writes, and fault translation.

This is the only module that talks to a file system. Everything above it works with
slash-separated paths on a :class:`Volume` and sees only :mod:`.errors` exceptions for
storage faults.

Why atomic writes: many workers write while the head reads, and any process may die at
any moment. Every file is written under a hidden temporary name in its final directory,
flushed (and on a local or NFS path, ``fsync``-ed), then renamed into place, and the
directory is ``fsync``-ed. A reader therefore sees either the old file, the new one, or
none, never a half-written one. Temporary names start with ``.`` and end in
``.tmp-<hex>``, so directory readers (pyarrow.dataset, pandas, ``*.parquet`` globs) skip
them. Other pyarrow file systems (object stores) get write-then-move without fsync; an
object store's single PUT is atomic on its own.

A :class:`Volume` may carry a ``check`` (the store's and the ledger's, :mod:`.checksums`):
it sees the bytes of every Parquet file read through the volume before they are parsed, so a
damaged file never reaches a caller as a table.
"""

from __future__ import annotations

import errno
import os
import posixpath
import uuid
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from typing import IO, Any

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .errors import StorageCorrupt, StorageError, StorageFull, StoragePermission

__all__ = ["Volume", "resolve_root", "translate", "TEMP_MARK"]

#: Part of every temporary name; never part of a finished file's name.
TEMP_MARK = ".tmp-"

_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)}
_DENIED = {errno.EACCES, errno.EPERM, errno.EROFS}
# Object-store file systems raise plain OSError without errno; match their wording too.
_TEXT_HINTS = (
    ("no space left", errno.ENOSPC),
    ("quota exceeded", errno.ENOSPC),
    ("read-only file system", errno.EROFS),
    ("permission denied", errno.EACCES),
    ("access denied", errno.EACCES),
    ("accessdenied", errno.EACCES),
    ("operation not permitted", errno.EPERM),
)

Writer = Callable[[IO[bytes]], None]


def _errno_of(exc: BaseException) -> int | None:
    code = getattr(exc, "errno", None)
    if isinstance(code, int) and code:
        return code
    text = str(exc).lower()
    for needle, value in _TEXT_HINTS:
        if needle in text:
            return value
    return None


def translate(exc: BaseException, path: str, action: str) -> StorageError:
    """Map an ``OSError`` or pyarrow error met while ``action``-ing ``path`` to our errors.

    Done in one place so every message says the path and what the operator should do.
    """
    folder = posixpath.dirname(path) or path
    code = _errno_of(exc)
    if code in _FULL:
        return StorageFull(
            f"no space left while {action} {path}: free space on the file system holding "
            f"{folder} (or raise its quota), then resume the search",
            path=path,
        )
    if code in _DENIED:
        why = "read-only file system" if code == errno.EROFS else "permission denied"
        return StoragePermission(
            f"{why} while {action} {path}: make {folder} writable by this user "
            f"(uid {os.getuid() if hasattr(os, 'getuid') else '?'}) or remount it read-write, "
            f"then resume the search",
            path=path,
        )
    if isinstance(exc, (pa.ArrowException, UnicodeDecodeError)) and not isinstance(exc, OSError):
        return StorageCorrupt(
            f"{path} cannot be read ({exc}); move it out of the search folder and resume "
            f"(only what that file held is lost)",
            path=path,
        )
    return StorageError(f"storage error while {action} {path}: {exc}", path=path)


@contextmanager
def _faults(path: str, action: str, *, reading: bool = False) -> Iterator[None]:
    """Translate storage faults inside the block; other exceptions pass unchanged."""
    try:
        yield
    except StorageError:
        raise
    except OSError as exc:
        raise translate(exc, path, action) from exc
    except (pa.ArrowException, UnicodeDecodeError) as exc:  # a damaged footer may hold bad text
        if not reading:
            raise
        raise translate(exc, path, action) from exc


def resolve_root(root: str) -> tuple[pafs.FileSystem, str]:
    """Turn a root (a plain path or any URI pyarrow understands) into (file system, base).

    Plain paths are made absolute so that every process, whatever its working directory,
    agrees on where the files are.
    """
    if not root:
        raise StorageError("the store root is empty: pass a folder path or a URI", path=root)
    if "://" in root:
        try:
            fs, base = pafs.FileSystem.from_uri(root)
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise StorageError(
                f"cannot open store root {root!r}: {exc}; pass a folder path or a URI "
                f"such as file:///shared/rungway",
                path=root,
            ) from exc
        return fs, base.rstrip("/") or "/"
    return pafs.LocalFileSystem(), os.path.abspath(os.path.expanduser(root))


def _as_chunks(data: bytes | bytearray | memoryview | Iterable[bytes]) -> Iterable[bytes]:
    if isinstance(data, (bytes, bytearray, memoryview)):
        return (bytes(data),)
    return data


def _fsync_dir(folder: str) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return  # cannot open directories here (some platforms); the rename still happened
    try:
        os.fsync(fd)
    except OSError as exc:  # some network file systems refuse directory fsync
        if exc.errno not in (errno.EINVAL, errno.ENOTSUP, errno.EBADF):
            raise
    finally:
        os.close(fd)


class Volume:
    """A pyarrow file system plus the few operations the store needs, fault-translated."""

    def __init__(self, fs: pafs.FileSystem, check: Callable[[str, bytes], object] | None = None) -> None:
        self.fs = fs
        # Local (and NFS-mounted) paths go through os so that fsync is available.
        self.local = isinstance(fs, pafs.LocalFileSystem)
        # Sees every Parquet file's bytes before they are parsed, and raises StorageCorrupt if
        # they are damaged (the store's and the ledger's checksums).
        self.check = check

    # -- writing -------------------------------------------------------------------------

    def write_bytes(self, path: str, data: bytes | bytearray | memoryview | Iterable[bytes]) -> None:
        """Atomically replace ``path`` with ``data`` (bytes or an iterable of chunks)."""

        def writer(out: IO[bytes]) -> None:
            for chunk in _as_chunks(data):
                out.write(chunk)

        self.write_with(path, writer)

    def write_table(self, path: str, table: pa.Table) -> None:
        """Atomically replace ``path`` with ``table`` as one Parquet file."""
        self.write_with(path, lambda out: pq.write_table(table, out))

    def write_with(self, path: str, writer: Writer) -> None:
        """Atomically replace ``path`` with whatever ``writer`` writes to the stream it gets.

        If ``writer`` (or the storage) fails, the temporary file is removed and any
        existing file at ``path`` is left untouched; the exception propagates (storage
        faults as :class:`StorageError`).
        """
        folder, name = posixpath.split(path)
        tmp = posixpath.join(folder, f".{name}{TEMP_MARK}{uuid.uuid4().hex[:12]}")
        self.make_dirs(folder)
        with _faults(path, "writing"):
            try:
                if self.local:
                    with open(tmp, "xb") as out:
                        writer(out)
                        out.flush()
                        os.fsync(out.fileno())
                    os.replace(tmp, path)
                else:
                    with self.fs.open_output_stream(tmp) as stream:
                        writer(stream)
                    self.fs.move(tmp, path)
            except BaseException:
                self._discard(tmp)
                raise
            if self.local:
                _fsync_dir(folder)

    def _discard(self, tmp: str) -> None:
        try:
            if self.local:
                os.unlink(tmp)
            else:
                self.fs.delete_file(tmp)
        except (OSError, pa.ArrowException):
            pass  # never there, or the storage is gone; nothing more we can do

    def make_dirs(self, folder: str) -> None:
        """Create ``folder`` and its parents if missing."""
        with _faults(folder, "creating folder"):
            if self.local:
                os.makedirs(folder, exist_ok=True)
            else:
                self.fs.create_dir(folder, recursive=True)

    def delete(self, path: str) -> bool:
        """Delete one file; False if it was already gone (another process got there first)."""
        with _faults(path, "deleting"):
            try:
                self.fs.delete_file(path)
            except FileNotFoundError:
                return False
        return True

    # -- reading -------------------------------------------------------------------------

    def read_bytes(self, path: str) -> bytes | None:
        """The whole file, or None if it does not exist."""
        with _faults(path, "reading", reading=True):
            try:
                with self.fs.open_input_stream(path) as stream:
                    return stream.read()
            except FileNotFoundError:
                return None

    def read_table(self, path: str) -> pa.Table | None:
        """One Parquet file as a table, or None if it does not exist (it was just merged).

        Read with ``ParquetFile`` rather than ``pq.read_table``: the same table and schema
        metadata, without building a one-file dataset, which costs more than reading a small
        part file itself (compaction and full reads go through hundreds of them).

        With a ``check``, the whole file is read in one request and checked before it is parsed."""
        if self.check is not None:
            data = self.read_bytes(path)
            if data is None:
                return None
            self.check(path, data)
            with _faults(path, "reading", reading=True):
                with pq.ParquetFile(pa.BufferReader(data)) as parquet:
                    return parquet.read()
        with _faults(path, "reading", reading=True):
            try:
                with self.fs.open_input_file(path) as source, pq.ParquetFile(source) as parquet:
                    return parquet.read()
            except FileNotFoundError:
                return None

    def read_schema(self, path: str) -> pa.Schema | None:
        """The schema (with key-value metadata) of one Parquet file; reads only the footer."""
        with _faults(path, "reading", reading=True):
            try:
                with self.fs.open_input_file(path) as source:
                    return pq.read_schema(source)
            except FileNotFoundError:
                return None

    def list_files(self, folder: str) -> list[str]:
        """Base names of the finished files directly in ``folder`` (no temporaries), sorted."""
        return sorted(
            info.base_name
            for info in self._list(folder)
            if info.type == pafs.FileType.File and TEMP_MARK not in info.base_name
        )

    def list_dirs(self, folder: str) -> list[str]:
        """Base names of the sub-folders of ``folder``, sorted; [] if it does not exist."""
        return sorted(info.base_name for info in self._list(folder) if info.type == pafs.FileType.Directory)

    def _list(self, folder: str) -> list[Any]:
        with _faults(folder, "listing", reading=True):
            return self.fs.get_file_info(pafs.FileSelector(folder, allow_not_found=True))

    def exists(self, path: str) -> bool:
        """Whether ``path`` exists (file or folder)."""
        with _faults(path, "checking", reading=True):
            return self.fs.get_file_info(path).type != pafs.FileType.NotFound
