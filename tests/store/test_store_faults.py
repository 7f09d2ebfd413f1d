"""Atomic writes and storage faults: nothing half-written, our own exceptions, clear messages."""

from __future__ import annotations

import errno
import os
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.fs as pafs
import pytest

from rungway.scheduler.store import (
    SearchFiles,
    StorageCorrupt,
    StorageError,
    StorageFull,
    StoragePermission,
    Store,
)
from rungway.scheduler.store import fs as store_fs
from rungway.scheduler.store.fs import Volume, translate


def listing(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_writer_failing_midway_leaves_old_file_and_no_temporary(tmp_path: Path) -> None:
    volume = Volume(pafs.LocalFileSystem())
    target = tmp_path / "out.bin"
    volume.write_bytes(str(target), b"old contents")

    def chunks() -> Iterator[bytes]:
        yield b"new " * 1000
        raise RuntimeError("producer died")

    with pytest.raises(RuntimeError, match="producer died"):
        volume.write_bytes(str(target), chunks())
    assert target.read_bytes() == b"old contents"
    assert listing(tmp_path) == ["out.bin"]


def test_failed_first_write_leaves_nothing(tmp_path: Path) -> None:
    volume = Volume(pafs.LocalFileSystem())

    def writer(out: Any) -> None:
        out.write(b"PAR1 partial")
        raise KeyboardInterrupt  # even a BaseException must not leave the temporary behind

    with pytest.raises(KeyboardInterrupt):
        volume.write_with(str(tmp_path / "t.parquet"), writer)
    assert listing(tmp_path) == []


def test_parquet_writer_failing_midway_keeps_the_previous_trials_table(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    files = Store(str(tmp_path)).search("s")
    row = dict(trial=0, status="done", rung=0, budget_reached=1.0, latest_value=0.1, record_value=0.1, attempts=1, failures=0)
    files.write_trials([row], [])

    def half_write(table: pa.Table, out: Any, **_: Any) -> None:
        out.write(b"PAR1" + b"\0" * 64)
        raise OSError(errno.EIO, "simulated I/O error")

    monkeypatch.setattr(store_fs.pq, "write_table", half_write)
    with pytest.raises(StorageError, match="storage error while writing") as caught:
        files.write_trials([dict(row, trial=1)], [])
    assert isinstance(caught.value.__cause__, OSError)
    monkeypatch.undo()
    assert files.read_trials()["trial"].tolist() == [0]
    assert listing(Path(files.path)) == ["trials.parquet"]


def test_a_crashed_writers_temporary_is_invisible_to_readers(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    files.write_measurements(
        [dict(trial=0, rung=0, attempt=0, seq=0, budget=1.0, metric="m", value=1.0, final=True)]
    )
    folder = Path(files.layout.measurements)
    (folder / ".part-t1-r0-a0-00000000.parquet.tmp-abcdef012345").write_bytes(b"PAR1 half")
    assert len(files.read_measurements()) == 1
    assert files.compact_measurements(min_parts=1) == 1
    assert len(files.read_measurements()) == 1


@pytest.mark.parametrize(
    ("exc", "kind", "says"),
    [
        (OSError(errno.ENOSPC, "No space left on device"), StorageFull, "free space on the file system holding /d"),
        (OSError(errno.EACCES, "Permission denied"), StoragePermission, "make /d writable"),
        (OSError(errno.EPERM, "Operation not permitted"), StoragePermission, "make /d writable"),
        (OSError(errno.EROFS, "Read-only file system"), StoragePermission, "read-only file system"),
        (OSError("When uploading part: AWS Error ACCESS_DENIED: Access Denied"), StoragePermission, "writable"),
        (OSError("Write failed: No space left on device"), StorageFull, "resume the search"),
        (pa.ArrowInvalid("Parquet magic bytes not found"), StorageCorrupt, "move it out"),
        (OSError(errno.EIO, "Input/output error"), StorageError, "storage error while writing /d/f"),
    ],
)
def test_translate_maps_faults_to_our_errors(exc: Exception, kind: type, says: str) -> None:
    error = translate(exc, "/d/f", "writing")
    assert type(error) is kind
    assert says in str(error) and "/d/f" in str(error)
    assert error.path == "/d/f"
    assert isinstance(error, RuntimeError)


def test_permission_denied_on_open_surfaces_as_storage_permission(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    files = Store(str(tmp_path)).search("s")
    files.write_spec("old\n")

    def denied(*args: Any, **kwargs: Any) -> Any:
        raise PermissionError(errno.EACCES, "Permission denied", args[0])

    monkeypatch.setattr(store_fs, "open", denied, raising=False)
    with pytest.raises(StoragePermission, match="make .* writable") as caught:
        files.write_spec("new\n")
    assert caught.value.path == files.layout.spec_checksum  # written first, so the first to fail
    assert isinstance(caught.value.__cause__, PermissionError)
    monkeypatch.undo()
    assert files.read_spec() == "old\n"


def _mount(*args: str) -> bool:
    done = subprocess.run(["mount", *args], capture_output=True, text=True)
    return done.returncode == 0


def _umount(path: Path) -> None:
    subprocess.run(["umount", str(path)], capture_output=True, check=False)


def _need_root() -> None:
    if not hasattr(os, "geteuid") or os.geteuid() != 0:
        pytest.skip("mounting needs root")


def test_read_only_mount_raises_storage_permission_and_reads_still_work(tmp_path: Path) -> None:
    _need_root()
    source, view = tmp_path / "source", tmp_path / "view"
    source.mkdir()
    view.mkdir()
    Store(str(source)).search("s").write_spec("kept\n")
    if not _mount("--bind", str(source), str(view)):
        pytest.skip("bind mounts are not allowed here")
    try:
        if not _mount("-o", "remount,ro,bind", str(view)):
            pytest.skip("cannot remount read-only here")
        files = Store(str(view)).search("s")
        with pytest.raises(StoragePermission, match="read-only file system") as caught:
            files.write_spec("new\n")
        assert "remount it read-write" in str(caught.value)
        with pytest.raises(StoragePermission):
            files.save_checkpoint(0, 1.0, 0, b"x")
        assert files.read_spec() == "kept\n"
        assert files.read_measurements().empty
    finally:
        _umount(view)
    assert listing(source / "searches" / "s") == ["spec.toml", "spec.toml.sha256"]


def test_full_disk_raises_storage_full_and_damages_nothing(tmp_path: Path) -> None:
    _need_root()
    disk = tmp_path / "disk"
    disk.mkdir()
    if not _mount("-t", "tmpfs", "-o", "size=1m", "tmpfs", str(disk)):
        pytest.skip("cannot mount a tmpfs here")
    try:
        files = Store(str(disk)).search("s")
        files.write_spec("kept\n")
        small = files.save_checkpoint(0, 1.0, 0, b"small")
        with pytest.raises(StorageFull, match="free space") as caught:
            files.save_checkpoint(0, 2.0, 0, os.urandom(2 * 1024 * 1024))
        assert str(disk) in str(caught.value)
        rows = [
            dict(trial=1, rung=0, attempt=0, seq=i, budget=1.0, metric=os.urandom(16).hex(), value=1.0, final=False)
            for i in range(40_000)
        ]
        with pytest.raises(StorageFull):
            files.write_measurements(rows)
        with pytest.raises(StorageFull):
            files.write_spec("x" * (2 * 1024 * 1024))
        # Nothing half-written remains and the earlier files are intact.
        assert files.read_spec() == "kept\n"
        loaded = files.load_checkpoint(0)
        assert loaded is not None and loaded.info.path == small.path and loaded.skipped == []
        assert listing(Path(small.path).parent) == ["1.0-0.ckpt", "1.0-0.ckpt.sha256"]
        assert listing(Path(files.layout.measurements)) == []
        assert files.read_measurements().empty
    finally:
        _umount(disk)


def test_storage_errors_are_runtime_errors_with_the_path() -> None:
    for kind in (StorageError, StorageFull, StoragePermission, StorageCorrupt):
        error = kind("message", path="/x")
        assert isinstance(error, RuntimeError) and isinstance(error, StorageError) and error.path == "/x"

