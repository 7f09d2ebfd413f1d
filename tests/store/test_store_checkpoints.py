"""Checkpoints: newest valid one wins; damaged ones are skipped and reported; pruning."""

from __future__ import annotations

import hashlib
import logging
import subprocess
from pathlib import Path

import pytest

from rungway.scheduler.store import SearchFiles, Store


@pytest.fixture
def files(tmp_path: Path) -> SearchFiles:
    return Store(str(tmp_path)).search("s")


def test_save_reports_path_budget_checksum_and_size(files: SearchFiles) -> None:
    data = b"\x00model-state\xff" * 100
    info = files.save_checkpoint(7, 3.0, 1, data)
    assert Path(info.path).read_bytes() == data
    assert (info.trial, info.budget, info.attempt, info.size) == (7, 3.0, 1, len(data))
    assert info.sha256 == hashlib.sha256(data).hexdigest()
    sidecar = Path(info.path + ".sha256").read_text()
    assert sidecar == f"{info.sha256}  3.0-1.ckpt\n"


def test_sidecar_is_checkable_with_sha256sum(files: SearchFiles) -> None:
    info = files.save_checkpoint(1, 2.0, 0, b"abc")
    try:
        done = subprocess.run(
            ["sha256sum", "-c", "2.0-0.ckpt.sha256"], cwd=Path(info.path).parent, capture_output=True, text=True
        )
    except FileNotFoundError:
        pytest.skip("sha256sum not installed")
    assert done.returncode == 0, done.stdout + done.stderr


def test_load_picks_highest_budget_then_highest_attempt(files: SearchFiles) -> None:
    files.save_checkpoint(1, 1.0, 5, b"b1a5")
    files.save_checkpoint(1, 9.0, 0, b"b9a0")
    files.save_checkpoint(1, 9.0, 2, b"b9a2")
    files.save_checkpoint(1, 3.0, 9, b"b3a9")
    files.save_checkpoint(1, 10.0, 0, b"b10a0")  # 10 sorts above 9 numerically, not as text
    files.save_checkpoint(2, 99.0, 0, b"other trial")
    loaded = files.load_checkpoint(1)
    assert loaded is not None
    assert loaded.data == b"b10a0"
    assert (loaded.info.budget, loaded.info.attempt) == (10.0, 0)
    assert loaded.skipped == []


def test_no_checkpoint_gives_none(files: SearchFiles) -> None:
    assert files.load_checkpoint(3) is None


def test_truncated_newest_falls_back_and_is_reported(files: SearchFiles, caplog: pytest.LogCaptureFixture) -> None:
    files.save_checkpoint(1, 1.0, 0, b"older")
    newest = files.save_checkpoint(1, 3.0, 0, b"newest-state" * 50)
    Path(newest.path).write_bytes(Path(newest.path).read_bytes()[:100])
    with caplog.at_level(logging.WARNING, logger="rungway.store"):
        loaded = files.load_checkpoint(1)
    assert loaded is not None and loaded.data == b"older"
    assert [path for path, _ in loaded.skipped] == [newest.path]
    assert "checksum mismatch" in loaded.skipped[0][1] and "100 bytes" in loaded.skipped[0][1]
    assert newest.path in caplog.text


def test_bit_flip_falls_back_and_is_reported(files: SearchFiles) -> None:
    files.save_checkpoint(1, 1.0, 0, b"older")
    newest = files.save_checkpoint(1, 1.0, 1, b"newest")
    raw = bytearray(Path(newest.path).read_bytes())
    raw[2] ^= 0x04
    Path(newest.path).write_bytes(bytes(raw))
    loaded = files.load_checkpoint(1)
    assert loaded is not None and loaded.data == b"older"
    assert loaded.skipped == [(newest.path, loaded.skipped[0][1])]
    assert "checksum mismatch" in loaded.skipped[0][1]


