"""``rungway run`` on a search that can only fail (issue #10): a real process with its own
embedded Ray ends with exit status 4 and prints the first failure, instead of holding its CPUs
forever. The exit statuses are the command's own (scheduler/cli/main.py's docstring)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from runhelpers import HERE, spec_text

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]
EXIT_FAILING = 4


def env() -> dict[str, str]:
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join([str(HERE), out.get("PYTHONPATH", "")])
    return out


@pytest.mark.parametrize(("objective", "first"), [
    ("objectives_dying:exits_three", "SystemExit: the objective exited with exit code 3"),
    ("objectives_dying:exits_at_once", "WorkerCrashedError: the worker process died"),
    ("objectives_dying:interrupts", "KeyboardInterrupt: the objective raised KeyboardInterrupt"),
    ("objectives_dying:kills_itself", "WorkerCrashedError: the worker process died"),
])
def test_run_exits_4_and_prints_the_first_failure(tmp_path: Path, objective: str, first: str) -> None:
    name = objective.split(":")[1].replace("_", "-")
    spec = tmp_path / "search.toml"
    spec.write_text(spec_text(name, objective=objective, trials=4))
    store = tmp_path / "store"
    # --no-probe: the search itself must meet the failure (the probe would stop it first).
    done = subprocess.run([*RUNGWAY, "run", str(spec), "--store", str(store), "--cpus", "2", "--no-probe", "--json"],
                          capture_output=True, text=True, timeout=900, env=env(), cwd=tmp_path)
    assert done.returncode == EXIT_FAILING, done.stderr
    summary = json.loads(done.stdout)
    assert summary["finished"] is False and summary["failing"] == "every trial failed (4 of 4)"
    assert first in summary["first_failure"]
    assert "first failure: trial " in done.stderr and first in done.stderr
    failures = pd.read_parquet(store / "searches" / name / "failures")
    assert len(failures) == 8  # 4 trials x (max_crashes = 1) + 1 attempts, each recorded once
    assert not failures.duplicated(["trial", "attempt"]).any()
    trials = pd.read_parquet(store / "searches" / name / "trials.parquet")
    assert (trials["status"] == "failed").all() and (trials["failures"] == 2).all()
