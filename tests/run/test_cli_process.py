"""The `rungway` command as a user runs it: a real process with its own embedded Ray."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from runhelpers import HERE, spec_text
from objectives_run import value_at

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]


def env(**extra: str) -> dict[str, str]:
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join([str(HERE), out.get("PYTHONPATH", "")])
    out.update(extra)
    return out


def test_the_demo_beats_scikit_learns_own_reference(tmp_path: Path) -> None:
    """The demo's best validation accuracy on digits must not be worse than scikit-learn's
    MLPClassifier with default settings trained at the full budget with ``fit`` on the same
    split (rungway.workers.demo.reference_accuracy)."""
    from rungway.workers.demo import MLP_MAX_EPOCHS, reference_accuracy

    out = subprocess.run(
        [*RUNGWAY, "demo", "--json", "--store", str(tmp_path / "store")],
        capture_output=True, text=True, timeout=600, env=env(), cwd=tmp_path,
    )
    assert out.returncode == 0, out.stderr
    summary = json.loads(out.stdout)
    assert summary["finished"] is True
    reference = reference_accuracy(MLP_MAX_EPOCHS)
    assert summary["best"]["value"] >= reference, (summary["best"], reference)
    assert summary["best"]["budget"] == MLP_MAX_EPOCHS
    trials = pd.read_parquet(tmp_path / "store" / "searches" / "digits-mlp" / "trials.parquet")
    assert len(trials) == summary["trials"]
    shown = subprocess.run([*RUNGWAY, "show", "digits-mlp", "--json", "--store", str(tmp_path / "store")],
                           capture_output=True, text=True, timeout=120, env=env())
    assert shown.returncode == 0, shown.stderr
    board = json.loads(shown.stdout)["leaderboard"]
    assert board[0]["value"] == pytest.approx(summary["best"]["value"])
    exported = tmp_path / "m.csv"
    done = subprocess.run([*RUNGWAY, "export", "digits-mlp", "--what", "measurements", "--out", str(exported),
                           "--store", str(tmp_path / "store")], capture_output=True, text=True, timeout=120, env=env())
    assert done.returncode == 0, done.stderr
    assert len(pd.read_csv(exported)) > len(trials)


def test_ctrl_c_stops_cleanly_and_the_same_command_resumes(tmp_path: Path) -> None:
    spec = tmp_path / "search.toml"
    spec.write_text(spec_text("interrupted", objective="objectives_run:sleepy", trials=30))
    store = tmp_path / "store"
    command = [*RUNGWAY, "run", str(spec), "--store", str(store), "--json"]
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env(RUNGWAY_TEST_SLEEP="0.3"), cwd=tmp_path)
    trials_file = store / "searches" / "interrupted" / "trials.parquet"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if trials_file.exists() and len(pd.read_parquet(trials_file)) >= 6:
            break
        time.sleep(0.3)
    else:
        proc.kill()
        pytest.fail("the search never got going: " + proc.communicate()[1])
    proc.send_signal(signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 130, stderr
    first = json.loads(stdout)
    assert first["interrupted"] is True and first["finished"] is False
    assert first["trials"] < 30

    again = subprocess.run(command, capture_output=True, text=True, timeout=600,
                           env=env(RUNGWAY_TEST_SLEEP="0.05"), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    second = json.loads(again.stdout)
    assert second["finished"] is True and second["trials"] == 30
    frame = pd.read_parquet(store / "searches" / "interrupted" / "measurements")
    finals = frame[frame["final"]]
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    trials = pd.read_parquet(trials_file).set_index("trial")
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(trials.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    assert set(trials.index) == set(range(30))


def test_a_second_run_of_the_same_search_is_refused_and_a_killed_one_is_taken_over(tmp_path: Path) -> None:
    spec = tmp_path / "search.toml"
    spec.write_text(spec_text("one-writer", objective="objectives_run:sleepy", trials=60))
    store = tmp_path / "store"
    command = [*RUNGWAY, "run", str(spec), "--store", str(store), "--json", "--cpus", "1"]
    first = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             env=env(RUNGWAY_TEST_SLEEP="2"), cwd=tmp_path, start_new_session=True)
    trials_file = store / "searches" / "one-writer" / "trials.parquet"
    try:
        deadline = time.monotonic() + 300  # a bound on waiting for it to start, not a speed
        while not (trials_file.exists() and len(pd.read_parquet(trials_file)) >= 2):
            if time.monotonic() > deadline or first.poll() is not None:
                first.kill()
                pytest.fail("the first run never got going: " + first.communicate()[1])
            time.sleep(0.3)

        second = subprocess.run(command, capture_output=True, text=True, timeout=600, env=env(), cwd=tmp_path)
        assert second.returncode != 0
        assert f"search 'one-writer' is already being run by process {first.pid}" in second.stderr, second.stderr
        assert "Traceback" not in second.stderr
        assert first.poll() is None  # the refused run did not disturb the first
    finally:
        os.killpg(first.pid, signal.SIGKILL)  # kill -9 of the command and its embedded Ray
        first.wait()

    third = subprocess.run(command, capture_output=True, text=True, timeout=900, env=env(RUNGWAY_TEST_SLEEP="0.02"),
                           cwd=tmp_path)
    assert third.returncode == 0, third.stderr
    assert json.loads(third.stdout)["trials"] == 60
    finals = pd.read_parquet(store / "searches" / "one-writer" / "measurements").query("final")
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
