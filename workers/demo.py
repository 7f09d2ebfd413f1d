"""The bundled demo objectives: small scikit-learn models on scikit-learn's bundled data sets.

Two objectives, one of each form (see :mod:`rungway.workers`):

- :func:`train_mlp` (resumable form): a one-hidden-layer network
  (``sklearn.neural_network.MLPClassifier``) on the 8x8 handwritten digits
  (``sklearn.datasets.load_digits``), the budget counted in epochs. Each epoch is one
  ``partial_fit`` call over the training set in an order drawn from ``(seed, epoch)`` alone, so
  training 0 -> 3 in one segment and 0 -> 1, checkpoint, 1 -> 3 give the same model.
- :func:`train_boosting` (plain form): a histogram gradient-boosted classifier
  (``sklearn.ensemble.HistGradientBoostingClassifier``) on the breast-cancer diagnostic table
  (``sklearn.datasets.load_breast_cancer``), the budget counted in boosting iterations.

Both use a fixed stratified train/validation split and report validation accuracy (and
validation log-loss as ``loss``). :data:`DEMO_SPEC` and :data:`BOOSTING_SPEC` are the search
specs that run them (``rungway demo`` runs the first; ``examples/`` holds both as files).
:func:`reference_accuracy` and :func:`reference_boosting_accuracy` are what scikit-learn's own
defaults reach on the same splits: the bar a search should clear.

scikit-learn is imported only when an objective or reference runs, so the specs can be read
on a head that lacks the ``demo`` extra. No data is downloaded: both data sets ship with
scikit-learn. Each process loads and splits a data set once (cached).

Threads: the demo specs ask for one CPU per trial, so the objectives run their numerical
libraries (BLAS, OpenMP) on one thread; that also keeps results independent of the machine's
core count.
"""

from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Mapping
from contextlib import contextmanager
from typing import Any

import numpy as np

__all__ = [
    "BOOSTING_DEFAULTS",
    "BOOSTING_MAX_ITER",
    "BOOSTING_SPEC",
    "DEMO_SPEC",
    "MLP_DEFAULTS",
    "MLP_MAX_EPOCHS",
    "epoch_order",
    "reference_accuracy",
    "reference_boosting_accuracy",
    "train_boosting",
    "train_mlp",
]

MLP_MAX_EPOCHS = 27
"""The demo ladder's top budget, in epochs."""

BOOSTING_MAX_ITER = 270
"""The boosting ladder's top budget, in boosting iterations."""

MLP_DEFAULTS: dict[str, Any] = {
    "hidden": 100,                 # units in the one hidden layer (MLPClassifier's default)
    "learning_rate_init": 1e-3,    # Adam's step size (default)
    "alpha": 1e-4,                 # L2 penalty (default)
    "batch_size": 200,             # mini-batch size (the default "auto" is min(200, n))
    "seed": 0,                     # weight initialisation and the per-epoch sample order
}
"""The keys :func:`train_mlp` reads, with the value it uses when a key is absent. Together
they are scikit-learn's own defaults, so ``train_mlp`` with an empty config is the reference
network trained one epoch at a time."""

BOOSTING_DEFAULTS: dict[str, Any] = {
    "learning_rate": 0.1,
    "max_leaf_nodes": 31,
    "l2_regularization": 0.0,
    "min_samples_leaf": 20,
    "seed": 0,
}
"""The keys :func:`train_boosting` reads (HistGradientBoostingClassifier's defaults)."""

_THREADS = 1
_DIGITS_VALIDATION = 0.2      # 360 of the 1797 images
_CANCER_VALIDATION = 0.3      # 171 of the 569 rows
_SPLIT_SEED = 0

# --------------------------------------------------------------------------------------------
# The search specs
# --------------------------------------------------------------------------------------------

