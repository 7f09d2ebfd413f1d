"""The lab config file: the head's settings, the teams with their quotas, and who may call.

Theory of operation. The lab's admin owns one TOML file::

    [head]
    host = "127.0.0.1"          # a non-loopback host needs allow_remote = true
    port = 8470
    store = "rungway-store"     # relative paths resolve against this file's folder
    allowance_period = "month"  # allowances reset at the start of each UTC day, week or month

    [[team]]
    name = "acoustics"
    guarantee_cpus = 8
    cap_cpus = 24
    weight = 2.0
    allowance_cpu_hours = 500
    tokens = ["pbkdf2-sha256$200000$<salt>$<hash>"]

    [[admin]]
    name = "lab-admin"
    tokens = ["pbkdf2-sha256$200000$<salt>$<hash>"]

:func:`load_lab_config` and :func:`parse_lab_config` read it into a :class:`LabConfig`.
Every mistake raises one :class:`~rungway.scheduler.spec.SpecFileError` (the spec files'
error: ``file:line: field: message`` per problem) naming the field and what would be valid.
Fields are checked by pydantic; what spans several tables (a name used twice, a hash used
twice) is checked afterwards. Messages never quote a token or a token hash, so a token
pasted by mistake does not end up in a terminal's scroll-back or a log.

The CPUs of the cluster are not known here, so guarantees are not compared with them; the
sharing core checks that when the head starts.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import math
import os
import re
import tomllib
from collections.abc import Sequence
from os import PathLike
from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, PlainValidator, PrivateAttr, ValidationError, model_validator

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.sharing import TeamQuota

# spec.py's TOML key grammar and wording, so that both kinds of file complain alike.
from rungway.scheduler.spec import (
    _ASSIGN_RE,
    _HEADER_RE,
    _TOML_AT_RE,
    Problem,
    SpecFileError,
    _field_names,
    _show,
    _split_key,
    _suggest,
)
from rungway.scheduler.spec import _TYPE_WORDS as _SPEC_TYPE_WORDS

from .auth import parse_token_hash

__all__ = [
    "PERIODS",
    "TEAM_NAME_PATTERN",
    "HeadSection",
    "TeamSection",
    "AdminSection",
    "LabConfig",
    "load_lab_config",
    "parse_lab_config",
    "period_start",
]

PERIODS: tuple[str, ...] = ("day", "week", "month")
TEAM_NAME_PATTERN = r"^[a-z0-9][a-z0-9_-]{0,39}$"
"""Team and admin names: a lower-case letter or digit, then up to 39 of those, ``_`` or ``-``."""

_NAME_RE = re.compile(TEAM_NAME_PATTERN)
_TOKENS_HINT = "tokens hold hashes made by `rungway lab token`, never the token itself"


# ---- field checks (each raises SpecError; pydantic adds where) ------------------------------


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _number(low: float, *, above: bool = False) -> PlainValidator:
    def check(value: Any) -> float:
        if not _is_number(value) or not math.isfinite(value) or value < low or (above and value == low):
            raise SpecError(f"must be a number {'>' if above else '>='} {_show(low)} (got {_show(value)})")
        return float(value)

    return PlainValidator(check)


def _integer(low: int, high: int, hint: str = "") -> PlainValidator:
    def check(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise SpecError(f"must be an integer from {low} to {high}{hint} (got {_show(value)})")
        return value

    return PlainValidator(check)


def _flag(value: Any) -> bool:
    if not isinstance(value, bool):
        raise SpecError(f"must be true or false (got {_show(value)})")
    return value


def _text(what: str, *, empty: bool = True) -> PlainValidator:
    def check(value: Any) -> str:
        if not isinstance(value, str) or (not empty and not value.strip()):
            raise SpecError(f"must be {what} (got {_show(value)})")
        return value

    return PlainValidator(check)


def _check_period(value: Any) -> str:
    if not isinstance(value, str) or value not in PERIODS:
        listed = ", ".join(f'"{p}"' for p in PERIODS)
        raise SpecError(f"must be one of {listed} (got {_show(value)}){_suggest(value, PERIODS)}")
    return value


def _check_name(value: Any) -> str:
    if not isinstance(value, str) or not _NAME_RE.match(value):
        raise SpecError(
            "must be 1 to 40 characters: a lower-case letter or digit, then lower-case letters, "
            f'digits, "_" or "-" (got {_show(value)}), e.g. name = "acoustics"'
        )
    return value


def _check_tokens(value: Any) -> tuple[str, ...]:
    # Never _show() a value here: it may be a token pasted by mistake.
    if not isinstance(value, list) or not value:
        got = "an empty array" if value == [] else "a string" if isinstance(value, str) else _show(value)
        raise SpecError(f"must be an array of at least one token hash (got {got}); {_TOKENS_HINT}")
    for index, item in enumerate(value):
        if not isinstance(item, str):
            raise SpecError(f"must be a string (got {_show(item)}); {_TOKENS_HINT}", field=f"[{index}]")
        try:
            parse_token_hash(item)
        except ValueError as exc:
            looks_raw = " (this looks like a token)" if item.startswith("rgw_") else ""
            raise SpecError(f"{exc}{looks_raw}; {_TOKENS_HINT}", field=f"[{index}]") from None
    return tuple(value)


Name = Annotated[str, PlainValidator(_check_name)]
Tokens = Annotated[tuple[str, ...], PlainValidator(_check_tokens)]
Flag = Annotated[bool, PlainValidator(_flag)]

_SECTION = ConfigDict(extra="forbid", frozen=True)


def _is_loopback(host: str) -> bool:
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False  # a host name other than localhost may resolve anywhere


class HeadSection(BaseModel):
    """``[head]``: where the head listens, where it keeps its files, how it shares."""

    model_config = _SECTION

    host: Annotated[str, _text('a host name or address, e.g. host = "127.0.0.1"', empty=False)] = "127.0.0.1"
    port: Annotated[int, _integer(0, 65535, " (0 picks a free port)")] = 8470
    allow_remote: Flag = False
    store: Annotated[str, _text('a folder path, e.g. store = "rungway-store"', empty=False)] = "rungway-store"
    ray_address: Annotated[str, _text('a Ray address, or "" to start an embedded Ray')] = ""
    ray_cpus: Annotated[int, _integer(0, 1 << 20, " (0: all CPUs of the machine)")] = 0
    preempt_deadline: Annotated[float, _number(0)] = 60.0
    """Seconds a preempted segment gets to save and yield."""
    round_seconds: Annotated[float, _number(0, above=True)] = 0.05
    """How often the sharing round runs, in seconds."""
    allowance_period: Annotated[str, PlainValidator(_check_period)] = "month"
    queued_per_slot: Annotated[float, _number(0)] = 0.0
    """Segments a search submits beyond each one the sharing rules grant, waiting in Ray's queue
    for a CPU (the spec's ``resources.queued_per_slot`` is not used in the lab). 0: none, every
    start is the sharing rules' decision; the sharing rules count a queued segment as running."""
    max_body_kb: Annotated[int, _integer(1, 1 << 20)] = 256
    log_file: Annotated[str, _text('a file path, or "" for no access log')] = ""

    @model_validator(mode="after")
    def _check(self) -> HeadSection:
        if not self.allow_remote and not _is_loopback(self.host):
            raise SpecError(
                f"must be true to listen on {_show(self.host)}, which is not a loopback address: "
                "anyone who can reach it may try tokens. Set allow_remote = true (and put TLS in "
                'front), or use host = "127.0.0.1"',
                field="allow_remote",
            )
        if "://" in self.store and not self.store.startswith("file://"):
            raise SpecError(
                f"the head keeps its journals in the store, so it must be a path (local disk or NFS), "
                f"not {_show(self.store)}; mount it and give the mount's path",
                field="store",
            )
        if self.queued_per_slot > 16:
            raise SpecError(f"must be a number from 0 to 16 (got {_show(self.queued_per_slot)})", field="queued_per_slot")
        if self.ray_address and self.ray_cpus:
            raise SpecError(
                'only applies to an embedded Ray (ray_address = ""); a joined cluster has the '
                "CPUs its nodes bring. Remove ray_cpus or ray_address",
                field="ray_cpus",
            )
        return self


class TeamSection(BaseModel):
    """One ``[[team]]``: its quota and its tokens' hashes."""

    model_config = _SECTION

    name: Name
    guarantee_cpus: Annotated[float, _number(0)] = 0.0
    cap_cpus: Annotated[float, _number(0)] | None = None
    weight: Annotated[float, _number(0, above=True)] = 1.0
    allowance_cpu_hours: Annotated[float, _number(0)] | None = None
    tokens: Tokens

    @model_validator(mode="after")
    def _check(self) -> TeamSection:
        if self.cap_cpus is not None and self.cap_cpus < self.guarantee_cpus:
            raise SpecError(
                f"must be >= guarantee_cpus = {_show(self.guarantee_cpus)} (got {_show(self.cap_cpus)}); "
                "remove cap_cpus for no cap",
                field="cap_cpus",
            )
        return self

    def quota(self) -> TeamQuota:
        """This team's promise, as the sharing core takes it."""
        return TeamQuota(
            name=self.name,
            guarantee_cpus=self.guarantee_cpus,
            cap_cpus=self.cap_cpus,
            weight=self.weight,
            allowance_cpu_hours=self.allowance_cpu_hours,
        )


class AdminSection(BaseModel):
    """One ``[[admin]]``: a person (or a script) that may see and act on every team's searches."""

    model_config = _SECTION

    name: Name
    tokens: Tokens


class LabConfig(BaseModel):
    """A validated lab config. Build one with :func:`load_lab_config` or :func:`parse_lab_config`."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    head: HeadSection = HeadSection()
    teams: tuple[TeamSection, ...] = Field(default=(), alias="team")
    admins: tuple[AdminSection, ...] = Field(default=(), alias="admin")

    _source: str = PrivateAttr(default="<config>")
    _store_root: str = PrivateAttr(default="")
    _log_path: str | None = PrivateAttr(default=None)

    @property
    def source(self) -> str:
        """Where the config came from (a file path, or ``"<config>"``)."""
        return self._source

    @property
    def store_root(self) -> str:
        """``head.store`` made absolute against the config file's folder (URIs unchanged)."""
        return self._store_root

    @property
    def log_path(self) -> str | None:
        """``head.log_file`` made absolute the same way, or None when there is none."""
        return self._log_path

    def quotas(self) -> tuple[TeamQuota, ...]:
        """Every team's quota, in the file's order."""
        return tuple(team.quota() for team in self.teams)

    def team(self, name: str) -> TeamSection:
        """The team called ``name``; ``KeyError`` if there is none."""
        for team in self.teams:
            if team.name == name:
                return team
        raise KeyError(f"no team {name!r} in {self._source}")


# ---- time periods ---------------------------------------------------------------------------


def period_start(period: str, now: float) -> float:
    """Unix seconds at which the UTC ``period`` holding ``now`` began: midnight of the day,
    Monday midnight of the ISO 8601 week, or midnight of the first of the month."""
    moment = dt.datetime.fromtimestamp(now, dt.timezone.utc)
    midnight = moment.replace(hour=0, minute=0, second=0, microsecond=0)
    if period == "day":
        start = midnight
    elif period == "week":
        start = midnight - dt.timedelta(days=midnight.weekday())  # weekday(): Monday is 0
    elif period == "month":
        start = midnight.replace(day=1)
    else:
        raise ValueError(f"period must be one of {', '.join(PERIODS)}, got {period!r}")
    return start.timestamp()


# ---- reading --------------------------------------------------------------------------------


def _line_index(text: str) -> dict[tuple[str, ...], int]:
    """Key path -> first line (1-based) defining it. Unlike spec.py's scan, elements of an
    array of tables get their index (``("team", "[1]", "name")``), so the second team's
    mistake points at the second team."""
    found: dict[tuple[str, ...], int] = {}
    counts: dict[tuple[str, ...], int] = {}
    table: tuple[str, ...] = ()
    open_quote: str | None = None
    for number, line in enumerate(text.splitlines(), 1):
        if open_quote:
            open_quote = None if open_quote in line else open_quote
            continue
        header = _HEADER_RE.match(line)
        if header:
            table = _split_key(header.group(1))
            if line.lstrip().startswith("[["):
                counts[table] = counts.get(table, -1) + 1
                table = table + (f"[{counts[table]}]",)
            for i in range(1, len(table) + 1):
                found.setdefault(table[:i], number)
            continue
        assign = _ASSIGN_RE.match(line)
        if assign:
            path = table + _split_key(assign.group(1))
            found.setdefault(path, number)
            rest = line[assign.end():].lstrip()
            open_quote = next((q for q in ('"""', "'''") if rest.startswith(q) and rest.count(q) == 1), None)
    return found


def _line_of(index: dict[tuple[str, ...], int], parts: Sequence[str]) -> int | None:
    for i in range(len(parts), 0, -1):
        if tuple(parts[:i]) in index:
            return index[tuple(parts[:i])]
    return None


def _dotted(parts: Sequence[str]) -> str:
    return "".join(p if p.startswith("[") or i == 0 else f".{p}" for i, p in enumerate(parts))


def _split_field(field: str) -> tuple[str, ...]:
    return tuple(re.findall(r"\[\d+\]|[^.\[\]]+", field))


_SECTION_MODELS: dict[tuple[str, ...], type[BaseModel]] = {
    (): LabConfig,
    ("head",): HeadSection,
    ("team",): TeamSection,
    ("admin",): AdminSection,
}

_MISSING_HINTS = {
    "name": 'give it a name, e.g. name = "acoustics"',
    "tokens": "add tokens = [...] with at least one hash made by `rungway lab token`",
}

_TYPE_WORDS = {**_SPEC_TYPE_WORDS, "list_type": "must be an array of tables", "tuple_type": "must be an array of tables"}


def _validation_problems(exc: ValidationError) -> list[tuple[tuple[str, ...], str]]:
    out: list[tuple[tuple[str, ...], str]] = []
    for err in exc.errors(include_url=False):
        loc = tuple(f"[{p}]" if isinstance(p, int) else str(p) for p in err["loc"])
        section = tuple(p for p in loc[:-1] if not p.startswith("["))
        kind = err["type"]
        error = (err.get("ctx") or {}).get("error")
        if isinstance(error, SpecError):
            message = str(error)
            if error.field:
                loc += _split_field(error.field)
                message = message[len(error.field) + 2:]
            out.append((loc, message))
        elif kind == "missing":
            hint = _MISSING_HINTS.get(loc[-1])
            out.append((loc, "required field is missing" + (f"; {hint}" if hint else "")))
        elif kind == "extra_forbidden":
            model = _SECTION_MODELS.get(section)
            valid = _field_names(model) if model else []
            where = f"in [{'.'.join(section)}]" if section else "at the top level"
            listed = f"; the keys {where} are: {', '.join(valid)}" if valid else ""
            out.append((loc, f"unknown key{_suggest(loc[-1], valid)}{listed}"))
        elif kind in _TYPE_WORDS:
            words = _TYPE_WORDS[kind]
            if kind in ("list_type", "tuple_type") and loc in (("team",), ("admin",)):
                words += f", one [[{loc[0]}]] per {loc[0]}"
            out.append((loc, f"{words} (got {_show(err.get('input'))})"))
        else:  # pragma: no cover - every field has its own check; kept so nothing is lost
            out.append((loc, str(err.get("msg", "invalid value"))))
    return out


def _cross_problems(config: LabConfig) -> list[tuple[tuple[str, ...], str]]:
    """What no single table can see: names and hashes used twice."""
    out: list[tuple[tuple[str, ...], str]] = []
    named: dict[str, tuple[str, ...]] = {}
    hashes: dict[str, tuple[str, ...]] = {}
    groups = [("team", config.teams), ("admin", config.admins)]
    for kind, sections in groups:
        for i, section in enumerate(sections):
            where = (kind, f"[{i}]")
            earlier = named.get(section.name)
            if earlier is None:
                named[section.name] = where
            elif earlier[0] == kind:
                out.append((where + ("name",), f'"{section.name}" is already the name of {_dotted(earlier)}; names must be unique'))
            else:
                out.append((where + ("name",), f'"{section.name}" is already the name of {_dotted(earlier)}; '
                            "a name is either a team or an admin, not both"))
            for j, stored in enumerate(section.tokens):
                here = where + ("tokens", f"[{j}]")
                first = hashes.setdefault(stored, here)
                if first != here:
                    out.append((here, f"the same hash as {_dotted(first)}; give each team and admin its own "
                                "token (`rungway lab token`), so that one can be revoked alone"))
    return out


def _resolve(value: str, base_dir: Path) -> str:
    if "://" in value:
        return value
    path = Path(value).expanduser()
    return os.path.abspath(path if path.is_absolute() else base_dir / path)


def parse_lab_config(
    text: str, source: str = "<config>", *, base_dir: str | PathLike[str] | None = None
) -> LabConfig:
    """A :class:`LabConfig` from TOML ``text``; ``source`` names it in error messages.

    Relative paths resolve against ``base_dir``: by default the folder of ``source`` when
    that is a path, else the current folder. Raises :class:`SpecFileError`.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        line = getattr(exc, "lineno", None)
        m = _TOML_AT_RE.search(message)
        if m:
            line, message = line or int(m.group(1)), f"{message[: m.start()]} at column {m.group(2)}"
        elif message.endswith("(at end of document)"):
            line = line or max(1, len(text.splitlines()))
            message = message[: -len("(at end of document)")].rstrip() + " at the end of the file"
        raise SpecFileError([Problem(None, f"not valid TOML: {message}", line)], source=source) from None
    index = _line_index(text)
    try:
        config = LabConfig.model_validate(data)
    except ValidationError as exc:
        found = _validation_problems(exc)
    else:
        found = _cross_problems(config)
    if found:
        problems = [Problem(_dotted(parts), message, _line_of(index, parts)) for parts, message in found]
        raise SpecFileError(problems, source=source)
    if base_dir is None:
        base_dir = Path.cwd() if source.startswith("<") else Path(source).resolve().parent
    folder = Path(base_dir)
    config._source = source
    config._store_root = _resolve(config.head.store, folder)
    config._log_path = _resolve(config.head.log_file, folder) if config.head.log_file else None
    return config


def load_lab_config(path: str | PathLike[str]) -> LabConfig:
    """Read and check the lab config at ``path``. Raises :class:`SpecFileError`."""
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise SpecFileError([Problem(None, f"cannot read the lab config: {exc.strerror or exc}")], source=source) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise SpecFileError([Problem(None, "not UTF-8 text; TOML files must be UTF-8", line)], source=source) from None
    return parse_lab_config(text, source, base_dir=Path(path).resolve().parent)
