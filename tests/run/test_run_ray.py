"""Searches on real Ray: a local instance and a 3-node cluster from ray.cluster_utils."""

from __future__ import annotations

import math

import pyarrow.parquet as pq
import pytest
from runhelpers import spec_text
from objectives_run import value_at

from rungway.scheduler.head.driver import SearchDriver
from rungway.scheduler.head.executor import RayExecutor
from rungway.scheduler.spec import parse_spec
from rungway.scheduler.store import MEASUREMENTS_SCHEMA, Store

pytestmark = pytest.mark.ray


def run_search(text: str, root: str) -> SearchDriver:
    spec = parse_spec(text)
    driver = SearchDriver(spec, text, root, RayExecutor())
    report = driver.run()
    assert report.finished
    return driver


def test_resumed_segments_equal_one_uninterrupted_run(local_ray, tmp_path) -> None:
    """Checkpoint correctness: a trial paused and resumed at every rung reports, at each rung
    budget, exactly what one uninterrupted run to that budget computes (objectives_run.value_at)."""
    driver = run_search(spec_text("resume", trials=27), str(tmp_path))
    frame = driver.files.read_measurements()
    finals = frame[frame["final"]]
    assert len(finals) > 27  # promotions happened
    trials = driver.files.read_trials().set_index("trial")
    promoted = finals[finals["rung"] > 0]
    assert not promoted.empty
    for row in finals.itertuples():
        x = trials.loc[row.trial, "space_x"]
        assert row.value == pytest.approx(value_at(x, int(row.budget)), abs=1e-12), row
    # every trial that reached rung k was resumed from its checkpoint at rung k-1's budget
    assert set(promoted["attempt"]) != {1}


def test_parquet_outputs_match_the_documented_schema(local_ray, tmp_path) -> None:
    driver = run_search(spec_text("schema", objective="objectives_run:plain", trials=12), str(tmp_path))
    folder = tmp_path / "searches" / "schema" / "measurements"
    files = sorted(folder.glob("*.parquet"))
    assert files
    for path in files:
        assert pq.read_schema(path).remove_metadata().equals(MEASUREMENTS_SCHEMA.remove_metadata()), path
    trials = pq.read_table(tmp_path / "searches" / "schema" / "trials.parquet")
    for column in ("trial", "status", "rung", "budget_reached", "latest_value", "record_value", "attempts", "failures", "space_x"):
        assert column in trials.column_names
    assert trials.num_rows == 12
    # every measurement has exactly one row per key
    frame = driver.files.read_measurements()
    assert not frame.duplicated(["trial", "rung", "attempt", "seq", "metric"]).any()


def test_crashing_trials_are_retried_then_failed_and_the_search_goes_on(local_ray, tmp_path) -> None:
    text = spec_text("fails", objective="objectives_run:always_fails", trials=4)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), RayExecutor())
    report = driver.run()
    # Every trial failed: the search ends failing, not finished (docs/scheduling.md, Failures).
    assert not report.finished and report.failing == "every trial failed (4 of 4)"
    states = {t.state for t in driver.core.trials()}
    assert states == {"failed"}
    failures = driver.files.read_failures()
    assert len(failures) == 8  # max_crashes = 1: two attempts per trial
    assert failures["message"].str.contains("always fails").all()
    assert failures["traceback"].str.contains("ValueError").all()


def test_segments_run_on_every_node_of_a_three_node_cluster(three_node_cluster, tmp_path) -> None:
    import ray

    assert len([n for n in ray.nodes() if n["Alive"]]) == 3
    text = spec_text("spread", objective="objectives_run:sleepy", trials=18)
    driver = run_search(text, str(tmp_path))
    frame = driver.files.read_measurements()
    nodes = set(frame["node"])
    assert len(nodes) == 3, nodes
    finals = frame[frame["final"]]
    trials = driver.files.read_trials().set_index("trial")
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(trials.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    assert not math.isnan(driver.statistics()["best"]["value"])


def test_run_prints_the_notes_of_the_spec_check(local_ray, tmp_path, capsys) -> None:
    from rungway.scheduler.cli.main import main

    path = tmp_path / "plain.toml"
    path.write_text(spec_text("notes", objective="objectives_run:plain", trials=3))
    assert main(["run", str(path), "--store", str(tmp_path / "store"), "--no-probe"]) == 0
    err = capsys.readouterr().err
    assert "note: objective: 'objectives_run:plain' takes (config, budget), so every promoted trial trains again" in err
