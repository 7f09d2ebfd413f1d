"""A client for the head's HTTP API, on the standard library only (``urllib.request``).

Theory of operation. One method per route (see ``api.py``); each sends one request with the
caller's bearer token and returns the decoded JSON. Any answer other than 2xx raises
:class:`LabClientError` with the status and the head's ``detail``; a head that cannot be
reached at all raises :class:`HeadUnreachable` (``status`` None).

Where the settings come from, first found wins:

- the head's URL: the ``url`` argument, ``$RUNGWAY_HEAD``, ``http://127.0.0.1:8470``;
- the token: the ``token`` argument, the ``token_file`` argument, ``$RUNGWAY_TOKEN``, the file
  named by ``$RUNGWAY_TOKEN_FILE``;
- a proxy to reach the head through: the ``proxy`` argument, ``$RUNGWAY_HEAD_PROXY``, else none.

The token goes to the head and nowhere else:

- The usual proxy variables (``http_proxy``, ``HTTPS_PROXY``, ``all_proxy``...) are ignored:
  they are set for the rest of the world, and an HTTP proxy sees every header of a plain
  ``http://`` request, the token included (the default head is 127.0.0.1). A head that can
  only be reached through a proxy takes it explicitly: ``proxy="http://host:port"`` or
  ``RUNGWAY_HEAD_PROXY=http://host:port``. That proxy sees the token of an ``http://`` head;
  an ``https://`` head is tunnelled through it (CONNECT), the token encrypted.
- Redirects are not followed: urllib would resend the Authorization header to wherever the
  redirect points. A 3xx answer raises :class:`LabClientError` with its status and Location.
"""

from __future__ import annotations

import http.client
import json
import os
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any

__all__ = ["LabClient", "LabClientError", "HeadUnreachable", "DEFAULT_HEAD", "resolve_token"]

DEFAULT_HEAD = "http://127.0.0.1:8470"
HEAD_ENV = "RUNGWAY_HEAD"
TOKEN_ENV = "RUNGWAY_TOKEN"
TOKEN_FILE_ENV = "RUNGWAY_TOKEN_FILE"
PROXY_ENV = "RUNGWAY_HEAD_PROXY"


class LabClientError(Exception):
    """The head refused (``status`` is its HTTP status) or there was no answer (None)."""

    def __init__(self, status: int | None, detail: str) -> None:
        super().__init__(f"{status}: {detail}" if status is not None else detail)
        self.status = status
        self.detail = detail


class HeadUnreachable(LabClientError):
    """No HTTP answer: nothing listening, a wrong address, a timeout."""

    def __init__(self, detail: str) -> None:
        super().__init__(None, detail)


class _NoRedirects(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, *args: Any, **kwargs: Any) -> None:
        return None  # urllib then raises HTTPError for the 3xx, which _call reports


def _opener(proxy: str | None) -> urllib.request.OpenerDirector:
    """No redirects; no proxy but ``proxy`` (an empty ProxyHandler also stops urllib from
    reading the proxy variables of the environment)."""
    proxies = {"http": proxy, "https": proxy} if proxy else {}
    return urllib.request.build_opener(urllib.request.ProxyHandler(proxies), _NoRedirects)


def _check_proxy(proxy: str, source: str) -> str:
    proxy = proxy.strip()
    parts = urllib.parse.urlsplit(proxy if "://" in proxy else "http://" + proxy)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        shown = proxy if "@" not in proxy else proxy.split("://")[0] + "://<credentials hidden>@..."
        raise LabClientError(None, f"{source} must be an HTTP proxy's address, http://host:port "
                                   f"(got {shown!r}); leave it unset to reach the head directly")
    return proxy


def resolve_token(token: str | None = None, token_file: str | os.PathLike[str] | None = None) -> str:
    """The token to send: the argument, the file, ``$RUNGWAY_TOKEN``, ``$RUNGWAY_TOKEN_FILE``."""
    if token:
        return token.strip()
    if token_file is not None:
        return _read_token(token_file)
    if os.environ.get(TOKEN_ENV, "").strip():
        return os.environ[TOKEN_ENV].strip()
    if os.environ.get(TOKEN_FILE_ENV):
        return _read_token(os.environ[TOKEN_FILE_ENV])
    raise LabClientError(None, f"no token: pass --token-file PATH, or set ${TOKEN_ENV} or ${TOKEN_FILE_ENV} "
                               "(an admin makes one with `rungway lab token`)")


def _read_token(path: str | os.PathLike[str]) -> str:
    try:
        text = Path(path).read_text().strip()
    except OSError as exc:
        raise LabClientError(None, f"cannot read the token file {os.fspath(path)}: {exc.strerror}") from None
    if not text:
        raise LabClientError(None, f"the token file {os.fspath(path)} is empty")
    return text


