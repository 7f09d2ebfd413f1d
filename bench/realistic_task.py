"""A realistic benchmark task: a network trained by epochs on shifted handwritten digits,
costing seconds per full training on one core (issue #11; the search-quality work reuses it).

**Data.** scikit-learn's bundled 8x8 digits (``load_digits``, 1797 images; nothing is
downloaded), split once by image, stratified (``random_state=0``): 60 % train, 20 %
validation, 20 % test. Each split is then expanded by a fixed, deterministic augmentation:
every image placed on a 12x12 canvas of zeros at each of the 5 x 5 offsets 0 .. 4 (25 copies,
144 pixels each, nothing of the digit cut off), so the training set holds 1077 x 25 = 26,925
images and the validation and test sets 360 x 25 = 9,000 each; copies of one image never cross
splits. Pixels are scaled by a ``StandardScaler`` fitted on the training split. A network
without convolutions has to learn every position apart, so an epoch costs enough to matter
and accuracy keeps improving for tens of epochs (validation accuracy moves in steps of
0.00011, not the plain digits' 0.0028).

**Model.** ``sklearn.neural_network.MLPClassifier`` with one hidden layer (Adam), trained one
epoch at a time with ``partial_fit`` over the training set in an order drawn from
``(seed, epoch)`` alone, so training 0 -> 9 in one go and 0 -> 3, checkpoint, 3 -> 9 give the
same model: the plain and the resumable form agree exactly at every budget. BLAS and OpenMP
run on one thread (``threadpoolctl``): one trial uses one core.

**Two forms** (README.md, "A short tour"):

- :func:`train` ``(config, budget)``: the plain form, trains from scratch for ``budget``
  epochs and returns the validation ``{"accuracy", "loss"}``;
- :func:`train_resumable` ``(ctx)``: the resumable form, from ``ctx.start`` (its checkpoint,
  the pickled model) to ``ctx.budget``, reporting and saving after every epoch and returning
  early when asked to yield.

:func:`test_accuracy` scores a configuration on the test split (for judging a search's pick
on data it never saw); :func:`reference_accuracy` is the validation accuracy at
:data:`DEFAULTS`.

**Search space** (:data:`SPACE`, 4 parameters): hidden units 64 .. 256 (log), Adam's step
size 1e-4 .. 3e-2 (log), L2 penalty 1e-6 .. 1e-1 (log), batch size 32 .. 256 (log). Budget:
1 .. 27 epochs (:data:`MAX_EPOCHS`), eta 3, so rungs at 1, 3, 9 and 27 epochs. :func:`spec`
writes a search spec over it for any mode (``asha``, ``hyperband``, ...) and either form;
:data:`ASHA_SPEC` and :data:`HYPERBAND_SPEC` are two (resumable form, 0.05 CPU-hours).
Specs name the objective ``realistic_task:...``: run with ``bench/`` on ``PYTHONPATH``.

**Cost and bias, measured** (``.venv/bin/python bench/realistic_task.py --processes 2``, which
prints these figures and writes them with ``--json``; on this repository's 2-core AMD EPYC
machine, 2026-12, other people's processes running, load average 0.9 to 1.6):

- a full training (27 epochs) at :data:`DEFAULTS` (hidden 128, batch size 128): 2.74 s on one
  core (2.6-3.0 s over the runs of ``bench/accounting.py``, which times it too); over 16
  configurations sampled from the space (seed 7), 2 trained at a time: median 3.54 s CPU,
  1.61 s (hidden 67, batch 216) to 4.99 s (hidden 193, batch 57); the corners of the space
  run from about 1.5 s (64 units, batches of 256) to about 7 s (256 units, batches of 32);
- low budgets are informative but biased: over the same 16 configurations (validation
  accuracy after 27 epochs 0.938 to 0.974, median 0.959), the Spearman rank correlation of
  the accuracy after 1, 3 and 9 epochs with that after 27 is 0.40, 0.58 and 0.94. Large step
  sizes lead early and small ones catch up: the best configuration after 1 epoch (step size
  6.9e-3) ranks 8th after 27, and the best after 27 (step size 1.4e-3, 193 units, batch 57)
  ranks 4th after 1 epoch; the slowest starters (step sizes 1e-4 to 3e-4: 0.32-0.51 after
  1 epoch) end at 0.943-0.958, in the lower half but not last.
"""

