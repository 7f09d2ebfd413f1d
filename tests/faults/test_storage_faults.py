"""Storage faults: a store that fills up and a read-only store. The search stops with a
message that says what to fix (exit status 3), nothing already written is lost, and running
the same command again once the fault is fixed finishes it with every result exact.

Needs root (mounts a small tmpfs and a read-only bind mount); skipped otherwise."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from objectives_run import value_at  # noqa: E402
from runhelpers import spec_text  # noqa: E402

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]


def env() -> dict[str, str]:
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join([str(RUN), out.get("PYTHONPATH", "")])
    return out


def mount(*args: str) -> None:
    subprocess.run(["mount", *args], check=True, capture_output=True)


@pytest.fixture()
def small_disk(tmp_path: Path):
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    where = tmp_path / "disk"
    where.mkdir()
    try:
        mount("-t", "tmpfs", "-o", "size=1m", "tmpfs", str(where))
    except (subprocess.CalledProcessError, FileNotFoundError) as exc:
        pytest.skip(f"cannot mount a tmpfs here: {exc}")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


def check_exact(store: Path, name: str, trials: int) -> None:
    frame = pd.read_parquet(store / "searches" / name / "measurements")
    finals = frame[frame["final"]]
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    table = pd.read_parquet(store / "searches" / name / "trials.parquet").set_index("trial")
    assert set(table.index) == set(range(trials))
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)


def test_a_full_disk_pauses_the_search_and_it_resumes_when_space_is_freed(small_disk: Path, tmp_path: Path) -> None:
    spec = tmp_path / "full.toml"
    spec.write_text(spec_text("full", objective="objectives_run:padded", trials=12))
    command = [*RUNGWAY, "run", str(spec), "--store", str(small_disk), "--json"]
    first = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env(), cwd=tmp_path)
    assert first.returncode == 3, first.stderr
    assert "no space left" in first.stderr and "free space" in first.stderr
    summary = json.loads(first.stdout)
    assert summary["paused"] and not summary["finished"]
    mount("-o", "remount,size=256m", str(small_disk))  # the admin frees space
    second = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env(), cwd=tmp_path)
    assert second.returncode == 0, second.stderr
    assert json.loads(second.stdout)["finished"] is True
    check_exact(small_disk, "full", 12)


def test_a_read_only_store_stops_with_a_message_and_resumes_once_writable(tmp_path: Path) -> None:
    if os.geteuid() != 0:
        pytest.skip("a read-only bind mount needs root")
    store = tmp_path / "store"
    store.mkdir()
    spec = tmp_path / "ro.toml"
    spec.write_text(spec_text("ro", objective="objectives_run:resumable", trials=9))
    command = [*RUNGWAY, "run", str(spec), "--store", str(store), "--json"]
    # Start the search, then make its store read-only underneath it and run again.
    warm = subprocess.run([*command[:-1], "--json"], capture_output=True, text=True, timeout=300, env=env(), cwd=tmp_path)
    assert warm.returncode == 0, warm.stderr
    spec.write_text(spec_text("ro2", objective="objectives_run:resumable", trials=9))
    try:
        mount("--bind", str(store), str(store))
        mount("-o", "remount,bind,ro", str(store))
    except subprocess.CalledProcessError as exc:
        pytest.skip(f"cannot make a read-only bind mount here: {exc.stderr!r}")
    try:
        blocked = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env(), cwd=tmp_path)
        assert blocked.returncode == 3, blocked.stderr
        assert "read-only" in blocked.stderr and "writable" in blocked.stderr
    finally:
        subprocess.run(["umount", str(store)], capture_output=True)
    again = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env(), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    check_exact(store, "ro", 9)
    check_exact(store, "ro2", 9)
