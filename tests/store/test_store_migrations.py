"""The store's format version and its migration chain, on stores written by earlier versions.

The fixtures under tests/store/fixtures/ were written by the rungway of each format and
committed as written (their README says how); every test works on a copy.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import tomllib
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from rungway.scheduler.spec import parse_spec
from rungway.scheduler.store import StorageCorrupt, Store, open_store
from rungway.scheduler.store import migrations
from rungway.scheduler.store.fs import Volume
from rungway.scheduler.store.migrations import FORMAT_FILE, STORE_FORMAT, store_format

FIXTURES = Path(__file__).parent / "fixtures"
SEARCH = "format-one"


@pytest.fixture
def format_one(tmp_path: Path) -> Path:
    root = tmp_path / "store"
    shutil.copytree(FIXTURES / "format-1", root)
    return root


def _old_tables(root: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The fixture's trials table as 0.1.0 wrote it, and its final rung results."""
    trials = pd.read_parquet(root / "searches" / SEARCH / "trials.parquet")
    rows = pd.read_parquet(root / "searches" / SEARCH / "measurements")
    return trials, rows[rows["final"]]


def test_a_format_one_store_is_migrated_on_open_and_reads_correctly(format_one: Path) -> None:
    old_trials, finals = _old_tables(format_one)
    assert store_format(Store(str(format_one))) == 1

    store = open_store(str(format_one))

    assert store_format(store) == STORE_FORMAT == 3
    assert json.loads((format_one / FORMAT_FILE).read_text()) == {"format": 3}
    assert not (format_one / migrations.MIGRATIONS_DIR / "to-2.json").exists()
    files = store.search(SEARCH)
    # The stored spec now says which values are better in the new words, and parses.
    spec = parse_spec(files.read_spec() or "", source="stored spec")
    assert spec.better == "lower" and spec.maximize is False
    # Every column is renamed, every value kept.
    trials = files.read_trials().set_index("trial")
    old = old_trials.set_index("trial")
    assert [c for c in trials.columns if c.startswith("space_")] == ["space_x", "space_depth"]
    assert not [c for c in trials.columns if c.startswith("param_") or c == "best_value"]
    pd.testing.assert_series_equal(trials["space_x"], old["param_x"], check_names=False)
    pd.testing.assert_series_equal(trials["space_depth"], old["param_depth"], check_names=False)
    pd.testing.assert_series_equal(trials["latest_value"], old["best_value"], check_names=False)
    for column in ("status", "rung", "budget_reached", "attempts", "failures"):
        pd.testing.assert_series_equal(trials[column], old[column])
    # record_value is each trial's best (lowest: better = "lower") rung result, from the
    # measurements themselves; trials 3 and 20 did worse at the top rung than at budget 3.
    expected = finals.groupby("trial")["value"].min()
    pd.testing.assert_series_equal(trials["record_value"], expected.reindex(trials.index), check_names=False)
    worse_at_top = trials.index[trials["record_value"] < trials["latest_value"]].tolist()
    assert worse_at_top == [3, 20]


def test_opening_a_migrated_store_again_changes_nothing(format_one: Path) -> None:
    open_store(str(format_one))
    before = {p: p.read_bytes() for p in sorted(format_one.rglob("*")) if p.is_file()}
    open_store(str(format_one))
    after = {p: p.read_bytes() for p in sorted(format_one.rglob("*")) if p.is_file()}
    assert after == before


