"""The head's HTTP API (service/api.py) against the fake head: who may do what, one error
shape, body limits, the audit log, and a schemathesis run of every operation."""

from __future__ import annotations

import logging
import re
from collections.abc import Iterator
from typing import Any

import pytest
import schemathesis
from fastapi import FastAPI
from fastapi.testclient import TestClient
from schemathesis.checks import CHECKS
from hypothesis import HealthCheck, given, settings

from rungway.scheduler.service.api import make_app
from rungway.scheduler.service.auth import Authenticator
from rungway.scheduler.service.models import UsageReport

LIMIT = 4096
AUDIT = "test.rungway.audit"

# Every route with a path that names a search owned by "speech".
ROUTES = [
    ("GET", "/v1/searches"),
    ("POST", "/v1/searches"),
    ("GET", "/v1/searches/speech-1"),
    ("POST", "/v1/searches/speech-1/pause"),
    ("POST", "/v1/searches/speech-1/resume"),
    ("POST", "/v1/searches/speech-1/cancel"),
    ("GET", "/v1/usage"),
    ("GET", "/v1/whoami"),
    ("GET", "/v1/openapi.json"),
]
SEARCH_ROUTES = [(m, p) for m, p in ROUTES if "speech-1" in p]


ORIGINAL = ["speech-1", "vision-1"]  # the searches the `http` fixture submits


def names(head: Any) -> list[str]:
    return sorted(s.name for s in head.searches(None))


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def build(head: Any, authenticator: Authenticator, lab_config: Any, *, teams: bool = True) -> FastAPI:
    return make_app(head, authenticator, max_body_bytes=LIMIT, audit=logging.getLogger(AUDIT),
                    teams=[t.name for t in lab_config.teams] if teams else None)


@pytest.fixture
def http(head: Any, authenticator: Authenticator, lab_config: Any, make_spec: Any) -> Iterator[TestClient]:
    head.submit("speech", make_spec("speech-1"))
    head.submit("vision", make_spec("vision-1"))
    with TestClient(build(head, authenticator, lab_config)) as client:
        yield client


def call(client: TestClient, method: str, path: str, headers: dict[str, str] | None = None) -> Any:
    # A submission's body need not be a valid spec: every refusal here comes before the spec is read.
    body = {"spec": "name = 'new-one'"} if method == "POST" and path.startswith("/v1/searches?") or path == "/v1/searches" else None
    return client.request(method, path, headers=headers, json=body if method == "POST" else None)


def assert_error(response: Any, status: int) -> str:
    assert response.status_code == status, response.text
    body = response.json()
    assert set(body) == {"detail"} and isinstance(body["detail"], str) and body["detail"]
    return body["detail"]


# ---- who may call ---------------------------------------------------------------------------


@pytest.mark.parametrize(("method", "path"), ROUTES)
@pytest.mark.parametrize("authorization", [None, "Bearer rgw_not-a-token-of-this-lab", "Basic dmlzaW9uOnB3", "Bearer", "Bearer  "])
def test_every_route_needs_a_valid_bearer_token(http: TestClient, head: Any, method: str, path: str,
                                                authorization: str | None) -> None:
    headers = None if authorization is None else {"Authorization": authorization}
    response = call(http, method, path, headers)
    assert_error(response, 401)
    assert response.headers["www-authenticate"] == "Bearer"
    assert names(head) == ORIGINAL  # nothing submitted
    assert head.search("speech-1").state == "running"


def test_a_host_sending_unknown_tokens_is_slowed_down(head: Any, authenticator: Authenticator, lab_config: Any,
                                                     tokens: dict[str, str]) -> None:
    now = [1000.0]
    fresh = Authenticator(lab_config)  # nothing verified yet in this process
    app = make_app(head, fresh, max_body_bytes=LIMIT, failed_tokens_per_minute=3, clock=lambda: now[0])
    with TestClient(app) as client:
        for i in range(3):
            assert_error(client.get("/v1/whoami", headers=bearer(f"rgw_guess-{i}")), 401)
            now[0] += 1
        assert_error(client.get("/v1/whoami"), 401)  # no token: costs nothing, counts for nothing
        refused = client.get("/v1/whoami", headers=bearer(tokens["vision"]))
        assert "too many unknown tokens" in assert_error(refused, 429)
        assert refused.headers["retry-after"] == "57"  # the first guess leaves the minute at 1060
        now[0] = 1060.0
        assert client.get("/v1/whoami", headers=bearer(tokens["vision"])).status_code == 200
        assert_error(client.get("/v1/whoami", headers=bearer("rgw_guess-again")), 401)
        # Three failures in the last minute: a token not verified yet waits; one verified
        # before is not locked out by somebody else's guesses from the same address.
        assert_error(client.get("/v1/whoami", headers=bearer(tokens["root"])), 429)
        assert client.get("/v1/whoami", headers=bearer(tokens["vision"])).status_code == 200


