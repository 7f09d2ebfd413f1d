"""The Python snippets in docs/storage.md run as written (against a temporary root)."""

from __future__ import annotations

import pickle
import re
from pathlib import Path

import pytest

DOC = Path(__file__).resolve().parents[2] / "docs" / "storage.md"


def test_storage_doc_snippets_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    text = DOC.read_text().replace("/shared/rungway", str(tmp_path / "root"))
    snippets = re.findall(r"```python\n(.*?)```", text, re.S)
    assert len(snippets) >= 6
    monkeypatch.chdir(tmp_path)
    (tmp_path / "lr-sweep.toml").write_text('name = "lr-sweep"\n')
    namespace: dict[str, object] = {"state": {"weights": [1.0, 2.0]}}
    for snippet in snippets:
        exec(compile(snippet, str(DOC), "exec"), namespace)
    # What the snippets wrote, they read back.
    assert namespace["store"].list_searches() == ["lr-sweep"]  # type: ignore[attr-defined]
    assert len(namespace["results"]) == 1  # type: ignore[arg-type]
    assert namespace["final"].num_rows == 1  # type: ignore[attr-defined]
    assert pickle.loads(namespace["loaded"].data) == {"weights": [1.0, 2.0]}  # type: ignore[attr-defined]
