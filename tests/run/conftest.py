"""Shared pieces for the execution-layer tests: real Ray, a temporary store, spec builders."""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def _worker_path() -> None:
    # Ray worker processes inherit this, so they import objectives_run as the test does.
    paths = [str(HERE), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
    os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))


def spec_text(name: str, objective: str = "objectives_run:resumable", *, mode: str = "asha", trials: int = 20,
              min_budget: int = 1, max_budget: int = 9, extra: str = "") -> str:
    return f"""
name = "{name}"
objective = "{objective}"
metric = "loss"
direction = "minimize"
seed = 3

[ladder]
min = {min_budget}
max = {max_budget}
eta = 3
mode = "{mode}"

[sampler]
kind = "random"

[limits]
trials = {trials}
max_crashes = 1
{extra}
[resources]
cpus = 1

[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


@pytest.fixture(scope="module")
def local_ray() -> Iterator[None]:
    import ray

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    ray.init(num_cpus=2, include_dashboard=False, logging_level="ERROR")
    yield
    ray.shutdown()


@pytest.fixture(scope="module")
def three_node_cluster() -> Iterator[object]:
    import ray
    from ray.cluster_utils import Cluster

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 1, "include_dashboard": False})
    cluster.add_node(num_cpus=1)
    cluster.add_node(num_cpus=1)
    ray.init(address=cluster.address, logging_level="ERROR")
    cluster.wait_for_nodes()
    yield cluster
    ray.shutdown()
    cluster.shutdown()
