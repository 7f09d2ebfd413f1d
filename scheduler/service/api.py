"""The head's HTTP API: every team's door to the lab, under ``/v1``.

Theory of operation. ``make_app`` wraps a running head (``lab.LabHead``, or anything with its
methods) in a FastAPI app. The app owns no state: each route checks who is calling and what
they may touch, then makes one thread-safe call on the head. Route functions are plain
``def`` so FastAPI runs them in its thread pool and a slow head call never blocks the loop.

Rules, in the order they are applied:

- Every request, for the OpenAPI document and unknown paths too, needs ``Authorization:
  Bearer <token>``; a missing, malformed or unknown token is 401 with ``WWW-Authenticate:
  Bearer``, decided (``_Authenticate``, a pure ASGI middleware) before any body is read. A
  host that keeps sending unknown tokens is answered 429 for a while (``_FailedTokens``):
  each one costs the head a PBKDF2 per configured hash.
- A team caller sees and changes only its own team's searches. Naming another team's search
  (reading or acting on it) is 403, as is a ``?team=`` other than its own. An admin sees and
  changes every search; to submit, an admin names the team with ``?team=``.
- Errors map from ``ServiceError.status``; spec mistakes (``SpecError``, ``SpecFileError``)
  are 422 with the located message (``file:line: field: message``) as ``detail``. Every error
  body, FastAPI's own validation errors included, is ``ErrorBody``: ``{"detail": "<text>"}``.
- Request bodies over ``max_body_bytes`` are 413, whether announced by Content-Length or only
  found while reading a chunked body (``_BodyLimit``, a pure ASGI middleware that buffers at
  most the limit before the app sees a byte).
- One audit line per request (``_Audit``): method, path, status, caller or ``anonymous``,
  client address and, for 401/403, the reason. Tokens are never logged.
- An unexpected exception is logged with its traceback and answered 500 with a generic
  detail; the head is another thread and keeps running.
"""

from __future__ import annotations

import ipaddress
import logging
import math
import time
from collections.abc import Awaitable, Callable, Collection, MutableMapping
from typing import Any, Literal, Protocol

from fastapi import Depends, FastAPI, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from fastapi.security import HTTPBearer
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.service.errors import ServiceError
from rungway.scheduler.service.models import (
    Caller,
    ErrorBody,
    SearchDetail,
    SearchInfo,
    SubmitRequest,
    UsageReport,
)

__all__ = ["make_app", "API_PREFIX", "Period"]

API_PREFIX = "/v1"
Period = Literal["day", "week", "month", "all"]

_log = logging.getLogger(__name__)
_AUDIT_LOGGER = "rungway.scheduler.service.audit"
# Per-request notes the routes leave for the audit line; a dict of our own in the ASGI scope
# (shared even if a layer shallow-copies the scope).
_SCOPE_KEY = "rungway.audit"
_MAX_TRACKED_HOSTS = 10_000

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]


class Head(Protocol):
    """What the API needs of the head (``lab.LabHead`` has it)."""

    def submit(self, team: str, spec_text: str, priority: int = 0) -> SearchInfo: ...
    def searches(self, team: str | None) -> list[SearchInfo]: ...
    def search(self, name: str) -> SearchDetail: ...
    def owner(self, name: str) -> str: ...
    def pause(self, name: str) -> SearchInfo: ...
    def resume(self, name: str) -> SearchInfo: ...
    def cancel(self, name: str) -> SearchInfo: ...
    def usage(self, team: str | None, period: str, since: float | None, until: float | None) -> UsageReport: ...


class Identifies(Protocol):
    def identify(self, token: str | None) -> Caller | None: ...


class _Refused(Exception):
    """A 401/403/404/422 decided here (not by the head); ``detail`` is also the audit reason."""

    def __init__(self, status: int, detail: str) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail


