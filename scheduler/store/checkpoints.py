"""Checkpoints: opaque bytes per (trial, budget, attempt), each with a SHA-256 sidecar.

A checkpoint ``checkpoints/<trial>/<budget>-<attempt>.ckpt`` is accompanied by
``<budget>-<attempt>.ckpt.sha256`` in ``sha256sum`` format (``<hex digest>  <file name>``),
so an operator can check a folder with ``sha256sum -c *.sha256``.

Write order is sidecar first, then data, each atomically. Because the data file appears
only after its sidecar, a reader never mistakes a checkpoint that is being written for a
damaged one; a crash between the two leaves only a stray sidecar, which pruning removes.
Loading picks the newest checkpoint (highest budget, then attempt) whose bytes match its
sidecar and reports the newer ones it had to skip, so a truncated or bit-flipped file
costs one step of progress instead of the trial.

Saving the same (trial, budget, attempt) twice replaces the pair, which is not atomic as
a pair: if that second save is interrupted, the checkpoint fails verification, is
reported as skipped, and loading falls back to the previous one.
"""

from __future__ import annotations

import hashlib
import logging
import posixpath
import re
from dataclasses import dataclass, field

from .errors import StorageError
from .fs import Volume
from .layout import CHECKSUM_SUFFIX, CheckpointName, SearchLayout, parse_checkpoint_name

__all__ = ["CheckpointInfo", "LoadedCheckpoint", "save_checkpoint", "load_checkpoint", "prune_checkpoints"]

log = logging.getLogger("rungway.store")

_SIDECAR = re.compile(r"([0-9a-f]{64})[ \t]+\*?(\S.*)")


@dataclass(frozen=True)
class CheckpointInfo:
    """Where a checkpoint lives and what its bytes hash to."""

    path: str
    trial: int
    budget: float
    attempt: int
    sha256: str
    size: int


@dataclass(frozen=True)
class LoadedCheckpoint:
    """A verified checkpoint plus the newer ones that failed verification, as (path, reason)."""

    info: CheckpointInfo
    data: bytes
    skipped: list[tuple[str, str]] = field(default_factory=list)


def _check_ids(trial: int, attempt: int) -> None:
    for label, value in (("trial", trial), ("attempt", attempt)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ValueError(f"checkpoint {label} must be an int >= 0, got {value!r}")


def save_checkpoint(
    volume: Volume, layout: SearchLayout, trial: int, budget: float, attempt: int, data: bytes
) -> CheckpointInfo:
    """Store ``data`` as trial ``trial``'s checkpoint at ``budget`` for ``attempt``."""
    _check_ids(trial, attempt)
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise TypeError(f"checkpoint data must be bytes (pickle it first), got {type(data).__name__}")
    data = bytes(data)
    path = layout.checkpoint(trial, budget, attempt)
    digest = hashlib.sha256(data).hexdigest()
    sidecar = layout.checksum(path)
    fresh = not volume.exists(path)
    volume.write_bytes(sidecar, f"{digest}  {posixpath.basename(path)}\n".encode())
    try:
        volume.write_bytes(path, data)
    except BaseException:
        if fresh:  # leave nothing behind; a re-save's old data no longer matches anyway
            try:
                volume.delete(sidecar)
            except StorageError:
                pass  # the original failure is the one to report
        raise
    return CheckpointInfo(path, trial, float(budget), attempt, digest, len(data))


def _newest_first(volume: Volume, folder: str) -> tuple[list[tuple[CheckpointName, str]], list[str]]:
    files = volume.list_files(folder)
    found = [(name, file) for file in files if (name := parse_checkpoint_name(file)) is not None]
    found.sort(key=lambda item: (item[0].budget, item[0].attempt), reverse=True)
    return found, files


def _verify(volume: Volume, trial: int, name: CheckpointName, path: str) -> tuple[CheckpointInfo | None, bytes | None, str | None]:
    """(info, data, None) if valid, (None, None, reason) if not, (None, None, None) if gone."""
    sidecar = volume.read_bytes(SearchLayout.checksum(path))
    if sidecar is None:
        return None, None, "checksum file missing (written by an interrupted save or removed)"
    match = _SIDECAR.fullmatch(sidecar.decode("utf-8", "replace").strip())
    if match is None or match.group(2) != posixpath.basename(path):
        return None, None, "checksum file unreadable or names another file"
    data = volume.read_bytes(path)
    if data is None:
        return None, None, None  # pruned by someone else since we listed it
    expected, actual = match.group(1), hashlib.sha256(data).hexdigest()
    if actual != expected:
        return None, None, f"checksum mismatch ({len(data)} bytes on disk): truncated or damaged"
    return CheckpointInfo(path, trial, name.budget, name.attempt, actual, len(data)), data, None


def load_checkpoint(volume: Volume, layout: SearchLayout, trial: int) -> LoadedCheckpoint | None:
    """The newest checkpoint of ``trial`` whose checksum verifies, or None if there is none.

    Damaged newer checkpoints are listed in ``skipped`` (and logged, so that they are
    visible even when nothing valid is left and None is returned).
    """
    folder = layout.trial_checkpoints(trial)
    found, _ = _newest_first(volume, folder)
    skipped: list[tuple[str, str]] = []
    for name, file in found:
        path = posixpath.join(folder, file)
        info, data, reason = _verify(volume, trial, name, path)
        if info is not None and data is not None:
            return LoadedCheckpoint(info, data, skipped)
        if reason is not None:
            log.warning("skipping checkpoint %s: %s", path, reason)
            skipped.append((path, reason))
    return None


def prune_checkpoints(volume: Volume, layout: SearchLayout, trial: int, keep: int = 2) -> list[str]:
    """Keep ``trial``'s ``keep`` newest valid checkpoints; delete the rest. Returns deleted paths.

    Damaged checkpoints are deleted only when at least one valid one is kept, so pruning
    never leaves a trial with nothing. Stray sidecars older than the oldest kept
    checkpoint go too; newer ones may belong to a save in progress and stay.
    """
    if isinstance(keep, bool) or not isinstance(keep, int) or keep < 1:
        raise ValueError(f"keep must be an int >= 1, got {keep!r}")
    folder = layout.trial_checkpoints(trial)
    found, files = _newest_first(volume, folder)
    kept: list[CheckpointName] = []
    doomed: list[str] = []
    damaged: list[str] = []
    for name, file in found:
        path = posixpath.join(folder, file)
        if len(kept) >= keep:
            doomed.append(path)
            continue
        info, _, reason = _verify(volume, trial, name, path)
        if info is not None:
            kept.append(name)
        elif reason is not None:
            damaged.append(path)
    if not kept:
        return []
    doomed += damaged
    oldest = (kept[-1].budget, kept[-1].attempt)
    deleted: list[str] = []
    for path in doomed:
        if volume.delete(path):
            deleted.append(path)
        if volume.delete(SearchLayout.checksum(path)):
            deleted.append(SearchLayout.checksum(path))
    live = {file for _, file in found}
    for file in files:
        if not file.endswith(CHECKSUM_SUFFIX) or file[: -len(".sha256")] in live:
            continue
        name = parse_checkpoint_name(file[: -len(".sha256")])
        if name is not None and (name.budget, name.attempt) < oldest:
            path = posixpath.join(folder, file)
            if volume.delete(path):
                deleted.append(path)
    return deleted
