"""Settings for every test."""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest


@pytest.fixture(autouse=True)
def _no_leaked_ray_address(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """ray.cluster_utils sets RAY_ADDRESS for the process; a later test's embedded Ray, or a
    `rungway` subprocess, must not try to join a cluster that is gone."""
    monkeypatch.delenv("RAY_ADDRESS", raising=False)
    yield
    os.environ.pop("RAY_ADDRESS", None)
