"""With no address, the embedded Ray is a new instance of our own (head/cluster.py): it does not
join a cluster started separately on the machine, whether that cluster is named by
$RAY_ADDRESS or recorded in Ray's ray_current_cluster file, and its files go under a folder of
the user's own. A Ray error at start-up reaches the user as one line, not a traceback."""

from __future__ import annotations

import os
import shutil
import signal
import stat
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from runhelpers import spec_text

from rungway.scheduler.cli.main import main
from rungway.scheduler.head.cluster import RayUnavailable, embedded_ray_root, ray_session


@pytest.fixture
def short_dir() -> Iterator[Path]:
    """A folder with a short path (Ray's unix socket paths are limited to about 107 bytes)."""
    path = Path(tempfile.mkdtemp(prefix="rgw-", dir="/tmp"))
    yield path
    shutil.rmtree(path, ignore_errors=True)


@pytest.fixture
def own_temp(short_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The user's temp folder as tempfile reports it (as $TMPDIR would set it). After tmp_path:
    pytest finds its own base folder through tempfile too."""
    path = short_dir / "mine"
    path.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(path))
    return path


def _free_port() -> int:
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _stop_group(pgid: int) -> None:
    """Stop every process of the group that ``ray start`` made (its own session: nothing else)."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            os.killpg(pgid, sig)
        except ProcessLookupError:
            return
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:  # waiting for the exits, not measuring them
            try:
                os.killpg(pgid, 0)
            except ProcessLookupError:
                return
            time.sleep(0.2)


@pytest.fixture
def other_cluster(short_dir: Path) -> Iterator[str]:
    """A 1-CPU Ray head started separately with `ray start`, as another user or another tool
    would; its files (ray_current_cluster among them) under short_dir/other."""
    import ray

    if ray.is_initialized():
        ray.shutdown()
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if k != "RAY_ADDRESS"}
    env["RAY_TMPDIR"] = str(short_dir / "other")
    env["RAY_AUTH_MODE"] = "disabled"  # so that a plain client joins it (Ray's default is a token)
    command = [str(Path(sys.executable).parent / "ray"), "start", "--head", "--num-cpus", "1", "--port", str(port),
               "--include-dashboard", "false", "--disable-usage-stats"]
    started = subprocess.Popen(command, env=env, start_new_session=True, stdout=subprocess.PIPE,
                               stderr=subprocess.STDOUT, text=True)
    try:
        output, _ = started.communicate(timeout=300)
        assert started.returncode == 0, output
        address = (short_dir / "other" / "ray" / "ray_current_cluster").read_text().strip()
        assert address.endswith(f":{port}")
        yield address
    finally:
        if started.poll() is None:
            started.kill()
            started.wait()
        _stop_group(started.pid)


@pytest.mark.ray
@pytest.mark.parametrize("named_by", ["RAY_ADDRESS", "ray_current_cluster"])
def test_with_no_address_a_new_ray_of_our_own_starts(named_by: str, other_cluster: str, short_dir: Path,
                                                       own_temp: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import ray

    monkeypatch.setenv("RAY_TMPDIR", str(short_dir / "other"))  # where Ray looks for ray_current_cluster
    if named_by == "RAY_ADDRESS":
        monkeypatch.setenv("RAY_ADDRESS", other_cluster)
    # The control: a bare ray.init() joins the other cluster here.
    ray.init(logging_level="ERROR")
    try:
        assert ray.cluster_resources()["CPU"] == 1
    finally:
        ray.shutdown()

    with ray_session(num_cpus=2):
        assert ray.cluster_resources()["CPU"] == 2
        assert "RAY_ADDRESS" not in os.environ
        context = ray.get_runtime_context()
        root = own_temp / f"rungway-{os.getuid()}" / "ray"
        assert context.get_temp_dir() == str(root) == embedded_ray_root()
        assert (root / context.get_session_name()).is_dir()
        assert ray.get(ray.remote(lambda: os.environ.get("RAY_ADDRESS")).remote()) is None
    assert not ray.is_initialized()
    assert os.environ.get("RAY_ADDRESS") == (other_cluster if named_by == "RAY_ADDRESS" else None)
    assert stat.S_IMODE(root.parent.stat().st_mode) == 0o700  # Ray makes root itself 0777: no one else gets in


@pytest.mark.ray
def test_a_ray_error_at_start_up_is_one_line_and_exit_1(own_temp: Path, tmp_path: Path,
                                                         monkeypatch: pytest.MonkeyPatch,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    import ray
    from ray.exceptions import RaySystemError

    from rungway.scheduler.head import executor

    def cancelled(*args: object, **kwargs: object) -> None:
        raise RaySystemError("Actor creation cancelled")

    monkeypatch.setattr(executor, "RayExecutor", cancelled)
    spec = tmp_path / "refused.toml"
    spec.write_text(spec_text("refused"))
    status = main(["run", str(spec), "--store", str(tmp_path / "store"), "--cpus", "1", "--no-probe"])
    err = capsys.readouterr().err
    assert status == 1
    assert "error: Ray failed under the command: RaySystemError: System error: Actor creation cancelled" in err
    assert f"Ray's logs: {own_temp}/rungway-{os.getuid()}/ray/session_" in err
    assert "Traceback" not in err
    assert not ray.is_initialized()


def test_a_folder_of_someone_elses_is_refused_by_name(own_temp: Path, tmp_path: Path) -> None:
    mine = own_temp / f"rungway-{os.getuid()}"
    mine.symlink_to(tmp_path, target_is_directory=True)  # planted where the user's folder goes
    with pytest.raises(RayUnavailable, match=rf"{mine} is not a folder of your own .* set TMPDIR"):
        embedded_ray_root()
    assert not (tmp_path / "ray").exists()


def test_the_users_folder_is_made_private(own_temp: Path) -> None:
    mine = own_temp / f"rungway-{os.getuid()}"
    mine.mkdir(mode=0o777)
    os.chmod(mine, 0o777)
    assert embedded_ray_root() == str(mine / "ray")
    assert stat.S_IMODE(mine.stat().st_mode) == 0o700
    assert (mine / "ray").is_dir()
