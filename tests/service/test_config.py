"""The lab config file (rungway.scheduler.service.config)."""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import pytest

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.sharing import TeamQuota
from rungway.scheduler.service.auth import hash_token
from rungway.scheduler.service.config import LabConfig, load_lab_config, parse_lab_config, period_start
from rungway.scheduler.spec import SpecFileError

H1, H2, H3 = (hash_token(f"rgw_{n}", iterations=1_000) for n in ("one", "two", "three"))

EXAMPLE = f"""\
[head]
host = "127.0.0.1"
port = 8470
store = "rungway-store"
ray_cpus = 4
preempt_deadline = 30
allowance_period = "week"
log_file = "logs/access.log"

[[team]]
name = "acoustics"
guarantee_cpus = 8
cap_cpus = 24
weight = 2.0
allowance_cpu_hours = 500
tokens = ["{H1}"]

[[team]]
name = "optics"
tokens = ["{H2}"]

[[admin]]
name = "lab-admin"
tokens = ["{H3}"]
"""


def _error(text: str) -> SpecFileError:
    with pytest.raises(SpecFileError) as info:
        parse_lab_config(text, "lab.toml")
    return info.value


def test_example_loads_with_defaults(tmp_path: Path) -> None:
    path = tmp_path / "lab" / "lab.toml"
    path.parent.mkdir()
    path.write_text(EXAMPLE)
    config = load_lab_config(path)
    assert isinstance(config, LabConfig) and config.source == str(path)
    assert (config.head.host, config.head.port, config.head.allow_remote) == ("127.0.0.1", 8470, False)
    assert (config.head.ray_cpus, config.head.preempt_deadline, config.head.round_seconds) == (4, 30.0, 0.05)
    assert (config.head.allowance_period, config.head.max_body_kb, config.head.ray_address) == ("week", 256, "")
    assert config.head.queued_per_slot == 0.0  # in the lab, every start is the sharing rules' by default
    # Relative paths resolve against the config file's folder, not the current one.
    assert config.store_root == str(tmp_path / "lab" / "rungway-store")
    assert config.log_path == str(tmp_path / "lab" / "logs" / "access.log")
    assert [t.name for t in config.teams] == ["acoustics", "optics"]
    assert [a.name for a in config.admins] == ["lab-admin"] and config.admins[0].tokens == (H3,)
    assert config.quotas() == (
        TeamQuota(name="acoustics", guarantee_cpus=8, cap_cpus=24, weight=2.0, allowance_cpu_hours=500),
        TeamQuota(name="optics", guarantee_cpus=0, cap_cpus=None, weight=1.0, allowance_cpu_hours=None),
    )
    assert config.team("optics").tokens == (H2,)
    with pytest.raises(KeyError):
        config.team("nobody")


def test_store_paths_are_kept_and_a_uri_the_head_cannot_journal_on_is_refused(tmp_path: Path) -> None:
    with pytest.raises(SpecFileError, match=r"head\.store: .*must be a path"):
        parse_lab_config('[head]\nstore = "s3://bucket/rungway"\n')
    local = parse_lab_config(f'[head]\nstore = "file://{tmp_path}/x"\n')
    assert local.store_root == f"file://{tmp_path}/x" and local.log_path is None
    absolute = parse_lab_config(f'[head]\nstore = "{tmp_path}/x"\n', base_dir="/elsewhere")
    assert absolute.store_root == f"{tmp_path}/x"
    relative = parse_lab_config('[head]\nstore = "s"\n', base_dir=tmp_path)
    assert relative.store_root == str(tmp_path / "s")


def test_an_empty_file_is_a_lab_with_defaults() -> None:
    config = parse_lab_config("")
    assert config.teams == () and config.admins == () and config.head.port == 8470
    assert config.store_root == os.path.join(os.getcwd(), "rungway-store")


@pytest.mark.parametrize("host", ["127.0.0.1", "127.3.4.5", "::1", "localhost"])
def test_loopback_hosts_need_no_permission(host: str) -> None:
    assert parse_lab_config(f'[head]\nhost = "{host}"\n').head.host == host


