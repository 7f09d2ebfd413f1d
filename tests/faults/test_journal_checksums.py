"""The head's journal checks every line it replays (scheduler/head/journal.py): a CRC per line,
entries in order with none missing, and only a torn last line forgiven.

The CRCs are checked against zlib.crc32 (the CRC-32 of ISO 3309 / ITU-T V.42, as ``gzip`` uses),
the outside reference here. The searches run without Ray (InlineExecutor).
"""

from __future__ import annotations

import json
import re
import sys
import zlib
from pathlib import Path

import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from runhelpers import spec_text  # noqa: E402

from rungway.scheduler.head.driver import SearchDriver  # noqa: E402
from rungway.scheduler.head.executor import InlineExecutor  # noqa: E402
from rungway.scheduler.head.journal import Journal, JournalCorrupt  # noqa: E402
from rungway.scheduler.spec import parse_spec  # noqa: E402
from rungway.scheduler.store import StorageCorrupt  # noqa: E402


def _journal(folder: Path, batches: int = 3, size: int = 4) -> Journal:
    journal = Journal(folder)
    for b in range(batches):
        journal.append([{"e": "rep", "t": b * size + i, "a": 1, "r": 0, "v": 0.25 * i} for i in range(size)])
    journal.close()
    return journal


def test_every_line_carries_the_crc32_of_its_place_and_its_text(tmp_path: Path) -> None:
    folder = tmp_path / "s" / "journal"
    _journal(folder)
    (path,) = folder.iterdir()
    assert path.name == "events-000000000001.crc.jsonl"
    for line in path.read_bytes().splitlines():
        seal = re.fullmatch(rb'\{"c":"([0-9a-f]{8})",(.*)', line)
        assert seal is not None
        body = b"{" + seal.group(2)
        assert int(seal.group(1), 16) == zlib.crc32(b"s/journal/" + path.name.encode() + b"\n" + body)
        assert "c" not in json.loads(body)
    assert [e["n"] for e in Journal(folder).entries_after(0)] == list(range(1, 13))
    assert all("c" not in e for e in Journal(folder).entries_after(0))


def _rewrite(path: Path, change) -> None:  # noqa: ANN001
    lines = path.read_bytes().splitlines(keepends=True)
    change(lines)
    path.write_bytes(b"".join(lines))


def test_a_changed_value_in_a_line_that_still_parses_is_named_by_file_and_line(tmp_path: Path) -> None:
    folder = tmp_path / "s" / "journal"
    _journal(folder)
    (path,) = folder.iterdir()
    _rewrite(path, lambda lines: lines.__setitem__(5, lines[5].replace(b'"v":0.25', b'"v":0.35')))
    with pytest.raises(JournalCorrupt) as caught:
        list(Journal(folder).entries_after(0))
    assert isinstance(caught.value, StorageCorrupt)
    message = str(caught.value)
    assert message.startswith(f"{path}:6: journal line damaged")
    assert "cannot resume this search from its journal" in message and "stay readable" in message


def test_lines_out_of_order_and_a_file_cut_short_are_errors(tmp_path: Path) -> None:
    folder = tmp_path / "s" / "journal"
    _journal(folder, batches=1)
    _journal(folder, batches=1)  # a second head: a second file
    first, second = sorted(folder.iterdir())
    assert second.name == "events-000000000005.crc.jsonl"
    original = first.read_bytes()

    def swap(lines: list[bytes]) -> None:
        lines[1], lines[2] = lines[2], lines[1]

    _rewrite(first, swap)
    with pytest.raises(JournalCorrupt, match=rf"{first}:2: entry 3 where entry 2 belongs"):
        list(Journal(folder).entries_after(0))
    first.write_bytes(original[: original.rfind(b"\n", 0, len(original) - 1) + 1])  # its last line gone
    with pytest.raises(JournalCorrupt, match=rf"{first}:4: the file stops before entry 4 but the next one, "
                                             rf"{second.name}, starts with entry 5"):
        list(Journal(folder).entries_after(0))
    # A line moved into another search's journal does not verify there, even in its place.
    other = tmp_path / "t" / "journal"
    other.mkdir(parents=True)
    (other / second.name).write_bytes(second.read_bytes())
    with pytest.raises(JournalCorrupt, match="does not match its CRC"):
        list(Journal(other).entries_after(0))


def test_only_a_torn_last_line_is_forgiven(tmp_path: Path) -> None:
    folder = tmp_path / "s" / "journal"
    _journal(folder)
    (path,) = folder.iterdir()
    whole = path.read_bytes()
    path.write_bytes(whole[:-7])  # a head killed mid-write: the last line has no newline
    journal = Journal(folder)
    assert [e["n"] for e in journal.entries_after(0)] == list(range(1, 12)) and journal.seq == 11
    path.write_bytes(whole[:-1] + b"\r")  # a whole line whose newline was damaged: not torn
    with pytest.raises(JournalCorrupt, match=rf"{path}:12: its line ends in a damaged byte"):
        list(Journal(folder).entries_after(0))


