"""The public surface uses only the names listed by hand in DEVELOPERS.md ("Surface names"),
and no name a rename replaced is left anywhere in the tree.

The real surface is collected from the code (spec and lab-config models, the CLI's parser,
the OpenAPI document, the store's schemas, trial states, ``rungway.workers``); the list it is
checked against is not generated, so a new name fails here until someone adds it on purpose.
"""

from __future__ import annotations

import argparse
import re
import subprocess
from pathlib import Path
from typing import Any
from unittest.mock import MagicMock

import pytest
from pydantic import BaseModel

from rungway.scheduler.store.migrations import RENAMED_IN_FORMAT_2

ROOT = Path(__file__).resolve().parents[1]


def listed_names() -> set[str]:
    """Every word in the fenced blocks under DEVELOPERS.md's "Surface names" heading."""
    text = (ROOT / "DEVELOPERS.md").read_text()
    section = text.split("\n## Surface names\n", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"^```\n(.*?)^```", section, flags=re.MULTILINE | re.DOTALL)
    assert len(blocks) == 5, "DEVELOPERS.md's Surface names section should hold five fenced lists"
    return {word for block in blocks for word in block.split()}


def _model_keys(model: type[BaseModel], out: set[str]) -> set[str]:
    for name, info in model.model_fields.items():
        out.add(info.alias or name)
        annotation = info.annotation
        for inner in (*getattr(annotation, "__args__", ()), annotation):
            if isinstance(inner, type) and issubclass(inner, BaseModel):
                _model_keys(inner, out)
    return out


def spec_keys() -> set[str]:
    from rungway.scheduler.core import space
    from rungway.scheduler.service.config import LabConfig
    from rungway.scheduler.spec import SearchSpec

    keys: set[str] = set()
    for model in (SearchSpec, LabConfig, space.RealParameter, space.IntegerParameter, space.CategoryParameter,
                  space.ConstantParameter):
        _model_keys(model, keys)
    keys.discard("space_table")  # the [space] table's attribute; its key is "space"
    return keys


def cli_names() -> set[str]:
    from rungway.scheduler.cli.main import build_parser

    names: set[str] = set()

    def walk(parser: argparse.ArgumentParser) -> None:
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, sub in action.choices.items():
                    names.add(name)
                    walk(sub)
            else:
                names.update(action.option_strings)

    walk(build_parser())
    return names


def api_names() -> set[str]:
    from rungway.scheduler.service.api import make_app

    document: dict[str, Any] = make_app(MagicMock(), MagicMock(), max_body_bytes=1024, teams=[]).openapi()
    names: set[str] = set()
    for path, operations in document["paths"].items():
        names.add(path)
        for operation in operations.values():
            names.update(p["name"] for p in operation.get("parameters", []))
    for schema_name, schema in document["components"]["schemas"].items():
        if schema_name in ("HTTPValidationError", "ValidationError"):
            continue  # FastAPI's own, not ours
        names.add(schema_name)
        names.update(schema.get("properties", {}))
    return names


def store_columns() -> set[str]:
    from rungway.scheduler.service.ledger import LEDGER_SCHEMA
    from rungway.scheduler.store.schemas import (
        FAILURES_SCHEMA, MEASUREMENTS_SCHEMA, SPACE_PREFIX, TRIALS_BASE_SCHEMA,
    )

    names = {SPACE_PREFIX}
    for schema in (MEASUREMENTS_SCHEMA, TRIALS_BASE_SCHEMA, FAILURES_SCHEMA, LEDGER_SCHEMA):
        names.update(schema.names)
    return names


def worker_names() -> set[str]:
    import rungway.workers as workers
    from rungway.scheduler.core.states import STATES

    context = {name for name in dir(workers.Context) if not name.startswith("_")}
    return set(STATES) | set(workers.__all__) | context


SURFACES = {
    "spec and lab-config keys": spec_keys,
    "CLI commands and options": cli_names,
    "HTTP API names": api_names,
    "store columns": store_columns,
    "trial states and rungway.workers": worker_names,
}


def unlisted(found: set[str], listed: set[str]) -> list[str]:
    return sorted(found - listed)


@pytest.mark.parametrize("surface", list(SURFACES))
def test_every_surface_name_is_listed_in_developers_md(surface: str) -> None:
    missing = unlisted(SURFACES[surface](), listed_names())
    assert missing == [], (
        f"{surface}: {missing} not in DEVELOPERS.md's Surface names; choose each name from what the thing "
        "is and add it there on purpose"
    )


def test_the_list_holds_no_name_the_code_no_longer_has() -> None:
    everything = set().union(*(collect() for collect in SURFACES.values()))
    assert sorted(listed_names() - everything) == []


def test_the_check_fails_on_an_unlisted_name() -> None:
    assert unlisted(spec_keys() | {"brand_new_key"}, listed_names()) == ["brand_new_key"]


# -- the renamed names are gone --------------------------------------------------------------

EXEMPT = ("scheduler/store/migrations.py", "tests/store/fixtures/", "tests/store/test_store_migrations.py", "CHANGELOG.md",
          "tests/test_surface_names.py")

# How each old name would show up. "direction" is also a plain word ("the direction of the
# noise"), so only its use as a key, a field or an attribute counts, with its two old values.
OLD_NAME_PATTERNS = {
    "direction": r"""\bdirection\s*=\s*["']|["']direction["']|\.direction\b|\bdirection:\s*\w|["']m(ax|in)imi[sz]e["']""",
    **{old: re.escape(old) for old in RENAMED_IN_FORMAT_2 if old != "direction"},
}


def tree_files() -> list[Path]:
    listing = subprocess.run(["git", "ls-files", "--cached", "--others", "--exclude-standard"], cwd=ROOT,
                             capture_output=True, text=True, check=True).stdout.split("\n")
    return [ROOT / name for name in listing if name and not name.startswith(EXEMPT) and (ROOT / name).is_file()]


def test_no_renamed_name_is_left_in_the_tree() -> None:
    assert set(OLD_NAME_PATTERNS) == set(RENAMED_IN_FORMAT_2)
    pattern = re.compile("|".join(f"(?:{p})" for p in OLD_NAME_PATTERNS.values()))
    found = []
    for path in tree_files():
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue  # binary (Parquet, checkpoints)
        for number, line in enumerate(text.splitlines(), 1):
            if pattern.search(line):
                found.append(f"{path.relative_to(ROOT)}:{number}: {line.strip()[:100]}")
    assert found == []


def test_the_scan_finds_an_old_name() -> None:
    pattern = re.compile(OLD_NAME_PATTERNS["direction"])
    assert pattern.search('direction = "maximize"') and pattern.search('spec["direction"]')
    assert not pattern.search("one step in the direction of the noise")
