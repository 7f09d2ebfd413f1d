"""Connecting to Ray: join a cluster at an address, or start an embedded local one.

The embedded Ray is always a new instance of our own. With no address, ``ray.init()`` would
join whatever cluster ``$RAY_ADDRESS`` or ``/tmp/ray/ray_current_cluster`` names (another
user's, another run's); here it is told ``address="local"``, ``$RAY_ADDRESS`` is hidden from
it while the session lasts, and its files (session folder, logs, sockets) go under a folder
of the user's own, ``<temp>/rungway-<uid>/ray`` (``<temp>`` is :func:`tempfile.gettempdir`,
or ``/tmp`` when that path is too long for Ray's unix sockets); ``rungway-<uid>`` is made
private to the user (0700), so no one else reaches the sockets, even though Ray makes the
folders inside it writable by all.
"""

from __future__ import annotations

import getpass
import logging
import os
import stat
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from rungway.scheduler.core.errors import RungwayError

__all__ = ["ray_session", "RayUnavailable", "embedded_ray_root"]

# Ray puts its unix sockets at <root>/session_<date>_<time>_<usec>_<pid>/sockets/plasma_store.N;
# a socket's path may not exceed 107 bytes (103 on macOS), which leaves the root about 37.
_ROOT_MAX = 36


class RayUnavailable(RungwayError):
    """Ray could not be started or joined, or failed under the command (not the user's input)."""


def _user() -> str:
    getuid = getattr(os, "getuid", None)
    return str(getuid()) if getuid is not None else getpass.getuser()


def embedded_ray_root() -> str:
    """The embedded Ray's temp folder, ``<temp>/rungway-<uid>/ray``, created private to the user.

    Raises :class:`RayUnavailable` when the user's folder there belongs to someone else, or
    cannot be made."""
    for base in dict.fromkeys([tempfile.gettempdir(), "/tmp"]):
        mine = os.path.join(base, f"rungway-{_user()}")
        if len(os.path.join(mine, "ray")) <= _ROOT_MAX and os.path.isdir(base):
            break
    else:
        raise RayUnavailable(
            f"the temp folder {tempfile.gettempdir()!r} makes too long a path for Ray's unix sockets (the embedded "
            f"Ray's folder, <temp>/rungway-{_user()}/ray, may have at most {_ROOT_MAX} characters) and there is no /tmp: "
            "set TMPDIR to a folder of your own with a short path")
    try:
        os.makedirs(mine, mode=0o700, exist_ok=True)
        _check_private(mine)
        root = os.path.join(mine, "ray")
        os.makedirs(root, exist_ok=True)  # Ray makes it (and what it puts there) 0777: ours keeps others out
    except OSError as exc:
        raise RayUnavailable(f"cannot make the embedded Ray's folder under {mine}: {exc.strerror}; "
                             "set TMPDIR to a folder you can write") from None
    return root


def _check_private(path: str) -> None:
    """``path`` must be a real folder (not a link) owned by this user; it is made 0700."""
    info = os.lstat(path)
    getuid = getattr(os, "getuid", None)
    if not stat.S_ISDIR(info.st_mode) or (getuid is not None and info.st_uid != getuid()):
        raise RayUnavailable(
            f"{path} is not a folder of your own (a link, a file, or another user's): the embedded Ray "
            "will not put its sockets there; remove it, or set TMPDIR to a folder of your own")
    if getuid is not None and stat.S_IMODE(info.st_mode) & 0o077:
        os.chmod(path, 0o700)


@contextmanager
def ray_session(address: str | None = None, num_cpus: int | None = None) -> Iterator[None]:
    """Ray for the duration of a command. With no address, a new embedded local Ray starts here
    (never an existing cluster; see the module's docstring) and stops at the end; the current
    directory is put on the workers' import path so that a local objective module imports
    there as it does here. With an address, that cluster is joined and left at the end.

    Raises :class:`RayUnavailable` when Ray cannot be started or joined, and when a Ray error
    escapes the command (Ray failing under it, e.g. an actor that could not be created)."""
    import ray
    from ray.exceptions import RayError

    if ray.is_initialized():
        yield
        return
    root = None
    if address is None:
        paths = [os.getcwd(), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
        os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
        root = embedded_ray_root()
    # Ray's processes (and the workers they start) inherit this process's environment: the
    # embedded Ray must not see an address to join. Put back when the session ends.
    hidden_address = os.environ.pop("RAY_ADDRESS", None) if address is None else None
    try:
        try:
            if address is None:
                ray.init(address="local", num_cpus=num_cpus, include_dashboard=False, logging_level=logging.WARNING,
                         log_to_driver=True, configure_logging=True, _temp_dir=root)
            else:
                ray.init(address=address, logging_level=logging.WARNING)
        except Exception as exc:
            _shutdown_quietly(ray)  # whatever a failed start left running
            if address is None:
                raise RayUnavailable(f"the embedded Ray did not start: {_first_lines(exc)} (its files are under "
                                     f"{root}; to run on a Ray cluster started separately, pass --address "
                                     "HOST:PORT)") from exc
            raise RayUnavailable(f"cannot join the Ray cluster at {address}: {_first_lines(exc)}; check that it "
                                 f"runs (`ray status --address {address}`), or leave out the address to start "
                                 "an embedded Ray") from exc
        logs = _logs_folder(ray)
        try:
            yield
        except RayError as exc:
            where = f"; Ray's logs: {logs}" if logs else ""
            raise RayUnavailable(f"Ray failed under the command: {_first_lines(exc)}{where}. Once Ray works, "
                                 "the same command resumes the search where it stopped") from exc
        finally:
            ray.shutdown()
            sys.stdout.flush()
    finally:
        if hidden_address is not None:
            os.environ["RAY_ADDRESS"] = hidden_address


def _shutdown_quietly(ray: Any) -> None:
    try:
        ray.shutdown()
    except Exception:  # noqa: BLE001  # already failing, with a better message
        pass


def _logs_folder(ray: Any) -> str | None:
    """Where this session's Ray writes its logs on this machine (None if Ray does not say)."""
    try:
        context = ray.get_runtime_context()
        return os.path.join(context.get_temp_dir(), context.get_session_name(), "logs")
    except Exception:  # noqa: BLE001  # only a hint is lost
        return None


def _first_lines(exc: BaseException, most: int = 3) -> str:
    lines = [line for line in str(exc).splitlines() if line.strip()]
    text = " ".join(line.strip() for line in lines[:most]) or "(no message)"
    return f"{type(exc).__name__}: {text}"
