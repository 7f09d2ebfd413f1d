"""Objectives for the spec and objective-loading tests (imported by path from spec files)."""

from __future__ import annotations

from typing import Any

NOT_A_FUNCTION = 42


def plain(config: dict[str, Any], budget: int) -> float:
    return float(config.get("lr", 0.0)) * budget


def plain_with_default(config: dict[str, Any], budget: int, verbose: bool = False) -> float:
    return 0.5


def resumable(ctx: Any) -> None:
    ctx.report(ctx.budget, accuracy=0.5)


def resumable_with_options(ctx: Any, *, log: bool = False) -> dict[str, float]:
    return {"accuracy": 0.5}


def three(config: dict[str, Any], budget: int, extra: int) -> float:
    return 0.0


def none() -> float:
    return 0.0


def keyword_only(config: dict[str, Any], budget: int, *, device: str) -> float:
    return 0.0


async def asynchronous(config: dict[str, Any], budget: int) -> float:
    return 0.0


def generator(ctx: Any):  # noqa: ANN201 - deliberately a generator
    yield 0.0


class CallableObject:
    def __call__(self, config: dict[str, Any], budget: int) -> float:
        return 1.0


callable_object = CallableObject()


def returns_string(config: dict[str, Any], budget: int) -> str:
    return "0.93"


def returns_nan(config: dict[str, Any], budget: int) -> float:
    return float("nan")


def raises(config: dict[str, Any], budget: int) -> float:
    raise RuntimeError("the data folder is missing")


def wrong_metric(config: dict[str, Any], budget: int) -> dict[str, float]:
    return {"acc": 0.9}


def exits_seven(config: dict[str, Any], budget: int) -> float:
    print("about to exit")
    raise SystemExit(7)


def ends_the_process(config: dict[str, Any], budget: int) -> float:
    import os

    print("chatty objective: loading data", flush=True)
    os._exit(1)


def killed_by_a_signal(config: dict[str, Any], budget: int) -> float:
    import os
    import signal

    os.kill(os.getpid(), signal.SIGKILL)
    return 0.0


def hangs(config: dict[str, Any], budget: int) -> float:
    import time

    print("waiting for a lock that never frees", flush=True)
    while True:
        time.sleep(0.05)
