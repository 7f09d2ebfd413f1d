"""`rungway run` on broken input: a clear message, exit status 2, nothing in the store.

The corpus is tests/spec/broken (mistakes in the file, the space or the objective's path and
signature) and tests/spec/broken_at_first_try (objectives that import but raise, return a
string, NaN or the wrong metric on their first try at the minimum budget).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from rungway.scheduler.cli.main import main

HERE = Path(__file__).resolve().parent
CORPUS = sorted((HERE / "broken").glob("*.toml")) + sorted((HERE / "broken_at_first_try").glob("*.toml"))


def expectation(path: Path) -> str:
    first = path.read_text().splitlines()[0]
    assert first.startswith("# expect:"), path
    return first.removeprefix("# expect:").strip()


@pytest.mark.parametrize("path", CORPUS, ids=[p.stem for p in CORPUS])
def test_broken_input_exits_2_with_a_message_and_writes_nothing(path: Path, tmp_path: Path, capsys) -> None:
    store = tmp_path / "store"
    code = main(["run", str(path), "--store", str(store)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert expectation(path).lower() in err.lower(), err
    assert "Traceback" not in err
    assert not (store / "searches").exists() or not any((store / "searches").iterdir())


def test_the_corpus_covers_the_runtime_cases() -> None:
    names = {p.stem for p in CORPUS}
    assert {"returns_string", "returns_nan", "raises", "wrong_metric", "objective_three_parameters",
            "objective_module_missing", "unknown_parameter_kind", "missing_name", "eta_wrong_type"} <= names


def test_a_missing_spec_file_is_a_user_error(tmp_path: Path, capsys) -> None:
    assert main(["run", str(tmp_path / "nope.toml"), "--store", str(tmp_path)]) == 2
    assert "nope.toml" in capsys.readouterr().err