def test_a_migration_cut_short_is_finished_by_the_next_open(format_one: Path, tmp_path: Path,
                                                            monkeypatch: pytest.MonkeyPatch) -> None:
    # The same store migrated in one go, for comparison.
    clean = tmp_path / "clean"
    shutil.copytree(format_one, clean)
    open_store(str(clean))

    # A head killed right after the spec was rewritten, before the trials table: the
    # intent is on disk, the version is not.
    def killed(volume: Volume, layout, higher: bool) -> None:  # noqa: ANN001
        raise KeyboardInterrupt("killed in the middle of the migration")

    monkeypatch.setattr(migrations, "_trials_to_2", killed)
    with pytest.raises(KeyboardInterrupt):
        open_store(str(format_one))
    assert (format_one / migrations.MIGRATIONS_DIR / "to-2.json").exists()
    assert not (format_one / FORMAT_FILE).exists()
    assert tomllib.loads((format_one / "searches" / SEARCH / "spec.toml").read_text())["better"] == "lower"
    monkeypatch.undo()

    open_store(str(format_one))
    spec = "searches/" + SEARCH + "/spec.toml"
    assert (format_one / spec).read_bytes() == (clean / spec).read_bytes()
    pd.testing.assert_frame_equal(pd.read_parquet(format_one / "searches" / SEARCH / "trials.parquet"),
                                  pd.read_parquet(clean / "searches" / SEARCH / "trials.parquet"))
    assert store_format(open_store(str(format_one))) == STORE_FORMAT


def test_a_store_of_a_newer_format_is_refused(tmp_path: Path) -> None:
    (tmp_path / FORMAT_FILE).write_text(json.dumps({"format": STORE_FORMAT + 1}))
    with pytest.raises(StorageCorrupt, match=r"newer than this rungway knows.*upgrade rungway"):
        open_store(str(tmp_path))


def test_a_damaged_format_file_is_named_with_its_repair(tmp_path: Path) -> None:
    (tmp_path / FORMAT_FILE).write_text('{"form')
    with pytest.raises(StorageCorrupt, match=rf"{FORMAT_FILE} is damaged.*\{{\"format\": {STORE_FORMAT}\}}"):
        open_store(str(tmp_path))


def test_a_new_store_is_marked_with_the_current_format_by_a_writer_only(tmp_path: Path) -> None:
    reader_root = tmp_path / "read"
    open_store(str(reader_root))
    assert not reader_root.exists()
    writer_root = tmp_path / "write"
    open_store(str(writer_root), create=True)
    assert json.loads((writer_root / FORMAT_FILE).read_text()) == {"format": STORE_FORMAT}


