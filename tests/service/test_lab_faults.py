"""A fault in one search is that search's fault: the lab's head keeps serving and running every
other search, and the faulted one shows its state and a reason naming the file at fault."""

from __future__ import annotations

from pathlib import Path

import pytest

from rungway.scheduler.head.driver import HEAD_STATE, SearchDriver
from rungway.scheduler.head.executor import InlinePool
from rungway.scheduler.service.lab import LabHead
from rungway.scheduler.store import Store

from test_lab_inline import config_for, exactly_once, finished, spec_text  # noqa: I001


def _files(root: Path, name: str):  # noqa: ANN202
    return Store(str(root / "store")).search(name)


def test_a_damaged_snapshot_faults_its_search_and_the_other_team_finishes(tmp_path: Path) -> None:
    config = config_for(tmp_path)
    first = LabHead(config, InlinePool(cpus=2))
    first.submit("vision", spec_text("v-snap", trials=12))
    first.submit("speech", spec_text("s-snap", trials=12))
    first.run_for(60, until=lambda: first.search("v-snap").segments >= 3)
    first.stop()  # writes every search's snapshot
    snapshot = Path(_files(tmp_path, "v-snap").journal_dir) / HEAD_STATE
    text = snapshot.read_text()
    snapshot.write_text(text[: len(text) // 2])  # torn, as after a kill -9 of a careless writer

    second = LabHead(config, InlinePool(cpus=2))
    second.run_for(120, until=finished(second, "v-snap", "s-snap"))
    damaged = second.search("v-snap")
    assert damaged.state == "faulted"
    assert str(snapshot) in (damaged.reason or "") and "saved state is damaged" in (damaged.reason or "")
    assert second.search("s-snap").state == "finished"
    exactly_once(tmp_path, "s-snap")
    # Listing as the team and as the admin answers (no 500 from one bad search).
    assert [s.state for s in second.searches(team="vision")] == ["faulted"]
    assert {s.name: s.state for s in second.searches()} == {"v-snap": "faulted", "s-snap": "finished"}
    second.stop()


def test_an_unreadable_spec_of_a_finished_search_does_not_stop_the_head(tmp_path: Path) -> None:
    config = config_for(tmp_path)
    first = LabHead(config, InlinePool(cpus=2))
    first.submit("speech", spec_text("s-old", trials=3))
    first.run_for(60, until=finished(first, "s-old"))
    first.stop()
    spec_path = Path(_files(tmp_path, "s-old").layout.spec)
    spec_path.write_text("name = \n")

    second = LabHead(config, InlinePool(cpus=2))  # starts whatever is in its store
    old = second.search("s-old")
    assert old.state == "faulted" and str(spec_path) in (old.reason or "")
    assert "Put back the spec it was submitted with" in (old.reason or "")
    second.submit("vision", spec_text("v-new", trials=3))
    second.run_for(60, until=finished(second, "v-new"))
    assert second.search("v-new").state == "finished"
    second.stop()


def test_an_error_while_stepping_one_search_faults_it_alone(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    real_step = SearchDriver.step

    def step(self: SearchDriver, *args, **kwargs):  # noqa: ANN002, ANN003, ANN202
        if self.spec.name == "v-bad" and self.segments >= 2:
            raise RuntimeError("a bug in one search's step")
        return real_step(self, *args, **kwargs)

    monkeypatch.setattr(SearchDriver, "step", step)
    head = LabHead(config_for(tmp_path), InlinePool(cpus=2))
    head.submit("vision", spec_text("v-bad", trials=9))
    head.submit("speech", spec_text("s-good", trials=9))
    head.run_for(120, until=finished(head, "v-bad", "s-good"))
    bad = head.search("v-bad")
    assert bad.state == "faulted" and bad.reason == "running: RuntimeError: a bug in one search's step"
    assert head.search("s-good").state == "finished"
    exactly_once(tmp_path, "s-good")
    head.stop()


def test_names_that_differ_only_in_case_are_refused(tmp_path: Path) -> None:
    from rungway.scheduler.service.errors import NameTaken

    head = LabHead(config_for(tmp_path), InlinePool(cpus=2))
    head.submit("vision", spec_text("A-Secret", trials=3))
    with pytest.raises(NameTaken, match="'A-Secret', which differs from 'a-secret' only in letter case"):
        head.submit("speech", spec_text("a-secret", trials=3))
    head.stop()


def test_a_run_whose_name_differs_only_in_case_is_refused_and_leaves_no_folder(tmp_path: Path) -> None:
    from rungway.scheduler.core.errors import SpecError
    from rungway.scheduler.head.executor import InlineExecutor
    from rungway.scheduler.spec import parse_spec

    first = spec_text("A-Secret", trials=3)
    SearchDriver(parse_spec(first), first, str(tmp_path), InlineExecutor(cpus=1)).run()
    second = spec_text("a-secret", trials=3)
    with pytest.raises(SpecError, match="differs from 'a-secret' only in letter case"):
        SearchDriver(parse_spec(second), second, str(tmp_path), InlineExecutor(cpus=1))
    assert Store(str(tmp_path)).list_searches() == ["A-Secret"]
