"""The standard-library client (service/client.py) and the ``rungway lab`` commands, against a
real uvicorn server on 127.0.0.1 in a thread, serving the API around the fake head."""

from __future__ import annotations

import http.server
import json
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import uvicorn

from rungway.scheduler.cli.main import main
from rungway.scheduler.service.api import make_app
from rungway.scheduler.service.auth import Authenticator, verify_token
from rungway.scheduler.service.client import HeadUnreachable, LabClient, LabClientError


@pytest.fixture(autouse=True)
def _no_settings_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in ("RUNGWAY_HEAD", "RUNGWAY_TOKEN", "RUNGWAY_TOKEN_FILE"):
        monkeypatch.delenv(name, raising=False)


@pytest.fixture
def url(head: Any, authenticator: Authenticator, lab_config: Any, make_spec: Any) -> Iterator[str]:
    head.submit("speech", make_spec("speech-1"))
    app = make_app(head, authenticator, max_body_bytes=64 * 1024, teams=[t.name for t in lab_config.teams])
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))  # a free port, chosen by the kernel
    sock.listen(16)
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", access_log=False, lifespan="off"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:  # waiting for start-up, not measuring it
        assert thread.is_alive() and time.monotonic() < deadline, "uvicorn did not start"
        time.sleep(0.01)
    yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    server.should_exit = True
    thread.join(30)
    sock.close()


@pytest.fixture
def token_files(tmp_path: Path, tokens: dict[str, str]) -> dict[str, Path]:
    files = {}
    for who, token in tokens.items():
        files[who] = tmp_path / f"{who}.token"
        files[who].write_text(token + "\n")  # as an editor saves it
    return files


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


# ---- the client -----------------------------------------------------------------------------


def test_the_client_drives_every_route(url: str, tokens: dict[str, str], make_spec: Any, tmp_path: Path) -> None:
    vision = LabClient(url, tokens["vision"])
    assert vision.whoami() == {"name": "vision", "team": "vision", "admin": False}
    created = vision.submit(make_spec("from-text"), priority=4)
    assert (created["name"], created["team"], created["priority"], created["state"]) == ("from-text", "vision", 4, "running")
    path = tmp_path / "spec.toml"
    path.write_text(make_spec("from-file"))
    assert vision.submit(path)["name"] == "from-file"
    assert [s["name"] for s in vision.searches()] == ["from-text", "from-file"]
    assert vision.search("from-file")["leaderboard"] == []
    assert vision.pause("from-file")["state"] == "paused"
    assert vision.resume("from-file")["state"] == "running"
    assert vision.cancel("from-file")["state"] == "cancelled"
    report = vision.usage("week")
    assert report["period"] == "week" and [t["team"] for t in report["teams"]] == ["vision"]

    admin = LabClient(url, tokens["root"])
    assert sorted(s["name"] for s in admin.searches()) == ["from-file", "from-text", "speech-1"]
    assert [s["name"] for s in admin.searches(team="speech")] == ["speech-1"]
    assert admin.submit(make_spec("for-speech"), team="speech")["team"] == "speech"
    assert sorted(t["team"] for t in admin.usage("all")["teams"]) == ["speech", "vision"]


@pytest.mark.parametrize(("who", "call", "status", "words"), [
    ("vision", lambda c, s: c.search("speech-1"), 403, "another team"),
    ("vision", lambda c, s: c.cancel("speech-1"), 403, "another team"),
    ("vision", lambda c, s: c.searches(team="speech"), 403, "speech"),
    ("vision", lambda c, s: c.search("no-such"), 404, "no-such"),
    ("speech", lambda c, s: c.resume("speech-1"), 409, "running"),
    ("speech", lambda c, s: c.submit(s("speech-1")), 409, "already exists"),
    ("speech", lambda c, s: c.submit(s("bad").replace('metric = "loss"', "metric = 3")), 422, ":4: metric: must be"),
    ("root", lambda c, s: c.submit(s("orphan")), 422, "?team="),
    ("nobody", lambda c, s: c.whoami(), 401, "unknown token"),
])
def test_refusals_raise_with_the_heads_status_and_detail(url: str, tokens: dict[str, str], make_spec: Any,
                                                         who: str, call: Any, status: int, words: str) -> None:
    client = LabClient(url, tokens.get(who, "rgw_not-a-token"))
    with pytest.raises(LabClientError) as caught:
        call(client, make_spec)
    assert (caught.value.status, type(caught.value)) == (status, LabClientError)
    assert words in caught.value.detail


