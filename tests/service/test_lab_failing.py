"""The lab's head shows a search that can only fail (issue #10) as ``faulted``, with the reason
and its first failure, not as ``finished``; resumed once its objective is fixed, it runs on.
Our own rules (docs/service.md, search states); no outside figures."""

from __future__ import annotations

import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from rungway.scheduler.head.executor import InlinePool
from rungway.scheduler.service.config import parse_lab_config
from rungway.scheduler.service.lab import LabHead

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "run"))
from runhelpers import spec_text  # noqa: E402


def test_a_failing_search_is_faulted_with_its_first_failure_and_resumes_once_fixed(
        make_lab_toml: Callable[..., str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    flag = tmp_path / "broken"
    flag.touch()
    monkeypatch.setenv("RUNGWAY_TEST_FLAG", str(flag))
    store = tmp_path / "store"
    config = parse_lab_config(make_lab_toml(head=f'store = "{store}"\nround_seconds = 0.001'), str(tmp_path / "lab.toml"))
    head = LabHead(config, InlinePool(cpus=2))
    head.submit("vision", spec_text("broken", objective="objectives_dying:fails_while_flagged", trials=12,
                                    extra="max_consecutive_failures = 2"))
    over = lambda: head.search("broken").state not in ("running", "held")  # noqa: E731
    head.run_for(120, until=over)
    info = head.search("broken")
    assert info.state == "faulted"
    assert info.reason is not None
    assert info.reason.startswith("failing: 2 trials in a row failed at their first rung")
    assert "; first failure: trial " in info.reason and info.reason.endswith("RuntimeError: the flag is up")
    flag.unlink()  # fixed: resuming gives it another run of trials
    head.resume("broken")
    head.run_for(120, until=over)
    info = head.search("broken")
    assert info.state == "finished" and info.reason is None
    assert info.trials == 12
    head.stop()
