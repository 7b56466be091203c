"""Request screening for the daemon's HTTP side, before any route sees a request.

Why each check (safety.md, "Daemon API"):
* Host must name this daemon (localhost, 127.0.0.1, ::1 or the bind host) on its port, in exactly one
  Host header: a web page on another site cannot reach the loopback daemon through a rebinding DNS
  name -> 403 (two Host headers -> 400: the server and a proxy could read different ones).
* Origin, when a browser sends one, must be this daemon's own origin: no other site's page may
  drive the valves -> 403.
* A token, when configured (always on a non-loopback bind), is required on every request as
  ``Authorization: Bearer`` or the HttpOnly SameSite=Strict cookie that the /login form POST sets
  (never in a URL, where histories and logs keep it); compared in constant time -> 401.
* Bodies are capped -> 413; a body must be JSON -> 415 (the /login form alone is form-encoded); a JSON
  body that gives one key twice -> 422 (a parser keeps the last silently: '"sample_id"' twice ran the
  run under the second, which the sender may not have meant), shaped as the routes' refusals
  (``problems``, ``field``); text that is not JSON is left to the route's 400.
"""

from __future__ import annotations

import hmac
import ipaddress
import json
import os
import urllib.parse
from collections import deque
from collections.abc import Awaitable, Callable, MutableMapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from starlette.middleware.trustedhost import TrustedHostMiddleware

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

COOKIE = "pycnoctl_token"
MAX_BODY = 64 * 1024
LOOPBACK_NAMES = ("localhost", "127.0.0.1", "::1")


class TokenError(Exception):
    """No usable token for a bind that needs one."""


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def load_token(token_file: str | Path | None, env: MutableMapping[str, str] | None = None) -> str | None:
    """The API token from --token-file, else $PYCNOCTL_TOKEN; None when neither is set.

    A token file readable by group or others is refused: the token is a key to the valves.
    """
    env = os.environ if env is None else env
    if token_file:
        p = Path(token_file)
        try:
            st = p.stat()
            text = p.read_text(encoding="utf-8").strip()
        except OSError as exc:
            raise TokenError(f"token file {p}: {exc.strerror or exc}") from None
        if st.st_mode & 0o077:
            raise TokenError(f"token file {p} is readable by others (mode {st.st_mode & 0o777:o}); chmod 600 it")
        token = text
    else:
        token = env.get("PYCNOCTL_TOKEN", "").strip()
        if not token:
            return None
    if len(token) < 16:
        raise TokenError("the API token must be at least 16 characters")
    return token


@dataclass
class Policy:
    """What the screen admits: host names, the bound port, the token, the body cap."""

    bind_host: str = "127.0.0.1"
    port: int | None = None
    token: str | None = None
    max_body: int = MAX_BODY
    extra_hosts: tuple[str, ...] = ()
    open_paths: tuple[str, ...] = field(default=("/login",))

    def __post_init__(self) -> None:
        if not is_loopback(self.bind_host) and not self.token:
            raise TokenError(f"binding {self.bind_host} (not loopback) needs a token: --token-file or PYCNOCTL_TOKEN")

    @property
    def hosts(self) -> set[str]:
        names = {*LOOPBACK_NAMES, *self.extra_hosts}
        if self.bind_host not in ("0.0.0.0", "::"):
            names.add(self.bind_host.strip("[]").lower())
        return {n.lower() for n in names}


def split_host(value: str) -> tuple[str, int | None] | None:
    """'name:port' / '[v6]:port' / 'name' -> (name, port); None when malformed."""
    value = value.strip()
    if not value or any(c in value for c in "/@?# \t"):
        return None
    if value.startswith("["):
        end = value.find("]")
        if end < 0:
            return None
        name, rest = value[1:end], value[end + 1:]
        if rest and not rest.startswith(":"):
            return None
        port_text = rest[1:] if rest else ""
    else:
        name, _, port_text = value.partition(":")
        if ":" in port_text:
            return None
    if port_text:
        if not port_text.isdigit() or not 0 < int(port_text) < 65536:
            return None
        return name.lower(), int(port_text)
    return name.lower(), None