class LabClient:
    """The head's API as Python calls. Every method returns the decoded JSON answer."""

    def __init__(self, url: str | None = None, token: str | None = None, timeout: float = 30, *,
                 token_file: str | os.PathLike[str] | None = None, proxy: str | None = None) -> None:
        """``proxy``: reach the head through this HTTP proxy (``http://host:port``); default
        ``$RUNGWAY_HEAD_PROXY``, else no proxy at all, whatever ``http_proxy`` and the like say."""
        self.url = (url or os.environ.get(HEAD_ENV) or DEFAULT_HEAD).rstrip("/")
        if urllib.parse.urlsplit(self.url).scheme not in ("http", "https"):
            raise LabClientError(None, f"the head's URL must start with http:// or https:// (got {self.url!r})")
        if proxy:
            self.proxy: str | None = _check_proxy(proxy, "the proxy argument")
        elif os.environ.get(PROXY_ENV, "").strip():
            self.proxy = _check_proxy(os.environ[PROXY_ENV], f"${PROXY_ENV}")
        else:
            self.proxy = None
        self._token = resolve_token(token, token_file)
        self.timeout = timeout
        self._opener = _opener(self.proxy)

    def __repr__(self) -> str:  # never the token
        return f"LabClient({self.url!r})"

    # -- the routes

    def submit(self, spec: str | Path, priority: int = 0, team: str | None = None) -> dict[str, Any]:
        """Submit a search; ``spec`` is the spec's text, or a Path to the spec file."""
        text = spec.read_text() if isinstance(spec, Path) else spec
        return self._call("POST", "/v1/searches", {"team": team}, {"spec": text, "priority": priority})

    def searches(self, team: str | None = None) -> list[dict[str, Any]]:
        return self._call("GET", "/v1/searches", {"team": team})

    def search(self, name: str) -> dict[str, Any]:
        return self._call("GET", f"/v1/searches/{_quote(name)}")

    def pause(self, name: str) -> dict[str, Any]:
        return self._call("POST", f"/v1/searches/{_quote(name)}/pause")

    def resume(self, name: str) -> dict[str, Any]:
        return self._call("POST", f"/v1/searches/{_quote(name)}/resume")

    def cancel(self, name: str) -> dict[str, Any]:
        return self._call("POST", f"/v1/searches/{_quote(name)}/cancel")

    def usage(self, period: str | None = None, *, since: float | None = None, until: float | None = None,
              team: str | None = None) -> dict[str, Any]:
        return self._call("GET", "/v1/usage", {"period": period, "since": since, "until": until, "team": team})

    def whoami(self) -> dict[str, Any]:
        return self._call("GET", "/v1/whoami")

    # -- the wire

    def _call(self, method: str, path: str, query: dict[str, Any] | None = None, body: Any = None) -> Any:
        params = {k: v for k, v in (query or {}).items() if v is not None}
        url = self.url + path + ("?" + urllib.parse.urlencode(params) if params else "")
        data = None if body is None else json.dumps(body).encode()
        request = urllib.request.Request(url, data=data, method=method)
        request.add_header("Authorization", f"Bearer {self._token}")
        request.add_header("Accept", "application/json")
        if data is not None:
            request.add_header("Content-Type", "application/json")
        try:
            with self._opener.open(request, timeout=self.timeout) as response:
                return json.loads(response.read() or b"null")
        except urllib.error.HTTPError as exc:
            with exc:
                if 300 <= exc.code < 400:
                    raise LabClientError(exc.code, self._redirected(exc)) from None
                raise LabClientError(exc.code, _detail(exc.read(), exc.reason)) from None
        except (urllib.error.URLError, OSError, http.client.HTTPException) as exc:
            reason = getattr(exc, "reason", exc)
            raise HeadUnreachable(f"cannot reach the head at {self.url}: {reason}") from None
        except json.JSONDecodeError:
            raise LabClientError(None, f"the head at {self.url} answered something that is not JSON") from None

    def _redirected(self, exc: urllib.error.HTTPError) -> str:
        location = exc.headers.get("Location") if exc.headers is not None else None
        where = f"to {location}" if location else "with no Location"
        return (f"the head at {self.url} answered {exc.code} {exc.reason}, a redirect {where}; it was not "
                "followed, so the token was not re-sent there. Point --head (or $RUNGWAY_HEAD) at the URL "
                "the head itself serves on")


def _quote(name: str) -> str:
    return urllib.parse.quote(name, safe="")


def _detail(raw: bytes, reason: Any) -> str:
    try:
        body = json.loads(raw)
    except ValueError:
        body = None
    if isinstance(body, dict) and isinstance(body.get("detail"), str):
        return body["detail"]
    text = raw.decode("utf-8", "replace").strip()
    return text[:500] if text else str(reason)
