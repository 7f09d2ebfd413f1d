"""Every file the store writes carries a checksum that its readers check (scheduler/store/checksums.py).

The digests are checked against hashlib's SHA-256 (what ``sha256sum`` prints), the outside
reference here; the rest checks our own promises: a damaged file is a StorageCorrupt naming
it and saying what to do, a file of the old shape (no checksum) still reads, and compaction
deletes nothing on the word of a damaged block.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from rungway.scheduler.service.ledger import Ledger, LedgerRow
from rungway.scheduler.store import StorageCorrupt, Store
from rungway.scheduler.store import tables
from rungway.scheduler.store.checksums import EMBEDDED_KEY


def _row(trial: int, rung: int = 1, attempt: int = 2, seq: int = 0, value: float = 0.5) -> dict:
    return dict(trial=trial, rung=rung, attempt=attempt, seq=seq, budget=1.0, metric="loss", value=value, final=True)


def _flip(path: Path, at: int = -100) -> None:
    data = bytearray(path.read_bytes())
    data[at] ^= 0x10
    path.write_bytes(bytes(data))


def test_names_end_with_the_sha256_of_the_bytes(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    part = Path(files.write_measurements([_row(3)]))
    failure = Path(files.record_failure(3, 1, 2, "ValueError", "bad", "Traceback ..."))
    ledger = Ledger(str(tmp_path))
    ledger.append([LedgerRow("t", "s", 3, 2, 1, None, 10.0, 20.0, 1.0, 512, "result")])
    for path in (part, failure, *Path(ledger.folder).iterdir()):
        digits = re.search(r"-([0-9a-f]{32})\.parquet$", path.name)
        assert digits is not None, path.name
        assert hashlib.sha256(path.read_bytes()).hexdigest().startswith(digits.group(1))
    assert part.name.startswith("part-t3-r1-a2-") and failure.name.startswith("fail-t3-r1-a2-")


def test_a_damaged_part_is_named_with_what_it_held_and_what_moving_it_costs(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    part = Path(files.write_measurements([_row(3, seq=s) for s in range(5)]))
    batch = Path(files.write_measurements([_row(4), _row(5)]))
    _flip(part)
    with pytest.raises(StorageCorrupt) as caught:
        files.read_measurements()
    message = str(caught.value)
    assert caught.value.path == str(part) and str(part) in message
    assert "trial 3's reports at rung 1, attempt 2" in message
    assert f"move it out of {part.parent}/" in message and "nothing is counted twice" in message
    part.unlink()  # as the message says: the rest reads
    assert files.read_measurements()["trial"].tolist() == [4, 5]
    _flip(batch, 50)
    with pytest.raises(StorageCorrupt, match="the rung results of 2 segments"):
        files.read_measurements()


def test_parts_blocks_and_failures_of_the_old_shape_read_unverified(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    folder = Path(files.layout.measurements)
    folder.mkdir(parents=True)
    table = pa.Table.from_pylist([_row(7)], schema=tables.MEASUREMENTS_SCHEMA)
    pq.write_table(table, folder / "part-t7-r1-a2-0123abcd.parquet")  # as rungway wrote it before checksums
    assert files.read_measurements()["trial"].tolist() == [7]
    files.write_measurements([_row(8)])
    assert files.compact_measurements(min_parts=2) == 2
    assert files.read_measurements()["trial"].tolist() == [7, 8]


def test_compaction_does_not_delete_parts_on_the_word_of_a_damaged_block(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    parts = [files.write_measurements([_row(t)]) for t in range(3)]
    volume, layout = files._volume, files.layout
    plan = tables.plan_compaction(volume, layout)
    block, merged = tables.write_block(volume, layout, plan.pending, plan.next_block)  # then the compactor died
    assert sorted(merged) == sorted(Path(p).name for p in parts)
    _flip(Path(block), 40)
    with pytest.raises(StorageCorrupt) as caught:
        files.compact_measurements(min_parts=1)
    assert caught.value.path == block
    assert all(Path(p).exists() for p in parts)  # the good copies of the rows are all still there
    Path(block).unlink()  # moved aside: the parts count again, once
    assert files.read_measurements()["trial"].tolist() == [0, 1, 2]


def test_the_trials_table_carries_its_checksum_inside(tmp_path: Path) -> None:
    store = Store(str(tmp_path))
    files = store.search("a")
    files.write_trials([dict(trial=0, status="done", rung=1, attempts=1, failures=0, params={"x": 0.5})], ["x"])
    path = Path(files.layout.trials)
    digest = pq.read_metadata(path).metadata[EMBEDDED_KEY]
    data = path.read_bytes()
    at = data.rfind(digest)  # the SHA-256 of its place and its bytes, with the digest's own as "0"
    zeroed = b"a/trials.parquet\n" + data[:at] + b"0" * 64 + data[at + 64:]
    assert hashlib.sha256(zeroed).hexdigest().encode() == digest
    assert files.read_trials()["space_x"].tolist() == [0.5]
    _flip(path, 20)
    with pytest.raises(StorageCorrupt, match=r"trials\.parquet is damaged.*the head writes it again") as caught:
        files.read_trials()
    assert caught.value.path == str(path)
    # A trials table copied over another search's does not verify there.
    path.write_bytes(data)
    other = store.search("b")
    other.write_trials([], [])
    Path(other.layout.trials).write_bytes(data)
    with pytest.raises(StorageCorrupt, match="copied here from another place than b/trials.parquet"):
        other.read_trials()
    # One written before checksums reads as it is.
    pq.write_table(pq.read_table(path).replace_schema_metadata(None), path)
    assert files.read_trials()["space_x"].tolist() == [0.5]


def test_the_spec_stays_as_written_with_its_checksum_beside_it(tmp_path: Path) -> None:
    files = Store(str(tmp_path)).search("s")
    files.write_spec('name = "s"\n')
    spec, sidecar = Path(files.layout.spec), Path(files.layout.spec_checksum)
    assert spec.read_text() == 'name = "s"\n'
    assert sidecar.read_text() == f"{hashlib.sha256(spec.read_bytes()).hexdigest()}  spec.toml\n"  # sha256sum -c
    spec.write_text('name = "t"\n')  # one bit away: a different spec that parses
    with pytest.raises(StorageCorrupt, match="Put back the spec it was submitted with") as caught:
        files.read_spec()
    assert caught.value.path == str(spec) and f"delete {sidecar}" in str(caught.value)
    # A spec replaced: until the new text is in place, the sidecar vouches for both.
    files.write_spec('name = "s"\n')
    files.write_spec('name = "s"\nseed = 2\n')
    assert files.read_spec() == 'name = "s"\nseed = 2\n' and len(sidecar.read_text().splitlines()) == 1
    sidecar.write_text(sidecar.read_text()[:20])
    with pytest.raises(StorageCorrupt, match=r"spec\.toml\.sha256, the spec's checksum, is damaged"):
        files.read_spec()
    sidecar.unlink()  # a spec written before checksums: read as it is
    assert files.read_spec() == 'name = "s"\nseed = 2\n'


def test_a_spec_whose_new_text_never_arrived_reads_as_the_old_one(tmp_path: Path,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    files = Store(str(tmp_path)).search("s")
    files.write_spec("old = 1\n")
    real, writes = files._volume.write_bytes, []

    def die_on_the_spec(path: str, data: bytes) -> None:
        if path == files.layout.spec:
            raise KeyboardInterrupt("killed between the sidecar and the spec")
        writes.append(path)
        real(path, data)

    monkeypatch.setattr(files._volume, "write_bytes", die_on_the_spec)
    with pytest.raises(KeyboardInterrupt):
        files.write_spec("new = 1\n")
    monkeypatch.undo()
    assert writes == [files.layout.spec_checksum]
    assert files.read_spec() == "old = 1\n"


def test_the_snapshot_carries_its_checksum_as_its_first_member(tmp_path: Path) -> None:
    store = Store(str(tmp_path))
    files = store.search("a")
    text = json.dumps({"meta": {"segments": 3}, "journal_seq": 12, "core": {"trials": [1, 2]}}, separators=(",", ":"))
    files.write_head_state("head-state.json", text)
    path = Path(files.journal_dir) / "head-state.json"
    stored = path.read_bytes()
    assert json.loads(stored)["journal_seq"] == 12 and stored.startswith(b'{"sha256":"')
    assert hashlib.sha256(b"a/journal/head-state.json\n" + text.encode()).hexdigest().encode() == stored[11:75]
    assert files.read_head_state("head-state.json") == text
    files.write_head_state("empty.json", "{}")
    assert files.read_head_state("empty.json") == "{}"
    with pytest.raises(ValueError, match="JSON object"):
        files.write_head_state("x.json", "not json")
    # A changed digit that still parses, a damaged checksum, a copy from another search.
    for damaged in (stored.replace(b'"journal_seq":12', b'"journal_seq":13'),
                    stored.replace(b'{"sha256"', b'{"sha2v6"'),
                    stored[: len(stored) // 2]):
        path.write_bytes(damaged)
        with pytest.raises(StorageCorrupt, match="saved state is damaged") as caught:
            files.read_head_state("head-state.json")
        assert caught.value.path == str(path)
    other = store.search("b")
    other.write_head_state("head-state.json", "{}")
    (Path(other.journal_dir) / "head-state.json").write_bytes(stored)
    with pytest.raises(StorageCorrupt):
        other.read_head_state("head-state.json")
    path.write_text(text)  # one written before checksums
    assert files.read_head_state("head-state.json") == text


def test_a_damaged_ledger_file_is_named_and_nothing_counts_twice(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    for trial in range(4):
        ledger.append([LedgerRow("t", "s", trial, 1, 0, None, 10.0, 20.0, 1.0, 512, "result")])
    folder = Path(ledger.folder)
    part = sorted(folder.iterdir())[0]
    _flip(part)
    with pytest.raises(StorageCorrupt, match="usage reports and allowances no longer count them") as caught:
        ledger.read()
    assert caught.value.path == str(part)
    part.unlink()
    assert ledger.cpu_seconds_by_team() == {"t": 30.0}
    # A compaction interrupted after its block: the leftovers go only once the block checks.
    real = ledger.volume.delete
    ledger.volume.delete = lambda path: False  # type: ignore[method-assign]
    ledger.compact(min_parts=1)
    ledger.volume.delete = real  # type: ignore[method-assign]
    (block,) = [p for p in folder.iterdir() if p.name.startswith("block-")]
    assert ledger.statistics()["leftovers"] == 3
    _flip(block, 60)
    with pytest.raises(StorageCorrupt):
        ledger.compact(min_parts=1)
    assert ledger.statistics()["leftovers"] == 3
    block.unlink()
    assert ledger.cpu_seconds_by_team() == {"t": 30.0}