class SecurityMiddleware:
    """Pure ASGI middleware applying ``Policy`` to every HTTP request."""

    def __init__(self, app: ASGIApp, policy: Policy) -> None:
        self.app = app
        self.policy = policy
        # starlette's host matching decides whether a name is ours; this screen adds the port, the
        # one-header rule and a 403 in the same JSON shape as every other refusal
        names = [f"[{h}]" if ":" in h else h for h in policy.hosts]
        self._trusted = TrustedHostMiddleware(_admit, allowed_hosts=names, www_redirect=False)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        raw = scope.get("headers", [])
        if sum(1 for k, _ in raw if k.lower() == b"host") > 1:
            await _reply(send, 400, "bad request: more than one Host header")
            return
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in raw}
        pol = self.policy
        if not await self._host_ok(scope, headers.get("host", "")):
            await _reply(send, 403, "forbidden: the Host header does not name this daemon")
            return
        origin = headers.get("origin")
        if origin is not None and not self._origin_ok(origin):
            await _reply(send, 403, "forbidden: requests from another origin are refused")
            return
        if pol.token and scope["path"] not in pol.open_paths and not self._token_ok(headers):
            await _reply(send, 401, "unauthorized: send 'Authorization: Bearer <token>' or log in at /login",
                         extra=[(b"www-authenticate", b'Bearer realm="pycnoctl"')])
            return
        method = scope.get("method", "GET")
        length = headers.get("content-length")
        if length is not None:
            if not length.isdigit():
                await _reply(send, 400, "bad Content-Length")
                return
            if int(length) > pol.max_body:
                await _reply(send, 413, f"request body over {pol.max_body} bytes")
                return
        if method in ("POST", "PUT", "PATCH", "DELETE") and (int(length or 0) > 0 or "transfer-encoding" in headers):
            ctype = headers.get("content-type", "").split(";")[0].strip().lower()
            form_ok = scope["path"] == "/login" and ctype == "application/x-www-form-urlencoded"
            if ctype != "application/json" and not form_ok:
                await _reply(send, 415, "request bodies must be application/json")
                return
        # read the body ourselves so a chunked body cannot slip past the cap
        body, more = b"", True
        if method in ("POST", "PUT", "PATCH", "DELETE"):
            while more:
                msg = await receive()
                if msg["type"] == "http.disconnect":
                    return
                body += msg.get("body", b"")
                more = msg.get("more_body", False)
                if len(body) > pol.max_body:
                    await _reply(send, 413, f"request body over {pol.max_body} bytes")
                    return
            if body and headers.get("content-type", "").split(";")[0].strip().lower() == "application/json":
                twice = duplicate_key(body)
                if twice is not None:  # a JSON parser takes the last silently: which one the sender meant is unknown
                    where = ".".join(str(p) for p in ("body", *twice))
                    # shaped as the routes' refusals: the problem at its path, the body's field in `field`
                    fields: dict[str, Any] = {"problems": [f"{where}: given more than once"]}
                    if isinstance(twice[0], str):
                        fields["field"] = twice[0]
                    await _reply(send, 422, f"the request body gives {twice[-1]!r} more than once", fields=fields)
                    return
            sent = False

            async def replay() -> Message:
                nonlocal sent
                if not sent:
                    sent = True
                    return {"type": "http.request", "body": body, "more_body": False}
                return await receive()

            await self.app(scope, replay, send)
            return
        await self.app(scope, receive, send)

    async def _host_ok(self, scope: Scope, value: str) -> bool:
        host = split_host(value)
        if host is None or (self.policy.port and host[1] not in (None, self.policy.port)):
            return False
        admitted: list[bool] = []
        await self._trusted({**scope, "pycnoctl.admitted": admitted}, _no_body, _discard)
        return bool(admitted)

    def _origin_ok(self, origin: str) -> bool:
        u = urllib.parse.urlsplit(origin)
        if u.scheme not in ("http", "https") or not u.hostname:
            return False
        try:
            port = u.port or (443 if u.scheme == "https" else 80)
        except ValueError:
            return False
        return u.hostname.lower() in self.policy.hosts and (self.policy.port is None or port == self.policy.port)

    def _token_ok(self, headers: dict[str, str]) -> bool:
        token = self.policy.token
        assert token is not None
        want = token.encode("utf-8")
        auth = headers.get("authorization", "")
        if auth[:7].lower() == "bearer ":
            return hmac.compare_digest(auth[7:].strip().encode("utf-8"), want)
        for part in headers.get("cookie", "").split(";"):
            name, _, value = part.strip().partition("=")
            if name == COOKIE:
                return hmac.compare_digest(urllib.parse.unquote(value).encode("utf-8"), want)
        return False


def token_matches(policy: Policy, candidate: str) -> bool:
    """Constant-time check of a token offered to /login."""
    if not policy.token:
        return True
    return hmac.compare_digest(candidate.encode("utf-8"), policy.token.encode("utf-8"))


async def _admit(scope: Scope, receive: Receive, send: Send) -> None:
    scope["pycnoctl.admitted"].append(True)


async def _no_body() -> Message:
    return {"type": "http.request", "body": b"", "more_body": False}


async def _discard(message: Message) -> None:
    return None


class _Object(dict[str, Any]):
    """A parsed JSON object that remembers the first key it was given twice (a dict keeps the last)."""

    twice: str | None = None


def _object(items: list[tuple[str, Any]]) -> _Object:
    out = _Object()
    for key, value in items:
        if key in out and out.twice is None:
            out.twice = key
        out[key] = value
    return out


def duplicate_key(body: bytes) -> tuple[str | int, ...] | None:
    """Where this JSON first gives one key twice (the path to it: keys and list indices, the key last),
    or None; also None for text that is not JSON at all, which the route refuses as such (400): a
    duplicate is only worth naming in an otherwise valid body."""
    try:
        doc = json.loads(body, object_pairs_hook=_object)
    except (ValueError, RecursionError):
        return None
    todo: deque[tuple[tuple[str | int, ...], Any]] = deque([((), doc)])
    while todo:  # breadth first (the shallowest is named), without recursion (a body may nest deep)
        path, node = todo.popleft()
        if isinstance(node, _Object):
            if node.twice is not None:
                return (*path, node.twice)
            todo.extend(((*path, k), v) for k, v in node.items())
        elif isinstance(node, list):
            todo.extend(((*path, i), v) for i, v in enumerate(node))
    return None


async def _reply(send: Send, status: int, message: str, extra: list[tuple[bytes, bytes]] | None = None,
                 fields: dict[str, Any] | None = None) -> None:
    body = json.dumps({"error": message, "status": status, **(fields or {})}).encode("utf-8")
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
               *(extra or [])]
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})