@pytest.mark.parametrize(("method", "path"), SEARCH_ROUTES)
def test_a_team_may_not_read_or_change_another_teams_search(http: TestClient, head: Any, tokens: dict[str, str],
                                                            method: str, path: str) -> None:
    if path.endswith("/resume"):
        head.pause("speech-1")  # so that resuming applies
    before = head.search("speech-1").state
    detail = assert_error(call(http, method, path, bearer(tokens["vision"])), 403)
    assert "another team" in detail and "speech" not in detail.replace("speech-1", "")
    assert head.search("speech-1").state == before
    # the owner may
    assert call(http, method, path, bearer(tokens["speech"])).status_code == 200


@pytest.mark.parametrize(("method", "path"), [("GET", "/v1/searches?team=speech"), ("POST", "/v1/searches?team=speech"),
                                              ("GET", "/v1/usage?team=speech")])
def test_a_team_may_not_name_another_team(http: TestClient, head: Any, tokens: dict[str, str], method: str, path: str) -> None:
    assert_error(call(http, method, path, bearer(tokens["vision"])), 403)
    assert names(head) == ORIGINAL


def test_a_team_lists_its_own_searches_and_may_name_its_own_team(http: TestClient, tokens: dict[str, str]) -> None:
    for query in ("", "?team=vision"):
        response = http.get(f"/v1/searches{query}", headers=bearer(tokens["vision"]))
        assert response.status_code == 200
        assert [(s["name"], s["team"]) for s in response.json()] == [("vision-1", "vision")]


def test_whoami_names_the_caller(http: TestClient, tokens: dict[str, str]) -> None:
    assert http.get("/v1/whoami", headers=bearer(tokens["vision"])).json() == {"name": "vision", "team": "vision", "admin": False}
    assert http.get("/v1/whoami", headers=bearer(tokens["root"])).json() == {"name": "root", "team": None, "admin": True}
    # the scheme's name is case-insensitive (RFC 7235, section 2.1)
    assert http.get("/v1/whoami", headers={"Authorization": f"bearer {tokens['speech']}"}).json()["name"] == "speech"


# ---- admins ---------------------------------------------------------------------------------


def test_an_admin_sees_every_teams_searches_or_one_teams(http: TestClient, tokens: dict[str, str]) -> None:
    admin = bearer(tokens["root"])
    assert sorted(s["name"] for s in http.get("/v1/searches", headers=admin).json()) == ["speech-1", "vision-1"]
    assert [s["name"] for s in http.get("/v1/searches?team=speech", headers=admin).json()] == ["speech-1"]
    assert "ghosts" in assert_error(http.get("/v1/searches?team=ghosts", headers=admin), 404)
    assert http.get("/v1/searches/vision-1", headers=admin).json()["team"] == "vision"


def test_an_admin_submits_for_a_named_existing_team_and_steers_any_search(http: TestClient, head: Any,
                                                                         tokens: dict[str, str], make_spec: Any) -> None:
    admin = bearer(tokens["root"])
    body = {"spec": make_spec("by-admin"), "priority": 5}
    assert "?team=" in assert_error(http.post("/v1/searches", json=body, headers=admin), 422)
    assert_error(http.post("/v1/searches?team=ghosts", json=body, headers=admin), 404)
    created = http.post("/v1/searches?team=speech", json=body, headers=admin)
    assert created.status_code == 201
    assert (created.json()["team"], created.json()["priority"]) == ("speech", 5)
    assert http.post("/v1/searches/vision-1/pause", headers=admin).json()["state"] == "paused"
    assert head.search("vision-1").state == "paused"


