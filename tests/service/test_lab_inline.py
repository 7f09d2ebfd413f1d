"""The lab's head (``service.lab.LabHead``) with in-process executors: many teams' searches in
one loop, states, the CPU ledger and restarts. Real Ray runs in ``test_lab_ray.py``.

What is checked against outside sources: each finished search's trial counts per rung are
the successive-halving counts of its ladder (Li et al., MLSys 2020: with eta = 3 and 9
trials at rung 0, at most floor(9/3) = 3 reach rung 1 and floor(3/3) = 1 the top); the
rest checks our own promises (nothing lost, exactly one result per trial and rung, the
ledger agrees with the measurements table).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.head.executor import InlinePool
from rungway.scheduler.service.auth import hash_token
from rungway.scheduler.service.config import parse_lab_config
from rungway.scheduler.service.errors import NameTaken, UnknownSearch, WrongState
from rungway.scheduler.service.lab import LabHead
from rungway.scheduler.service.ledger import Ledger
from rungway.scheduler.store import Store

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "run"))
from runhelpers import spec_text  # noqa: E402


def config_for(root: Path, *, vision_allowance: str = "", speech_cap: str = "cap_cpus = 2"):
    text = f"""
[head]
store = "{root / 'store'}"
round_seconds = 0.001
preempt_deadline = 5

[[team]]
name = "vision"
guarantee_cpus = 1
weight = 1
{vision_allowance}
tokens = ["{hash_token('rgw_v', iterations=1000)}"]

