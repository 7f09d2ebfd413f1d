"""Several "hosts" on one machine, for the multi-host tests: one network namespace per host.

Each host is a network namespace with a veth pair into a bridge in the root namespace. Each
``Hosts`` gets a /24 of its own inside the benchmark-testing range 198.18.0.0/15, the first
free 198.18.k.0/24: the bridge is 198.18.k.1 and the hosts are 198.18.k.11, .12, ... The
namespaces have no default route, so nothing started in them can send to any address outside
that /24. The filesystem and the process table are shared with the machine, so a directory
serves as the shared store (as an NFS mount would); every host has its own Ray temp dir under
/tmp (short: Ray's socket paths must stay under 107 characters).

    hosts = Hosts(3)            # namespaces rw<pid>-<n>-h1 .. -h3 on bridge rwbr<k>
    try:
        hosts.run("h1", ["ip", "-4", "addr"])                 # CompletedProcess, text
        proc = hosts.popen(1, ["python", "-c", "..."], env={"X": "1"})
        hosts.address("h2"), hosts.temp_dir("h2"), hosts.pids("h2")
        hosts.kill_host("h2")   # kill -9 every process in that namespace
        hosts.cut_link("h3"); hosts.restore_link("h3")
    finally:
        hosts.teardown()        # idempotent; also `with Hosts(3) as hosts:`

Hosts are named by their short name (``"h1"``), their 1-based index (``1``) or the full
namespace name (``"rw1234-0-h1"``). ``env`` is laid over this process's environment, or over
a bare one (PATH only) with ``inherit=False``. Needs root and ``ip netns``; otherwise the
constructor calls ``pytest.skip`` with the reason. What a killed test run left behind (its
pid is gone) is removed when the next ``Hosts`` is built.

Why teardown does not call ``ray stop --force``: ``ray stop`` finds Ray's processes by name in
the machine's one process table, not per namespace or per temp dir, so inside one namespace it
would kill every host's Ray and any other Ray running on the machine. Teardown instead kills
exactly the processes ``ip netns pids`` lists for each host (SIGTERM, then SIGKILL).
"""

from __future__ import annotations

import contextlib
import fcntl
import itertools
import os
import re
import shutil
import signal
import subprocess
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

import pytest

__all__ = ["Hosts", "HostsUnavailable", "netns_unavailable_reason"]

SUBNET_PREFIX = "198.18"  # inside the benchmark-testing range 198.18.0.0/15, nothing else
LOCK_PATH = "/run/rungway-test-netns.lock"
OWNER_ALIAS = "rungway-test-owner="  # stored as the bridge's ifalias
MAX_SOCKET_PATH = 107  # AF_UNIX sun_path limit; Ray's socket paths must stay below it

Command = str | Sequence[str]
_SEQUENCE = itertools.count()
_NS_NAME = re.compile(r"^rw(\d+)-(\d+)-h(\d+)$")


class HostsUnavailable(RuntimeError):
    """This machine cannot build namespaces (not root, or no ``ip netns``)."""


def _ip(*args: str, check: bool = True) -> subprocess.CompletedProcess[str]:
    return subprocess.run(["ip", *args], capture_output=True, text=True, check=check, timeout=30)


