"""The planner and ``rungway plan`` on the bundled demo spec.

Outside figures: the demo spec's own arithmetic (``rungway.workers.demo.DEMO_SPEC``, its
``[limits]`` comment) counts 1 + 2/3 + 6/9 + 18/27 = 3 epochs per trial, 216 epochs for 72
trials: successive halving's proportions. ASHA (Li et al., MLSys 2020, Algorithm 2; recalled
from memory) promotes any trial in the current top floor(n/eta) of a rung that is not yet
promoted, so by the time it drains at least floor(n_k/eta) trials left rung k -- and often more,
since a trial promoted early may later fall out of the top 1/eta. Hence a lower bound of
72 + 24*2 + 8*6 + 2*18 = 204 epochs, not an equality.
"""

from __future__ import annotations

import argparse
import json
import math
from datetime import datetime, timedelta, timezone

import pytest

from rungway.scheduler.cli import plan_cmd
from rungway.scheduler.sim import DEFAULT_SECONDS_PER_UNIT, LinearCost, plan_search
from rungway.scheduler.spec import parse_spec
from rungway.workers.demo import DEMO_SPEC

DEMO = parse_spec(DEMO_SPEC, "<demo>")


def test_planner_on_the_demo_spec():
    est = plan_search(DEMO, workers=4, repeats=8, seed=0)
    for iv in (est.wall_seconds, est.cpu_hours, est.utilization):
        assert math.isfinite(iv.median) and iv.median > 0
        assert iv.low <= iv.median <= iv.high
    assert est.cost_is_default and "default" in " ".join(est.notes)
    assert est.drained == est.repeats == 8
    assert est.slots == 4
    assert est.trials_per_rung[0][0].median == est.trials_per_rung[0][0].low == 72  # every trial reports at rung 0
    assert est.budgets == ((1, 3, 9, 27),)
    # busy time cannot beat the slots: wall >= CPU time / slots, for each run
    for run in est.runs:
        assert run.wall_seconds * 4 >= run.cpu_hours * 3600 * (1 - 1e-9)
    # the runs differ (sampler and values change with the seed), so the interval is real
    assert len({run.wall_seconds for run in est.runs}) > 1


def test_demo_epochs_match_the_specs_arithmetic():
    est = plan_search(DEMO, workers=4, cost=LinearCost(1.0), repeats=8, seed=1)
    increments = (1, 2, 6, 18)  # epochs from the rung below to this one, 1..27 with eta 3
    for run in est.runs:
        counts = run.trials_per_rung[0]
        epochs = run.cpu_hours * 3600  # 1 s per epoch, 1 CPU per trial
        assert epochs == pytest.approx(sum(c * d for c, d in zip(counts, increments, strict=True)))
        assert epochs == pytest.approx(run.budget_run)
        assert counts[0] == 72
        for k in range(3):
            assert counts[k + 1] >= counts[k] // 3
        assert epochs >= 204
    # and the default cost is DEFAULT_SECONDS_PER_UNIT times that, exactly
    default = plan_search(DEMO, workers=4, repeats=8, seed=1)
    assert default.cpu_hours.median == pytest.approx(DEFAULT_SECONDS_PER_UNIT * est.cpu_hours.median, rel=1e-9)
    assert default.wall_seconds.median == pytest.approx(DEFAULT_SECONDS_PER_UNIT * est.wall_seconds.median, rel=1e-9)


def test_more_workers_finish_sooner_and_quota_caps_them():
    few = plan_search(DEMO, workers=2, repeats=4)
    many = plan_search(DEMO, workers=16, repeats=4)
    capped = plan_search(DEMO, workers=16, quota_cpus=2, repeats=4)
    assert many.wall_seconds.median < few.wall_seconds.median
    assert capped.slots == 2
    assert capped.wall_seconds.median == pytest.approx(few.wall_seconds.median)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="rungway")
    plan_cmd.add_parser(parser.add_subparsers(dest="command"))
    return parser


@pytest.fixture
def demo_file(tmp_path):
    path = tmp_path / "digits.toml"
    path.write_text(DEMO_SPEC)
    return path