[[team]]
name = "speech"
guarantee_cpus = 1
{speech_cap}
tokens = ["{hash_token('rgw_s', iterations=1000)}"]
"""
    return parse_lab_config(text, str(root / "lab.toml"))


def finished(head: LabHead, *names: str):
    return lambda: all(head.search(n).state in ("finished", "faulted", "cancelled") for n in names)


def exactly_once(root: Path, name: str) -> None:
    frame = Store(str(root / "store")).search(name).read_measurements()
    finals = frame[frame["final"] & (frame["metric"] == "loss")]
    assert not finals.duplicated(["trial", "rung"]).any(), "a rung result was stored twice"


def test_two_teams_share_the_loop_and_every_segment_is_charged(tmp_path: Path) -> None:
    config = config_for(tmp_path)
    head = LabHead(config, InlinePool(cpus=2))
    head.submit("vision", spec_text("v-one", objective="objectives_run:resumable", trials=9))
    head.submit("speech", spec_text("s-one", objective="objectives_run:plain", trials=9), priority=3)
    head.run_for(120, until=finished(head, "v-one", "s-one"))

    for name, team in (("v-one", "vision"), ("s-one", "speech")):
        info = head.search(name)
        assert info.state == "finished" and info.team == team
        assert info.leader_value is not None and info.trials == 9
        rungs = [r["results"] for r in info.rungs]
        assert rungs == [9, 3, 1]  # eta = 3 over budgets 1, 3, 9 (successive halving counts)
        exactly_once(tmp_path, name)
    assert head.search("s-one").priority == 3

    # One ledger row per segment, charged to the right team: the CPU time the segment used (as
    # the runner measured it: never unknown here) and its reservation, cpus x the worker's own
    # start-to-end time.
    ledger = Ledger(config.store_root).read()
    for name, team in (("v-one", "vision"), ("s-one", "speech")):
        rows = ledger[ledger["search"] == name]
        assert (rows["team"] == team).all()
        assert len(rows) == head.search(name).segments
        assert set(rows["outcome"]) == {"result"}
        frame = Store(config.store_root).search(name).read_measurements()
        finals = frame[frame["final"] & (frame["metric"] == "loss")]
        # Every result row has a ledger row for its trial and attempt.
        charged = set(zip(rows["trial"], rows["attempt"], strict=True))
        assert set(zip(finals["trial"], finals["attempt"], strict=True)) <= charged
        assert (rows["reserved_cpu_seconds"] - rows["cpus"] * (rows["ended"] - rows["started"])).abs().max() < 1e-9
        assert rows["cpu_seconds"].notna().all() and (rows["cpu_seconds"] > 0).all()
    usage = head.usage(period="all")
    by_team = {t.team: t for t in usage.teams}
    for team in ("vision", "speech"):
        assert by_team[team].used_cpu_hours == pytest.approx(ledger[ledger["team"] == team]["cpu_seconds"].sum() / 3600)
    assert {s.search for s in usage.searches} == {"v-one", "s-one"}
    # Allowances count CPU time too: the sharing state's usage is the ledger's CPU time (it
    # accrues reservations while segments run; each one's end replaces it with what it used).
    sharing = head.sharing.statistics()["teams"]
    for team in ("vision", "speech"):
        charged = ledger[ledger["team"] == team]
        assert sharing[team]["used_cpu_hours"] == pytest.approx(charged["cpu_seconds"].sum() / 3600, rel=1e-6)
        assert by_team[team].reserved_cpu_hours == pytest.approx(charged["reserved_cpu_seconds"].sum() / 3600)
    head.stop()


def test_a_restarted_head_finishes_every_search_and_keeps_usage(tmp_path: Path) -> None:
    config = config_for(tmp_path)
    first = LabHead(config, InlinePool(cpus=2))
    first.submit("vision", spec_text("v-two", trials=12))
    first.submit("speech", spec_text("s-two", trials=12), priority=1)
    first.run_for(60, until=lambda: first.search("v-two").segments >= 5)
    used_before = {t.team: t.used_cpu_hours for t in first.usage(period="all").teams}
    assert used_before["vision"] > 0
    # No stop(): the head vanishes as if killed; its drivers' journals are all there is.
    second = LabHead(config, InlinePool(cpus=2))
    names = [s.name for s in second.searches()]
    assert names == ["v-two", "s-two"]  # submission order is the queue order
    assert second.search("s-two").priority == 1 and second.owner("s-two") == "speech"
    second.run_for(120, until=finished(second, "v-two", "s-two"))
    for name in ("v-two", "s-two"):
        info = second.search(name)
        assert info.state == "finished" and info.trials == 12
        assert info.leaderboard and info.leaderboard[0]["value"] == info.leader_value
        exactly_once(tmp_path, name)
    used_after = {t.team: t.used_cpu_hours for t in second.usage(period="all").teams}
    assert used_after["vision"] >= used_before["vision"]
    second.stop()


def test_states_pause_resume_cancel_and_the_errors_for_actions_that_do_not_apply(tmp_path: Path) -> None:
    head = LabHead(config_for(tmp_path), InlinePool(cpus=1))
    head.submit("vision", spec_text("v-three", trials=30))
    with pytest.raises(NameTaken):
        head.submit("speech", spec_text("v-three", trials=3))
    with pytest.raises(SpecError):
        head.submit("vision", "name = 'broken'\n")
    with pytest.raises(UnknownSearch):
        head.search("nobody")
    with pytest.raises(WrongState):
        head.resume("v-three")
    assert head.pause("v-three").state == "paused"
    head.run_for(0.3)
    assert head.search("v-three").segments == 0  # paused before it started: nothing ran
    with pytest.raises(WrongState):
        head.pause("v-three")
    assert head.resume("v-three").state == "running"
    head.run_for(60, until=lambda: head.search("v-three").segments >= 3)
    assert head.cancel("v-three").state == "cancelled"
    with pytest.raises(WrongState):
        head.cancel("v-three")
    done = head.search("v-three").segments
    head.run_for(0.3)
    assert head.search("v-three").segments == done  # a cancelled search gets nothing more
    head.stop()


def test_a_team_whose_allowance_is_spent_is_held_with_the_reason(tmp_path: Path) -> None:
    head = LabHead(config_for(tmp_path, vision_allowance="allowance_cpu_hours = 0"), InlinePool(cpus=2))
    head.submit("vision", spec_text("v-four", trials=5))
    head.submit("speech", spec_text("s-four", trials=5))
    head.run_for(60, until=finished(head, "s-four"))
    held = head.search("v-four")
    assert held.state == "held" and held.reason == "allowance spent" and held.segments == 0
    assert head.search("s-four").state == "finished"
    assert next(t for t in head.usage().teams if t.team == "vision").held
    head.stop()


def test_a_trial_larger_than_its_teams_cap_is_refused_at_submission(tmp_path: Path) -> None:
    head = LabHead(config_for(tmp_path), InlinePool(cpus=8))
    text = spec_text("s-big", trials=3).replace("cpus = 1", "cpus = 3")
    with pytest.raises(SpecError, match="resources.cpus"):
        head.submit("speech", text)
    assert Store(config_for(tmp_path).store_root).search("s-big").read_spec() is None  # nothing stored
    head.stop()


def test_a_search_whose_team_left_the_config_is_held_and_the_rest_of_the_lab_runs(tmp_path: Path) -> None:
    first = LabHead(config_for(tmp_path), InlinePool(cpus=2))
    first.submit("speech", spec_text("s-five", trials=5))
    first.stop()
    text = Path(tmp_path / "lab.toml")
    only_vision = parse_lab_config(f"""
[head]
store = "{tmp_path / 'store'}"
round_seconds = 0.001

[[team]]
name = "vision"
guarantee_cpus = 1
tokens = ["{hash_token('rgw_v', iterations=1000)}"]
""", str(text))
    head = LabHead(only_vision, InlinePool(cpus=2))
    head.submit("vision", spec_text("v-five", trials=5))
    head.run_for(60, until=finished(head, "v-five"))
    held = head.search("s-five")
    assert held.state == "held" and held.reason == "team 'speech' is not in the lab config"
    assert head.search("v-five").state == "finished" and head.loop_error is None
    head.stop()
    back = LabHead(config_for(tmp_path), InlinePool(cpus=2))  # the team is back in the config
    back.run_for(60, until=finished(back, "s-five"))
    assert back.search("s-five").state == "finished"
    back.stop()