def _error(status: int, detail: str, headers: dict[str, str] | None = None) -> JSONResponse:
    return JSONResponse({"detail": detail}, status_code=status, headers=headers)


def _notes(request: Request) -> dict[str, Any]:
    return request.scope.setdefault(_SCOPE_KEY, {})


def _responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    # Declared so the OpenAPI document lists every status a route can answer, each with the
    # one error schema (schemathesis checks responses against it).
    words = {
        400: "a malformed request (the detail says how)",
        401: "no valid bearer token",
        403: "the caller may not touch this",
        404: "no such search or team",
        409: "name taken, or the action does not apply in the search's state",
        413: "request body over the head's limit",
        422: "invalid request or spec",
        429: "too many unknown tokens from this address; see Retry-After",
        500: "unexpected error in the head (logged there)",
        503: "the head is shutting down",
    }
    return {s: {"model": ErrorBody, "description": words[s]} for s in (400, 401, 413, 422, 429, 500, *statuses)}


# ---- middleware -----------------------------------------------------------------------------


class _Middleware:
    """A pure ASGI middleware for HTTP requests; anything else (lifespan) passes through."""

    app: ASGIApp

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        await self.http(scope, receive, send, scope.setdefault(_SCOPE_KEY, {}))

    async def http(self, scope: Scope, receive: Receive, send: Send, notes: dict[str, Any]) -> None:
        raise NotImplementedError


