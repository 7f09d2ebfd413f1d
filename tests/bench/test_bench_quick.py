"""Every benchmark script runs at its smallest sizes and produces well-formed JSON with the
keys the runner (bench/run.py) reads, and the runner renders a report from them.

Speed is not tested here (no timing assertions): the figures at these sizes mean nothing.
Each script runs once (cached for the module) through the runner's own ``run_bench`` with
the flags of its "smoke" plan, so what is tested is what ``bench/run.py`` runs.
"""

from __future__ import annotations

import importlib.util
import json
import math
import sys
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
BENCH = ROOT / "bench"


def _load(name: str, path: Path) -> Any:
    spec = importlib.util.spec_from_file_location(name, path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


RUNNER = _load("rungway_bench_run", BENCH / "run.py")
SVG = _load("rungway_bench_svg", BENCH / "svg.py")

_RESULTS: dict[str, dict[str, Any]] = {}


@pytest.fixture(scope="module")
def dirs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("bench")
    (base / "scratch").mkdir()
    (base / "figures").mkdir()
    return {"scratch": base / "scratch", "figures": base / "figures", "base": base}


def smoke(name: str, dirs: dict[str, Path]) -> dict[str, Any]:
    """The runner's result for one benchmark at the smoke sizes (run once per module)."""
    if name not in _RESULTS:
        bench = next(b for b in RUNNER.plan("smoke", str(dirs["figures"])) if b.name == name)
        _RESULTS[name] = RUNNER.run_bench(bench, dirs["scratch"])
        _RESULTS[name]["what"] = bench.what
    result = _RESULTS[name]
    assert result["errors"] == [], result["errors"]
    assert len(result["runs"]) == bench_invocations(name, dirs)
    return result


def bench_invocations(name: str, dirs: dict[str, Path]) -> int:
    return next(b.invocations for b in RUNNER.plan("smoke", str(dirs["figures"])) if b.name == name)


def spread_ok(s: Any) -> None:
    assert set(s) >= {"median", "min", "max"}, s
    if s["median"] is not None:
        assert s["min"] <= s["median"] <= s["max"], s


def number(x: Any) -> None:
    assert isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x), x


# ---- one check per script -------------------------------------------------------------------------


def check_core_cost(data: dict[str, Any]) -> None:
    assert [r["n"] for r in data["rows"]] == [1000, 10000]
    for row in data["rows"]:
        for key in ("pairs", "pairs_per_s", "first10_pairs_per_s", "last10_pairs_per_s", "loop_cpu_pairs_per_s",
                    "bytes_per_trial", "bytes_per_trial_with_configs"):
            number(row[key])
    assert set(data["snapshot"]) >= {"n", "snapshot_s", "restore_s", "json_bytes"}
    assert set(data["tracemalloc"]) >= {"retained_per_trial", "peak_per_trial"}


def check_dispatch(data: dict[str, Any]) -> None:
    for key in ("raw_ray_tasks_per_s", "rungway_segments_per_s", "ratio", "busy_fraction_100ms",
                "busy_fraction_100ms_steady"):
        spread_ok(data[key])
        number(data[key]["median"])


def check_utilization(data: dict[str, Any]) -> None:
    assert set(data["sim"]["modes"]) == {"asha", "hyperband", "sync-halving", "full-budget"}
    for mode in data["sim"]["modes"].values():
        for key in ("busy_steady", "busy_whole", "wall_hours"):
            spread_ok(mode[key])
        assert 0 < mode["busy_steady"]["median"] <= 1 + 1e-9
    real = data["real"]["modes"]
    assert set(real) == {"asha", "hyperband", "sync-halving", "full-budget", "ray-replay"}
    for name, mode in real.items():
        spread_ok(mode["busy_steady"])
        assert 0 < mode["busy_steady"]["median"] <= 1 + 1e-9, (name, mode)
        if name != "ray-replay":
            for key in ("busy_whole", "wall_s", "startup_s", "busy_cpu_s", "head_cpu_s", "segments"):
                spread_ok(mode[key])
    assert isinstance(data["met_sim"], bool) and isinstance(data["met_real"], bool)