from __future__ import annotations

import argparse
import functools
import json
import math
import statistics
import sys
import time
import warnings
from collections.abc import Mapping
from contextlib import contextmanager
from typing import Any

import numpy as np

__all__ = ["DEFAULTS", "MAX_EPOCHS", "MIN_EPOCHS", "SPACE", "data", "measure", "reference_accuracy", "spec",
           "test_accuracy", "train", "train_resumable"]

MIN_EPOCHS = 1
MAX_EPOCHS = 27
"""The ladder's budgets, in epochs (eta 3: rungs at 1, 3, 9, 27)."""

DEFAULTS: dict[str, Any] = {
    "hidden": 128,
    "learning_rate_init": 1e-3,
    "alpha": 1e-4,
    "batch_size": 128,
    "seed": 0,
}
"""The keys the objectives read, with the value used when a key is absent (the step size and
the penalty are scikit-learn's defaults; the widths are the middle of :data:`SPACE`)."""

SPACE = """\
[space.hidden]
kind = "integer"
lower = 64
upper = 256
scale = "log"

[space.learning_rate_init]
kind = "real"
lower = 1e-4
upper = 3e-2
scale = "log"

[space.alpha]
kind = "real"
lower = 1e-6
upper = 1e-1
scale = "log"

[space.batch_size]
kind = "integer"
lower = 32
upper = 256
scale = "log"
"""
"""The search space, as the ``[space]`` tables of a spec."""

_SPEC = """\
name = "{name}"
objective = "{objective}"
metric = "accuracy"
better = "higher"
seed = {seed}

[ladder]
unit = "epochs"
min = {low}
max = {high}
eta = 3
mode = "{mode}"

[sampler]
kind = "random"

[limits]
{limits}
[resources]
cpus = 1

{space}"""


def spec(mode: str = "asha", *, name: str | None = None, form: str = "resumable", seed: int = 0,
         cpu_hours: float | None = None, trials: int | None = None,
         objective: str | None = None) -> str:
    """A search spec over :data:`SPACE`, budget 1 .. 27 epochs, eta 3, in ``mode`` (``"asha"``,
    ``"hyperband"``, ...), for the ``form`` (``"plain"``: :func:`train`, ``"resumable"``:
    :func:`train_resumable`) or another ``objective`` (``module:function``) that wraps one.
    The module must be importable on the workers: run with ``bench/`` on ``PYTHONPATH``."""
    if objective is None:
        objective = {"plain": "realistic_task:train", "resumable": "realistic_task:train_resumable"}[form]
    limits = []
    if cpu_hours is not None:
        limits.append(f"cpu_hours = {cpu_hours!r}")
    if trials is not None:
        limits.append(f"trials = {int(trials)}")
    return _SPEC.format(name=name or f"digits-shifted-{mode}-{form}", objective=objective, seed=seed, low=MIN_EPOCHS,
                        high=MAX_EPOCHS, mode=mode, limits="\n".join(limits) + ("\n" if limits else ""), space=SPACE)


ASHA_SPEC = spec("asha", cpu_hours=0.05)
"""ASHA over the space, resumable form, 3 CPU-minutes."""

HYPERBAND_SPEC = spec("hyperband", cpu_hours=0.05)
"""Asynchronous Hyperband over the space, resumable form, 3 CPU-minutes."""


_CANVAS = 12
_COPIES = (_CANVAS - 7) ** 2  # 25


# ---- data (built once per process) ----------------------------------------------------------------