class _BodyLimit(_Middleware):
    """413 for a body over ``limit`` bytes, before the app reads any of it.

    A Content-Length over the limit is refused at once. Otherwise (chunked, or a lying
    length) the body is read here, at most ``limit`` bytes plus one message, and replayed to
    the app; bodies are small (kilobytes), so buffering costs nothing worth streaming for."""

    def __init__(self, app: ASGIApp, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def http(self, scope: Scope, receive: Receive, send: Send, notes: dict[str, Any]) -> None:
        for key, value in scope.get("headers", []):
            if key == b"content-length":
                try:
                    announced = int(value)
                except ValueError:
                    await _error(400, "invalid Content-Length header")(scope, receive, send)
                    return
                if announced > self.limit:
                    await self._refuse(scope, receive, send)
                    return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":
                # The client went away mid-body: let the app see the disconnect.
                replay = [message]
                break
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.limit:
                await self._refuse(scope, receive, send)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                replay = [{"type": "http.request", "body": b"".join(chunks), "more_body": False}]
                break

        async def replayed() -> Message:
            return replay.pop(0) if replay else await receive()

        await self.app(scope, replayed, send)

    async def _refuse(self, scope: Scope, receive: Receive, send: Send) -> None:
        await _error(413, f"request body over the head's limit of {self.limit} bytes")(scope, receive, send)


def _client_group(host: str) -> str:
    """The unit the unknown-token limit counts by: every loopback address is one machine (a
    local user could rotate through 127.0.0.0/8), an IPv6 client its /64 (one site's block)."""
    try:
        address = ipaddress.ip_address(host)
    except ValueError:
        return host
    if address.is_loopback:
        return "loopback"
    if address.version == 6:
        if address.ipv4_mapped is not None:
            return _client_group(str(address.ipv4_mapped))
        return str(ipaddress.ip_network(f"{address}/64", strict=False))
    return host


class _FailedTokens:
    """Unknown tokens per client host in a sliding window. Checking an unknown token costs one
    PBKDF2 per configured hash (auth.py), so a host past ``limit`` in ``window`` seconds is
    answered 429 without checking more. Called from the event loop only: no lock."""

    def __init__(self, limit: int, window: float, clock: Callable[[], float]) -> None:
        self.limit = limit
        self.window = window
        self.clock = clock
        self._seen: dict[str, list[float]] = {}

    def _recent(self, host: str, now: float) -> list[float]:
        times = [t for t in self._seen.get(host, ()) if now - t < self.window]
        if times:
            self._seen[host] = times
        else:
            self._seen.pop(host, None)
        return times

    def retry_after(self, host: str) -> float | None:
        """Seconds until ``host`` may try another token, or None if it may now."""
        now = self.clock()
        times = self._recent(host, now)
        if len(times) < self.limit:
            return None
        return max(0.0, times[-self.limit] + self.window - now)

    def failed(self, host: str) -> None:
        now = self.clock()
        if len(self._seen) > _MAX_TRACKED_HOSTS:  # bound the memory: forget hosts gone quiet
            for other in list(self._seen):
                self._recent(other, now)
        self._seen.setdefault(host, []).append(now)


class _Authenticate(_Middleware):
    """401 unless the request carries ``Authorization: Bearer <token>`` of a known caller; the
    caller goes into the scope's notes for the routes and the audit line."""

    def __init__(self, app: ASGIApp, authenticator: Identifies, failures: _FailedTokens) -> None:
        self.app = app
        self.authenticator = authenticator
        self.failures = failures

    async def http(self, scope: Scope, receive: Receive, send: Send, notes: dict[str, Any]) -> None:
        header = next((v for k, v in scope.get("headers", []) if k == b"authorization"), None)
        caller = None
        if header is None:
            reason = "no Authorization header; send 'Authorization: Bearer <token>'"
        else:
            scheme, _, token = header.decode("latin-1").partition(" ")
            token = token.strip()
            if scheme.lower() != "bearer" or not token:
                reason = "the Authorization header is not 'Bearer <token>'"
            else:
                host = _client_group(scope["client"][0]) if scope.get("client") else "-"
                wait = self.failures.retry_after(host)
                known = getattr(self.authenticator, "known", None)
                if wait is not None and known is not None and (caller := known(token)) is not None:
                    wait = None  # verified before: another holder's failures do not lock it out
                if wait is not None:
                    notes["reason"] = "too many unknown tokens from this address"
                    detail = f"too many unknown tokens from this address; try again in {math.ceil(wait)} s"
                    await _error(429, detail, {"Retry-After": str(math.ceil(wait))})(scope, receive, send)
                    return
                if caller is None:  # PBKDF2 is slow on purpose: off the event loop.
                    caller = await run_in_threadpool(self.authenticator.identify, token)
                reason = "unknown token"
                if caller is None:
                    self.failures.failed(host)
        if caller is None:
            notes["reason"] = reason
            await _error(401, reason, {"WWW-Authenticate": "Bearer"})(scope, receive, send)
            return
        notes["caller"] = caller
        await self.app(scope, receive, send)


class _Audit(_Middleware):
    """One log line per request; turns an exception that escaped the app into a 500."""

    def __init__(self, app: ASGIApp, logger: logging.Logger) -> None:
        self.app = app
        self.logger = logger

    async def http(self, scope: Scope, receive: Receive, send: Send, notes: dict[str, Any]) -> None:
        sent: dict[str, int] = {}

        async def watched(message: Message) -> None:
            if message["type"] == "http.response.start":
                sent["status"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, watched)
        except Exception:
            _log.exception("unexpected error answering %s %s", scope.get("method"), scope.get("path"))
            if "status" not in sent:
                await _error(500, "internal error in the head; its log has the details")(scope, receive, watched)
        self._line(scope, notes, sent.get("status", 0))

    def _line(self, scope: Scope, notes: dict[str, Any], status: int) -> None:
        caller: Caller | None = notes.get("caller")
        who = "anonymous" if caller is None else caller.name + (" (admin)" if caller.admin else f" ({caller.team})")
        client = scope.get("client")
        where = f"{client[0]}:{client[1]}" if client else "-"
        line = f"{scope.get('method')} {scope.get('path')} {status} {who} from {where}"
        if status in (401, 403, 429) and notes.get("reason"):
            line += f": {notes['reason']}"
        self.logger.info(line)


# ---- the app --------------------------------------------------------------------------------


def make_app(
    head: Head,
    authenticator: Identifies,
    *,
    max_body_bytes: int,
    audit: logging.Logger | None = None,
    teams: Collection[str] | None = None,
    failed_tokens_per_minute: int = 30,
    clock: Callable[[], float] = time.monotonic,
) -> FastAPI:
    """The API around ``head``. ``teams`` are the lab's team names (an admin's ``?team=`` must
    name one); without it they are read from the head's usage report, which lists every team.
    A client host that sends more than ``failed_tokens_per_minute`` unknown tokens in a
    minute is answered 429 until the minute has passed (``clock``: seconds, for tests)."""
    audit = audit or logging.getLogger(_AUDIT_LOGGER)
    app = FastAPI(
        title="rungway head",
        version="1",
        description="Submit, watch and steer searches on the lab's shared cluster.",
        docs_url=None,
        redoc_url=None,
        openapi_url=None,  # served below, behind the token like every other route
    )
    bearer = HTTPBearer(auto_error=False, description="a team's or an admin's token")

    def known_teams() -> set[str]:
        if teams is not None:
            return set(teams)
        return {row.team for row in head.usage(None, "all", None, None).teams}

    def caller_of(request: Request, _scheme: Any = Depends(bearer)) -> Caller:
        # `_Authenticate` has checked the token before the body was read; `bearer` is here
        # only to put the scheme in the OpenAPI document.
        caller = _notes(request).get("caller")
        if caller is None:  # not reached behind the middleware; refuse rather than assume
            raise _Refused(401, "no caller")
        return caller

    def scope_of(caller: Caller, team: str | None) -> str | None:
        """The team a listing is limited to: a team caller's own; an admin's choice (None: all)."""
        if caller.admin:
            if team is not None and team not in known_teams():
                raise _Refused(404, f"no team named {team!r} in this lab")
            return team
        if caller.team is None:
            raise _Refused(403, f"{caller.name} belongs to no team")
        if team is not None and team != caller.team:
            raise _Refused(403, f"{caller.name} may not see team {team!r}")
        return caller.team

    def may_touch(caller: Caller, name: str) -> None:
        owner = head.owner(name)  # UnknownSearch: 404
        if not caller.admin and owner != caller.team:
            raise _Refused(403, f"search {name!r} belongs to another team")

    # -- errors: one body shape for all of them

    @app.exception_handler(_Refused)
    async def refused(request: Request, exc: _Refused) -> JSONResponse:
        _notes(request)["reason"] = exc.detail
        headers = {"WWW-Authenticate": "Bearer"} if exc.status == 401 else None
        return _error(exc.status, exc.detail, headers)

    @app.exception_handler(ServiceError)
    async def service_error(request: Request, exc: ServiceError) -> JSONResponse:
        return _error(exc.status, str(exc))

    @app.exception_handler(SpecError)
    async def spec_error(request: Request, exc: SpecError) -> JSONResponse:
        return _error(422, str(exc))

    @app.exception_handler(RequestValidationError)
    async def invalid_request(request: Request, exc: RequestValidationError) -> JSONResponse:
        return _error(422, _validation_text(exc))

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        return _error(exc.status_code, str(exc.detail), getattr(exc, "headers", None))

    # -- routes

    authed = [Depends(caller_of)]
    v1 = API_PREFIX

    @app.get(f"{v1}/openapi.json", include_in_schema=False, dependencies=authed)
    def openapi_document() -> dict[str, Any]:
        return app.openapi()

    @app.get(f"{v1}/whoami", response_model=Caller, responses=_responses(), summary="who the token belongs to")
    def whoami(caller: Caller = Depends(caller_of)) -> Caller:
        return caller

    @app.get(f"{v1}/searches", response_model=list[SearchInfo], responses=_responses(403, 404),
             summary="the caller's team's searches (an admin: every team's, or one team's with ?team=)")
    def list_searches(team: str | None = Query(None, description="limit to this team"),
                      caller: Caller = Depends(caller_of)) -> list[SearchInfo]:
        return head.searches(scope_of(caller, team))

    @app.post(f"{v1}/searches", response_model=SearchInfo, status_code=201, responses=_responses(403, 404, 409, 503),
              summary="submit a search for the caller's team (an admin names the team with ?team=)")
    def submit(body: SubmitRequest, team: str | None = Query(None, description="the team to submit for; admins only need it"),
               caller: Caller = Depends(caller_of)) -> SearchInfo:
        owner = scope_of(caller, team)
        if owner is None:
            owner = caller.team  # an admin who is also on a team submits for it by default
        if owner is None:
            raise _Refused(422, "an admin submits for a team: name it (?team=NAME; rungway lab submit --team NAME)")
        return head.submit(owner, body.spec, body.priority)

    @app.get(f"{v1}/searches/{{name}}", response_model=SearchDetail, responses=_responses(403, 404),
             summary="one search: state, leaderboard, rungs")
    def show(name: str, caller: Caller = Depends(caller_of)) -> SearchDetail:
        may_touch(caller, name)
        return head.search(name)

    def action(verb: str, call: Callable[[str], SearchInfo]) -> None:
        def act(name: str, caller: Caller = Depends(caller_of)) -> SearchInfo:
            may_touch(caller, name)
            return call(name)

        act.__name__ = verb
        app.post(f"{v1}/searches/{{name}}/{verb}", response_model=SearchInfo, responses=_responses(403, 404, 409, 503),
                 summary=f"{verb} a search")(act)

    action("pause", head.pause)
    action("resume", head.resume)
    action("cancel", head.cancel)

    @app.get(f"{v1}/usage", response_model=UsageReport, responses=_responses(403, 404),
             summary="CPU-hours charged per team and search in a period (a team: its own row)")
    def usage(period: Period | None = Query(None, description="the current day, week or month, or all time "
                                            "(default: the lab's allowance period)"),
              since: float | None = Query(None, description="Unix time; overrides the period's start"),
              until: float | None = Query(None, description="Unix time; default now"),
              team: str | None = Query(None, description="limit to this team"),
              caller: Caller = Depends(caller_of)) -> UsageReport:
        for label, value in (("since", since), ("until", until)):
            if value is not None and not math.isfinite(value):
                raise _Refused(422, f"query.{label}: must be a finite Unix time")
        if since is not None and until is not None and since > until:
            raise _Refused(422, "query.since: must not be after until")
        limit = scope_of(caller, team)
        report = head.usage(limit, period, since, until)
        if limit is not None:  # a team sees its own rows, whatever the head returns
            report = report.model_copy(update={
                "teams": [row for row in report.teams if row.team == limit],
                "searches": [row for row in report.searches if row.team == limit],
            })
        return report

    # Outermost last: the audit line sees every answer; the token is checked before any of
    # the body is read, so an anonymous caller cannot make the head buffer anything.
    app.add_middleware(_BodyLimit, limit=max_body_bytes)
    app.add_middleware(_Authenticate, authenticator=authenticator,
                       failures=_FailedTokens(failed_tokens_per_minute, 60.0, clock))
    app.add_middleware(_Audit, logger=audit)
    return app


def _validation_text(exc: RequestValidationError) -> str:
    """FastAPI's error list as one line: ``body.priority: Input should be a valid integer``."""
    parts = []
    for error in exc.errors():
        where = ".".join(str(p) for p in error.get("loc", ()))
        if error.get("type") == "json_invalid":
            reason = (error.get("ctx") or {}).get("error", "")
            parts.append(f"body: not valid JSON ({reason} at character {error['loc'][-1]})")
        else:
            parts.append(f"{where}: {error.get('msg', 'invalid')}" if where else str(error.get("msg", "invalid")))
    return "; ".join(parts) or "invalid request"