def test_the_url_and_token_come_from_the_environment(url: str, tokens: dict[str, str], token_files: dict[str, Path],
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("RUNGWAY_HEAD", url + "/")
    monkeypatch.setenv("RUNGWAY_TOKEN_FILE", str(token_files["speech"]))
    assert LabClient().whoami()["name"] == "speech"
    monkeypatch.setenv("RUNGWAY_TOKEN", tokens["vision"])  # the variable beats the file variable
    assert LabClient().whoami()["name"] == "vision"
    assert LabClient(token_file=token_files["root"]).whoami()["name"] == "root"  # an explicit file beats both
    assert LabClient(token=tokens["speech"], token_file=token_files["root"]).whoami()["name"] == "speech"


def test_without_a_token_or_with_an_unreadable_file_the_client_says_what_to_do(tmp_path: Path) -> None:
    with pytest.raises(LabClientError, match="RUNGWAY_TOKEN") as caught:
        LabClient("http://127.0.0.1:1")
    assert caught.value.status is None
    with pytest.raises(LabClientError, match="cannot read the token file"):
        LabClient("http://127.0.0.1:1", token_file=tmp_path / "missing")
    (tmp_path / "empty").write_text("\n")
    with pytest.raises(LabClientError, match="is empty"):
        LabClient("http://127.0.0.1:1", token_file=tmp_path / "empty")


def test_a_head_that_is_not_there_is_head_unreachable(tokens: dict[str, str]) -> None:
    client = LabClient(f"http://127.0.0.1:{free_port()}", tokens["vision"], timeout=5)
    with pytest.raises(HeadUnreachable, match="cannot reach the head") as caught:
        client.whoami()
    assert caught.value.status is None
    assert tokens["vision"] not in repr(client) + str(caught.value)


def test_redirects_are_not_followed_so_the_token_stays_with_the_head(tokens: dict[str, str]) -> None:
    seen: list[str | None] = []

    class Redirect(http.server.BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            if self.path.startswith("/elsewhere"):
                seen.append(self.headers.get("Authorization"))
                self.send_response(200)
                self.end_headers()
                self.wfile.write(b"{}")
                return
            self.send_response(307)
            self.send_header("Location", f"http://127.0.0.1:{self.server.server_address[1]}/elsewhere")
            self.end_headers()

        def log_message(self, *args: Any) -> None:
            pass

    with http.server.ThreadingHTTPServer(("127.0.0.1", 0), Redirect) as server:
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        try:
            with pytest.raises(LabClientError) as caught:
                LabClient(f"http://127.0.0.1:{server.server_address[1]}", tokens["vision"]).whoami()
        finally:
            server.shutdown()
            thread.join(10)
    assert caught.value.status == 307
    assert seen == []


# ---- rungway lab ... ------------------------------------------------------------------------


def lab(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    status = main(["lab", *argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_the_lab_commands_against_the_head(url: str, token_files: dict[str, Path], make_spec: Any, tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    common = ["--head", url, "--token-file", str(token_files["vision"])]
    spec = tmp_path / "mine.toml"
    spec.write_text(make_spec("mine"))

    assert lab(capsys, "whoami", *common) == (0, "vision (team vision)\n", "")
    status, out, _ = lab(capsys, "submit", str(spec), "--priority", "2", *common)
    assert (status, out) == (0, "submitted mine for team vision (priority 2): running\n")
    status, out, _ = lab(capsys, "list", *common)
    assert status == 0
    header, row = out.splitlines()
    assert header.split() == ["NAME", "TEAM", "STATE", "PRIORITY", "TRIALS", "CPUS", "CPU-HOURS", "BEST"]
    assert row.split() == ["mine", "vision", "running", "2", "0", "0.0", "0.00", "-"]
    status, out, _ = lab(capsys, "list", "--json", *common)
    assert status == 0 and [s["name"] for s in json.loads(out)] == ["mine"]
    status, out, _ = lab(capsys, "show", "mine", *common)
    assert status == 0 and out.startswith("mine (vision): running, priority 2\n")
    assert lab(capsys, "pause", "mine", *common)[:2] == (0, "mine (vision): paused\n")
    assert lab(capsys, "resume", "mine", *common)[:2] == (0, "mine (vision): running\n")
    assert lab(capsys, "cancel", "mine", *common)[:2] == (0, "mine (vision): cancelled\n")
    status, out, _ = lab(capsys, "usage", "--period", "week", *common)
    assert status == 0 and out.splitlines()[0] == "usage for the week period"
    assert out.splitlines()[2].split()[0] == "vision" and "speech" not in out
    status, out, _ = lab(capsys, "usage", "--json", *common)
    assert status == 0 and json.loads(out)["period"] == "month"


@pytest.mark.parametrize(("argv", "words"), [
    (["show", "speech-1"], "belongs to another team"),
    (["cancel", "speech-1"], "belongs to another team"),
    (["list", "--team", "speech"], "may not see team 'speech'"),
    (["resume", "no-such"], "no-such"),
    (["submit", "{bad}"], ":4: metric: must be"),
    (["submit", "{missing}"], "cannot read the spec file"),
])
def test_a_refusal_exits_2_with_the_message_and_no_traceback(url: str, token_files: dict[str, Path], make_spec: Any,
                                                             tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                             argv: list[str], words: str) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(make_spec("bad").replace('metric = "loss"', "metric = 3"))
    argv = [a.format(bad=bad, missing=tmp_path / "missing.toml") for a in argv]
    status, out, err = lab(capsys, *argv, "--head", url, "--token-file", str(token_files["vision"]))
    assert (status, out) == (2, "")
    assert err.startswith("error: ") and words in err and "Traceback" not in err


def test_without_a_token_the_lab_commands_exit_2(url: str, capsys: pytest.CaptureFixture[str]) -> None:
    status, out, err = lab(capsys, "whoami", "--head", url)
    assert (status, out) == (2, "") and "rungway lab token" in err


def test_a_wrong_token_exits_2(url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    wrong = tmp_path / "wrong.token"
    wrong.write_text("rgw_wrong-token-0123456789")
    status, _, err = lab(capsys, "whoami", "--head", url, "--token-file", str(wrong))
    assert status == 2 and "unknown token" in err and "rgw_wrong" not in err


def test_an_unreachable_head_exits_1_and_says_how_to_start_one(token_files: dict[str, Path],
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    status, out, err = lab(capsys, "list", "--head", f"http://127.0.0.1:{free_port()}", "--token-file", str(token_files["vision"]))
    assert (status, out) == (1, "")
    assert "cannot reach the head" in err and "rungway head --config" in err and "Traceback" not in err


def test_lab_token_makes_a_token_and_its_hash_without_a_head(capsys: pytest.CaptureFixture[str]) -> None:
    status, out, _ = lab(capsys, "token", "--json")
    made = json.loads(out)
    assert status == 0 and made["token"].startswith("rgw_")
    assert verify_token(made["token"], made["hash"])
    status, out, _ = lab(capsys, "token")
    lines = out.splitlines()
    token = lines[0].removeprefix("token: ")
    stored = lines[-1].strip().removeprefix('tokens = ["').removesuffix('"]')
    assert status == 0 and token != made["token"] and verify_token(token, stored)


# ---- rungway head ---------------------------------------------------------------------------


def test_head_refuses_an_invalid_config_with_exit_2(tmp_path: Path, make_lab_toml: Any,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "lab.toml"
    bad.write_text(make_lab_toml(head='host = "0.0.0.0"'))
    assert main(["head", "--config", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"error: {bad}:") and "allow_remote" in err and "Traceback" not in err
    assert main(["head", "--config", str(tmp_path / "missing.toml")]) == 2
    assert "cannot read the lab config" in capsys.readouterr().err


# Runs `rungway head` in its own process, with the fake head in place of LabHead and no Ray
# (the real head's own tests cover those): what is checked is the process around them.
HEAD_PROCESS = """
import contextlib, sys
sys.path.insert(0, sys.argv[1])
from conftest import FakeHead
import rungway.scheduler.head.cluster as cluster
import rungway.scheduler.service.lab as lab

class Head(FakeHead):
    def stop(self, timeout=None):
        print("head stopped", flush=True)

lab.LabHead = Head
cluster.ray_session = lambda *args, **kwargs: contextlib.nullcontext()
from rungway.scheduler.cli.main import main
sys.exit(main(["head", "--config", sys.argv[2]]))
"""


def test_head_serves_until_sigterm_then_stops_the_head_and_exits_0(tmp_path: Path, make_lab_toml: Any,
                                                                   tokens: dict[str, str], make_spec: Any) -> None:
    import select
    import signal
    import subprocess
    import sys

    config = tmp_path / "lab.toml"
    config.write_text(make_lab_toml(head='port = 0\nlog_file = "head.log"'))
    process = subprocess.Popen([sys.executable, "-c", HEAD_PROCESS, str(Path(__file__).parent), str(config)],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        ready, _, _ = select.select([process.stdout], [], [], 120)  # never hang the suite on a stuck child
        first = process.stdout.readline() if ready else ""  # type: ignore[union-attr]
        if not first.startswith("rungway head listening on http://127.0.0.1:"):
            process.kill()
            pytest.fail(f"the head did not start: {first}{process.communicate()[1]}")
        url = first.split()[4]
        client = LabClient(url, tokens["vision"])
        assert client.whoami()["name"] == "vision"
        assert client.submit(make_spec("served"))["state"] == "running"
        process.send_signal(signal.SIGTERM)
        out, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert process.returncode == 0, err
    assert out == "head stopped\n"
    log = (tmp_path / "head.log").read_text()  # relative to the config's folder
    assert "GET /v1/whoami 200 vision (vision) from 127.0.0.1:" in log
    assert "POST /v1/searches 201 vision" in log
    for token in tokens.values():
        assert token not in log + err