def test_missing_or_garbled_sidecar_is_skipped(files: SearchFiles) -> None:
    files.save_checkpoint(1, 1.0, 0, b"good")
    no_sidecar = files.save_checkpoint(1, 2.0, 0, b"x")
    garbled = files.save_checkpoint(1, 3.0, 0, b"y")
    Path(no_sidecar.path + ".sha256").unlink()
    Path(garbled.path + ".sha256").write_text("not a digest\n")
    loaded = files.load_checkpoint(1)
    assert loaded is not None and loaded.data == b"good"
    reasons = dict(loaded.skipped)
    assert list(reasons) == [garbled.path, no_sidecar.path]
    assert "missing" in reasons[no_sidecar.path]
    assert "unreadable" in reasons[garbled.path]


def test_sidecar_copied_from_another_checkpoint_does_not_vouch_for_it(files: SearchFiles) -> None:
    files.save_checkpoint(1, 1.0, 0, b"good")
    a = files.save_checkpoint(1, 2.0, 0, b"same")
    b = files.save_checkpoint(1, 3.0, 0, b"same")
    Path(b.path + ".sha256").write_bytes(Path(a.path + ".sha256").read_bytes())
    loaded = files.load_checkpoint(1)
    assert loaded is not None and loaded.info.path == a.path
    assert [path for path, _ in loaded.skipped] == [b.path]


def test_all_damaged_gives_none(files: SearchFiles) -> None:
    info = files.save_checkpoint(1, 1.0, 0, b"data")
    Path(info.path).write_bytes(b"")
    assert files.load_checkpoint(1) is None


def test_prune_keeps_the_newest_valid_and_drops_damaged_and_strays(files: SearchFiles) -> None:
    for budget in (1.0, 2.0, 3.0, 4.0):
        files.save_checkpoint(1, budget, 0, f"b{budget}".encode())
    damaged = files.save_checkpoint(1, 5.0, 0, b"will break")
    Path(damaged.path).write_bytes(b"broken")
    folder = Path(damaged.path).parent
    (folder / "0.5-0.ckpt.sha256").write_text("0" * 64 + "  0.5-0.ckpt\n")  # stray from a crash
    (folder / "9.0-0.ckpt.sha256").write_text("0" * 64 + "  9.0-0.ckpt\n")  # a save in progress
    deleted = files.prune_checkpoints(1, keep=2)
    remaining = sorted(p.name for p in folder.iterdir())
    assert remaining == [
        "3.0-0.ckpt", "3.0-0.ckpt.sha256", "4.0-0.ckpt", "4.0-0.ckpt.sha256", "9.0-0.ckpt.sha256",
    ]
    assert str(folder / "5.0-0.ckpt") in deleted and str(folder / "0.5-0.ckpt.sha256") in deleted
    loaded = files.load_checkpoint(1)
    assert loaded is not None and loaded.data == b"b4.0" and loaded.skipped == []


def test_prune_never_removes_the_last_checkpoints_when_none_verify(files: SearchFiles) -> None:
    info = files.save_checkpoint(1, 1.0, 0, b"data")
    Path(info.path).write_bytes(b"damaged")
    assert files.prune_checkpoints(1, keep=1) == []
    assert Path(info.path).exists()


@pytest.mark.parametrize("keep", [0, -1, 1.5, True])
def test_prune_rejects_bad_keep(files: SearchFiles, keep: object) -> None:
    with pytest.raises(ValueError, match="keep"):
        files.prune_checkpoints(1, keep=keep)  # type: ignore[arg-type]


def test_save_rejects_non_bytes_and_bad_ids(files: SearchFiles) -> None:
    with pytest.raises(TypeError, match="pickle it first"):
        files.save_checkpoint(1, 1.0, 0, "text")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="attempt"):
        files.save_checkpoint(1, 1.0, -1, b"")
    with pytest.raises(ValueError, match="budget"):
        files.save_checkpoint(1, -2.0, 0, b"")
    assert not Path(files.layout.checkpoints).exists() or not any(Path(files.layout.checkpoints).rglob("*"))
