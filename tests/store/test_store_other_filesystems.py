"""Non-local pyarrow file systems take the write-then-move path (no fsync); it must behave alike.

Arrow's in-memory ``mock://`` file system stands in for an object store.
"""

from __future__ import annotations

from collections.abc import Iterator

import pyarrow.fs as pafs
import pytest

from rungway.scheduler.store import Store


def all_files(store: Store) -> list[str]:
    infos = store.filesystem.get_file_info(pafs.FileSelector(store.base, recursive=True))
    return sorted(info.path for info in infos if info.type == pafs.FileType.File)


def test_whole_lifecycle_on_a_non_local_file_system() -> None:
    store = Store("mock:///bucket/rungway")
    assert not store.volume.local
    files = store.search("s")
    files.write_spec("x = 1\n")
    for trial in range(3):
        files.write_measurements(
            [dict(trial=trial, rung=0, attempt=0, seq=0, budget=1.0, metric="loss", value=0.5, final=True)]
        )
    assert files.compact_measurements(min_parts=2) == 3
    files.save_checkpoint(0, 1.0, 0, b"one")
    files.save_checkpoint(0, 2.0, 0, b"two")
    files.write_trials([dict(trial=0, status="done", rung=0, attempts=1, failures=0, params={"lr": 0.1})], ["lr"])
    files.record_failure(1, 0, 0, "E", "m", "tb")

    assert store.list_searches() == ["s"]
    assert files.read_spec() == "x = 1\n"
    assert files.read_measurements()["trial"].tolist() == [0, 1, 2]
    loaded = files.load_checkpoint(0)
    assert loaded is not None and loaded.data == b"two"
    assert files.read_trials()["space_lr"].tolist() == [0.1]
    assert len(files.read_failures()) == 1
    assert not any(".tmp-" in path for path in all_files(store))


def test_failed_write_on_a_non_local_file_system_leaves_no_temporary() -> None:
    store = Store("mock:///bucket")
    files = store.search("s")
    files.write_spec("old")

    def chunks() -> Iterator[bytes]:
        yield b"partial"
        raise RuntimeError("writer died")

    with pytest.raises(RuntimeError, match="writer died"):
        store.volume.write_bytes(files.layout.spec, chunks())
    assert files.read_spec() == "old"
    assert [path.rsplit("/", 1)[1] for path in all_files(store)] == ["spec.toml", "spec.toml.sha256"]
