"""``rungway head --config lab.toml``: the head as a long-running process.

Theory of operation, in order: load and check the lab config (a mistake: exit 2, nothing
started); bind the listening socket (so a taken port fails before Ray starts, and the line
saying where it listens is true when printed); start Ray (embedded, or join
``head.ray_address``); build and start ``LabHead``; serve the API with uvicorn until SIGTERM
or SIGINT. Then uvicorn stops accepting, finishes the requests in flight, and the head is
stopped (running segments are requeued from their checkpoints, state written); exit 0.
A config mistake is exit 2 with the located message; a port that cannot be bound, exit 1.
"""

from __future__ import annotations

import contextlib
import logging
import signal
import socket
import sys
from collections.abc import Iterator
from typing import Any

import uvicorn

from rungway.scheduler.core.errors import SpecError

__all__ = ["serve"]

EXIT_USER_ERROR = 2
EXIT_ENVIRONMENT = 1
_LOGGER = "rungway"  # the lab loop (rungway.lab), the API and its audit lines


def serve(config_path: str) -> int:
    """Run the head from the lab config at ``config_path`` until SIGTERM or SIGINT; 0 then."""
    from rungway.scheduler.service.config import load_lab_config

    try:
        config = load_lab_config(config_path)  # also refuses a non-loopback host without allow_remote
    except SpecError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    head_config = config.head
    try:
        sock = _listen(head_config.host, head_config.port)
    except OSError as exc:
        print(f"error: cannot listen on {head_config.host}:{head_config.port}: {exc.strerror} "
              f"(another head running? choose another head.port in {config_path})", file=sys.stderr)
        return EXIT_ENVIRONMENT
    with sock:
        _log_to(config.log_path)
        return _run(config, sock)


def _run(config: Any, sock: socket.socket) -> int:
    from rungway.scheduler.head.cluster import ray_session
    from rungway.scheduler.service.api import make_app
    from rungway.scheduler.service.auth import Authenticator
    from rungway.scheduler.service.lab import LabHead

    head_config = config.head
    # "" and 0 in the config mean: an embedded Ray, with all of this machine's CPUs.
    with ray_session(head_config.ray_address or None, head_config.ray_cpus or None):
        head = LabHead(config)
        head.start()
        try:
            app = make_app(head, Authenticator(config), max_body_bytes=head_config.max_body_kb * 1024,
                           teams=[team.name for team in config.teams])
            # access_log off: the API writes its own audit line per request.
            server = _Server(uvicorn.Config(app, log_level="warning", access_log=False, lifespan="off"))
            host, port = sock.getsockname()[:2]
            shown = f"[{host}]" if ":" in host else host
            print(f"rungway head listening on http://{shown}:{port} ({len(config.teams)} teams; "
                  f"Ray {head_config.ray_address or 'embedded'}); SIGTERM or Ctrl-C stops it", flush=True)
            server.run(sockets=[sock])
        finally:
            print("rungway head stopping: requeueing running segments", file=sys.stderr, flush=True)
            head.stop()
    return 0


class _Server(uvicorn.Server):
    """uvicorn's server, except on SIGTERM/SIGINT: uvicorn re-raises the signal once it has
    shut down (so the process dies of it); we still have to stop the head, then exit 0."""

    @contextlib.contextmanager
    def capture_signals(self) -> Iterator[None]:
        previous = {sig: signal.signal(sig, self.handle_exit) for sig in (signal.SIGINT, signal.SIGTERM)}
        try:
            yield
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)


def _listen(host: str, port: int) -> socket.socket:
    host = host.strip("[]")  # "[::1]" as written in a URL
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # restart at once after a stop
        sock.bind((host, port))
        sock.listen(128)
    except OSError:
        sock.close()
        raise
    return sock


def _log_to(log_file: str | None) -> None:
    """rungway's log lines (the API's audit lines among them) at INFO, to the file or stderr."""
    handler: logging.Handler = logging.FileHandler(log_file) if log_file else logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    logger = logging.getLogger(_LOGGER)
    logger.setLevel(logging.INFO)
    logger.addHandler(handler)
    logger.propagate = False  # the CLI's root handler would print every line a second time