def test_without_a_team_list_the_api_asks_the_head_which_teams_exist(head: Any, authenticator: Authenticator,
                                                                     lab_config: Any, tokens: dict[str, str], make_spec: Any) -> None:
    with TestClient(build(head, authenticator, lab_config, teams=False)) as client:
        admin = bearer(tokens["root"])
        assert client.post("/v1/searches?team=vision", json={"spec": make_spec("a")}, headers=admin).status_code == 201
        assert_error(client.post("/v1/searches?team=ghosts", json={"spec": make_spec("b")}, headers=admin), 404)


# ---- the lifecycle and the head's errors ----------------------------------------------------


def test_submit_pause_resume_cancel(http: TestClient, head: Any, tokens: dict[str, str], make_spec: Any) -> None:
    team = bearer(tokens["vision"])
    created = http.post("/v1/searches", json={"spec": make_spec("mine"), "priority": 3}, headers=team)
    assert created.status_code == 201
    assert {k: created.json()[k] for k in ("name", "team", "priority", "state", "metric")} == \
        {"name": "mine", "team": "vision", "priority": 3, "state": "running", "metric": "loss"}
    assert "already exists" in assert_error(http.post("/v1/searches", json={"spec": make_spec("mine")}, headers=team), 409)

    assert http.post("/v1/searches/mine/pause", headers=team).json()["state"] == "paused"
    assert_error(http.post("/v1/searches/mine/pause", headers=team), 409)
    assert http.post("/v1/searches/mine/resume", headers=team).json()["state"] == "running"
    assert http.post("/v1/searches/mine/cancel", headers=team).json()["state"] == "cancelled"
    assert "cancelled" in assert_error(http.post("/v1/searches/mine/resume", headers=team), 409)
    detail = http.get("/v1/searches/mine", headers=team).json()
    assert detail["state"] == "cancelled" and "leaderboard" in detail and "rungs" in detail
    assert (head.owner("mine"), head.search("mine").priority) == ("vision", 3)


@pytest.mark.parametrize("path", ["/v1/searches/nothing-here", "/v1/searches/nothing-here/pause"])
def test_an_unknown_search_is_404(http: TestClient, tokens: dict[str, str], path: str) -> None:
    method = "POST" if path.endswith("pause") else "GET"
    assert "nothing-here" in assert_error(http.request(method, path, headers=bearer(tokens["vision"])), 404)


def test_a_bad_spec_is_422_with_the_located_message(http: TestClient, head: Any, tokens: dict[str, str], make_spec: Any) -> None:
    bad = make_spec("bad-one").replace('metric = "loss"', "metric = 3")
    detail = assert_error(http.post("/v1/searches", json={"spec": bad}, headers=bearer(tokens["vision"])), 422)
    # file:line: field: message, as SpecFileError writes it (metric is on line 4 of the text;
    # the file's name is the head's choice)
    assert re.match(r"[^\n]+:4: metric: must be", detail), detail
    assert head.searches(None) and "bad-one" not in [s.name for s in head.searches(None)]


# ---- request validation: one error shape ----------------------------------------------------


@pytest.mark.parametrize(("content", "content_type", "words"), [
    (b'{"spec": "x", ', "application/json", "not valid JSON"),
    (b'{"spec": 5}', "application/json", "body.spec"),
    (b'{"spec": "name = 1", "priority": "high"}', "application/json", "body.priority"),
    (b'{"spec": "name = 1", "priority": 5000}', "application/json", "body.priority"),
    (b'{"spec": "name = 1", "colour": "red"}', "application/json", "body.colour"),
    (b'{"spec": ""}', "application/json", "body.spec"),
    (b"", "application/json", "body"),
    (b'{"spec": "name = 1"}', "text/plain", "body"),
])
def test_malformed_or_mistyped_bodies_are_422_with_a_string_detail(http: TestClient, head: Any, tokens: dict[str, str],
                                                                   content: bytes, content_type: str, words: str) -> None:
    response = http.post("/v1/searches", content=content,
                         headers={**bearer(tokens["vision"]), "Content-Type": content_type})
    assert words in assert_error(response, 422)
    assert names(head) == ORIGINAL


