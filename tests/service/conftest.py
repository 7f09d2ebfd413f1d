"""Fixtures for the service tests: a lab of two teams and an admin, tokens, and a fake head.

``head`` is :class:`FakeHead`, an in-memory stand-in with exactly the methods of
``lab.LabHead`` that the API calls (submit, searches, search, owner, pause, resume, cancel,
usage, start, stop). It parses submitted specs with the real ``parse_spec``, so spec errors
are the real ``SpecFileError``. A fixture with the real head can replace ``head``: everything
else takes the head only through that fixture.

``lab_config`` is a real ``LabConfig`` parsed from :func:`lab_toml` (teams vision and
speech, admin root; their tokens in ``tokens``, hashed with few iterations).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from typing import Any

import pytest

from rungway.scheduler.service.auth import Authenticator, hash_token
from rungway.scheduler.service.config import LabConfig, parse_lab_config
from rungway.scheduler.service.errors import NameTaken, UnknownSearch, WrongState
from rungway.scheduler.service.models import (
    SearchDetail,
    SearchInfo,
    SearchUsage,
    TeamUsage,
    UsageReport,
)
from rungway.scheduler.spec import parse_spec

# Few PBKDF2 iterations: the tests check who a token belongs to, not the hash's cost.
TEST_ITERATIONS = 1_000


# ---- the lab config ------------------------------------------------------------------------


@pytest.fixture(scope="session")
def tokens() -> dict[str, str]:
    """One token per caller: two teams and an admin. Fixed strings so a test can look for them."""
    return {
        "vision": "rgw_vision-test-token-0123456789abcdefghijklmnop",
        "speech": "rgw_speech-test-token-0123456789abcdefghijklmnop",
        "root": "rgw_admin-test-token-0123456789abcdefghijklmnopq",
    }


def lab_toml(tokens: dict[str, str], *, head: str = "") -> str:
    """The lab config's text, with fresh hashes of ``tokens``; ``head`` adds [head] lines."""
    hashed = {who: hash_token(token, iterations=TEST_ITERATIONS) for who, token in tokens.items()}
    return f"""
[head]
{head}

[[team]]
name = "vision"
guarantee_cpus = 2
cap_cpus = 4
weight = 2
allowance_cpu_hours = 100
tokens = ["{hashed['vision']}"]

[[team]]
name = "speech"
guarantee_cpus = 1
tokens = ["{hashed['speech']}"]

[[admin]]
name = "root"
tokens = ["{hashed['root']}"]
"""


@pytest.fixture(scope="session")
def lab_config(tokens: dict[str, str], tmp_path_factory: pytest.TempPathFactory) -> LabConfig:
    folder = tmp_path_factory.mktemp("lab")
    return parse_lab_config(lab_toml(tokens), str(folder / "lab.toml"))


@pytest.fixture(scope="session")
def make_lab_toml(tokens: dict[str, str]) -> Callable[..., str]:
    return lambda **kw: lab_toml(tokens, **kw)


@pytest.fixture(scope="session")
def authenticator(lab_config: LabConfig) -> Authenticator:
    return Authenticator(lab_config)


# ---- the fake head ---------------------------------------------------------------------------