def _shifted(images: np.ndarray) -> np.ndarray:
    """The 25 copies of each 8x8 image placed on a 12x12 canvas of zeros at every offset
    0 .. 4 along each axis (nothing of the digit is cut off); copies of one image are
    consecutive. 144 pixels a copy."""
    n = len(images)
    out = np.zeros((n, _COPIES, _CANVAS, _CANVAS), dtype=images.dtype)
    k = 0
    for dy in range(_CANVAS - 7):
        for dx in range(_CANVAS - 7):
            out[:, k, dy:dy + 8, dx:dx + 8] = images
            k += 1
    return out.reshape(n * _COPIES, _CANVAS * _CANVAS)


@functools.lru_cache(maxsize=1)
def data() -> dict[str, np.ndarray]:
    """``X_train, y_train, X_val, y_val, X_test, y_test``: the shifted, scaled splits (read-only)."""
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split
    from sklearn.preprocessing import StandardScaler

    digits = load_digits()
    images, labels = digits.images, digits.target
    idx = np.arange(len(labels))
    fit_idx, test_idx = train_test_split(idx, test_size=0.2, stratify=labels, random_state=0)
    train_idx, val_idx = train_test_split(fit_idx, test_size=0.25, stratify=labels[fit_idx], random_state=0)
    out: dict[str, np.ndarray] = {}
    for name, part in (("train", train_idx), ("val", val_idx), ("test", test_idx)):
        out[f"X_{name}"] = _shifted(images[part])
        out[f"y_{name}"] = np.repeat(labels[part], _COPIES)
    scaler = StandardScaler().fit(out["X_train"])
    for name in ("train", "val", "test"):
        out[f"X_{name}"] = np.ascontiguousarray(scaler.transform(out[f"X_{name}"]))
    for a in out.values():
        a.flags.writeable = False
    return out


# ---- training -----------------------------------------------------------------------------------


@contextmanager
def _one_thread():
    from sklearn.exceptions import ConvergenceWarning
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        yield


def _settings(config: Mapping[str, Any]) -> dict[str, Any]:
    unknown = sorted(set(config) - set(DEFAULTS))
    if unknown:
        raise ValueError(f"realistic_task: unknown config key(s) {unknown}; it reads {list(DEFAULTS)}")
    s = {**DEFAULTS, **config}
    return {"hidden": int(s["hidden"]), "learning_rate_init": float(s["learning_rate_init"]),
            "alpha": float(s["alpha"]), "batch_size": int(s["batch_size"]), "seed": int(s["seed"])}


def _new_model(s: Mapping[str, Any]) -> Any:
    from sklearn.neural_network import MLPClassifier

    # shuffle=False: MLPClassifier would re-seed its shuffling on every partial_fit call and
    # repeat one order every epoch; the epoch's order is drawn from (seed, epoch) instead.
    return MLPClassifier(hidden_layer_sizes=(s["hidden"],), learning_rate_init=s["learning_rate_init"],
                         alpha=s["alpha"], batch_size=s["batch_size"], shuffle=False, random_state=s["seed"])


def _epoch(model: Any, s: Mapping[str, Any], epoch: int, d: Mapping[str, np.ndarray]) -> None:
    order = np.random.default_rng([s["seed"], epoch]).permutation(len(d["y_train"]))
    model.partial_fit(d["X_train"][order], d["y_train"][order], classes=np.arange(10))


def _scores(model: Any, X: np.ndarray, y: np.ndarray) -> dict[str, float]:
    from sklearn.metrics import log_loss

    proba = np.clip(model.predict_proba(X), 1e-15, 1.0)
    accuracy = float(np.mean(model.classes_[np.argmax(proba, axis=1)] == y))
    return {"accuracy": accuracy, "loss": float(log_loss(y, proba, labels=model.classes_))}


def _budget(value: Any, what: str) -> int:
    if isinstance(value, bool) or not float(value).is_integer() or value < 0:
        raise ValueError(f"realistic_task: {what} must be a whole number of epochs >= 0 (got {value!r})")
    return int(value)