@pytest.mark.parametrize("query", ["period=year", "since=abc", "since=nan", "since=10&until=5"])
def test_bad_usage_queries_are_422(http: TestClient, tokens: dict[str, str], query: str) -> None:
    assert_error(http.get(f"/v1/usage?{query}", headers=bearer(tokens["vision"])), 422)


def test_unknown_paths_and_methods_keep_the_error_shape(http: TestClient, tokens: dict[str, str]) -> None:
    assert_error(http.get("/v1/nowhere"), 401)  # even which paths exist needs a token
    assert_error(http.get("/v1/nowhere", headers=bearer(tokens["vision"])), 404)
    assert_error(http.delete("/v1/searches/vision-1", headers=bearer(tokens["vision"])), 405)


# ---- body size limit ------------------------------------------------------------------------


def test_a_body_over_the_limit_is_413_by_content_length(http: TestClient, head: Any, tokens: dict[str, str]) -> None:
    body = b'{"spec": "' + b"#" * LIMIT + b'"}'
    response = http.post("/v1/searches", content=body, headers={**bearer(tokens["vision"]), "Content-Type": "application/json"})
    assert str(LIMIT) in assert_error(response, 413)
    assert names(head) == ORIGINAL


def test_a_chunked_body_over_the_limit_is_413(http: TestClient, head: Any, tokens: dict[str, str]) -> None:
    def chunks() -> Iterator[bytes]:  # no Content-Length: httpx sends a generator chunked
        yield b'{"spec": "'
        for _ in range(LIMIT // 512 + 1):
            yield b"#" * 512
        yield b'"}'

    response = http.post("/v1/searches", content=chunks(), headers={**bearer(tokens["vision"]), "Content-Type": "application/json"})
    assert "content-length" not in {k.lower() for k in response.request.headers}
    assert_error(response, 413)
    assert names(head) == ORIGINAL


def test_a_chunked_body_under_the_limit_reaches_the_route(http: TestClient, tokens: dict[str, str], make_spec: Any) -> None:
    text = make_spec("chunked").encode()

    def chunks() -> Iterator[bytes]:
        yield b'{"spec": '
        yield from (bytes([b]) for b in __import__("json").dumps(text.decode()).encode())
        yield b"}"

    response = http.post("/v1/searches", content=chunks(), headers={**bearer(tokens["vision"]), "Content-Type": "application/json"})
    assert response.status_code == 201, response.text
    assert response.json()["name"] == "chunked"


# ---- usage ----------------------------------------------------------------------------------


def test_a_team_sees_only_its_own_usage_row_and_an_admin_every_row(http: TestClient, tokens: dict[str, str]) -> None:
    team = http.get("/v1/usage?period=week", headers=bearer(tokens["speech"])).json()
    assert team["period"] == "week"
    assert [r["team"] for r in team["teams"]] == ["speech"]
    assert [(r["team"], r["search"]) for r in team["searches"]] == [("speech", "speech-1")]
    admin = http.get("/v1/usage?period=all&since=0&until=100", headers=bearer(tokens["root"])).json()
    assert sorted(r["team"] for r in admin["teams"]) == ["speech", "vision"]
    assert (admin["since"], admin["until"]) == (0, 100)


def test_a_teams_usage_is_filtered_even_if_the_head_returns_every_row(fake_head_class: Any, authenticator: Authenticator,
                                                                      lab_config: Any, tokens: dict[str, str], make_spec: Any) -> None:
    class Leaky(fake_head_class):
        def usage(self, team: str | None, period: str, since: float | None, until: float | None) -> UsageReport:
            return super().usage(None, period, since, until)

    leaky = Leaky(lab_config)
    leaky.submit("vision", make_spec("v"))
    with TestClient(build(leaky, authenticator, lab_config)) as client:
        report = client.get("/v1/usage", headers=bearer(tokens["speech"])).json()
    assert [r["team"] for r in report["teams"]] == ["speech"] and report["searches"] == []


# ---- the OpenAPI document -------------------------------------------------------------------


def test_the_openapi_document_is_served_only_with_a_token_and_there_are_no_docs_pages(http: TestClient,
                                                                                      tokens: dict[str, str]) -> None:
    assert_error(http.get("/v1/openapi.json"), 401)
    for path in ("/docs", "/redoc", "/openapi.json"):
        assert http.get(path, headers=bearer(tokens["vision"])).status_code == 404
    document = http.get("/v1/openapi.json", headers=bearer(tokens["vision"])).json()
    operations = {(m.upper(), p) for p, item in document["paths"].items() for m in item}
    assert operations == {
        ("GET", "/v1/searches"), ("POST", "/v1/searches"), ("GET", "/v1/searches/{name}"),
        ("POST", "/v1/searches/{name}/pause"), ("POST", "/v1/searches/{name}/resume"),
        ("POST", "/v1/searches/{name}/cancel"), ("GET", "/v1/usage"), ("GET", "/v1/whoami"),
    }
    for path, item in document["paths"].items():
        for method, operation in item.items():
            assert operation["security"] == [{"HTTPBearer": []}], (method, path)
            for status in ("401", "422", "500"):
                ref = operation["responses"][status]["content"]["application/json"]["schema"]["$ref"]
                assert ref == "#/components/schemas/ErrorBody", (method, path, status)
    assert "HTTPValidationError" not in document["components"]["schemas"]


# ---- unexpected errors and the audit log ----------------------------------------------------


def test_an_unexpected_error_is_a_generic_500_logged_with_its_traceback(fake_head_class: Any, authenticator: Authenticator,
                                                                       lab_config: Any, tokens: dict[str, str],
                                                                       caplog: pytest.LogCaptureFixture) -> None:
    class Broken(fake_head_class):
        def searches(self, team: str | None) -> list[Any]:
            raise RuntimeError("disk on fire at /secret/path")

    broken = Broken(lab_config)
    caplog.set_level(logging.INFO)
    with TestClient(build(broken, authenticator, lab_config)) as client:
        detail = assert_error(client.get("/v1/searches", headers=bearer(tokens["vision"])), 500)
        assert "fire" not in detail and "secret" not in detail
        # the app keeps answering
        assert client.get("/v1/whoami", headers=bearer(tokens["vision"])).status_code == 200
    failures = [r for r in caplog.records if r.exc_info]
    assert len(failures) == 1 and "disk on fire" in str(failures[0].exc_info[1])
    assert any(r.name == AUDIT and "GET /v1/searches 500 vision" in r.getMessage() for r in caplog.records)


def test_the_audit_log_has_one_line_per_request_and_never_a_token(http: TestClient, tokens: dict[str, str],
                                                                  caplog: pytest.LogCaptureFixture, make_spec: Any) -> None:
    caplog.set_level(logging.DEBUG)
    wrong = "rgw_wrong-token-that-must-not-be-logged-0123456789"
    http.get("/v1/searches", headers=bearer(tokens["vision"]))
    http.get("/v1/searches/speech-1", headers=bearer(tokens["vision"]))
    http.get("/v1/whoami", headers=bearer(wrong))
    http.get("/v1/whoami", headers={"Authorization": f"Token {wrong}"})
    http.get("/v1/whoami")
    http.post("/v1/searches?team=speech", json={"spec": make_spec("x")}, headers=bearer(tokens["root"]))
    http.post("/v1/searches", content=b"#" * (LIMIT + 1), headers=bearer(tokens["speech"]))
    lines = [r.getMessage() for r in caplog.records if r.name == AUDIT]
    assert len(lines) == 7
    assert lines[0].startswith("GET /v1/searches 200 vision (vision) from testclient:")
    assert lines[1].startswith("GET /v1/searches/speech-1 403 vision (vision) from ")
    assert lines[1].endswith("search 'speech-1' belongs to another team")
    assert lines[2].startswith("GET /v1/whoami 401 anonymous from ") and lines[2].endswith("unknown token")
    assert lines[3].endswith("not 'Bearer <token>'")
    assert lines[4].endswith("no Authorization header; send 'Authorization: Bearer <token>'")
    assert lines[5].startswith("POST /v1/searches 201 root (admin) from ")
    assert lines[6].startswith("POST /v1/searches 413 speech (speech) from ")
    captured = caplog.text + "\n".join(lines)
    for token in [*tokens.values(), wrong]:
        assert token not in captured


# ---- every operation, property-based --------------------------------------------------------


@pytest.fixture(scope="module", params=["fake", "real"])
def lab_schema(request: pytest.FixtureRequest, fake_head_class: Any, lab_config: Any, authenticator: Authenticator,
               tokens: dict[str, str], make_spec: Any, make_real_head: Any,
               tmp_path_factory: pytest.TempPathFactory) -> Any:
    # The real head too: whatever the fuzzer sends, the head itself must not fail (no 5xx).
    head = (fake_head_class(lab_config) if request.param == "fake"
            else make_real_head(tmp_path_factory.mktemp("fuzzed") / "store"))
    for team in ("vision", "speech"):
        head.submit(team, make_spec(f"{team}-1"))
    # The fuzzer's own checks send wrong tokens on every operation; the slow-down for a host
    # that keeps guessing has its own test, and would answer those 429 instead of 401 here.
    app = make_app(head, authenticator, max_body_bytes=LIMIT, audit=logging.getLogger(AUDIT),
                   teams=[t.name for t in lab_config.teams], failed_tokens_per_minute=1_000_000)
    return schemathesis.openapi.from_asgi("/v1/openapi.json", app, headers=bearer(tokens["root"]))


OPERATIONS = [("GET", "/v1/searches"), ("POST", "/v1/searches"), ("GET", "/v1/searches/{name}"),
              ("POST", "/v1/searches/{name}/pause"), ("POST", "/v1/searches/{name}/resume"),
              ("POST", "/v1/searches/{name}/cancel"), ("GET", "/v1/usage"), ("GET", "/v1/whoami")]


# Hypothesis is driven here rather than through schemathesis' pytest plugin, whose lazy
# fixture loader breaks on pytest 9.2 (it reads a private attribute pytest no longer has).
@pytest.mark.parametrize(("method", "path"), OPERATIONS)
def test_every_operation_answers_as_documented(lab_schema: Any, tokens: dict[str, str], method: str, path: str) -> None:
    operation = lab_schema[path][method]
    # A spec's TOML inside the body, and since <= until, are rules a JSON schema cannot state:
    # schema-valid requests there may rightly be 422.
    semantic = (method, path) in {("POST", "/v1/searches"), ("GET", "/v1/usage")}
    excluded = CHECKS.get_by_names(["positive_data_acceptance"]) if semantic else []

    # As the admin, so every operation is reachable. The default checks include: no 5xx, and
    # the status, headers and body of each answer match the document.
    @given(case=operation.as_strategy())
    @settings(max_examples=25, deadline=None, database=None, suppress_health_check=list(HealthCheck))
    def answers_as_documented(case: Any) -> None:
        case.call_and_validate(headers=bearer(tokens["root"]), excluded_checks=excluded)

    answers_as_documented()


def test_the_property_run_covers_every_operation(lab_schema: Any) -> None:
    assert {(op.ok().method.upper(), op.ok().path) for op in lab_schema.get_all_operations()} == set(OPERATIONS)


def test_rotating_loopback_addresses_does_not_escape_the_unknown_token_limit(head: Any, lab_config: Any,
                                                                             tokens: dict[str, str]) -> None:
    now = [1000.0]
    app = make_app(head, Authenticator(lab_config), max_body_bytes=LIMIT, failed_tokens_per_minute=3,
                   clock=lambda: now[0])
    for i in range(3):  # three guesses, each from another address of 127.0.0.0/8
        with TestClient(app, client=(f"127.0.{i}.{i + 2}", 40000 + i)) as client:
            assert_error(client.get("/v1/whoami", headers=bearer(f"rgw_guess-{i}")), 401)
    with TestClient(app, client=("127.9.9.9", 40009)) as client:
        assert "too many unknown tokens" in assert_error(client.get("/v1/whoami", headers=bearer("rgw_guess-9")), 429)
    # An IPv6 client is counted by its /64.
    for i in range(3):
        with TestClient(app, client=(f"2001:db8::{i + 1}", 40100 + i)) as client:
            assert_error(client.get("/v1/whoami", headers=bearer(f"rgw_v6-{i}")), 401)
    with TestClient(app, client=("2001:db8::ff", 40200)) as client:
        assert_error(client.get("/v1/whoami", headers=bearer("rgw_v6-9")), 429)
    with TestClient(app, client=("2001:db8:1::1", 40300)) as client:  # another /64
        assert_error(client.get("/v1/whoami", headers=bearer("rgw_v6-x")), 401)
