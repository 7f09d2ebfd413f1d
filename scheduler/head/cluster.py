"""Connecting to Ray: join a cluster at an address, or start an embedded local one."""

from __future__ import annotations

import logging
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager

__all__ = ["ray_session"]


@contextmanager
def ray_session(address: str | None = None, num_cpus: int | None = None) -> Iterator[None]:
    """Ray for the duration of a command. With no address, an embedded local Ray starts here
    and stops at the end; the current directory is put on the workers' import path so that a
    local objective module imports there as it does here."""
    import ray

    if ray.is_initialized():
        yield
        return
    if address is None:
        paths = [os.getcwd(), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
        os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
        ray.init(
            num_cpus=num_cpus,
            include_dashboard=False,
            logging_level=logging.WARNING,
            log_to_driver=True,
            configure_logging=True,
        )
    else:
        ray.init(address=address, logging_level=logging.WARNING)
    try:
        yield
    finally:
        ray.shutdown()
        sys.stdout.flush()