def _fit(config: Mapping[str, Any], budget: int) -> Any:
    s = _settings(config)
    d = data()
    with _one_thread():
        model = _new_model(s)
        for epoch in range(1, budget + 1):
            _epoch(model, s, epoch, d)
    return model


def train(config: Mapping[str, Any], budget: int) -> dict[str, float]:
    """The plain form: train from scratch for ``budget`` epochs; validation accuracy and loss."""
    budget = _budget(budget, "budget")
    if budget < 1:
        raise ValueError("realistic_task: budget must be at least 1 epoch")
    model = _fit(config, budget)
    d = data()
    with _one_thread():
        return _scores(model, d["X_val"], d["y_val"])


def train_resumable(ctx: Any) -> dict[str, float] | None:
    """The resumable form: from ``ctx.start`` (the saved model) to ``ctx.budget`` epochs,
    reporting validation ``accuracy`` and ``loss`` and saving after every epoch; None when
    asked to yield before the budget."""
    s = _settings(ctx.config)
    start, target = _budget(ctx.start, "start"), _budget(ctx.budget, "budget")
    d = data()
    scores = None
    with _one_thread():
        if ctx.state is None:
            if start != 0:
                raise ValueError(f"realistic_task: start is {start} epochs but there is no saved model")
            model = _new_model(s)
        else:
            model = ctx.state
        for epoch in range(start + 1, target + 1):
            _epoch(model, s, epoch, d)
            scores = _scores(model, d["X_val"], d["y_val"])
            ctx.report(epoch, **scores)
            ctx.save(model, epoch)
            if epoch < target and ctx.asked_to_yield:
                return None
        if scores is None:  # restored at the budget already
            scores = _scores(model, d["X_val"], d["y_val"])
    return scores


def test_accuracy(config: Mapping[str, Any], budget: int = MAX_EPOCHS) -> float:
    """Accuracy on the held-out test split of ``config`` trained ``budget`` epochs (for judging
    a search's pick on data it never saw)."""
    model = _fit(config, _budget(budget, "budget"))
    d = data()
    with _one_thread():
        return _scores(model, d["X_test"], d["y_test"])["accuracy"]


@functools.lru_cache(maxsize=4)
def reference_accuracy(budget: int = MAX_EPOCHS) -> float:
    """Validation accuracy at :data:`DEFAULTS` after ``budget`` epochs: the bar a search should clear."""
    return train({}, budget)["accuracy"]


# ---- measuring the task itself ------------------------------------------------------------------------


def _sample_configs(n: int, seed: int) -> list[dict[str, Any]]:
    from rungway.scheduler.spec import parse_spec

    parsed = parse_spec(spec("asha", trials=n, seed=seed))
    sampler = parsed.make_sampler(np.random.default_rng(seed))
    return [dict(sampler.propose()) for _ in range(n)]


def _curve(config: dict[str, Any]) -> dict[str, Any]:
    """Accuracy after every epoch and the seconds (wall and this thread's CPU) of the whole
    training with that scoring left out: one epoch loop to 27, then the plain form timed."""
    s = _settings(config)
    d = data()
    accuracy = []
    with _one_thread():
        model = _new_model(s)
        for epoch in range(1, MAX_EPOCHS + 1):
            _epoch(model, s, epoch, d)
            accuracy.append(_scores(model, d["X_val"], d["y_val"])["accuracy"])
    wall, cpu = time.perf_counter(), time.thread_time()
    train(config, MAX_EPOCHS)
    return {"config": config, "accuracy": accuracy, "full_wall_s": time.perf_counter() - wall,
            "full_cpu_s": time.thread_time() - cpu}


def _spearman(a: list[float], b: list[float]) -> float:
    def ranks(x: list[float]) -> np.ndarray:
        order = np.argsort(x, kind="stable")
        r = np.empty(len(x))
        xs = np.asarray(x)[order]
        i = 0
        while i < len(x):  # average ranks over ties
            j = i
            while j + 1 < len(x) and xs[j + 1] == xs[i]:
                j += 1
            r[order[i:j + 1]] = (i + j) / 2
            i = j + 1
        return r

    ra, rb = ranks(a), ranks(b)
    if ra.std() == 0 or rb.std() == 0:
        return math.nan
    return float(np.corrcoef(ra, rb)[0, 1])


