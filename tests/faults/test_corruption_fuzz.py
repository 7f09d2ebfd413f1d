"""A seeded corruption fuzzer over a real store: nothing damaged is ever read as data.

One store is built once: two small searches driven by the real head (``SearchDriver`` with the
in-process ``InlineExecutor``; one finished, one killed twice so that its journal spans two
files after a snapshot), failure records from an objective that crashes on purpose, and a CPU
ledger of the segments they ran (parts and compacted blocks). Then, for each kind of file,
at least 200 seeded cases each of

- a flipped bit (one random bit of one random byte of one file),
- a truncation (one file cut to a random shorter length),
- a swap (two files of the same kind exchange their bytes; or two lines of a journal, two lines
  of a spec, or two equal-length byte ranges of one file change places),

are applied to the store in place, read back through the store's public readers
(``read_measurements``, ``read_trials``, ``read_failures``, ``Ledger.read``, ``read_spec``,
``read_head_state``, ``load_checkpoint``) or the journal's replay (``Journal.entries_after``),
and undone. Each case is

- harmless: what is read equals the original (a flip in a checkpoint the reader never needs),
- detected: a ``StorageCorrupt`` (or the journal's ``JournalCorrupt``) whose message names a
  damaged file (a checkpoint skipped, named in ``LoadedCheckpoint.skipped`` and the log), or
- rolled back: the journal replays a strict prefix of its entries. Only a truncation may do
  that: a journal cut short is what a head killed in the middle of a write leaves, and the
  head resumes from there (docs/reliability.md).

Anything else (a value, a row, an entry changed without an error, or an error that is not a
located storage error) fails the test. The counts per kind are printed (and quoted in
docs/reliability.md); they move by a case or two between runs, since rows carry the workers'
real times. About 10 s on 2 cores, so not marked slow. The figures are our own; no outside
source.
"""

from __future__ import annotations

import json
import logging
import random
import sys
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

HERE = Path(__file__).resolve().parent
sys.path[:0] = [str(HERE), str(HERE.parent / "run")]

from runhelpers import spec_text  # noqa: E402

from rungway.scheduler.head.driver import HEAD_STATE, SearchDriver  # noqa: E402
from rungway.scheduler.head.executor import InlineExecutor  # noqa: E402
from rungway.scheduler.head.journal import Journal  # noqa: E402
from rungway.scheduler.service.ledger import Ledger, LedgerRow  # noqa: E402
from rungway.scheduler.spec import parse_spec  # noqa: E402
from rungway.scheduler.store import StorageError, Store  # noqa: E402

CASES = 200  # per kind and operation
OPERATIONS = ("flip", "truncate", "swap")
OBJECTIVE = "corruption_objective:resumable_flaky"


class _Ledgerer:
    """Collects one ledger row per ended segment, as the lab's head does."""

    def __init__(self) -> None:
        self.rows: list[LedgerRow] = []

    def started(self, search: str, trial: int, attempt: int, rung: int) -> None:
        return None

    def ended(self, search: str, trial: int, attempt: int, rung: int, outcome: str, cpu_seconds: float,
              summary: Any, node: str, reserved_seconds: float) -> None:
        started = float(getattr(summary, "started", 0.0) or 1_000.0)
        ended = max(started, float(getattr(summary, "ended", 0.0) or started))
        kind = {"result": "result", "yielded": "yielded", "lost": "lost", "crashed": "crashed"}.get(outcome, "other")
        self.rows.append(LedgerRow(team="vision", search=search, trial=trial, attempt=attempt, rung=rung,
                                   node=node or None, started=started, ended=ended, cpus=1.0, memory_mb=512,
                                   outcome=kind))


class _Clock:
    """The head's clock: a millisecond per reading, so that the store's shape (which results share
    a part, which segments a journal file holds) is the same on every run, however loaded the
    machine. (Rows still carry the workers' real times, so the bytes differ from run to run.)"""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        self.now += 0.001
        return self.now


def _driver(text: str, root: Path, listener: _Ledgerer) -> SearchDriver:
    return SearchDriver(parse_spec(text), text, str(root), InlineExecutor(cpus=2), persist_seconds=3600,
                        listener=listener, clock=_Clock())


def _steps(driver: SearchDriver, segments: int) -> None:
    for _ in range(10_000):  # bounded: a drained search stops counting
        if driver.segments >= segments or driver.over:
            return
        driver.step()


def _killed(driver: SearchDriver) -> None:
    """The head dies here: no end(), no snapshot; its process (and so its lease) is gone."""
    driver.journal.close()
    lease = getattr(driver, "lease", None)
    if lease is not None:
        lease.release()


