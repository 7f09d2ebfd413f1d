"""Every package folder is installed under the rungway namespace, and the core stays pure."""

from __future__ import annotations

import ast
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_every_package_folder_is_listed_in_pyproject() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(config["packages"])
    mapping = config["package-dir"]
    found = set()
    for name, folder in mapping.items():
        for init in (ROOT / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / folder)
            found.add(".".join([name, *rel.parts]))
    assert found == listed


FORBIDDEN_IN_CORE = {"ray", "pyarrow", "pandas", "time", "random", "os", "socket", "threading", "datetime"}


def test_the_scheduling_core_imports_no_io_clock_or_global_randomness() -> None:
    offenders = []
    for path in (ROOT / "scheduler" / "core").rglob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            for name in names:
                if name.split(".")[0] in FORBIDDEN_IN_CORE:
                    offenders.append(f"{path.relative_to(ROOT)}: {name}")
    assert offenders == []
