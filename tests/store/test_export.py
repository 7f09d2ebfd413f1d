"""`rungway export` and `rungway show` as a reader of the store uses them (on the committed
0.1.0 fixture store, migrated on open)."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from rungway.scheduler.cli.main import main

FIXTURE = Path(__file__).parent / "fixtures" / "format-1"


@pytest.fixture
def store(tmp_path: Path) -> Path:
    shutil.copytree(FIXTURE, tmp_path / "store")
    return tmp_path / "store"


@pytest.mark.parametrize("what", ["trials", "measurements"])
def test_json_export_round_trips_every_float_and_time_exactly(what: str, store: Path, tmp_path: Path) -> None:
    out = tmp_path / f"{what}.json"
    assert main(["export", "format-one", "--what", what, "--out", str(out), "--store", str(store)]) == 0
    from rungway.scheduler.store import open_store

    files = open_store(str(store)).search("format-one")
    frame = files.read_trials() if what == "trials" else files.read_measurements()
    records = json.loads(out.read_text())
    assert len(records) == len(frame)
    for record, (_, row) in zip(records, frame.iterrows(), strict=True):
        for column, value in row.items():
            got = record[column]
            if pd.isna(value):
                assert got is None
            elif isinstance(value, pd.Timestamp):
                assert pd.Timestamp(got) == value  # to the microsecond
            elif isinstance(value, float):
                assert got == value  # bit for bit: Python's shortest round-trip text
            else:
                assert got == value


def test_show_json_into_a_closed_pipe_is_not_an_error(store: Path) -> None:
    # As `rungway show --json | head -c 1` once the reader has gone: every write fails with EPIPE.
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        done = subprocess.run([sys.executable, "-m", "rungway.scheduler.cli.main", "show", "format-one", "--json",
                               "--store", str(store)], stdout=write_end, stderr=subprocess.PIPE, text=True, timeout=300)
    finally:
        os.close(write_end)
    assert "Traceback" not in done.stderr and "BrokenPipeError" not in done.stderr, done.stderr
    assert done.returncode == 0
