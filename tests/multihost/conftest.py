"""A three-host lab on this machine, brought up with the deploy/ scripts as a lab admin would.

``lab_cluster`` (module scope) builds three network namespaces (tests/multihost/netns.py),
writes one settings file per host in the format of deploy/rungway.env.example, starts the
Ray head on host 1 with deploy/start-ray-head.sh and joins hosts 2 and 3 with
deploy/join-ray-worker.sh. The shared store is a temporary directory (the filesystem is
shared between namespaces, as an NFS mount would be). Everything is torn down at the end of
the module, whatever happened. ``start_lab_cluster`` does the same as a context manager, for
tests that need a fresh cluster of their own (after killing a host, say).
"""

from __future__ import annotations

import contextlib
import json
import os
import secrets
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
DEPLOY = ROOT / "deploy"
RUN_TESTS = ROOT / "tests" / "run"  # objectives_run lives here; every host imports it from here
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(RUN_TESTS))

from netns import Hosts  # noqa: E402

# Variables the deploy scripts and drivers see; everything else of the test's own environment
# stays out, as it would under systemd.
_PASSED_THROUGH = ("PATH", "LANG", "LC_ALL", "TERM", "TZ")


@dataclass
class LabCluster:
    """A running three-host lab. ``hosts`` is the netns harness; host 1 is the Ray head."""

    hosts: Hosts
    work: Path  # this cluster's own folder: settings files, token, HOME, specs
    store: Path
    token_path: Path
    env_files: dict[str, Path]  # short host name -> its settings file
    head_address: str
    extra_settings: dict[str, str]
    base_env: dict[str, str] = field(default_factory=dict)

    @property
    def env(self) -> dict[str, str]:
        """A driver's environment: what run-search.sh sets up, for commands run directly."""
        return {
            **self.base_env,
            "RAY_AUTH_MODE": "token",
            "RAY_AUTH_TOKEN_PATH": str(self.token_path),
            "PYTHONPATH": str(RUN_TESTS),
            "RUNGWAY_STORE": str(self.store),
            **self.extra_settings,
        }

    @property
    def venv_bin(self) -> Path:
        return Path(sys.executable).parent

    def env_file(self, host: str | int) -> Path:
        return self.env_files[self.hosts.short_names[self.hosts.names.index(self.hosts.ns(host))]]

    # ---- the deploy scripts ---------------------------------------------------------------

    def deploy(self, script: str, host: str | int, *args: str, timeout: float = 180,
               check: bool = True) -> subprocess.CompletedProcess[str]:
        """Run ``deploy/<script> --env <host's settings> ARGS`` inside ``host``."""
        cmd = [str(DEPLOY / script), "--env", str(self.env_file(host)), *args]
        out = self.hosts.run(host, cmd, self.base_env, inherit=False, timeout=timeout, cwd=self.work)
        if check and out.returncode != 0:
            raise AssertionError(f"{script} on {host} failed ({out.returncode}):\n{out.stdout}\n{out.stderr}")
        return out

    def deploy_popen(self, script: str, host: str | int, *args: str) -> subprocess.Popen[str]:
        cmd = [str(DEPLOY / script), "--env", str(self.env_file(host)), *args]
        return self.hosts.popen(host, cmd, self.base_env, inherit=False, cwd=self.work)

    def rejoin(self, host: str | int) -> None:
        """Bring a worker host back after ``kill_host`` or a cut link: stop what is left of its
        Ray (stop-ray.sh), then join-ray-worker.sh --background. Its node comes back with a new
        node id; the old one stays dead in ``ray.nodes()``."""
        self.deploy("stop-ray.sh", host, "--grace", "3")
        self.deploy("join-ray-worker.sh", host, "--background")

    # ---- drivers on host 1 ------------------------------------------------------------------

    def write_spec(self, name: str, text: str | None = None, **kwargs: Any) -> Path:
        """Write a spec file for search ``name``: ``text``, or :func:`spec_text` (name, kwargs)."""
        text = spec_text(name, **kwargs) if text is None else text
        path = self.work / "specs" / f"{name}.toml"
        path.parent.mkdir(exist_ok=True)
        path.write_text(text)
        return path

    def run_search(self, spec: Path, *args: str, host: str | int = 1, timeout: float = 300
                   ) -> subprocess.CompletedProcess[str]:
        """``deploy/run-search.sh SPEC ARGS`` inside ``host`` (default: the head), to the end."""
        return self.deploy("run-search.sh", host, str(spec), *args, timeout=timeout, check=False)

    def start_search(self, spec: Path, *args: str, host: str | int = 1) -> subprocess.Popen[str]:
        """``deploy/run-search.sh SPEC ARGS`` inside ``host``, not waited for (stdout and stderr
        are pipes; teardown kills it if it is still running)."""
        return self.deploy_popen("run-search.sh", host, str(spec), *args)

    def rungway(self, *args: str, host: str | int = 1, timeout: float = 300,
                env: Mapping[str, str | None] | None = None) -> subprocess.CompletedProcess[str]:
        """``rungway ARGS`` inside ``host`` with the driver environment (for ``rungway run
        SPEC --address ...`` with other options, ``show``, ``export``)."""
        return self.hosts.run(host, [str(self.venv_bin / "rungway"), *args], {**self.env, **(env or {})},
                              inherit=False, timeout=timeout, cwd=self.work)

    def python(self, code: str, host: str | int = 1, timeout: float = 120) -> subprocess.CompletedProcess[str]:
        """Run a Python snippet inside ``host`` with the driver environment; ``HEAD`` in the
        snippet's globals is the head's address."""
        prelude = f"HEAD = {self.head_address!r}\n"
        return self.hosts.run(host, [sys.executable, "-c", prelude + code], self.env, inherit=False,
                              timeout=timeout, cwd=self.work)

    def ray_nodes(self, host: str | int = 1) -> list[dict[str, Any]]:
        """``ray.nodes()`` as a driver inside ``host`` sees it: NodeID, NodeManagerAddress, Alive."""
        code = (
            "import json, logging, ray\n"
            "ray.init(address=HEAD, logging_level=logging.ERROR, log_to_driver=False)\n"
            "print('NODES=' + json.dumps([{k: n[k] for k in ('NodeID', 'NodeManagerAddress', 'Alive')} for n in ray.nodes()]))\n"
        )
        errors = []
        for _ in range(3):  # a driver can fail to start while a node is going away; try again
            out = self.python(code, host)
            found = [line[6:] for line in out.stdout.splitlines() if line.startswith("NODES=")]
            if out.returncode == 0 and found:
                return json.loads(found[-1])
            lines = (out.stdout + out.stderr).splitlines()
            errors.append("\n".join(lines[:25] + ["..."] + lines[-5:]) if len(lines) > 40 else out.stderr)
            time.sleep(1)
        raise AssertionError(f"ray.nodes() on {host} failed three times:\n" + "\n-----\n".join(errors))

    def wait_for_nodes(self, count: int, timeout: float = 90) -> list[dict[str, Any]]:
        """Until ``count`` nodes are alive (a bounded wait, not a timing check)."""
        deadline = time.monotonic() + timeout
        while True:
            nodes = self.ray_nodes()
            alive = [n for n in nodes if n["Alive"]]
            if len(alive) >= count:
                return alive
            if time.monotonic() > deadline:
                raise AssertionError(f"{len(alive)} of {count} Ray nodes alive after {timeout}s: {nodes}")
            time.sleep(1)

    def wait_for_node(self, address: str, alive: bool, timeout: float = 120) -> list[dict[str, Any]]:
        """Until the node at ``address`` is reported alive (or dead, or gone) by ``ray.nodes()``
        on the head; returns the node table then. A bounded wait, not a timing check."""
        deadline = time.monotonic() + timeout
        while True:
            nodes = self.ray_nodes()
            state = any(n["Alive"] for n in nodes if n["NodeManagerAddress"] == address)
            if state == alive:
                return nodes
            if time.monotonic() > deadline:
                raise AssertionError(f"the node at {address} is not {'alive' if alive else 'dead'} after {timeout}s: {nodes}")
            time.sleep(1)

    def logs(self, host: str | int, pattern: str = "*.err", tail: int = 30) -> str:
        """The ends of ``host``'s Ray logs (for failure messages)."""
        out = []
        for path in sorted(Path(self.hosts.temp_dir(host)).glob(f"session_latest/logs/{pattern}")):
            with contextlib.suppress(OSError):
                lines = path.read_text(errors="replace").splitlines()[-tail:]
                out.append(f"--- {path}\n" + "\n".join(lines))
        return "\n".join(out)


