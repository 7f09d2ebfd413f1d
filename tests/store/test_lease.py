"""One writer per search: the lease refuses a second live writer, is taken over once its holder
is gone (kill -9 on this host, or unrenewed for its ttl from another host), and fences a holder
that was replaced; of several processes racing for it, exactly one wins."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from rungway.scheduler.store.lease import LEASE_DIR, LeaseLost, SearchInUse, SearchLease


def holder(folder: Path, token: int, **content) -> Path:  # noqa: ANN003
    path = folder / LEASE_DIR / f"{token:09d}.json"
    path.parent.mkdir(exist_ok=True)
    path.write_text(json.dumps(content))
    return path


@pytest.fixture
def other_process():  # noqa: ANN201
    child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(600)"])
    yield child
    child.kill()
    child.wait()


def test_a_live_process_on_this_host_keeps_its_lease_until_it_is_killed(tmp_path: Path, other_process) -> None:  # noqa: ANN001
    lease = SearchLease(str(tmp_path), "s")
    holder(tmp_path, token=4, host=lease.host, pid=other_process.pid, since=0)
    with pytest.raises(SearchInUse, match=rf"already being run by process {other_process.pid} on {lease.host}"):
        lease.acquire()
    other_process.send_signal(signal.SIGKILL)
    other_process.wait()
    assert lease.acquire() == 5  # taken over at once: its holder is gone; the token grows


def test_a_lease_of_another_host_is_taken_over_only_once_unrenewed_for_its_ttl(tmp_path: Path) -> None:
    lease = SearchLease(str(tmp_path), "s", ttl=60.0)
    path = holder(tmp_path, token=2, host="another-host", pid=1, since=0)
    with pytest.raises(SearchInUse, match="run again once the lease is 60 s old"):
        lease.acquire()
    old = time.time() - 61
    os.utime(path, (old, old))
    assert lease.acquire() == 3


def test_release_then_acquire_takes_the_next_token(tmp_path: Path) -> None:
    first = SearchLease(str(tmp_path), "s")
    assert first.acquire() == 1
    first.release()
    assert json.loads((tmp_path / LEASE_DIR / "000000001.json").read_text())["released"] is True
    assert SearchLease(str(tmp_path), "s").acquire() == 2


def test_a_replaced_holder_is_fenced(tmp_path: Path) -> None:
    lease = SearchLease(str(tmp_path), "s")
    lease.acquire()
    holder(tmp_path, token=9, host="another-host", pid=1, since=0)  # taken over after a long stall
    with pytest.raises(LeaseLost, match="another process took its lease over"):
        lease.renew(every=0)
    with pytest.raises(LeaseLost):
        lease.check()
    lease.release()
    with pytest.raises(SearchInUse, match="another-host"):  # the highest token holds the lease
        SearchLease(str(tmp_path), "s").acquire()


def test_a_torn_lease_file_holds_nothing(tmp_path: Path) -> None:
    holder(tmp_path, 3).write_text('{"ho')
    assert SearchLease(str(tmp_path), "s").acquire() == 4


def test_of_four_racers_exactly_one_wins(tmp_path: Path) -> None:
    # All see the same stale lease; one takes it over, the others find it held by the winner,
    # which stays alive until every racer has answered.
    path = holder(tmp_path, token=1, host="another-host", pid=1, since=0)
    old = time.time() - 3600
    os.utime(path, (old, old))
    code = ("import os, sys, time; from rungway.scheduler.store.lease import SearchLease, SearchInUse\n"
            "folder, me = sys.argv[1], sys.argv[2]\n"
            "try:\n answer = str(SearchLease(folder, 's').acquire())\n"
            "except SearchInUse:\n answer = 'refused'\n"
            "open(os.path.join(folder, 'answer-' + me), 'w').write(answer)\n"
            "while answer != 'refused' and not os.path.exists(os.path.join(folder, 'stop')): time.sleep(0.05)\n")
    racers = [subprocess.Popen([sys.executable, "-c", code, str(tmp_path), str(i)]) for i in range(4)]
    try:
        for _ in range(6000):  # a bound, not a speed: each racer answers once it has run
            if len(list(tmp_path.glob("answer-*"))) == 4:
                break
            time.sleep(0.05)
    finally:
        (tmp_path / "stop").write_text("")
        for racer in racers:
            racer.wait(timeout=120)
    answers = sorted(p.read_text() for p in tmp_path.glob("answer-*"))
    assert answers == ["2", "refused", "refused", "refused"]
