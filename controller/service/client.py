"""A small httpx client for the daemon's API (used by the CLI verbs and the tests)."""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import httpx
from httpx_sse import SSEError, connect_sse

DEFAULT_URL = "http://127.0.0.1:8765"


def default_url() -> str:
    """The daemon's address: $PYCNOCTL_URL when set, else the local default."""
    return os.environ.get("PYCNOCTL_URL") or DEFAULT_URL


class DaemonError(Exception):
    """The daemon refused a request (status and its message) or could not be reached (status 0)."""

    def __init__(self, status: int, message: str, body: dict[str, Any] | None = None) -> None:
        super().__init__(message)
        self.status = status
        self.body = body or {}


@dataclass
class StreamEvent:
    kind: str
    data: Any
    id: str | None = None


class DaemonClient:
    """Talks to one daemon (at $PYCNOCTL_URL unless told); the token comes from the argument or $PYCNOCTL_TOKEN."""

    def __init__(self, url: str | None = None, token: str | None = None, timeout: float = 10.0,
                 transport: httpx.BaseTransport | None = None) -> None:
        token = token if token is not None else os.environ.get("PYCNOCTL_TOKEN") or None
        headers = {"authorization": f"Bearer {token}"} if token else {}
        self.url = (url or default_url()).rstrip("/")
        kw: dict[str, Any] = {"base_url": self.url, "headers": headers, "timeout": timeout}
        if transport is not None:
            kw["transport"] = transport
        self.http = httpx.Client(**kw)

    def close(self) -> None:
        self.http.close()

    def __enter__(self) -> DaemonClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _call(self, method: str, path: str, **kw: Any) -> Any:
        try:
            r = self.http.request(method, path, **kw)
        except httpx.HTTPError as exc:
            raise DaemonError(0, f"cannot reach the daemon at {self.url}: {exc}") from None
        try:
            body = r.json()
        except ValueError:
            body = {"error": r.text[:200]}
        if r.status_code >= 400:
            msg = body.get("error", r.reason_phrase) if isinstance(body, dict) else r.reason_phrase
            raise DaemonError(r.status_code, str(msg), body if isinstance(body, dict) else None)
        return body

    # ----- API
    def status(self) -> dict[str, Any]:
        return self._call("GET", "/api/status")

    def submit(self, **request: Any) -> dict[str, Any]:
        return self._call("POST", "/api/runs", json={k: v for k, v in request.items() if v is not None})

    def runs(self, **filters: Any) -> list[dict[str, Any]]:
        return self._call("GET", "/api/runs", params={k: v for k, v in filters.items() if v is not None})["runs"]

    def run(self, run_id: str) -> dict[str, Any]:
        return self._call("GET", f"/api/runs/{run_id}")

    def queue(self) -> dict[str, Any]:
        return self._call("GET", "/api/queue")

    def remove(self, run_id: str) -> dict[str, Any]:
        return self._call("DELETE", f"/api/queue/{run_id}")

    def resume(self) -> dict[str, Any]:
        return self._call("POST", "/api/queue/resume")

    def pause(self) -> dict[str, Any]:
        return self._call("POST", "/api/queue/pause")

    def abort(self) -> dict[str, Any]:
        return self._call("POST", "/api/abort")

    def reset(self) -> dict[str, Any]:
        return self._call("POST", "/api/reset")

    def events(self, timeout: float | None = None) -> Iterator[StreamEvent]:
        """Server-sent events as they come (blocks; stop iterating to disconnect)."""
        try:
            with connect_sse(self.http, "GET", "/api/events", timeout=httpx.Timeout(10.0, read=timeout)) as es:
                r = es.response
                if r.status_code >= 400:
                    r.read()
                    raise DaemonError(r.status_code, r.text[:200])
                for sse in es.iter_sse():
                    try:
                        payload: Any = json.loads(sse.data)
                    except ValueError:
                        payload = sse.data
                    yield StreamEvent(sse.event, payload, sse.id or None)
        except (httpx.HTTPError, SSEError) as exc:
            raise DaemonError(0, f"event stream from {self.url} ended: {exc}") from None
