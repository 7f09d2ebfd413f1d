"""Search names, the folder layout, and the root forms a Store accepts."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.store import StorageError, Store
from rungway.scheduler.store.layout import SearchLayout, parse_checkpoint_name


@pytest.mark.parametrize("name", ["a", "Z9", "lr-sweep_2.v1", "0" + "x" * 63])
def test_valid_search_names_are_accepted(tmp_path: Path, name: str) -> None:
    assert Store(str(tmp_path)).search(name).name == name


@pytest.mark.parametrize("name", ["", "-lead", ".hidden", "a/b", "..", "sp ace", "x" * 65, "ü"])
def test_invalid_search_names_raise_spec_error_naming_the_rule(tmp_path: Path, name: str) -> None:
    with pytest.raises(SpecError, match="invalid search name") as caught:
        Store(str(tmp_path)).search(name)
    assert caught.value.field == "name"


def test_layout_puts_each_file_where_the_docs_say(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s1")
    files.write_spec("x = 1\n")
    files.write_trials([], [])
    part = files.write_measurements(
        [dict(trial=3, rung=1, attempt=2, seq=0, budget=1.0, metric="loss", value=0.5, final=True)]
    )
    ckpt = files.save_checkpoint(3, 9.0, 2, b"state")
    failure = files.record_failure(3, 1, 2, "ValueError", "bad", "Traceback ...")
    base = tmp_path / "searches" / "s1"
    assert (base / "spec.toml").read_text() == "x = 1\n"
    assert (base / "trials.parquet").is_file()
    assert Path(part).parent == base / "measurements"
    assert Path(part).name.startswith("part-t3-r1-a2-") and part.endswith(".parquet")
    assert Path(ckpt.path) == base / "checkpoints" / "3" / "9.0-2.ckpt"
    assert (base / "checkpoints" / "3" / "9.0-2.ckpt.sha256").is_file()
    assert Path(failure).parent == base / "failures"
    # The journal folder is reserved for the head; the store never creates it.
    assert not (base / "journal").exists()
    assert files.journal_dir == str(base / "journal")


def test_list_searches_lists_written_searches_only(tmp_path: Path) -> None:
    store = Store(str(tmp_path))
    assert store.list_searches() == []
    store.search("b").write_spec("")
    store.search("a").write_spec("")
    store.search("never-written")
    (tmp_path / "searches" / ".not a search").mkdir()
    assert store.list_searches() == ["a", "b"]


def test_file_uri_root_reads_what_a_plain_path_root_wrote(tmp_path: Path) -> None:
    Store(str(tmp_path)).search("s").write_spec("shared = true\n")
    via_uri = Store(tmp_path.as_uri()).search("s")
    assert via_uri.read_spec() == "shared = true\n"
    via_uri.save_checkpoint(0, 1.0, 0, b"abc")
    loaded = Store(str(tmp_path)).search("s").load_checkpoint(0)
    assert loaded is not None and loaded.data == b"abc"


def test_relative_root_is_made_absolute(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    files = Store("rel").search("s")
    assert os.path.isabs(files.path)
    assert files.path == str(tmp_path / "rel" / "searches" / "s")


def test_unknown_uri_scheme_raises_storage_error() -> None:
    with pytest.raises(StorageError, match="cannot open store root"):
        Store("nosuchscheme://bucket/x")


def test_checkpoint_names_round_trip_awkward_budgets() -> None:
    layout = SearchLayout("/r/searches/s")
    for budget in (0.0, 1e-05, 3.0, 2.5e10, 1 / 3):
        name = Path(layout.checkpoint(1, budget, 7)).name
        parsed = parse_checkpoint_name(name)
        assert parsed is not None and parsed.budget == budget and parsed.attempt == 7
    for stray in ("x.ckpt", "1.0-a.ckpt", "1.0-1.ckpt.sha256", "nan-1.ckpt", "1.0.ckpt"):
        assert parse_checkpoint_name(stray) is None
    with pytest.raises(ValueError, match="finite"):
        layout.checkpoint(1, float("inf"), 0)
