"""Nothing waits silently: a trial no node can hold is refused at the start, a cluster left
with no CPUs stops the run with its reason, and the last working node is never set aside."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from runhelpers import HERE, spec_text

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.head.driver import HealthSettings, SearchDriver
from rungway.scheduler.head.executor import InlineExecutor
from rungway.scheduler.spec import parse_spec
from rungway.scheduler.store import Store


class NoCpus(InlineExecutor):
    """A cluster whose every node has gone: nothing can start."""

    def capacity(self) -> float:
        return 0.0


def test_a_cluster_with_no_cpus_stops_the_run_with_its_reason(tmp_path: Path) -> None:
    now = [0.0]
    text = spec_text("no-cpus", trials=4)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), NoCpus(cpus=1), clock=lambda: now[0],
                          health=HealthSettings(no_cpus_timeout=120.0))
    driver.begin()
    for _ in range(1000):
        if driver.over:
            break
        driver.step()
        now[0] += 5.0
    report = driver.end()
    assert report.paused_reason is not None and "the cluster has had no CPUs for 120s" in report.paused_reason
    assert 120.0 <= now[0] <= 130.0  # stopped at the first health check past the limit
    assert not report.finished


def test_a_trial_larger_than_every_node_is_refused_before_anything_is_written(tmp_path: Path) -> None:
    text = spec_text("too-big", trials=4).replace("cpus = 1", "cpus = 4")
    with pytest.raises(SpecError, match=r"resources.cpus: one trial asks for 4 CPUs .* the largest node has 2 CPUs"):
        SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=2))
    assert Store(str(tmp_path)).list_searches() == []


@pytest.mark.ray
def test_run_refuses_a_trial_larger_than_the_embedded_ray(tmp_path: Path) -> None:
    spec = tmp_path / "big.toml"
    spec.write_text(spec_text("too-big", trials=4).replace("cpus = 1", "cpus = 2"))
    done = subprocess.run([sys.executable, "-m", "rungway.scheduler.cli.main", "run", str(spec), "--cpus", "1",
                           "--store", str(tmp_path / "store"), "--no-probe"], capture_output=True, text=True,
                          timeout=600, env={**os.environ, "PYTHONPATH": str(HERE)})
    assert done.returncode == 2, done.stderr
    assert "one trial asks for 2 CPUs and 0 MB, but the largest node has 1 CPUs" in done.stderr
    assert "Traceback" not in done.stderr
    assert Store(str(tmp_path / "store")).list_searches() == []


@pytest.mark.ray
@pytest.mark.slow
def test_a_killed_raylet_stops_the_run_instead_of_waiting_forever(tmp_path: Path) -> None:
    # The run as `rungway run` does it, in a process of its own, with the raylet of its
    # embedded Ray killed (kill -9) while segments run.
    script = textwrap.dedent(f"""
        import os, signal, subprocess, sys, threading, time
        sys.path.insert(0, {str(HERE)!r})
        from runhelpers import spec_text
        from rungway.scheduler.head.cluster import ray_session
        from rungway.scheduler.head.driver import HealthSettings, SearchDriver
        from rungway.scheduler.head.executor import RayExecutor
        from rungway.scheduler.spec import parse_spec
        os.environ["RUNGWAY_TEST_SLEEP"] = "1"
        text = spec_text("raylet-gone", objective="objectives_run:sleepy", trials=40)
        with ray_session(None, 1):
            driver = SearchDriver(parse_spec(text), text, {str(tmp_path)!r}, RayExecutor(),
                                  health=HealthSettings(no_cpus_timeout=5.0))
            def kill_raylet():
                while driver.segments < 2:
                    time.sleep(0.2)
                mine = subprocess.run(["pgrep", "-f", "-P", str(os.getpid()), "raylet/raylet"],
                                      capture_output=True, text=True).stdout.split()
                for pid in mine:
                    os.kill(int(pid), signal.SIGKILL)
                print("killed", mine, flush=True)
            threading.Thread(target=kill_raylet, daemon=True).start()
            report = driver.run()
            print("REASON", report.paused_reason, flush=True)
            os._exit(0)  # the embedded Ray is half gone: no orderly shutdown to wait for
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=900,
                          env={**os.environ, "PYTHONPATH": str(HERE)})
    assert "killed [" in done.stdout and "killed []" not in done.stdout, done.stdout + done.stderr
    assert "REASON the cluster has had no CPUs" in done.stdout, done.stdout + done.stderr


def test_the_last_node_known_to_work_is_never_set_aside(tmp_path: Path) -> None:
    text = spec_text("one-node", trials=4)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=1),
                          health=HealthSettings(node_failure_limit=3))
    for _ in range(5):
        driver._count_node_failure("only-node")  # noqa: SLF001 (the health rule on its own)
    assert driver.quarantined == {}  # a one-node cluster keeps its node: no silent wait
    driver._count_node_failure("other-node")  # noqa: SLF001
    for _ in range(3):
        driver._count_node_failure("bad-node")  # noqa: SLF001
    assert set(driver.quarantined) == {"bad-node"}  # with another node known, a failing one is set aside
