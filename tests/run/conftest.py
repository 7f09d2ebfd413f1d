"""Shared pieces for the execution-layer tests: real Ray, a temporary store, spec builders."""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from runhelpers import _worker_path  # noqa: E402


@pytest.fixture(scope="module")
def local_ray() -> Iterator[None]:
    import ray

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    ray.init(address="local", num_cpus=2, include_dashboard=False, logging_level="ERROR")  # never a cluster found on the machine
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
