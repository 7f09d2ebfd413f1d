"""Every surface names Hyperband's brackets by the docs' s: ``rungway show``, ``rungway plan``
(text and JSON), the live view and ``core.statistics()``.

Source: Li et al., "Hyperband", JMLR 18 (2018), Algorithm 1 and Table 1 (recalled from memory):
bracket s starts its trials at budget R * eta**-s, so s = s_max (4 for R = 81, eta = 3) is the
bracket that starts at the minimum budget r = 1 and s = 0 runs every trial at R = 81.
"""

from __future__ import annotations

import argparse
import json
import re
from pathlib import Path

import numpy as np
import pytest

from rungway.scheduler.cli import plan_cmd
from rungway.scheduler.cli.main import main
from rungway.scheduler.cli.progress import render
from rungway.scheduler.core.events import Segment
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.head.driver import HEAD_STATE
from rungway.scheduler.spec import parse_spec
from rungway.scheduler.store import open_store
from rungway.workers.demo import DEMO_SPEC

S_MAX = 4  # R / r = 81 = 3**4 (Li et al., Table 1)


def hyperband_spec(mode: str = "hyperband", trials: int = 40, ladder: str = "") -> str:
    text = DEMO_SPEC.replace('max = 27', 'max = 81').replace('mode = "asha"', f'mode = "{mode}"\n{ladder}')
    return text.replace("trials = 72", f"trials = {trials}")


def bracket_lines(out: str) -> dict[str, str]:
    """label -> the rest of the line, for each line naming a bracket."""
    found = {}
    for line in out.splitlines():
        m = re.match(r"\s*((?:iteration \d+ )?bracket s=\d+):\s*(.*)", line)
        if m:
            found[m.group(1)] = m.group(2)
    return found


def test_statistics_name_brackets_by_s() -> None:
    spec = parse_spec(hyperband_spec())
    core = SearchCore(spec.plan(), spec.make_sampler(np.random.default_rng(0)))
    stats = core.statistics()["brackets"]
    assert [b["s"] for b in stats] == [4, 3, 2, 1, 0]
    first = {b["s"]: b["rungs"][0]["budget"] for b in stats}
    assert first[S_MAX] == 1 and first[0] == 81  # s_max starts at the minimum budget, s = 0 at R


def test_show_names_the_bracket_at_the_minimum_budget_s_max(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = hyperband_spec()
    spec = parse_spec(text)
    core = SearchCore(spec.plan(), spec.make_sampler(np.random.default_rng(spec.seed)))
    while isinstance(seg := core.ask(), Segment):
        core.report(seg.trial, seg.attempt, seg.rung, 0.5 + seg.trial / 100)
    files = open_store(str(tmp_path), create=True).search(spec.name)
    files.write_spec(text)
    files.write_head_state(HEAD_STATE, json.dumps({"core": core.snapshot(), "meta": {}}))

    assert main(["show", spec.name, "--store", str(tmp_path)]) == 0
    lines = bracket_lines(capsys.readouterr().out)
    assert list(lines) == [f"bracket s={s}" for s in (4, 3, 2, 1, 0)]
    assert lines[f"bracket s={S_MAX}"].startswith("1: ")  # the minimum budget
    assert lines["bracket s=0"].startswith("81: ") and "|" not in lines["bracket s=0"]

    assert main(["show", spec.name, "--store", str(tmp_path), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert {b["s"]: b["rungs"][0]["budget"] for b in shown["statistics"]["brackets"]}[S_MAX] == 1


def _plan(path: Path, *extra: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    plan_cmd.configure(parser)
    return parser.parse_args([str(path), "--workers", "4", "--repeats", "2", "--seconds-per-unit", "1", *extra])


def test_plan_names_the_bracket_at_the_minimum_budget_s_max(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "hb.toml"
    path.write_text(hyperband_spec())
    assert plan_cmd.run(_plan(path)) == 0
    lines = bracket_lines(capsys.readouterr().out)
    assert list(lines) == [f"bracket s={s}" for s in (4, 3, 2, 1, 0)]
    assert lines[f"bracket s={S_MAX}"].startswith("epochs 1: ")
    assert lines["bracket s=0"].startswith("epochs 81: ")

    assert plan_cmd.run(_plan(path, "--json")) == 0
    data = json.loads(capsys.readouterr().out)
    assert [(b["s"], b["rungs"][0]["budget"]) for b in data["brackets"]] == [(4, 1), (3, 3), (2, 9), (1, 27), (0, 81)]


def test_plan_names_sync_hyperband_iterations(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "shb.toml"
    path.write_text(hyperband_spec("sync-hyperband", trials=286))  # two iterations of 143 (Algorithm 1)
    assert plan_cmd.run(_plan(path)) == 0
    lines = bracket_lines(capsys.readouterr().out)
    assert list(lines) == [f"iteration {i} bracket s={s}" for i in (1, 2) for s in (4, 3, 2, 1, 0)]
    assert lines[f"iteration 2 bracket s={S_MAX}"].startswith("epochs 1: 81 ")  # n = 81 (Li et al., Table 1)


def test_the_live_view_names_brackets_by_s() -> None:
    spec = parse_spec(hyperband_spec())
    core = SearchCore(spec.plan(), spec.make_sampler(np.random.default_rng(0)))
    stats = dict(core.statistics(), search="hb", unit="epochs", metric="accuracy", better="higher",
                 cpus_busy=0, cpus_total=2, elapsed=0.0)
    lines = [line.strip() for line in render(stats)]
    assert any(line.startswith(f"bracket s={S_MAX} rungs  1: ") for line in lines)
    assert any(line.startswith("bracket s=0 rungs  81: ") for line in lines)