def measure(configs: int = 16, seed: int = 7, processes: int = 1) -> dict[str, Any]:
    """The task's cost on one core (a full training at :data:`DEFAULTS`, and over ``configs``
    sampled configurations) and how well low budgets rank configurations (Spearman rank
    correlation of accuracy at 1, 3 and 9 epochs with that at 27)."""
    data()
    train({}, 1)  # imports, data
    default_times = []
    for _ in range(3):
        wall, cpu = time.perf_counter(), time.thread_time()
        accuracy = train({}, MAX_EPOCHS)["accuracy"]
        default_times.append((time.perf_counter() - wall, time.thread_time() - cpu))
    sampled = _sample_configs(configs, seed)
    if processes > 1:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(processes) as pool:
            curves = list(pool.map(_curve, sampled))
    else:
        curves = [_curve(c) for c in sampled]
    top = [c["accuracy"][-1] for c in curves]
    out: dict[str, Any] = {
        "max_epochs": MAX_EPOCHS,
        "train_size": int(len(data()["y_train"])),
        "val_size": int(len(data()["y_val"])),
        "defaults": {"config": DEFAULTS, "accuracy": accuracy,
                     "full_wall_s": statistics.median(w for w, _ in default_times),
                     "full_cpu_s": statistics.median(c for _, c in default_times)},
        "sampled": {"n": configs, "seed": seed, "processes": processes,
                    "full_cpu_s": {"median": statistics.median(c["full_cpu_s"] for c in curves),
                                   "min": min(c["full_cpu_s"] for c in curves),
                                   "max": max(c["full_cpu_s"] for c in curves)},
                    "accuracy_at_27": {"median": statistics.median(top), "min": min(top), "max": max(top)}},
        "rank_correlation_with_27": {str(b): _spearman([c["accuracy"][b - 1] for c in curves], top) for b in (1, 3, 9)},
        "best_at": {str(b): int(np.argmax([c["accuracy"][b - 1] for c in curves])) for b in (1, 3, 9, 27)},
        "curves": curves,
    }
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Measure the realistic task: its cost on one core and its low-budget bias.")
    parser.add_argument("--configs", type=int, default=16, help="sampled configurations (default 16)")
    parser.add_argument("--processes", type=int, default=1,
                        help="train the sampled configurations in this many processes (default 1: timings undisturbed)")
    parser.add_argument("--json", metavar="OUT")
    args = parser.parse_args(argv)
    result = measure(args.configs, processes=args.processes)
    d, s = result["defaults"], result["sampled"]
    print(f"train {result['train_size']} images, validation {result['val_size']}; budget 1..{MAX_EPOCHS} epochs")
    print(f"full training at the defaults: {d['full_wall_s']:.2f} s wall, {d['full_cpu_s']:.2f} s CPU "
          f"(accuracy {d['accuracy']:.4f})")
    print(f"full training over {s['n']} sampled configurations: CPU median {s['full_cpu_s']['median']:.2f} s "
          f"({s['full_cpu_s']['min']:.2f} - {s['full_cpu_s']['max']:.2f}); accuracy at {MAX_EPOCHS} epochs "
          f"{s['accuracy_at_27']['median']:.4f} ({s['accuracy_at_27']['min']:.4f} - {s['accuracy_at_27']['max']:.4f})")
    print("Spearman rank correlation with accuracy at 27 epochs: "
          + ", ".join(f"{b} epochs {r:.2f}" for b, r in result["rank_correlation_with_27"].items()))
    print("index of the best configuration after 1, 3, 9, 27 epochs: "
          + ", ".join(str(v) for v in result["best_at"].values()))
    if args.json:
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(result, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