@pytest.mark.parametrize("host", ["0.0.0.0", "10.1.2.3", "::", "head.example.org"])
def test_other_hosts_need_allow_remote(host: str) -> None:
    error = _error(f'[head]\nport = 9000\nhost = "{host}"\n')
    assert error.problems[0].field == "head.allow_remote"
    assert str(error).startswith(f'lab.toml:1: head.allow_remote: must be true to listen on "{host}"')
    assert parse_lab_config(f'[head]\nhost = "{host}"\nallow_remote = true\n').head.allow_remote


# (text, the first line of the error). Lines count from 1; [[team]] tables are numbered from 0.
CASES = [
    ('[head]\nport = 70000\n', 'lab.toml:2: head.port: must be an integer from 0 to 65535 (0 picks a free port) (got 70000)'),
    ('[head]\nallow_remote = "yes"\n', 'lab.toml:2: head.allow_remote: must be true or false (got "yes")'),
    ('[head]\nround_seconds = 0\n', 'lab.toml:2: head.round_seconds: must be a number > 0 (got 0)'),
    ('[head]\nallowance_period = "monthly"\n',
     'lab.toml:2: head.allowance_period: must be one of "day", "week", "month" (got "monthly") (did you mean "month"?)'),
    ('[head]\nray_address = "auto"\nray_cpus = 8\n',
     'lab.toml:3: head.ray_cpus: only applies to an embedded Ray (ray_address = ""); a joined cluster has the CPUs '
     'its nodes bring. Remove ray_cpus or ray_address'),
    ('[head]\nprot = 1\n', 'lab.toml:2: head.prot: unknown key (did you mean "port"?); the keys in [head] are: host, '
     'port, allow_remote, store, ray_address, ray_cpus, preempt_deadline, round_seconds, allowance_period, '
     'queued_per_slot, max_body_kb, log_file'),
    ('[head]\nqueued_per_slot = -1\n', 'lab.toml:2: head.queued_per_slot: must be a number >= 0 (got -1)'),
    ('[head]\nqueued_per_slot = 17\n', 'lab.toml:2: head.queued_per_slot: must be a number from 0 to 16 (got 17.0)'),
    (f'[[team]]\nname = "a"\ntokens = ["{H1}"]\n\n[[team]]\nname = "b"\nweigth = 2\ntokens = ["{H2}"]\n',
     'lab.toml:7: team[1].weigth: unknown key (did you mean "weight"?); the keys in [team] are: name, '
     'guarantee_cpus, cap_cpus, weight, allowance_cpu_hours, tokens'),
    (f'[[team]]\nname = "Acoustics"\ntokens = ["{H1}"]\n',
     'lab.toml:2: team[0].name: must be 1 to 40 characters: a lower-case letter or digit, then lower-case letters, '
     'digits, "_" or "-" (got "Acoustics"), e.g. name = "acoustics"'),
    (f'[[team]]\nname = "a"\nweight = 0\ntokens = ["{H1}"]\n', 'lab.toml:3: team[0].weight: must be a number > 0 (got 0)'),
    (f'[[team]]\nname = "a"\nguarantee_cpus = 8\ncap_cpus = 4\ntokens = ["{H1}"]\n',
     'lab.toml:4: team[0].cap_cpus: must be >= guarantee_cpus = 8.0 (got 4.0); remove cap_cpus for no cap'),
    ('[[team]]\nname = "a"\n', 'lab.toml:1: team[0].tokens: required field is missing; add tokens = [...] with at '
     'least one hash made by `rungway lab token`'),
    ('[[team]]\nname = "a"\ntokens = []\n', 'lab.toml:3: team[0].tokens: must be an array of at least one token hash '
     '(got an empty array); tokens hold hashes made by `rungway lab token`, never the token itself'),
    (f'[team]\nname = "a"\ntokens = ["{H1}"]\n', 'lab.toml:1: team: must be an array of tables, one [[team]] per team (got a table)'),
    (f'[[team]]\nname = "a"\ntokens = ["{H1}"]\n[[team]]\nname = "a"\ntokens = ["{H2}"]\n',
     'lab.toml:5: team[1].name: "a" is already the name of team[0]; names must be unique'),
    (f'[[admin]]\nname = "x"\ntokens = ["{H1}"]\n[[admin]]\nname = "x"\ntokens = ["{H2}"]\n',
     'lab.toml:5: admin[1].name: "x" is already the name of admin[0]; names must be unique'),
    (f'[[team]]\nname = "a"\ntokens = ["{H1}"]\n[[admin]]\nname = "a"\ntokens = ["{H2}"]\n',
     'lab.toml:5: admin[0].name: "a" is already the name of team[0]; a name is either a team or an admin, not both'),
    (f'[[team]]\nname = "a"\ntokens = ["{H1}"]\n[[admin]]\nname = "b"\ntokens = ["{H2}", "{H1}"]\n',
     'lab.toml:6: admin[0].tokens[1]: the same hash as team[0].tokens[0]; give each team and admin its own token '
     '(`rungway lab token`), so that one can be revoked alone'),
    ('name = "x"\n', 'lab.toml:1: name: unknown key; the keys at the top level are: head, team, admin'),
    ('[head]\nport = \n', 'lab.toml:2: not valid TOML: Invalid value at column 8'),
]