def test_cli_prints_the_estimate(demo_file, capsys):
    args = _parser().parse_args(["plan", str(demo_file), "--workers", "4", "--repeats", "5"])
    assert plan_cmd.run(args) == 0
    out = capsys.readouterr().out
    assert "plan for digits-mlp" in out
    assert "wall time" in out and "CPU-hours" in out and "results per rung" in out
    assert "DEFAULT" in out
    assert "epochs 1: 72 [72-72]" in out


def test_cli_json_and_seconds_per_unit(demo_file, capsys):
    args = _parser().parse_args(["plan", str(demo_file), "--workers", "4", "--repeats", "5", "--json",
                                 "--seconds-per-unit", "2"])
    assert plan_cmd.run(args) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["cost_is_default"] is False
    assert data["cost"].startswith("linear: 2 s per budget unit (epochs)")
    wall = data["wall_seconds"]
    assert wall["low"] <= wall["median"] <= wall["high"]
    expected = plan_search(DEMO, workers=4, cost=LinearCost(2.0), repeats=5)
    assert wall["median"] == pytest.approx(expected.wall_seconds.median)
    assert [r["budget"] for r in data["brackets"][0]["rungs"]] == [1, 3, 9, 27]
    assert data["brackets"][0]["s"] == 3  # Li et al.'s s: four rungs, starting at the minimum budget


def test_cli_fits_the_cost_to_a_finished_search(demo_file, tmp_path, capsys):
    from rungway.scheduler.store import Store

    files = Store(str(tmp_path / "store")).search("digits-mlp")
    files.write_spec(DEMO_SPEC)
    t0 = datetime(2026, 1, 1, tzinfo=timezone.utc)
    clock = t0
    for trial in range(12):
        for rung, (start, target) in enumerate([(0, 1), (1, 3), (3, 9)][: 1 + trial % 3]):
            seconds = 0.5 + 3.0 * (target - start)  # 3 s per epoch, 0.5 s per segment
            end = clock + timedelta(seconds=seconds)
            files.write_measurements([dict(trial=trial, rung=rung, attempt=rung + 1, seq=0, budget=float(target),
                                           metric="accuracy", value=0.9, final=True, node="n",
                                           started_at=clock, ended_at=end)])
            clock = end
    args = _parser().parse_args(["plan", str(demo_file), "--workers", "4", "--repeats", "3",
                                 "--from-search", "digits-mlp", "--store", str(tmp_path / "store"), "--json"])
    assert plan_cmd.run(args) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["cost_is_default"] is False
    # 24 segments; the first, which also started the worker, is left out of the fit.
    assert data["cost"].startswith("fitted to 23 measured segments: 3 s per budget unit (epochs) + 0.5 s per segment")
    expected = plan_search(DEMO, workers=4, cost=LinearCost(3.0, 0.5), repeats=3)
    # The fitted line equals the true one to ~1e-15 s; segments of equal cost then end in
    # an order set by those last bits, so the simulated searches differ a little.
    assert data["wall_seconds"]["median"] == pytest.approx(expected.wall_seconds.median, rel=0.1)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--from-search", "x"], "--from-search needs --store"),
        (["--from-search", "nope", "--store", "STORE"], "no search named 'nope'"),
    ],
)
def test_cli_input_mistakes_exit_2(demo_file, tmp_path, capsys, argv, message):
    argv = [a.replace("STORE", str(tmp_path)) for a in argv]
    args = _parser().parse_args(["plan", str(demo_file), "--workers", "2", *argv])
    assert plan_cmd.run(args) == 2
    assert message in capsys.readouterr().err


def test_cli_unreadable_spec_exits_2(tmp_path, capsys):
    args = _parser().parse_args(["plan", str(tmp_path / "missing.toml"), "--workers", "2"])
    assert plan_cmd.run(args) == 2
    assert "cannot read the spec file" in capsys.readouterr().err


def test_planner_refuses_an_unlimited_asynchronous_search():
    unlimited = parse_spec(DEMO_SPEC.replace("trials = 72", ""), "<demo>")
    with pytest.raises(Exception, match="limits.trials"):
        plan_search(unlimited, workers=2, repeats=1)