def test_show_reads_a_format_one_store(format_one: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from rungway.scheduler.cli.main import main

    assert main(["show", SEARCH, "--store", str(format_one), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["better"] == "lower"


# -- an old name gets its new one -------------------------------------------------------------


def test_a_spec_with_the_old_key_gets_an_error_naming_the_new_key() -> None:
    from rungway.scheduler.spec import SpecFileError

    text = (FIXTURES / "format-1.toml").read_text()
    assert 'direction = "minimize"' in text
    with pytest.raises(SpecFileError) as caught:
        parse_spec(text, source="old.toml")
    message = str(caught.value)
    assert 'old.toml:4: direction: this key was renamed in rungway 0.2: write better' in message
    assert 'better = "lower"' in message


def test_an_objective_using_an_old_name_is_told_the_new_one() -> None:
    from rungway.workers import Context

    ctx = Context(config={}, budget=1, start=0, state=None, trial=0, attempt=1, rung=0, milestones=(1,),
                  save=lambda state, budget: None, report=lambda budget, metrics, at: True,
                  yield_flag=lambda: False)
    with pytest.raises(AttributeError, match=r"ctx\.should_yield was renamed in rungway 0\.2: use ctx\.asked_to_yield"):
        ctx.should_yield  # noqa: B018
    with pytest.raises(AttributeError, match="no attribute 'no_such_thing'"):
        ctx.no_such_thing  # noqa: B018
    with pytest.raises(ImportError, match="rungway.workers.TrialStopped was renamed in rungway 0.2: use TrialCulled"):
        from rungway.workers import TrialStopped  # noqa: F401


# -- format 2 -> 3: checksums -------------------------------------------------------------------

SEARCH_TWO = "format-two"


@pytest.fixture
def format_two(tmp_path: Path) -> Path:
    root = tmp_path / "store"
    shutil.copytree(FIXTURES / "format-2", root)
    return root


def test_a_format_two_store_gets_checksums_and_its_old_files_read_as_written(format_two: Path) -> None:
    from rungway.scheduler.head.journal import Journal
    from rungway.scheduler.service.ledger import Ledger
    from rungway.scheduler.store.checksums import EMBEDDED_KEY

    folder = format_two / "searches" / SEARCH_TWO
    trials = pd.read_parquet(folder / "trials.parquet")
    rows = pd.read_parquet(folder / "measurements")
    ledger = pd.read_parquet(format_two / "_ledger")
    snapshot = json.loads((folder / "journal" / "head-state.json").read_text())
    spec = (folder / "spec.toml").read_bytes()
    assert store_format(Store(str(format_two))) == 2

    files = open_store(str(format_two)).search(SEARCH_TWO)

    assert json.loads((format_two / FORMAT_FILE).read_text()) == {"format": 3}
    # The files of a fixed name carry their checksums now; their contents are what they were.
    assert (folder / "spec.toml").read_bytes() == spec and files.read_spec() == spec.decode()
    assert (folder / "spec.toml.sha256").read_text() == f"{hashlib.sha256(spec).hexdigest()}  spec.toml\n"
    assert EMBEDDED_KEY in pq.read_metadata(folder / "trials.parquet").metadata
    pd.testing.assert_frame_equal(files.read_trials(), trials)
    assert (folder / "journal" / "head-state.json").read_text().startswith('{"sha256":"')
    assert json.loads(files.read_head_state("head-state.json") or "") == snapshot
    # The rest keeps its old names and reads unverified, as before.
    key = ["trial", "rung", "attempt", "seq", "metric"]
    expected = rows.sort_values(key).drop_duplicates(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(files.read_measurements(), expected)
    assert files.read_failures()["trial"].tolist() == [1]
    got = Ledger(str(format_two)).read()
    # Its rows held the reservation in cpu_seconds: read as the reservation, CPU time unknown.
    assert len(got) == len(ledger) and got["reserved_cpu_seconds"].sum() == pytest.approx(ledger["cpu_seconds"].sum())
    assert got["cpu_seconds"].isna().all()
    entries = list(Journal(folder / "journal").entries_after(snapshot["journal_seq"]))
    assert entries and [e["n"] for e in entries] == list(range(snapshot["journal_seq"] + 1, entries[-1]["n"] + 1))
    # Opening it again changes nothing.
    before = {p: p.read_bytes() for p in sorted(format_two.rglob("*")) if p.is_file()}
    open_store(str(format_two))
    assert {p: p.read_bytes() for p in sorted(format_two.rglob("*")) if p.is_file()} == before


def test_a_search_killed_by_a_format_two_head_resumes_and_finishes(format_two: Path) -> None:
    import sys

    from rungway.scheduler.head.driver import SearchDriver
    from rungway.scheduler.head.executor import InlineExecutor

    sys.path.insert(0, str(FIXTURES))  # format2_objective
    text = (FIXTURES / "format-2.toml").read_text()
    folder = format_two / "searches" / SEARCH_TWO
    driver = SearchDriver(parse_spec(text), text, str(format_two), InlineExecutor(cpus=2))
    assert driver.replayed > 0  # the old journal, lines without checksums
    assert driver.run().finished
    files = driver.files
    finals = files.read_measurements()
    finals = finals[finals["final"]]
    assert not finals.duplicated(["trial", "rung"]).any()
    # Ladder counts (Li et al., MLSys 2020: eta = 3, 9 trials at rung 0: 3 reach rung 1, 1 the top).
    assert finals.groupby("rung")["trial"].nunique().tolist() == [9, 3, 1]
    # What the new head wrote carries checksums: its journal was rotated away at the last snapshot.
    assert not list((folder / "journal").glob("events-*"))
    assert (folder / "journal" / "head-state.json").read_text().startswith('{"sha256":"')
    old, new = sorted(p.name for p in (folder / "measurements").iterdir())
    assert re.fullmatch(r"block-000001-[0-9a-f]{8}\.parquet", old)  # the old block stays, unverified
    assert re.fullmatch(r"block-000002-[0-9a-f]{32}\.parquet", new)  # the new one is named after its bytes
