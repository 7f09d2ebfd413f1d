"""The README's set-up commands are the ones CI runs."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    head = text.split("## ", 1)[0]
    return [block.strip() for block in re.findall(r"```\n(.*?)```", head, flags=re.S)]


def test_readme_top_has_exactly_two_setup_commands() -> None:
    commands = readme_commands()
    assert len(commands) == 2
    assert all("\n" not in c for c in commands)
    assert "demo" in commands[0] and "pytest" in commands[1]


def test_ci_runs_the_readme_test_command() -> None:
    ci = (ROOT / ".ci" / "run").read_text()
    assert readme_commands()[1] in ci.splitlines()


# -- the tour, verbatim, in a fresh folder ----------------------------------------------------

import os  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402

import pytest  # noqa: E402


def tour_blocks() -> list[tuple[str, str]]:
    """(language, text) of every fenced block in the README's tour."""
    tour = (ROOT / "README.md").read_text().split("## A short tour", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```(\w*)\n(.*?)```", tour, flags=re.S)


@pytest.mark.slow
@pytest.mark.ray
def test_the_tour_works_verbatim_from_a_fresh_folder(tmp_path: Path) -> None:
    blocks = tour_blocks()
    objective = "".join(text for lang, text in blocks if lang == "python" and text.startswith("# mylab/objectives.py"))
    spec = next(text for lang, text in blocks if lang == "toml" and text.startswith("# search.toml"))
    commands = next(text for lang, text in blocks if lang == "" and text.startswith("rungway run search.toml"))
    reading = next(text for lang, text in blocks if lang == "python" and "read_parquet" in text)
    (tmp_path / "mylab").mkdir()
    (tmp_path / "mylab" / "__init__.py").write_text("")
    (tmp_path / "mylab" / "objectives.py").write_text(objective)
    (tmp_path / "search.toml").write_text(spec)
    bin_dir = Path(sys.executable).parent
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "RAY_ADDRESS")}
    env["PATH"] = f"{bin_dir}{os.pathsep}{env.get('PATH', '')}"
    env["RUNGWAY_STORE"] = "rungway-store"
    ran = []
    for line in commands.splitlines():
        command = line.split("#", 1)[0].strip()
        if not command or "--address" in command:
            continue  # joining a lab's cluster needs one
        done = subprocess.run(command, shell=True, cwd=tmp_path,
                              env=env, capture_output=True, text=True, timeout=1800)
        assert done.returncode == 0, f"{command}\n{done.stdout}\n{done.stderr}"
        ran.append(command)
    assert ran[0] == "rungway run search.toml" and len(ran) == 4
    # Run again: the search is over, and the same command says how it ended.
    again = subprocess.run("rungway run search.toml", shell=True, cwd=tmp_path, env=env, capture_output=True,
                           text=True, timeout=600)
    assert again.returncode == 0 and "best accuracy:" in again.stdout, again.stderr
    curves = (tmp_path / "curves.csv").read_text().splitlines()
    assert curves[0].startswith("trial,rung,attempt") and len(curves) > 60
    namespace: dict[str, object] = {}
    cwd = os.getcwd()
    try:
        os.chdir(tmp_path)
        exec(compile(reading, "README.md", "exec"), namespace)  # noqa: S102
    finally:
        os.chdir(cwd)
    leaders = namespace["leaders"]
    trials = namespace["trials"]
    # The tour's reading sorts by budget reached, then value: the first row reached the top.
    assert leaders.iloc[0]["budget_reached"] == 27 == trials["budget_reached"].max()
    top = trials[trials["budget_reached"] == 27]
    assert leaders.iloc[0]["latest_value"] == top["latest_value"].max()