def build_store(root: Path) -> None:
    listener = _Ledgerer()
    alpha = spec_text("alpha", OBJECTIVE, trials=10, max_budget=9)
    first = _driver(alpha, root, listener)
    first.run(lambda: first.segments >= 6)  # stopped cleanly: a snapshot and a first block
    assert _driver(alpha, root, listener).run().finished  # a second block
    beta = spec_text("beta", OBJECTIVE, trials=16, max_budget=9, seed=5)
    first = _driver(beta, root, listener)
    first.begin()
    _steps(first, 6)
    first.persist()  # the snapshot; the journal's first file starts after it
    _steps(first, 14)
    _killed(first)
    second = _driver(beta, root, listener)  # replays, then writes a second journal file
    second.begin()
    _steps(second, 24)
    _killed(second)
    ledger = Ledger(str(root))
    rows = listener.rows
    for start in range(0, len(rows), 2):
        ledger.append(rows[start : start + 2])
        if start in (16, 36):
            ledger.compact(min_parts=4)


def _kind_of(path: Path) -> str | None:
    parts = path.parts
    if "_ledger" in parts:
        return "ledger"
    if path.suffix == ".parquet":
        return {"measurements": "measurements", "failures": "failures"}.get(path.parent.name) or (
            "trials" if path.name == "trials.parquet" else None)
    if "checkpoints" in parts:
        return "checkpoints"
    if path.name.startswith("spec.toml"):
        return "spec"
    if path.name == HEAD_STATE:
        return "snapshot"
    if path.name.startswith("events-"):
        return "journal"
    return None