def _settings(lab: LabCluster, short: str, ns: str, extra: Mapping[str, str]) -> str:
    hosts = lab.hosts
    lines = {
        "RUNGWAY_STORE": str(lab.store),
        "RUNGWAY_VENV": str(Path(sys.executable).parent.parent),
        "RUNGWAY_PYTHONPATH": str(RUN_TESTS),
        "RAY_HEAD_ADDRESS": lab.head_address,
        "RAY_AUTH_MODE": "token",
        "RAY_AUTH_TOKEN_PATH": str(lab.token_path),
        "NODE_IP": hosts.addresses[ns],
        "RAY_TEMP_DIR": hosts.temp_dirs[ns],
        "CPUS": "1",
        "RUNGWAY_NODE": short,
        "RAY_OBJECT_STORE_MEMORY": str(100 * 1024 * 1024),
        "RAY_JOIN_TIMEOUT": "120",
        **extra,
    }
    return "# written by tests/multihost/conftest.py\n" + "".join(f"{k}={v}\n" for k, v in lines.items())


@contextlib.contextmanager
def start_lab_cluster(work: Path, n: int = 3, extra_settings: Mapping[str, str] | None = None) -> Iterator[LabCluster]:
    """Build ``n`` hosts, start the head on host 1 and join the rest, with the deploy scripts.
    ``extra_settings`` are added to (or override) every host's settings file; as the file is
    exported into ``ray start``'s environment, every Ray process there sees them: a test
    objective's knobs (RUNGWAY_TEST_SLEEP) or Ray's own (RAY_health_check_period_ms=1000,
    RAY_health_check_timeout_ms=1000 make the GCS declare a cut-off node dead sooner).
    The driver environment (``env``) gets them too."""
    ray_bin = Path(sys.executable).parent / "ray"
    if not ray_bin.exists():
        pytest.skip(f"no ray next to {sys.executable}: the deploy scripts need the venv's bin folder")
    hosts = Hosts(n)
    try:
        work.mkdir(parents=True, exist_ok=True)
        home = work / "home"
        home.mkdir(exist_ok=True)
        token = work / "ray-auth-token"
        token.write_text(secrets.token_hex(32))
        token.chmod(0o600)
        store = work / "store"
        store.mkdir(exist_ok=True)
        base_env = {k: os.environ[k] for k in _PASSED_THROUGH if k in os.environ}
        base_env["HOME"] = str(home)  # nothing of this cluster lands in the real ~/.ray
        lab = LabCluster(
            hosts=hosts, work=work, store=store, token_path=token, env_files={},
            head_address=f"{hosts.address(1)}:6379", extra_settings=dict(extra_settings or {}), base_env=base_env,
        )
        for short, ns in zip(hosts.short_names, hosts.names):
            path = work / f"{short}.env"
            path.write_text(_settings(lab, short, ns, lab.extra_settings))
            lab.env_files[short] = path
        lab.deploy("start-ray-head.sh", 1, "--background")
        joins = [(short, lab.deploy_popen("join-ray-worker.sh", short, "--background")) for short in hosts.short_names[1:]]
        for short, proc in joins:
            stdout, stderr = proc.communicate(timeout=180)
            if proc.returncode != 0:
                raise AssertionError(f"join-ray-worker.sh on {short} failed ({proc.returncode}):\n{stdout}\n{stderr}")
        lab.wait_for_nodes(n)
        yield lab
    finally:
        try:
            for short in hosts.short_names:
                with contextlib.suppress(Exception):
                    hosts.run(short, [str(DEPLOY / "stop-ray.sh"), "--env", str(work / f"{short}.env"), "--grace", "3"],
                              inherit=False, env={"PATH": os.environ.get("PATH", "/usr/bin:/bin")}, timeout=60)
        finally:
            hosts.teardown()


@pytest.fixture(scope="module")
def lab_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LabCluster]:
    """Three hosts, Ray head on host 1, hosts 2 and 3 joined; Ray workers sleep
    RUNGWAY_TEST_SLEEP=0.5 s in objectives_run.sleepy."""
    with start_lab_cluster(tmp_path_factory.mktemp("lab"), extra_settings={"RUNGWAY_TEST_SLEEP": "0.5"}) as lab:
        yield lab


def spec_text(name: str, objective: str = "objectives_run:sleepy", *, trials: int = 18, mode: str = "asha",
              min_budget: int = 1, max_budget: int = 9, seed: int = 3) -> str:
    """A search of one real parameter ``x`` in [0, 1] (the objectives in objectives_run)."""
    from runhelpers import spec_text as run_spec_text

    return run_spec_text(name, objective, mode=mode, trials=trials, min_budget=min_budget,
                         max_budget=max_budget, seed=seed)


__all__ = ["LabCluster", "lab_cluster", "spec_text", "start_lab_cluster"]