def netns_unavailable_reason() -> str | None:
    """Why namespaces cannot be built here, or None when they can."""
    if os.geteuid() != 0:
        return "the multi-host tests need root (network namespaces, veths and a bridge)"
    if shutil.which("ip") is None:
        return "no `ip` command (iproute2) on this machine"
    try:
        probe = _ip("netns", "list", check=False)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"`ip netns` is unavailable: {exc}"
    if probe.returncode != 0:
        return f"`ip netns` is unavailable: {probe.stderr.strip()}"
    return None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class Hosts:
    """``n`` hosts in network namespaces on one bridge. See the module docstring."""

    def __init__(self, n: int = 3, *, ray_tmp_root: str = "/tmp", keep_temp: bool = False) -> None:
        reason = netns_unavailable_reason()
        if reason is not None:
            pytest.skip(reason)
        if not 1 <= n <= 200:
            raise ValueError(f"between 1 and 200 hosts, not {n}")
        self.owner = os.getpid()
        self.seq = next(_SEQUENCE)
        tag = f"rw{self.owner}-{self.seq}"
        self.keep_temp = keep_temp
        self._torn_down = False
        self._popens: list[subprocess.Popen[str]] = []
        self._made: list[tuple[str, str]] = []  # ("netns" | "link", name) in creation order
        self.short_names = [f"h{i}" for i in range(1, n + 1)]
        self.names = [f"{tag}-h{i}" for i in range(1, n + 1)]
        self.temp_dirs = {name: f"{ray_tmp_root}/{tag}h{i}" for i, name in enumerate(self.names, 1)}
        try:
            with self._lock():
                _sweep_stale()
                self.k = self._free_subnet()
                self.bridge = f"rwbr{self.k}"
                self.bridge_ip = f"{SUBNET_PREFIX}.{self.k}.1"
                self.addresses = {name: f"{SUBNET_PREFIX}.{self.k}.{10 + i}" for i, name in enumerate(self.names, 1)}
                self._build_bridge()
            for i, name in enumerate(self.names, 1):
                self._build_host(i, name)
        except HostsUnavailable as exc:
            self.teardown()
            pytest.skip(str(exc))
        except BaseException:
            self.teardown()
            raise

    # ---- naming --------------------------------------------------------------------------

    def ns(self, host: str | int) -> str:
        """The namespace name of ``host`` (short name, 1-based index or full name)."""
        if isinstance(host, int):
            if not 1 <= host <= len(self.names):
                raise KeyError(f"no host {host}: hosts are 1..{len(self.names)}")
            return self.names[host - 1]
        if host in self.names:
            return host
        if host in self.short_names:
            return self.names[self.short_names.index(host)]
        raise KeyError(f"no host {host!r}: hosts are {self.short_names} ({self.names})")

    def address(self, host: str | int) -> str:
        return self.addresses[self.ns(host)]

    def temp_dir(self, host: str | int) -> str:
        return self.temp_dirs[self.ns(host)]

    def bridge_veth(self, host: str | int) -> str:
        """The bridge-side end of ``host``'s veth pair (what ``cut_link`` takes down)."""
        return f"rw{self.k}h{self.names.index(self.ns(host)) + 1}b"

    def __iter__(self):  # type: ignore[no-untyped-def]
        return iter(self.names)

    def __len__(self) -> int:
        return len(self.names)

    # ---- running things inside a host ----------------------------------------------------

    def environ(self, env: Mapping[str, str | None] | None = None, inherit: bool = True) -> dict[str, str]:
        """This process's environment (or, with ``inherit=False``, an empty one) with ``env`` on
        top; a value of None removes the name."""
        out = dict(os.environ) if inherit else {"PATH": os.environ.get("PATH", "/usr/sbin:/usr/bin:/sbin:/bin")}
        for key, value in (env or {}).items():
            if value is None:
                out.pop(key, None)
            else:
                out[key] = value
        return out

    def _argv(self, host: str | int, cmd: Command) -> list[str]:
        argv = ["bash", "-c", cmd] if isinstance(cmd, str) else list(cmd)
        return ["ip", "netns", "exec", self.ns(host), *argv]

    def run(self, host: str | int, cmd: Command, env: Mapping[str, str | None] | None = None, *,
            inherit: bool = True, timeout: float = 120, check: bool = False,
            cwd: str | os.PathLike[str] | None = None) -> subprocess.CompletedProcess[str]:
        """Run ``cmd`` (argv list, or a string for bash -c) inside ``host`` and wait for it;
        ``env`` and ``inherit`` as for :meth:`environ`."""
        out = subprocess.run(self._argv(host, cmd), env=self.environ(env, inherit), capture_output=True, text=True,
                             timeout=timeout, cwd=cwd)
        if check and out.returncode != 0:
            raise subprocess.CalledProcessError(out.returncode, out.args, out.stdout, out.stderr)
        return out

    def popen(self, host: str | int, cmd: Command, env: Mapping[str, str | None] | None = None, *,
              inherit: bool = True, **kwargs: object) -> subprocess.Popen[str]:
        """Start ``cmd`` inside ``host``; stdout and stderr are pipes unless given. Teardown
        kills and reaps it if it is still running."""
        kwargs.setdefault("stdout", subprocess.PIPE)
        kwargs.setdefault("stderr", subprocess.PIPE)
        kwargs.setdefault("text", True)
        proc: subprocess.Popen[str] = subprocess.Popen(self._argv(host, cmd), env=self.environ(env, inherit), **kwargs)  # type: ignore[call-overload]
        self._popens.append(proc)
        return proc

    def pids(self, host: str | int) -> list[int]:
        """Every process in ``host``'s namespace (``ip netns pids``)."""
        out = _ip("netns", "pids", self.ns(host), check=False)
        return [int(p) for p in out.stdout.split() if p.strip().isdigit()]

    # ---- faults ----------------------------------------------------------------------------

    def kill_host(self, host: str | int) -> list[int]:
        """``kill -9`` every process in ``host``, again until none is left (Ray restarts workers
        while it dies). Returns the pids killed. The namespace and its link stay up."""
        return _kill_all(self.ns(host), signal.SIGKILL)

    def cut_link(self, host: str | int) -> None:
        """Take the bridge side of ``host``'s veth down: its packets go nowhere, and nothing in
        it is told (no reset), as when a cable is pulled."""
        _ip("link", "set", self.bridge_veth(host), "down")

    def restore_link(self, host: str | int) -> None:
        _ip("link", "set", self.bridge_veth(host), "up")

    # ---- building and tearing down -------------------------------------------------------

    @contextlib.contextmanager
    def _lock(self):  # type: ignore[no-untyped-def]
        with open(LOCK_PATH, "a") as handle:
            fcntl.flock(handle, fcntl.LOCK_EX)
            try:
                yield
            finally:
                fcntl.flock(handle, fcntl.LOCK_UN)

    def _free_subnet(self) -> int:
        taken = _ip("-4", "-o", "addr", "show").stdout + _ip("-4", "route", "show").stdout
        links = _ip("-o", "link", "show").stdout
        for k in range(1, 255):
            if f" {SUBNET_PREFIX}.{k}." not in taken and f": rwbr{k}:" not in links and f": rwbr{k}@" not in links:
                return k
        raise HostsUnavailable(f"no free /24 left in {SUBNET_PREFIX}.0.0/16 for a test bridge")

    def _made_link(self, name: str) -> None:
        self._made.append(("link", name))

    def _build_bridge(self) -> None:
        made = _ip("link", "add", self.bridge, "type", "bridge", check=False)
        if made.returncode != 0:
            raise HostsUnavailable(f"cannot create a bridge: {made.stderr.strip()}")
        self._made_link(self.bridge)
        _ip("link", "set", self.bridge, "alias", f"{OWNER_ALIAS}{self.owner}")
        _ip("addr", "add", f"{self.bridge_ip}/24", "dev", self.bridge)
        _ip("link", "set", self.bridge, "up")

    def _build_host(self, i: int, name: str) -> None:
        made = _ip("netns", "add", name, check=False)
        if made.returncode != 0:
            raise HostsUnavailable(f"cannot create a network namespace: {made.stderr.strip()}")
        self._made.append(("netns", name))
        outside, inside = f"rw{self.k}h{i}b", f"rw{self.k}h{i}n"
        made = _ip("link", "add", outside, "type", "veth", "peer", "name", inside, check=False)
        if made.returncode != 0:
            raise HostsUnavailable(f"cannot create a veth pair: {made.stderr.strip()}")
        self._made_link(outside)
        _ip("link", "set", outside, "master", self.bridge)
        _ip("link", "set", outside, "up")
        _ip("link", "set", inside, "netns", name)
        _ip("-n", name, "link", "set", "lo", "up")
        _ip("-n", name, "addr", "add", f"{self.addresses[name]}/24", "dev", inside)
        _ip("-n", name, "link", "set", inside, "up")
        temp = self.temp_dirs[name]
        # Ray's longest socket path is about <temp>/session_<date>_<time>_<us>_<pid>/sockets/plasma_store.
        if len(temp) + 70 > MAX_SOCKET_PATH:
            raise ValueError(f"Ray temp dir {temp} is too long for Ray's socket paths")
        os.makedirs(temp, exist_ok=True)

    def teardown(self) -> None:
        """Kill every process in every host, delete the namespaces, veths and bridge, and the
        hosts' temp dirs. Safe to call again, and after a partial build."""
        if self._torn_down:
            return
        self._torn_down = True
        errors: list[str] = []
        namespaces = [name for kind, name in self._made if kind == "netns"]
        for name in namespaces:  # the polite signal first, to everyone at once, then -9
            _kill_all(name, signal.SIGTERM, rounds=1)
        if namespaces:
            deadline = time.monotonic() + 3.0
            while time.monotonic() < deadline and any(_ns_pids(n) for n in namespaces):
                time.sleep(0.1)
        for name in namespaces:
            _kill_all(name, signal.SIGKILL)
        for proc in self._popens:
            with contextlib.suppress(Exception):
                if proc.poll() is None:
                    proc.kill()
                proc.communicate(timeout=10)
        for kind, name in reversed(self._made):
            if kind == "netns":
                left = _ns_pids(name)
                if left:
                    errors.append(f"{name}: processes {left} would not die")
                out = _ip("netns", "del", name, check=False)
            else:
                out = _ip("link", "del", name, check=False)
            if out.returncode != 0 and "Cannot find" not in out.stderr and "No such" not in out.stderr \
                    and "does not exist" not in out.stderr:
                errors.append(f"{kind} {name}: {out.stderr.strip()}")
        if not self.keep_temp:
            for temp in self.temp_dirs.values():
                shutil.rmtree(temp, ignore_errors=True)
        if errors:
            raise RuntimeError("teardown left something behind: " + "; ".join(errors))

    def __enter__(self) -> Hosts:
        return self

    def __exit__(self, *exc: object) -> None:
        self.teardown()


