"""Input a hostile or careless user hands `rungway run` and `rungway lab submit`: each is a
located message with exit status 2, no traceback, and nothing in the store."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from rungway.scheduler.cli.main import main
from rungway.scheduler.spec import SpecFileError, parse_spec

HERE = Path(__file__).resolve().parent
GOOD = (HERE / "broken" / "negative_cpus.toml").read_text().replace("cpus = -1", "cpus = 1")


def run_rejects(path: Path, store: Path, capsys: pytest.CaptureFixture[str]) -> str:
    code = main(["run", str(path), "--store", str(store), "--no-probe"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err
    assert not (store / "searches").exists() or not any((store / "searches").iterdir())
    return err


def test_a_spec_that_is_not_utf8_is_located(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "latin1.toml"
    path.write_bytes(GOOD.replace('metric = "accuracy"', 'metric = "précision"').encode("latin-1"))
    err = run_rejects(path, tmp_path / "store", capsys)
    assert f"{path}:6: not UTF-8 text" in err and "save the file as UTF-8" in err


def test_lab_submit_of_a_spec_that_is_not_utf8_is_located(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "latin1.toml"
    path.write_bytes(b"name = \"caf\xe9\"\n")
    token = tmp_path / "token"
    token.write_text("a-token-that-is-never-sent\n")
    # No head is listening there: the file is refused before anything is sent.
    code = main(["lab", "submit", str(path), "--head", "http://127.0.0.1:9", "--token-file", str(token)])
    err = capsys.readouterr().err
    assert code == 2 and f"{path}:1: not UTF-8 text" in err, err


@pytest.mark.parametrize("nested", ["a = " + "[" * 600 + "]" * 600, "a = " + "{b = " * 600 + "1" + "}" * 600])
def test_values_nested_600_deep_are_refused(nested: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "deep.toml"
    path.write_text(nested + "\n" + GOOD)
    assert "nested too deeply" in run_rejects(path, tmp_path / "store", capsys)
    with pytest.raises(SpecFileError, match="nested too deeply"):  # what the lab's head calls on a submission
        parse_spec(nested + "\n" + GOOD, source="spec")


def test_a_byte_order_mark_is_accepted() -> None:
    assert parse_spec("\ufeff" + GOOD, source="bom.toml").resources.cpus == 1


def test_a_json_file_gets_a_hint(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "spec.json"
    path.write_text(json.dumps({"name": "x", "objective": "objectives_for_tests:plain"}))
    err = run_rejects(path, tmp_path / "store", capsys)
    assert "this looks like JSON, but a spec file is TOML" in err


def test_a_hanging_objective_meets_the_probe_time_limit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "hangs.toml"
    path.write_text((HERE / "broken_at_first_try" / "raises.toml").read_text().replace(":raises", ":hangs"))
    code = main(["run", str(path), "--store", str(tmp_path / "store"), "--probe-timeout", "3"])
    captured = capsys.readouterr()
    assert code == 2 and "did not finish a first try within 3 s" in captured.err, captured.err
    assert "waiting for a lock that never frees" in captured.err  # its output, shown as the reason
    assert captured.out == ""  # nothing of the objective's on the command's own output
    assert not (tmp_path / "store" / "searches").exists()


def test_hang_timeout_on_a_plain_objective_is_explained() -> None:
    from rungway.scheduler.spec import check_spec

    spec = parse_spec(GOOD.replace("[resources]", "[limits]\nhang_timeout = 30\n\n[resources]"), source="s.toml")
    notes = check_spec(spec)
    assert any(n.startswith("limits.hang_timeout: a plain objective reports only when it returns, so its 30 s bound")
               for n in notes), notes