DEMO_SPEC = """\
# rungway's demo search: a one-hidden-layer network reading scikit-learn's bundled 8x8
# handwritten digits, tuned with ASHA over training epochs (rungway.workers.demo:train_mlp).
name = "digits-mlp"
objective = "rungway.workers.demo:train_mlp"
metric = "accuracy"
better = "higher"
seed = 20

[ladder]
unit = "epochs"
min = 1
max = 27
eta = 3
mode = "asha"

[sampler]
kind = "random"

[limits]
# Measured 0.013-0.018 s per epoch on average (training, scoring and pickling the checkpoint,
# one core; 0.007-0.027 s across this space). ASHA promotes more than successive halving's
# 1/3 per rung early on: `rungway plan` simulates about 28/12/5 results at rungs 3/9/27 for
# 72 trials, about 300 epochs in all: a few seconds of CPU plus each segment's start-up and
# checkpoint writes (measured: the whole demo takes about 12 s of wall time on 2 cores).
trials = 72

[resources]
cpus = 1

[space.hidden]
kind = "integer"
lower = 16
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
lower = 16
upper = 256
scale = "log"

[space.seed]
kind = "constant"
value = 0
"""
"""The demo search (``rungway demo``); ``examples/digits-mlp.toml`` holds the same text."""

BOOSTING_SPEC = """\
# Gradient-boosted trees on scikit-learn's bundled breast-cancer diagnostic table, tuned with
# ASHA over boosting iterations (rungway.workers.demo:train_boosting, a plain objective: each
# rung retrains from scratch with the larger budget).
name = "cancer-boosting"
objective = "rungway.workers.demo:train_boosting"
metric = "accuracy"
better = "higher"
seed = 30

[ladder]
unit = "iterations"
min = 10
max = 270
eta = 3
mode = "asha"

[sampler]
kind = "random"

[limits]
# Measured about 0.001 s per iteration plus 0.02 s per fit (one core). Retraining from scratch
# costs at most 10 + 30/3 + 90/9 + 270/27 = 40 iterations per trial on average, so 60 trials
# cost about 2400 iterations in about 90 fits: under 5 s of CPU.
trials = 60

[resources]
cpus = 1

[space.learning_rate]
kind = "real"
lower = 0.01
upper = 0.5
scale = "log"

[space.max_leaf_nodes]
kind = "integer"
lower = 4
upper = 64
scale = "log"

[space.l2_regularization]
kind = "real"
lower = 1e-6
upper = 10.0
scale = "log"

[space.min_samples_leaf]
kind = "integer"
lower = 2
upper = 64
scale = "log"

[space.seed]
kind = "constant"
value = 0
"""
"""The boosting example (``examples/boosting.toml`` holds the same text)."""


# --------------------------------------------------------------------------------------------
# Data (loaded and split once per process)
# --------------------------------------------------------------------------------------------


def _frozen(*arrays: np.ndarray) -> tuple[np.ndarray, ...]:
    for a in arrays:
        a.flags.writeable = False  # cached and shared between calls: nobody may change them
    return arrays


@functools.lru_cache(maxsize=1)
def _digits() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Digits: (X_train, X_val, y_train, y_val), scaled by a StandardScaler fitted on train."""
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split
    from sklearn.preprocessing import StandardScaler

    X, y = load_digits(return_X_y=True)
    X_train, X_val, y_train, y_val = train_test_split(
        X, y, test_size=_DIGITS_VALIDATION, stratify=y, random_state=_SPLIT_SEED
    )
    scaler = StandardScaler().fit(X_train)
    return _frozen(
        np.ascontiguousarray(scaler.transform(X_train)),
        np.ascontiguousarray(scaler.transform(X_val)),
        np.ascontiguousarray(y_train),
        np.ascontiguousarray(y_val),
    )


@functools.lru_cache(maxsize=1)
def _breast_cancer() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Breast cancer: (X_train, X_val, y_train, y_val); trees need no scaling."""
    from sklearn.datasets import load_breast_cancer
    from sklearn.model_selection import train_test_split

    X, y = load_breast_cancer(return_X_y=True)
    X_train, X_val, y_train, y_val = train_test_split(
        X, y, test_size=_CANCER_VALIDATION, stratify=y, random_state=_SPLIT_SEED
    )
    return _frozen(*(np.ascontiguousarray(a) for a in (X_train, X_val, y_train, y_val)))


# --------------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------------


@contextmanager
def _quiet_single_thread():
    """One thread for BLAS and OpenMP; scikit-learn's ConvergenceWarning silenced."""
    from sklearn.exceptions import ConvergenceWarning
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=_THREADS), warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        yield


def _settings(config: Mapping[str, Any], defaults: Mapping[str, Any], who: str) -> dict[str, Any]:
    unknown = sorted(set(config) - set(defaults))
    if unknown:
        raise ValueError(
            f"{who}: unknown config key(s) {', '.join(map(repr, unknown))}; "
            f"it reads {', '.join(map(repr, defaults))}"
        )
    return {**defaults, **config}


