"""Every path the store uses, built in one place so the layout can be read (and changed) here.

::

    <root>/searches/<name>/
        spec.toml                                   the search spec, as the user wrote it
        spec.toml.sha256                            "<sha256 hex>  spec.toml\n"
        trials.parquet                              one row per trial (replaced whole)
        measurements/part-t<T>-r<R>-a<A>-<sha>.parquet   one per write (one trial segment)
        measurements/part-batch-n<N>-<sha>.parquet       the head's batch of N segments' final rows
        measurements/block-<n>-<sha>.parquet        compacted parts
        checkpoints/<T>/<budget>-<attempt>.ckpt     opaque bytes
        checkpoints/<T>/<budget>-<attempt>.ckpt.sha256   "<hex digest>  <file name>\\n"
        failures/fail-t<T>-r<R>-a<A>-<sha>.parquet  one row per failed attempt
        journal/                                    reserved for the head's journal

Names embed the writer's identity plus the first 32 hex digits of the SHA-256 of the file's
bytes (``<sha>``, see :mod:`.checksums`), so that two writers never pick the same name without
any coordination, and a reader can check the bytes. Files written before checksums have an
8-digit random token there instead.
"""

from __future__ import annotations

import math
import posixpath
import re
import uuid
from dataclasses import dataclass

from rungway.scheduler.core.errors import SpecError

from .checksums import NAME_DIGITS

__all__ = [
    "SEARCH_NAME",
    "validate_search_name",
    "searches_dir",
    "SearchLayout",
    "CHECKPOINT_SUFFIX",
    "CHECKSUM_SUFFIX",
    "PART_PREFIX",
    "BLOCK_PREFIX",
]

SEARCH_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
CHECKPOINT_SUFFIX = ".ckpt"
CHECKSUM_SUFFIX = ".ckpt.sha256"
PART_PREFIX = "part-"
BLOCK_PREFIX = "block-"
PARQUET = ".parquet"
_BLOCK_NUMBER = re.compile(r"block-(\d+)-[0-9a-f]+\.parquet")


def validate_search_name(name: str) -> str:
    """Return ``name`` if it is a valid search name; the name becomes a folder on shared storage."""
    if not isinstance(name, str) or SEARCH_NAME.fullmatch(name) is None:
        raise SpecError(
            f"invalid search name {name!r}: use 1-64 characters from letters, digits, '.', "
            f"'_' and '-', starting with a letter or digit (it names a folder)",
            field="name",
        )
    return name


def searches_dir(base: str) -> str:
    """The folder that holds one sub-folder per search."""
    return posixpath.join(base, "searches")


def token() -> str:
    """A short random token that keeps concurrently written names apart."""
    return uuid.uuid4().hex[:8]


def _tag(digest: str | None) -> str:
    """What keeps names apart: the file's digest digits (a random token if none is given)."""
    return digest[:NAME_DIGITS] if digest else token()


def budget_text(budget: float) -> str:
    """The budget as written in a checkpoint name: Python's shortest round-trip float text."""
    value = float(budget)
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"checkpoint budget must be a finite number >= 0, got {budget!r}")
    return repr(value)


@dataclass(frozen=True)
class CheckpointName:
    """What a checkpoint's file name says."""

    budget: float
    attempt: int


def parse_checkpoint_name(file_name: str) -> CheckpointName | None:
    """Parse ``<budget>-<attempt>.ckpt``; None for anything else (sidecars, strays)."""
    if not file_name.endswith(CHECKPOINT_SUFFIX):
        return None
    stem = file_name[: -len(CHECKPOINT_SUFFIX)]
    budget, sep, attempt = stem.rpartition("-")  # budgets may contain '-' (1e-05)
    if not sep or not attempt.isdigit():
        return None
    try:
        value = float(budget)
    except ValueError:
        return None
    if not math.isfinite(value):
        return None
    return CheckpointName(value, int(attempt))


def block_number(file_name: str) -> int | None:
    """The sequence number of a block file name; None if it is not one."""
    match = _BLOCK_NUMBER.fullmatch(file_name)
    return int(match.group(1)) if match else None


@dataclass(frozen=True)
class SearchLayout:
    """Paths of one search's files under ``base`` (``<root>/searches/<name>``)."""

    base: str

    @property
    def spec(self) -> str:
        return posixpath.join(self.base, "spec.toml")

    @property
    def spec_checksum(self) -> str:
        """``spec.toml``'s SHA-256, in ``sha256sum`` format (written before the spec)."""
        return self.spec + ".sha256"

    @property
    def trials(self) -> str:
        return posixpath.join(self.base, "trials.parquet")

    @property
    def measurements(self) -> str:
        return posixpath.join(self.base, "measurements")

    @property
    def checkpoints(self) -> str:
        return posixpath.join(self.base, "checkpoints")

    @property
    def failures(self) -> str:
        return posixpath.join(self.base, "failures")

    @property
    def journal(self) -> str:
        """Reserved for the head's journal; the store never writes here."""
        return posixpath.join(self.base, "journal")

    def part(self, trial: int, rung: int, attempt: int, digest: str | None = None) -> str:
        """The name of one measurements part file whose bytes hash to ``digest``."""
        return posixpath.join(self.measurements, f"{PART_PREFIX}t{trial}-r{rung}-a{attempt}-{_tag(digest)}{PARQUET}")

    def batch_part(self, segments: int, digest: str | None = None) -> str:
        """The name of a part file holding the final rows of several segments."""
        return posixpath.join(self.measurements, f"{PART_PREFIX}batch-n{segments}-{_tag(digest)}{PARQUET}")

    def block(self, number: int, digest: str | None = None) -> str:
        """The name of compacted block ``number``; the digest keeps two compactors apart."""
        return posixpath.join(self.measurements, f"{BLOCK_PREFIX}{number:06d}-{_tag(digest)}{PARQUET}")

    def trial_checkpoints(self, trial: int) -> str:
        return posixpath.join(self.checkpoints, str(int(trial)))

    def checkpoint(self, trial: int, budget: float, attempt: int) -> str:
        return posixpath.join(self.trial_checkpoints(trial), f"{budget_text(budget)}-{int(attempt)}{CHECKPOINT_SUFFIX}")

    @staticmethod
    def checksum(checkpoint_path: str) -> str:
        """The sidecar that holds ``checkpoint_path``'s SHA-256."""
        return checkpoint_path + ".sha256"

    def failure(self, trial: int, rung: int, attempt: int, digest: str | None = None) -> str:
        return posixpath.join(self.failures, f"fail-t{trial}-r{rung}-a{attempt}-{_tag(digest)}{PARQUET}")

    def label(self, path: str) -> str:
        """``path``'s place as checksums name it: ``<search name>/<path in the search folder>``."""
        return posixpath.relpath(path, posixpath.dirname(self.base))


def is_part(file_name: str) -> bool:
    return file_name.startswith(PART_PREFIX) and file_name.endswith(PARQUET)


def is_block(file_name: str) -> bool:
    return block_number(file_name) is not None