class FakeHead:
    """Searches in a dict; state changes as ``LabHead`` documents them, nothing runs."""

    def __init__(self, config: LabConfig) -> None:
        self._config = config
        self._lock = threading.Lock()
        self._searches: dict[str, SearchInfo] = {}
        self.started = False
        self.stopped = False

    def start(self) -> None:
        self.started = True

    def stop(self, timeout: float | None = None) -> None:
        self.stopped = True

    def submit(self, team: str, spec_text: str, priority: int = 0) -> SearchInfo:
        spec = parse_spec(spec_text, "<submitted spec>")  # SpecFileError on a bad spec
        with self._lock:
            if spec.name in self._searches:
                raise NameTaken(f"a search named {spec.name!r} already exists")
            info = SearchInfo(name=spec.name, team=team, priority=priority, state="running",
                              submitted_at=time.time(), metric=spec.metric, better=spec.better)  # type: ignore[arg-type]
            self._searches[spec.name] = info
            return info

    def searches(self, team: str | None) -> list[SearchInfo]:
        with self._lock:
            return [s for s in self._searches.values() if team is None or s.team == team]

    def _get(self, name: str) -> SearchInfo:
        try:
            return self._searches[name]
        except KeyError:
            raise UnknownSearch(f"no search named {name!r}") from None

    def search(self, name: str) -> SearchDetail:
        with self._lock:
            info = self._get(name)
            return SearchDetail(**info.model_dump(), statistics={"trials": info.trials})

    def owner(self, name: str) -> str:
        with self._lock:
            return self._get(name).team

    def _move(self, name: str, verb: str, allowed: set[str], to: str) -> SearchInfo:
        with self._lock:
            info = self._get(name)
            if info.state not in allowed:
                raise WrongState(f"cannot {verb} search {name!r}: it is {info.state}")
            info = info.model_copy(update={"state": to})
            self._searches[name] = info
            return info

    def pause(self, name: str) -> SearchInfo:
        return self._move(name, "pause", {"running", "held"}, "paused")

    def resume(self, name: str) -> SearchInfo:
        return self._move(name, "resume", {"paused", "faulted"}, "running")

    def cancel(self, name: str) -> SearchInfo:
        return self._move(name, "cancel", {"running", "paused", "held", "faulted"}, "cancelled")

    def usage(self, team: str | None, period: str | None, since: float | None, until: float | None) -> UsageReport:
        period = period or self._config.head.allowance_period  # as the real head
        with self._lock:
            rows = [
                TeamUsage(team=t.name, guarantee_cpus=t.guarantee_cpus, cap_cpus=t.cap_cpus, weight=t.weight,
                          allowance_cpu_hours=t.allowance_cpu_hours, used_cpu_hours=0.0,
                          searches=sum(s.team == t.name for s in self._searches.values()))
                for t in self._config.teams if team is None or t.name == team
            ]
            per_search = [SearchUsage(team=s.team, search=s.name, cpu_hours=0.0, segments=0)
                          for s in self._searches.values() if team is None or s.team == team]
            return UsageReport(period=period, since=since, until=until if until is not None else time.time(),
                               teams=rows, searches=per_search)


def real_head(tokens: dict[str, str], store: Any) -> Any:
    """The real ``LabHead`` on its own store, with in-process executors and its loop not
    started: the API's rules are checked against what the head itself refuses and returns
    (nothing is run, so the fixtures' objective never needs to exist)."""
    from rungway.scheduler.head.executor import InlinePool
    from rungway.scheduler.service.lab import LabHead

    config = parse_lab_config(lab_toml(tokens, head=f'store = "{store}"'), str(store) + ".toml")
    return LabHead(config, InlinePool(cpus=4))


@pytest.fixture(params=["fake", "real"])
def head(request: pytest.FixtureRequest, lab_config: LabConfig, tokens: dict[str, str],
         tmp_path: Any) -> Iterator[Any]:
    made = FakeHead(lab_config) if request.param == "fake" else real_head(tokens, tmp_path / "store")
    if request.param == "fake":
        made.start()
    yield made
    made.stop()


def spec_text(name: str, *, metric: str = "loss") -> str:
    """A valid spec (the objective is never run by the fake head)."""
    return f"""
name = "{name}"
objective = "objectives_for_tests:quadratic"
metric = "{metric}"
better = "lower"

[ladder]
min = 1
max = 9
eta = 3

[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


# Test modules take these through fixtures, not `from conftest import`: every test folder has
# a conftest.py, and which one a bare `import conftest` finds depends on what pytest collected.


@pytest.fixture(scope="session")
def fake_head_class() -> type[FakeHead]:
    return FakeHead


@pytest.fixture(scope="session")
def make_spec() -> Callable[..., str]:
    return spec_text


@pytest.fixture(scope="session")
def make_real_head(tokens: dict[str, str]) -> Callable[[Any], Any]:
    """``make_real_head(store_folder)``: the real head (see :func:`real_head`)."""
    return lambda store: real_head(tokens, store)