def test_a_journal_written_before_checksums_replays_and_is_continued(tmp_path: Path) -> None:
    folder = tmp_path / "s" / "journal"
    folder.mkdir(parents=True)
    old = folder / "events-000000000001.jsonl"
    old.write_text('{"e":"seg","t":0,"a":1,"r":0,"n":1}\n{"e":"rep","t":0,"a":1,"r":0,"v":0.5,"n":2}\n')
    journal = Journal(folder)
    assert journal.seq == 2
    journal.append([{"e": "stop", "why": "deadline"}])
    journal.close()
    assert sorted(p.name for p in folder.iterdir()) == [old.name, "events-000000000003.crc.jsonl"]
    assert [(e["n"], e["e"]) for e in Journal(folder).entries_after(0)] == [(1, "seg"), (2, "rep"), (3, "stop")]
    old.write_text('{"e":"rep","t":0,"a":1,"r":0,"v":0.5,"n":2}\n{"e":"seg","t":0,"a":1,"r":0,"n":1}\n')
    with pytest.raises(JournalCorrupt, match=rf"{old}:1: entry 2 where entry 1 belongs"):
        list(Journal(folder).entries_after(0))


def _killed_search(root: Path, name: str) -> tuple[str, Path]:
    text = spec_text(name, trials=12, max_budget=9)
    driver = SearchDriver(parse_spec(text), text, str(root), InlineExecutor(cpus=2), persist_seconds=3600)
    driver.begin()
    for _ in range(10_000):
        if driver.segments >= 10 or driver.over:
            break
        driver.step()
    driver.journal.close()  # killed: no snapshot since the start
    lease = getattr(driver, "lease", None)
    if lease is not None:  # its process is gone
        lease.release()
    (path,) = sorted((root / "searches" / name / "journal").glob("events-*"))
    return text, path


def test_the_head_refuses_a_changed_result_that_still_parses(tmp_path: Path) -> None:
    text, path = _killed_search(tmp_path, "ladder")
    lines = path.read_bytes().splitlines(keepends=True)
    number = next(i for i, line in enumerate(lines, 1) if b'"e":"rep"' in line and i > 3)
    value = re.search(rb'"v":(-?[0-9.e-]+)', lines[number - 1]).group(1)  # type: ignore[union-attr]
    other = value[:-1] + (b"8" if value.endswith(b"9") else b"9")
    lines[number - 1] = lines[number - 1].replace(b'"v":' + value, b'"v":' + other)
    path.write_bytes(b"".join(lines))  # still valid JSON: before checksums, this value went into the ladder
    with pytest.raises(JournalCorrupt) as caught:
        SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=2))
    message = str(caught.value)
    assert message.startswith(f"{path}:{number}: journal line damaged (it does not match its CRC)")
    assert "cannot resume this search from its journal" in message and f"copy of {path.name}" in message


def test_damage_to_a_line_the_snapshot_holds_is_passed_over(tmp_path: Path) -> None:
    text = spec_text("covered", trials=12, max_budget=9)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=2), persist_seconds=3600)
    driver.begin()
    for _ in range(10_000):
        if driver.segments >= 6 or driver.over:
            break
        driver.step()
    driver.journal.rotate = lambda covered: None  # type: ignore[method-assign]  # killed before the rotation
    driver.persist()
    covered = driver.journal.seq
    driver.journal.close()
    lease = getattr(driver, "lease", None)
    if lease is not None:
        lease.release()
    (path,) = (tmp_path / "searches" / "covered" / "journal").glob("events-*")
    lines = path.read_bytes().splitlines(keepends=True)
    assert len(lines) == covered >= 2
    lines[1] = lines[1].replace(b'"n":', b'"n" :')  # entry 2, which the snapshot holds, damaged
    path.write_bytes(b"".join(lines))
    with pytest.raises(JournalCorrupt, match=rf"{path}:2: journal line damaged"):
        list(Journal(path.parent).entries_after(1))
    assert list(Journal(path.parent).entries_after(covered)) == []
    again = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=2))
    assert again.replayed == 0 and again.run().finished


def test_the_head_refuses_a_damaged_stored_spec(tmp_path: Path) -> None:
    text, _ = _killed_search(tmp_path, "specs")
    spec = tmp_path / "searches" / "specs" / "spec.toml"
    spec.write_text(spec.read_text().replace("trials = 12", "trials = 13"))  # parses: another search
    with pytest.raises(StorageCorrupt, match="does not match its checksum") as caught:
        SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=2))
    assert caught.value.path == str(spec)