class Fuzz:
    """The store, what its readers return before any damage, and one reading per kind."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.store = Store(str(root))
        self.files: dict[str, list[Path]] = {}
        for path in sorted(p for p in root.rglob("*") if p.is_file()):
            kind = _kind_of(path.relative_to(root))
            if kind is not None:
                self.files.setdefault(kind, []).append(path)
        beta_state = json.loads(self.store.search("beta").read_head_state(HEAD_STATE) or "{}")
        self.covered = beta_state["journal_seq"]
        self.journal_dir = root / "searches" / "beta" / "journal"
        self.original = {kind: self.read(kind, self.files[kind]) for kind in self.files}

    def search_of(self, path: Path) -> str:
        return path.relative_to(self.root / "searches").parts[0]

    def read(self, kind: str, touched: list[Path]) -> Any:
        """What the public readers return for the searches (or trials) ``touched`` belongs to."""
        if kind == "ledger":
            return Ledger(str(self.root)).read()
        if kind == "journal":
            return list(Journal(self.journal_dir).entries_after(self.covered))
        if kind == "checkpoints":
            out = {}
            for path in touched:
                search, trial = self.search_of(path), int(path.parent.name)
                loaded = self.store.search(search).load_checkpoint(trial)
                out[(search, trial)] = None if loaded is None else (loaded.info.path, loaded.data, loaded.skipped)
            return out
        reader: Callable[[Any], Any] = {
            "measurements": lambda f: f.read_measurements(),
            "trials": lambda f: f.read_trials(),
            "failures": lambda f: f.read_failures(),
            "spec": lambda f: f.read_spec(),
            "snapshot": lambda f: f.read_head_state(HEAD_STATE),
        }[kind]
        searches = sorted({self.search_of(p) for p in touched}) if touched else ["alpha", "beta"]
        return {name: reader(self.store.search(name)) for name in searches}


def _same(kind: str, before: Any, after: Any) -> bool:
    if isinstance(before, pd.DataFrame):
        return before.equals(after)
    if isinstance(before, dict):
        return before.keys() == after.keys() and all(_same(kind, before[k], after[k]) for k in before)
    if kind == "checkpoints" and isinstance(before, tuple) and isinstance(after, tuple):
        return before[0] == after[0] and before[1] == after[1] and not after[2]
    return before == after


def _lines(data: bytes) -> list[bytes]:
    return data.splitlines(keepends=True)


def damage(fuzz: Fuzz, kind: str, operation: str, rng: random.Random) -> dict[Path, bytes]:
    """Apply one seeded fault to the store; returns the new bytes of the files it changed."""
    files = fuzz.files[kind]
    path = rng.choice(files)
    data = path.read_bytes()
    if operation == "flip":
        at = rng.randrange(len(data))
        changed = bytearray(data)
        changed[at] ^= 1 << rng.randrange(8)
        return {path: bytes(changed)}
    if operation == "truncate":
        return {path: data[: rng.randrange(len(data))]}
    if kind == "journal":  # two lines of the journal change places (within a file or across its files)
        lines = [(p, i) for p in files for i in range(len(_lines(p.read_bytes())))]
        (first, i), (second, j) = rng.sample(lines, 2)
        texts = {p: _lines(p.read_bytes()) for p in {first, second}}
        texts[first][i], texts[second][j] = _lines(second.read_bytes())[j], _lines(first.read_bytes())[i]
        return {p: b"".join(t) for p, t in texts.items()}
    # Two files of the same kind (and the same suffix: checkpoints with checkpoints, sidecars with
    # sidecars) exchange their bytes, or two pieces of one file change places.
    peers = [p for p in files if p != path and p.suffix == path.suffix and (p.name == path.name or kind != "spec")]
    if peers and rng.random() < 0.5:
        other = rng.choice(peers)
        return {path: other.read_bytes(), other: data}
    lines = _lines(data)
    if kind == "spec" and len(lines) >= 2:
        i, j = rng.sample(range(len(lines)), 2)
        lines[i], lines[j] = lines[j], lines[i]
        return {path: b"".join(lines)}
    if len(data) < 2:
        return {path: data}
    size = rng.randint(1, min(64, len(data) // 2))
    a = rng.randrange(len(data) - 2 * size + 1)
    b = rng.randrange(a + size, len(data) - size + 1)
    changed = bytearray(data)
    changed[a : a + size], changed[b : b + size] = data[b : b + size], data[a : a + size]
    return {path: bytes(changed)}


class _Log(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


def classify(fuzz: Fuzz, kind: str, operation: str, changed: dict[Path, bytes], log: _Log) -> str:
    originals = {path: path.read_bytes() for path in changed}
    log.messages.clear()
    try:
        for path, data in changed.items():
            path.write_bytes(data)
        try:
            got = fuzz.read(kind, list(changed))
        except StorageError as exc:
            named = [str(path) for path in changed if str(path) in str(exc)]
            assert named, f"{kind} {operation}: the error does not name a damaged file: {exc}"
            return "detected"
        before = fuzz.original[kind]
        if isinstance(got, dict):  # the searches (or trials) the damaged files belong to
            before = {key: before[key] for key in got}
        if _same(kind, before, got):
            return "harmless"
        if kind == "checkpoints":
            damaged = {str(p) for p in changed} | {str(p).removesuffix(".sha256") for p in changed}
            for key, value in got.items():
                skipped = {p for p, _ in value[2]} if value is not None else set()
                if value is None:
                    assert any(any(d in m for d in damaged) for m in log.messages), (operation, key, log.messages)
                elif not _same(kind, before[key], value):
                    assert skipped & damaged, f"checkpoint of {key} changed with nothing skipped ({operation})"
            return "detected"
        if kind == "journal" and operation == "truncate" and got == before[: len(got)]:
            return "rolled back"
        raise AssertionError(f"SILENT: a {operation} of {[str(p) for p in changed]} changed what is read "
                             f"without an error")
    finally:
        for path, data in originals.items():
            path.write_bytes(data)


def test_no_damage_is_read_as_data(tmp_path_factory: pytest.TempPathFactory,
                                   capsys: pytest.CaptureFixture[str]) -> None:
    root = tmp_path_factory.mktemp("fuzz") / "store"
    build_store(root)
    fuzz = Fuzz(root)
    kinds = ["measurements", "trials", "failures", "ledger", "journal", "snapshot", "spec", "checkpoints"]
    assert set(kinds) <= set(fuzz.files), sorted(fuzz.files)
    assert len(fuzz.files["journal"]) == 2 and len(fuzz.files["measurements"]) > 10
    log = _Log()
    logging.getLogger("rungway.store").addHandler(log)
    counts: dict[tuple[str, str], Counter[str]] = {}
    try:
        for kind in kinds:
            for operation in OPERATIONS:
                tally = counts.setdefault((kind, operation), Counter())
                for case in range(CASES):
                    rng = random.Random(f"{kind}/{operation}/{case}")
                    changed = damage(fuzz, kind, operation, rng)
                    tally[classify(fuzz, kind, operation, changed, log)] += 1
    finally:
        logging.getLogger("rungway.store").removeHandler(log)
    # Undone after each case: the store reads as it did.
    assert all(_same(kind, fuzz.original[kind], fuzz.read(kind, fuzz.files[kind])) for kind in kinds)
    table = ["kind          operation  cases  detected  harmless  rolled back"]
    for (kind, operation), tally in counts.items():
        table.append(f"{kind:<13} {operation:<9} {sum(tally.values()):>6} {tally['detected']:>9} "
                     f"{tally['harmless']:>9} {tally['rolled back']:>12}")
    with capsys.disabled():
        print("\n" + "\n".join(table))
    for (kind, operation), tally in counts.items():
        assert sum(tally.values()) == CASES
        assert tally["rolled back"] == 0 or (kind, operation) == ("journal", "truncate")