def _whole(value: Any, what: str, *, minimum: int) -> int:
    """``value`` as an int, if it is a whole number >= minimum (budgets, sizes, seeds)."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise TypeError(f"{what} must be a whole number (got {value!r})")
    if not (math.isfinite(value) and float(value).is_integer()):
        raise ValueError(f"{what} must be a whole number (got {value!r})")
    if value < minimum:
        raise ValueError(f"{what} must be >= {minimum} (got {value!r})")
    return int(value)


def _positive(value: Any, what: str, *, zero_ok: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise TypeError(f"{what} must be a number (got {value!r})")
    value = float(value)
    if not math.isfinite(value) or value < 0 or (value == 0 and not zero_ok):
        raise ValueError(f"{what} must be {'>= 0' if zero_ok else '> 0'} (got {value!r})")
    return value


def _scores(proba: np.ndarray, classes: np.ndarray, y_val: np.ndarray) -> dict[str, float]:
    """Validation accuracy and log-loss from predicted probabilities."""
    from sklearn.metrics import log_loss

    accuracy = float(np.mean(classes[np.argmax(proba, axis=1)] == y_val))
    return {"accuracy": accuracy, "loss": float(log_loss(y_val, proba, labels=classes))}


# --------------------------------------------------------------------------------------------
# The network on digits (resumable form)
# --------------------------------------------------------------------------------------------


def _mlp_settings(config: Mapping[str, Any]) -> dict[str, Any]:
    s = _settings(config, MLP_DEFAULTS, "train_mlp")
    return {
        "hidden": _whole(s["hidden"], "hidden", minimum=1),
        "learning_rate_init": _positive(s["learning_rate_init"], "learning_rate_init"),
        "alpha": _positive(s["alpha"], "alpha", zero_ok=True),
        "batch_size": _whole(s["batch_size"], "batch_size", minimum=1),
        "seed": _whole(s["seed"], "seed", minimum=0),
    }


def _new_mlp(s: Mapping[str, Any]):
    from sklearn.neural_network import MLPClassifier

    return MLPClassifier(
        hidden_layer_sizes=(s["hidden"],),
        learning_rate_init=s["learning_rate_init"],
        alpha=s["alpha"],
        batch_size=s["batch_size"],
        # MLPClassifier re-seeds its own shuffling from random_state on every partial_fit
        # call, so it would repeat one order every epoch; the objective shuffles instead.
        shuffle=False,
        random_state=s["seed"],
    )


def epoch_order(seed: int, epoch: int, n: int) -> np.ndarray:
    """The order of the ``n`` training samples in ``epoch`` (1-based): a function of
    ``(seed, epoch)`` only, never of global random state, so a resumed trial replays it."""
    return np.random.default_rng([seed, epoch]).permutation(n)


def train_mlp(ctx) -> dict[str, float] | None:
    """Train the digits network from ``ctx.start`` to ``ctx.budget`` epochs.

    Config keys (all optional, defaults in :data:`MLP_DEFAULTS`): ``hidden`` (int, units),
    ``learning_rate_init`` (real > 0), ``alpha`` (real >= 0), ``batch_size`` (int) and ``seed``
    (int >= 0). Reports ``accuracy`` and ``loss`` (validation log-loss) after every epoch and
    saves the model (a pickled ``MLPClassifier``) every epoch. Returns the final
    ``{"accuracy", "loss"}``, or None when asked to yield before reaching the budget.
    """
    s = _mlp_settings(ctx.config)
    target = _whole(ctx.budget, "budget (epochs)", minimum=1)
    start = _whole(ctx.start, "start (epochs)", minimum=0)
    X_train, X_val, y_train, y_val = _digits()
    classes = np.unique(y_train)

    with _quiet_single_thread():
        if ctx.state is None:
            if start != 0:
                raise ValueError(f"train_mlp: start is {start} epochs but there is no saved model")
            model = _new_mlp(s)
        else:
            model = ctx.state
            fitted = getattr(model, "n_features_in_", None)
            if type(model).__name__ != "MLPClassifier" or fitted != X_train.shape[1]:
                raise TypeError(f"train_mlp: the saved state is not a digits network ({type(model).__name__})")

        scores: dict[str, float] | None = None
        for epoch in range(start + 1, target + 1):
            order = epoch_order(s["seed"], epoch, len(y_train))
            model.partial_fit(X_train[order], y_train[order], classes=classes)
            scores = _scores(model.predict_proba(X_val), model.classes_, y_val)
            ctx.report(epoch, **scores)
            ctx.save(model, epoch)
            if epoch < target and ctx.asked_to_yield:
                return None
        if scores is None:  # restored at (or past) the budget already
            scores = _scores(model.predict_proba(X_val), model.classes_, y_val)
    return scores


@functools.lru_cache(maxsize=8)
def reference_accuracy(max_epochs: int = MLP_MAX_EPOCHS, seed: int = 0) -> float:
    """Validation accuracy of scikit-learn's own reference: ``MLPClassifier`` with its default
    settings (``max_iter=max_epochs``, ``random_state=seed``) trained with ``fit`` on the same
    split and scaling as :func:`train_mlp`.

    ``fit`` differs from ``train_mlp`` at the defaults in two ways: it shuffles with its own
    random stream (``train_mlp`` draws each epoch's order from ``(seed, epoch)``), and it may
    stop before ``max_epochs`` once the training loss has not improved by ``tol`` for
    ``n_iter_no_change`` epochs. The two therefore agree closely, not exactly.
    """
    from sklearn.neural_network import MLPClassifier

    max_epochs = _whole(max_epochs, "max_epochs", minimum=1)
    X_train, X_val, y_train, y_val = _digits()
    with _quiet_single_thread():
        model = MLPClassifier(max_iter=max_epochs, random_state=seed).fit(X_train, y_train)
        return float(model.score(X_val, y_val))


# --------------------------------------------------------------------------------------------
# Boosted trees on breast cancer (plain form)
# --------------------------------------------------------------------------------------------


def _boosting_settings(config: Mapping[str, Any]) -> dict[str, Any]:
    s = _settings(config, BOOSTING_DEFAULTS, "train_boosting")
    return {
        "learning_rate": _positive(s["learning_rate"], "learning_rate"),
        "max_leaf_nodes": _whole(s["max_leaf_nodes"], "max_leaf_nodes", minimum=2),
        "l2_regularization": _positive(s["l2_regularization"], "l2_regularization", zero_ok=True),
        "min_samples_leaf": _whole(s["min_samples_leaf"], "min_samples_leaf", minimum=1),
        "seed": _whole(s["seed"], "seed", minimum=0),
    }


def train_boosting(config: Mapping[str, Any], budget: int) -> dict[str, float]:
    """Fit boosted trees with ``budget`` iterations from scratch; validation scores.

    Config keys (all optional, defaults in :data:`BOOSTING_DEFAULTS`): ``learning_rate``
    (real > 0), ``max_leaf_nodes`` (int >= 2), ``l2_regularization`` (real >= 0),
    ``min_samples_leaf`` (int >= 1), ``seed`` (int >= 0). Returns ``{"accuracy", "loss"}``.
    """
    from sklearn.ensemble import HistGradientBoostingClassifier

    s = _boosting_settings(config)
    iterations = _whole(budget, "budget (iterations)", minimum=1)
    X_train, X_val, y_train, y_val = _breast_cancer()
    model = HistGradientBoostingClassifier(
        max_iter=iterations,
        early_stopping=False,
        learning_rate=s["learning_rate"],
        max_leaf_nodes=s["max_leaf_nodes"],
        l2_regularization=s["l2_regularization"],
        min_samples_leaf=s["min_samples_leaf"],
        random_state=s["seed"],
    )
    with _quiet_single_thread():
        model.fit(X_train, y_train)
        return _scores(model.predict_proba(X_val), model.classes_, y_val)


@functools.lru_cache(maxsize=8)
def reference_boosting_accuracy(max_iter: int = BOOSTING_MAX_ITER, seed: int = 0) -> float:
    """Validation accuracy of ``HistGradientBoostingClassifier`` with scikit-learn's defaults
    (``max_iter=max_iter``, ``random_state=seed``) on the same split as :func:`train_boosting`.
    (Its default ``early_stopping="auto"`` is off below 10 000 samples, as in the objective.)"""
    from sklearn.ensemble import HistGradientBoostingClassifier

    max_iter = _whole(max_iter, "max_iter", minimum=1)
    X_train, X_val, y_train, y_val = _breast_cancer()
    with _quiet_single_thread():
        model = HistGradientBoostingClassifier(max_iter=max_iter, random_state=seed).fit(X_train, y_train)
        return float(model.score(X_val, y_val))
