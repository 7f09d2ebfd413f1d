"""One writer per search: a lease on the search's folder, held by the head that drives it.

Theory of operation. The lease is a folder, ``<search>/lease/``, of numbered files
``<token>.json``; the holder is the writer of the highest number, its *fencing token*. A file
is made with an exclusive create (``O_CREAT | O_EXCL``: atomic on local disks and on NFS v3 and
later), so of two processes that both want token ``n + 1`` exactly one gets it, and the other
finds the lease taken. Each file holds its writer's host, process id and start time. The
holder renews its file (touches its modification time) while it runs, and each time checks
that no higher token exists; a holder that finds one has been replaced and stops writing
(:class:`LeaseLost`). A clean stop marks its file released.

A lease still held is taken over only when its holder is surely gone: on the same host, when
its process no longer exists (so a ``kill -9`` and an immediate restart work); on another
host, when it has not been renewed for ``ttl`` seconds (the holder renews every ``ttl / 6``).

Local and NFS folders only (the journal beside it is POSIX too). On NFS the age of a lease
is read from the server's modification time against this machine's clock: keep the hosts'
clocks in sync (NTP), as any NFS setup assumes. Object stores, which have no exclusive
create, are not supported for a head's files. Tested here with several processes on one
host; NFS between two hosts is untested.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import time
import uuid
from collections.abc import Callable
from typing import Any

from rungway.scheduler.core.errors import RungwayError

from .errors import StorageError
from .fs import translate

__all__ = ["SearchLease", "SearchInUse", "LeaseLost", "LEASE_DIR"]

LEASE_DIR = "lease"
_KEEP = 4  # older token files kept, for the record
DEFAULT_TTL = 60.0


class SearchInUse(RungwayError):
    """Another live process drives this search: a second writer is refused."""


class LeaseLost(StorageError):
    """Another process took this search's lease over: this one must stop writing."""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's live process
        return True
    return True


class SearchLease:
    """The lease on one search's folder (see the module's docstring)."""

    def __init__(self, folder: str, search: str, *, ttl: float = DEFAULT_TTL,
                 wall: Callable[[], float] = time.time) -> None:
        self.folder = os.path.join(folder, LEASE_DIR)
        self.search = search
        self.ttl = ttl
        self.wall = wall
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self.token: int | None = None
        self._renewed = -float("inf")

    def _path(self, token: int) -> str:
        return os.path.join(self.folder, f"{token:09d}.json")

    # -- reading -------------------------------------------------------------------------------

    def _tokens(self) -> list[int]:
        try:
            names = os.listdir(self.folder)
        except FileNotFoundError:
            return []
        return sorted(int(n[:-5]) for n in names if n.endswith(".json") and n[:-5].isdigit())

    def _read(self, token: int) -> tuple[dict[str, Any], float] | None:
        """A token file's content and modification time; None if it is gone."""
        try:
            with open(self._path(token), "rb") as fh:
                data = fh.read()
                mtime = os.fstat(fh.fileno()).st_mtime
        except FileNotFoundError:
            return None
        try:
            content = json.loads(data.decode("utf-8"))
            if not isinstance(content, dict):
                raise ValueError(content)
        except ValueError:
            # A torn create: its writer died between the create and the write; it holds nothing.
            content = {"released": True}
        return content, mtime

    def _gone(self, holder: dict[str, Any], mtime: float) -> bool:
        if holder.get("released"):
            return True
        if holder.get("host") == self.host:
            pid = int(holder.get("pid", -1))
            # This very process: a driver it abandoned without ending (a test's simulated
            # kill); one process never drives one search twice at once (names are unique).
            return pid == self.pid or not _alive(pid)
        return self.wall() - mtime > self.ttl

    # -- the lease -------------------------------------------------------------------------------

    def acquire(self) -> int:
        """Take the lease (taking over one whose holder is gone); returns the fencing token.
        Raises :class:`SearchInUse` while a live holder has it, :class:`StorageError` when the
        folder cannot be written (a full disk, a read-only mount)."""
        try:
            return self._acquire()
        except OSError as exc:
            raise translate(exc, self.folder, "taking the search's lease in") from None

    def _acquire(self) -> int:
        os.makedirs(self.folder, exist_ok=True)
        for _ in range(16):  # each turn wins, refuses, or lost a race for the next token
            tokens = self._tokens()
            top = tokens[-1] if tokens else 0
            if top:
                found = self._read(top)
                if found is not None and not self._gone(*found):
                    raise SearchInUse(self._in_use(*found))
            if self._create(top + 1):
                for old in tokens[:-_KEEP]:
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(self._path(old))
                return top + 1
        raise SearchInUse(f"search {self.search!r}: its lease at {self.folder} keeps changing hands; another "
                          "rungway is starting it at the same time: stop one of them")

    def _create(self, token: int) -> bool:
        content = {"host": self.host, "pid": self.pid, "since": self.wall()}
        try:
            fd = os.open(self._path(token), os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        try:
            os.write(fd, json.dumps(content).encode("utf-8"))
            os.fsync(fd)
        finally:
            os.close(fd)
        self.token = token
        self._renewed = self.wall()
        return True

    def _in_use(self, holder: dict[str, Any], mtime: float) -> str:
        age = max(0.0, self.wall() - mtime)
        where = f"process {holder.get('pid')} on {holder.get('host')}"
        if holder.get("host") == self.host:
            gone = "stop that process first (its Ctrl-C stops cleanly)"
        else:
            gone = (f"stop it first; if that machine is gone, run again once the lease is {self.ttl:g} s old "
                    f"(it is {age:.0f} s old)")
        return f"search {self.search!r} is already being run by {where} (lease {self.folder}); {gone}"

    def renew(self, *, every: float | None = None) -> None:
        """Touch the lease if ``every`` seconds have passed (ttl / 6 by default), after checking
        that it is still ours. Raises :class:`LeaseLost` if another process took it over."""
        if self.token is None:
            return
        now = self.wall()
        if now - self._renewed < (self.ttl / 6 if every is None else every):
            return
        self.check()
        try:
            os.utime(self._path(self.token))
        except FileNotFoundError:
            raise LeaseLost(self._lost("its lease file was removed"), path=self.folder) from None
        except OSError as exc:
            raise translate(exc, self._path(self.token), "renewing the search's lease") from None
        self._renewed = now

    def check(self) -> None:
        """Raise :class:`LeaseLost` unless this holder's token is still the highest."""
        if self.token is None:
            return
        tokens = self._tokens()
        if not tokens or tokens[-1] != self.token:
            raise LeaseLost(self._lost("another process took its lease over"), path=self.folder)

    def _lost(self, why: str) -> str:
        return (f"search {self.search!r}: {why} ({self.folder}); this process stopped writing. Run the search from "
                "one place at a time")

    def release(self) -> None:
        """Mark this holder's file released (a later holder takes the next token)."""
        if self.token is None:
            return
        token, self.token = self.token, None
        tmp = f"{self._path(token)}.{uuid.uuid4().hex[:8]}.tmp"
        try:
            with open(tmp, "w") as fh:
                json.dump({"released": True, "host": self.host, "pid": self.pid}, fh)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, self._path(token))
        except OSError:
            # The disk is full or read-only: the lease stays as it was, and this process,
            # about to exit, is taken over as gone (same host) or after the ttl (another).
            with contextlib.suppress(OSError):
                os.unlink(tmp)