def check_quality(data: dict[str, Any]) -> None:
    assert data["objectives"], data
    for obj in data["objectives"].values():
        assert set(obj["methods"]) == {"asha", "hyperband", "sync-halving", "baseline"}
        assert set(obj["targets"]) >= {"sklearn-default"}
        for method in obj["methods"].values():
            for key in ("best_at_equal_cpu", "best_final", "cpu_used_s", "head_counted_cpu_s", "wall_s", "trials"):
                spread_ok(method[key])
            assert 0 <= method["best_final"]["median"] <= 1
            for reach in method["to_target"].values():
                spread_ok(reach["cpu_s"])
                done, total = (int(x) for x in reach["reached"].split("/"))
                assert 0 <= done <= total
        for curves in obj["curves"].values():
            for curve in curves:
                xs = [point[0] for point in curve]
                assert xs == sorted(xs) and all(len(point) == 3 for point in curve)
        assert Path(obj["svg"]).exists()
        ET.parse(obj["svg"])
        assert "ratio" in obj["asha_vs_one_training"]["sklearn-default"]


def check_recovery(data: dict[str, Any]) -> None:
    for key in ("notice_seconds", "requeue_to_resubmit_seconds", "segments_lost", "units_redone"):
        spread_ok(data[key])
    assert data["runs"] == 1


def check_journal_replay(data: dict[str, Any]) -> None:
    assert data["events"] == 2000
    spread_ok(data["replay_seconds"])
    number(data["events_per_second"])


def check_sim_scale(data: dict[str, Any]) -> None:
    assert set(data["scale"]) >= {"trials", "workers", "real_seconds", "events", "segments_per_s", "utilization"}
    workers = sorted({row["workers"] for row in data["throughput"]})
    assert workers == [1, 10, 100, 1000, 10000]
    for row in data["throughput"]:
        for key in ("segments_per_hour", "budget_per_hour", "budget_per_worker", "utilization"):
            number(row[key])


def check_sim_accuracy(data: dict[str, Any]) -> None:
    search = data["searches"]["sleepy-linear"]
    assert len(search["runs"]) == 2 and "next_run" in search["runs"][1]
    for row in search["runs"]:
        for kind in ("in_sample", "next_run"):
            if kind in row:
                number(row[kind]["wall_error"])
                number(row[kind]["cpu_error"])
                assert row[kind]["wall_s"]["low"] <= row[kind]["wall_s"]["median"] <= row[kind]["wall_s"]["high"]
                number(row[kind]["fit"]["seconds_per_unit"])
        number(row["measured"]["wall_s"])
    assert isinstance(search["met"], bool) and isinstance(data["met"], bool)


def check_sharing_round(data: dict[str, Any]) -> None:
    assert (data["teams"], data["searches"], data["waiting"]) == (50, 500, 10_000)  # the sizes
    for case in ("steady", "cold", "preempting"):
        assert 0 < data[case]["median_ms"] <= data[case]["p99_ms"]
    assert data["steady"]["rounds"] == 20 and data["steady"]["grants_per_round"] > 0
    assert data["preempting"]["preemptions_per_round"] > 0


def check_lab_round(data: dict[str, Any]) -> None:
    assert (data["teams"], data["searches"]) == (10, 50)  # --quick sizes
    assert data["running_segments"] > 0 and data["segments_ended_per_turn"] > 0
    assert data["waiting_segments_counted"] > 0
    for key in ("turn_ms", "sharing_round_ms"):
        assert 0 < data[key]["median"] <= data[key]["p99"]
    number(data["first_turn_ms"])


def check_accounting(data: dict[str, Any]) -> None:
    assert data["limit_cpu_s"] == 6.0 and data["cpus"] == 2  # --smoke
    assert [(r["method"], r["form"]) for r in data["runs"]] == [
        ("asha", "plain"), ("asha", "resumable"), ("hyperband", "plain"), ("hyperband", "resumable"), ("baseline", "plain")]
    for run in data["runs"]:
        assert run["objective_calls"] > 0 and run["objective_pids"] >= 1
        for key in ("workers_per_slot", "objective_cpu_s", "worker_os_cpu_s", "extra_cpu", "overshoot", "wall_s"):
            number(run[key])
        if run["method"] != "baseline":
            number(run["charged_cpu_s"])
            number(run["charged_over_os"])
            assert run["listener_cpu_s"] == pytest.approx(run["charged_cpu_s"])
            assert isinstance(run["overshoot_met"], bool)
    for name, figures in data["summary"].items():
        for key in ("workers_per_slot", "extra_cpu", "overshoot", "objective_cpu_s"):
            spread_ok(figures[key])


