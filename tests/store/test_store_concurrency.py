"""Concurrent writers (threads and separate processes) lose nothing, even while compacting."""

from __future__ import annotations

import multiprocessing
import threading
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path
from typing import Any

from rungway.scheduler.store import Store

SEGMENTS_PER_WRITER = 12
ROWS_PER_SEGMENT = 4


def rows(trial: int, attempt: int) -> list[dict[str, Any]]:
    return [
        dict(trial=trial, rung=0, attempt=attempt, seq=i, budget=1.0, metric="loss",
             value=float(trial * 100 + attempt * 10 + i), final=i == ROWS_PER_SEGMENT - 1, node=f"w{trial}")
        for i in range(ROWS_PER_SEGMENT)
    ]


def write_segments(root: str, trial: int) -> list[str]:
    """One worker: many segments of its own trial (attempts 0..n-1), plus a checkpoint each."""
    files = Store(root).search("s")
    paths = []
    for attempt in range(SEGMENTS_PER_WRITER):
        paths.append(files.write_measurements(rows(trial, attempt)))
        files.save_checkpoint(trial, 1.0, attempt, f"{trial}:{attempt}".encode())
    return paths


def expected_keys(trials: range) -> set[tuple[int, int, int]]:
    return {(t, a, i) for t in trials for a in range(SEGMENTS_PER_WRITER) for i in range(ROWS_PER_SEGMENT)}


def observed_keys(root: str) -> list[tuple[int, int, int]]:
    frame = Store(root).search("s").read_measurements()
    return list(zip(frame["trial"], frame["attempt"], frame["seq"]))


def test_threads_writing_parts_lose_nothing(tmp_path: Path) -> None:
    root = str(tmp_path)
    with ThreadPoolExecutor(max_workers=8) as pool:
        paths = [p for batch in pool.map(lambda t: write_segments(root, t), range(8)) for p in batch]
    assert len(set(paths)) == 8 * SEGMENTS_PER_WRITER
    keys = observed_keys(root)
    assert len(keys) == len(set(keys)) and set(keys) == expected_keys(range(8))
    loaded = Store(root).search("s").load_checkpoint(3)
    assert loaded is not None and loaded.data == f"3:{SEGMENTS_PER_WRITER - 1}".encode()


def test_processes_writing_parts_lose_nothing(tmp_path: Path) -> None:
    root = str(tmp_path)
    with ProcessPoolExecutor(max_workers=4, mp_context=multiprocessing.get_context("spawn")) as pool:
        results = list(pool.map(write_segments, [root] * 4, range(4)))
    assert sum(len(r) for r in results) == 4 * SEGMENTS_PER_WRITER
    keys = observed_keys(root)
    assert len(keys) == len(set(keys)) and set(keys) == expected_keys(range(4))


def test_compacting_while_threads_write_loses_nothing(tmp_path: Path) -> None:
    root = str(tmp_path)
    files = Store(root).search("s")
    done = threading.Event()
    compactions: list[int] = []

    def compact_until_done() -> None:
        while not done.is_set():
            compactions.append(files.compact_measurements(min_parts=2))
            # Reads during writes and compaction never show a row twice.
            keys = observed_keys(root)
            assert len(keys) == len(set(keys))

    compactor = ThreadPoolExecutor(max_workers=1)
    running = compactor.submit(compact_until_done)
    try:
        with ThreadPoolExecutor(max_workers=6) as pool:
            list(pool.map(lambda t: write_segments(root, t), range(6)))
    finally:
        done.set()
        running.result()
        compactor.shutdown()
    keys = observed_keys(root)
    assert len(keys) == len(set(keys)) and set(keys) == expected_keys(range(6))
    files.compact_measurements(min_parts=1)
    folder = Path(files.layout.measurements)
    assert not any(p.name.startswith("part-") for p in folder.iterdir())
    assert set(observed_keys(root)) == expected_keys(range(6))
