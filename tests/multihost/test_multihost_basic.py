"""A search on a three-host lab brought up with the deploy/ scripts (see conftest.py)."""

from __future__ import annotations

import json
import secrets
import shutil
import sys
from pathlib import Path

import pytest
from objectives_run import value_at

pytestmark = [pytest.mark.ray, pytest.mark.slow]

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"


def test_a_search_started_with_run_search_sh_runs_on_all_three_hosts(lab_cluster) -> None:
    spec = lab_cluster.write_spec("lab-basic", objective="objectives_run:sleepy", trials=18)
    out = lab_cluster.run_search(spec, "--json")
    assert out.returncode == 0, f"{out.stdout}\n{out.stderr}\n{lab_cluster.logs(1)}"
    summary = json.loads(out.stdout)
    assert summary["finished"] is True
    assert summary["trials"] == 18
    assert summary["store"] == str(lab_cluster.store / "searches" / "lab-basic")

    from rungway.scheduler.store import Store

    files = Store(str(lab_cluster.store)).search("lab-basic")
    trials = files.read_trials().set_index("trial")
    assert len(trials) == 18
    frame = files.read_measurements()
    # RUNGWAY_NODE (the settings file's per-machine name) is the node column's host part.
    hosts = {node.split("/")[0] for node in frame["node"]}
    assert hosts == {"h1", "h2", "h3"}, frame["node"].value_counts()
    finals = frame[frame["final"]]
    assert (finals["rung"] > 0).any()  # promotions happened
    for row in finals.itertuples():
        x = trials.loc[row.trial, "space_x"]
        assert row.value == pytest.approx(value_at(x, int(row.budget)), abs=1e-12), row


def test_every_host_is_a_ray_node_at_its_own_address(lab_cluster) -> None:
    nodes = lab_cluster.ray_nodes(host=2)  # a driver on a worker host sees the same cluster
    alive = sorted(n["NodeManagerAddress"] for n in nodes if n["Alive"])
    assert alive == sorted(lab_cluster.hosts.addresses.values())


def test_a_driver_without_the_token_is_refused(lab_cluster) -> None:
    env = {**lab_cluster.env, "RAY_AUTH_MODE": None, "RAY_AUTH_TOKEN_PATH": None}
    out = lab_cluster.hosts.run(
        1, [sys.executable, "-c", f"import ray; ray.init(address={lab_cluster.head_address!r})"],
        env, inherit=False, timeout=120,
    )
    assert out.returncode != 0
    assert "auth" in out.stderr.lower(), out.stderr[-2000:]


def test_a_machine_with_another_token_cannot_join(lab_cluster, tmp_path: Path) -> None:
    bad = tmp_path / "other-token"
    bad.write_text(secrets.token_hex(32))
    bad.chmod(0o600)
    settings = tmp_path / "h3-other-token.env"
    settings.write_text(lab_cluster.env_file(3).read_text().replace(str(lab_cluster.token_path), str(bad)))
    out = lab_cluster.hosts.run(3, [str(DEPLOY / "join-ray-worker.sh"), "--env", str(settings), "--background"],
                                lab_cluster.base_env, inherit=False, timeout=180)
    assert out.returncode == 2, out.stderr
    assert "refused this machine's token" in out.stderr


@pytest.mark.skipif(shutil.which("nft") is None, reason="nftables (nft) is not installed")
def test_the_firewall_example_drops_ray_ports_from_outside_the_lab_subnet(tmp_path: Path) -> None:
    """deploy/firewall.nft loaded inside host 3, with host 1 as the whole 'lab subnet': host 1
    reaches a listener on host 3's GCS port and on a worker port, host 2 gets no answer."""
    from netns import Hosts

    text = (DEPLOY / "firewall.nft").read_text()
    with Hosts(3) as hosts:
        assert "define lab_net = 10.20.0.0/24" in text
        rules = tmp_path / "firewall.nft"
        rules.write_text(text.replace("define lab_net = 10.20.0.0/24", f"define lab_net = {hosts.address(1)}/32"))
        loaded = hosts.run(3, ["nft", "-f", str(rules)])
        assert loaded.returncode == 0, loaded.stderr
        listener = hosts.popen(3, [sys.executable, "-c", (
            "import socket, threading\n"
            f"servers = [socket.create_server(({hosts.address(3)!r}, p)) for p in (6379, 10500, 7000)]\n"
            "def serve(s):\n"
            "    while True:\n"
            "        s.accept()[0].close()\n"
            "for s in servers[1:]:\n"
            "    threading.Thread(target=serve, args=(s,), daemon=True).start()\n"
            "print('up', flush=True)\n"
            "serve(servers[0])\n"
        )])
        assert listener.stdout is not None and listener.stdout.readline().strip() == "up"

        def reach(host: int, port: int) -> str:
            probe = (
                "import socket\n"
                "try:\n"
                f"    socket.create_connection(({hosts.address(3)!r}, {port}), timeout=2).close(); print('open')\n"
                "except OSError as exc:\n"
                "    print(type(exc).__name__)\n"
            )
            return hosts.run(host, [sys.executable, "-c", probe], timeout=30).stdout.strip()

        assert reach(1, 6379) == "open"
        assert reach(1, 10500) == "open"
        assert reach(2, 6379) == "TimeoutError"  # dropped: no answer at all
        assert reach(2, 10500) == "TimeoutError"
        assert reach(2, 7000) == "open"  # not a Ray port: left to the machine's own firewall


def test_stop_ray_sh_stops_one_host_and_leaves_the_others_running(lab_cluster) -> None:
    """Runs last in this module: host 3 is gone afterwards."""
    hosts = lab_cluster.hosts
    before = {h: len(hosts.pids(h)) for h in ("h1", "h2")}
    out = lab_cluster.deploy("stop-ray.sh", 3, "--grace", "5")
    assert "stopped" in out.stderr
    assert hosts.pids(3) == []
    assert all(len(hosts.pids(h)) >= 1 for h in ("h1", "h2")), before
    nodes = lab_cluster.wait_for_node(hosts.address(3), alive=False)
    alive = {n["NodeManagerAddress"] for n in nodes if n["Alive"]}
    assert alive == {hosts.address(1), hosts.address(2)}