@pytest.mark.parametrize(("text", "first"), CASES)
def test_mistakes_are_located_and_explained(text: str, first: str) -> None:
    error = _error(text)
    assert str(error).split("\n")[0] == first
    assert isinstance(error, SpecError)  # the CLI's exit 2, no traceback


def test_a_token_pasted_instead_of_its_hash_is_refused_without_echo() -> None:
    token = "rgw_Zk3pQ8sXw0mJ2vLr9tYb4nHc6dFe1aGu7iKo5qWs3xE"
    error = _error(f'[[team]]\nname = "a"\n\ntokens = ["{H1}",\n  "{token}"]\n')
    text = str(error)
    assert text.startswith("lab.toml:4: team[0].tokens[1]: not a token hash")
    assert "(this looks like a token)" in text
    assert "tokens hold hashes made by `rungway lab token`, never the token itself" in text
    assert token not in text and token not in repr(error.problems)
    assert token not in str(_error(f'[[team]]\nname = "a"\ntokens = "{token}"\n'))


def test_every_problem_is_reported_at_once() -> None:
    error = _error(f'[head]\nport = -1\nround_seconds = "fast"\n\n[[team]]\nname = "a"\nweight = -2\ntokens = ["{H1}"]\n')
    assert [(p.field, p.line) for p in error.problems] == [
        ("head.port", 2), ("head.round_seconds", 3), ("team[0].weight", 7),
    ]


def test_unreadable_files(tmp_path: Path) -> None:
    with pytest.raises(SpecFileError, match="cannot read the lab config"):
        load_lab_config(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_bytes(b'[head]\nhost = "\xff"\n')
    with pytest.raises(SpecFileError, match=r"bad.toml:2: not UTF-8"):
        load_lab_config(bad)


def _utc(*args: int) -> float:
    return dt.datetime(*args, tzinfo=dt.timezone.utc).timestamp()


def test_period_start() -> None:
    # 29 February 2024 was a Thursday (Python's datetime.date(2024, 2, 29).isoweekday() == 4),
    # so its ISO 8601 week began on Monday 26 February.
    now = _utc(2024, 2, 29, 13, 45, 7)
    assert period_start("day", now) == _utc(2024, 2, 29)
    assert period_start("week", now) == _utc(2024, 2, 26)
    assert period_start("month", now) == _utc(2024, 2, 1)
    # 1 January 2021 was a Friday, in ISO week 53 of 2020, which began Monday 28 December 2020.
    assert period_start("week", _utc(2021, 1, 1, 8)) == _utc(2020, 12, 28)
    assert period_start("month", _utc(2021, 1, 1, 8)) == _utc(2021, 1, 1)
    # A Sunday belongs to the week that began six days earlier; a start is its own start.
    assert period_start("week", _utc(2024, 3, 3, 23, 59, 59)) == _utc(2024, 2, 26)
    assert period_start("week", _utc(2024, 2, 26)) == _utc(2024, 2, 26)
    assert period_start("day", _utc(2024, 2, 29) - 0.001) == _utc(2024, 2, 28)
    with pytest.raises(ValueError, match="day, week, month"):
        period_start("year", now)