CHECKS = {
    "accounting": check_accounting,
    "sharing_round": check_sharing_round, "lab_round": check_lab_round,
    "core_cost": check_core_cost, "dispatch": check_dispatch, "utilization": check_utilization,
    "quality": check_quality, "recovery": check_recovery, "journal_replay": check_journal_replay,
    "sim_scale": check_sim_scale, "sim_accuracy": check_sim_accuracy,
}


def test_every_benchmark_of_the_runner_has_a_check(dirs: dict[str, Path]) -> None:
    assert {b.name for b in RUNNER.plan("smoke", str(dirs["figures"]))} == set(CHECKS)
    assert [b.name for b in RUNNER.plan("quick", "f")] == [b.name for b in RUNNER.plan("full", "f")]


@pytest.mark.slow
@pytest.mark.ray
@pytest.mark.parametrize("name", list(CHECKS))
def test_benchmark_runs_and_writes_well_formed_json(name: str, dirs: dict[str, Path]) -> None:
    result = smoke(name, dirs)
    for data in result["runs"]:
        json.dumps(data)  # plain JSON all the way down
        CHECKS[name](data)


@pytest.mark.slow
@pytest.mark.ray
def test_the_runner_renders_every_section(dirs: dict[str, Path]) -> None:
    results = [smoke(name, dirs) for name in CHECKS]
    out = dirs["base"] / "BENCHMARKS.md"
    text = RUNNER.write_report(RUNNER.environment(), results, "smoke", out, dirs["figures"], 1.0, ([], []))
    assert all(not r["errors"] for r in results), [r["errors"] for r in results]
    for heading in ("## Summary", "## Scheduling core", "## Dispatch overhead", "## Utilization",
                    "## Search quality per CPU-second", "## Recovery", "## Journal replay", "## Simulator scale",
                    "## Sharing round", "## Lab head turn", "## Accounting",
                    "## Simulator accuracy"):
        assert heading in text
    summary = text.split("## Summary", 1)[1].split("## Runs", 1)[0]
    rows = [line for line in summary.splitlines() if line.startswith("| ") and not line.startswith("| benchmark")]
    assert {row.split(" | ")[0].lstrip("| ") for row in rows} == set(CHECKS)
    assert all(row.count(" | ") == 5 for row in rows)
    ET.parse(dirs["figures"] / "sim-scaling.svg")


# ---- the pieces that need no benchmark run -------------------------------------------------------------


def test_line_plot_writes_well_formed_svg(tmp_path: Path) -> None:
    path = SVG.line_plot({"a": [(0, 0.5), (1, 0.7), (3, 0.9)], "b": [(1, 0.2)], "empty": []}, tmp_path / "p.svg",
                         title="t <&>", xlabel="x", ylabel="y", step=True, hline=(0.8, "ref"))
    root = ET.parse(path).getroot()
    assert root.tag.endswith("svg")
    ns = {"s": "http://www.w3.org/2000/svg"}
    assert len(root.findall("s:polyline", ns)) == 1  # "b" has one point (a marker), "empty" none
    assert root.findall("s:circle", ns)
    log = SVG.line_plot({"w": [(1, 10), (10, 100), (10000, 1e5)]}, tmp_path / "log.svg", logx=True, logy=True)
    ET.parse(log)


def test_nice_ticks_cover_the_range() -> None:
    ticks = SVG.nice_ticks(0.93, 0.99)
    assert ticks and ticks[0] >= 0.93 - 1e-9 and ticks[-1] <= 0.99 + 1e-9
    assert SVG.nice_ticks(5, 5) == [5]


def test_last_json_finds_the_object_after_log_lines() -> None:
    text = 'noise {not json\n[raylet] x\n{\n  "a": 1\n}\nmore\n{"b": {"c": 2}}\n'
    assert RUNNER.last_json(text) == {"b": {"c": 2}}
    assert RUNNER.last_json("nothing here") is None
