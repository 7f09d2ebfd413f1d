"""The store's format version and its migration chain, on stores written by earlier versions.

The fixtures under tests/store/fixtures/ were written by the rungway of each format and
committed as written (their README says how); every test works on a copy.
"""

from __future__ import annotations

import json
import shutil
import tomllib
from pathlib import Path

import pandas as pd
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

    assert store_format(store) == STORE_FORMAT == 2
    assert json.loads((format_one / FORMAT_FILE).read_text()) == {"format": 2}
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