def _ns_pids(name: str) -> list[int]:
    out = _ip("netns", "pids", name, check=False)
    return [int(p) for p in out.stdout.split() if p.strip().isdigit()]


def _kill_all(name: str, sig: signal.Signals, rounds: int = 50) -> list[int]:
    killed: list[int] = []
    me = os.getpid()
    for _ in range(rounds):
        pids = [p for p in _ns_pids(name) if p != me]
        if not pids:
            break
        for pid in pids:
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, sig)
                killed.append(pid)
        if sig != signal.SIGKILL:
            break
        time.sleep(0.05)
    return killed


def _sweep_stale() -> None:
    """Remove what an earlier run of this harness left behind when it was killed before its
    teardown ran: namespaces ``rw<pid>-<n>-h<i>`` and bridges owned by a pid that is gone."""
    for line in _ip("netns", "list", check=False).stdout.splitlines():
        match = _NS_NAME.match(line.split()[0] if line.split() else "")
        if match is None or _pid_alive(int(match.group(1))):
            continue
        _kill_all(match.group(0), signal.SIGKILL)
        _ip("netns", "del", match.group(0), check=False)
        shutil.rmtree(f"/tmp/rw{match.group(1)}-{match.group(2)}h{match.group(3)}", ignore_errors=True)
    for path in Path("/sys/class/net").glob("rwbr*"):
        try:
            alias = (path / "ifalias").read_text().strip()
        except OSError:
            continue
        if alias.startswith(OWNER_ALIAS) and alias[len(OWNER_ALIAS):].isdigit() \
                and not _pid_alive(int(alias[len(OWNER_ALIAS):])):
            for port in (path / "brif").glob("*"):
                _ip("link", "del", port.name, check=False)
            _ip("link", "del", path.name, check=False)
