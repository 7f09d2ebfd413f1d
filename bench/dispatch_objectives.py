"""Objectives for bench/dispatch.py."""

import time


def noop(config, budget):
    return 0.0


def sleep100(config, budget):
    time.sleep(0.1)
    return 0.0
