"""The daemon's local HTTP API and dashboard (Starlette ASGI app).

Every handler only asks the Daemon: the control thread owns the drivers, so no request can
block a tick.  Catalog look-ups run in the thread pool (sync handlers); status and the event
stream read the lock-protected snapshot and the event bus.  Runs are named only by IDs the
daemon issued (``catalog.is_run_id`` and a catalog row), never by a path.
"""

from __future__ import annotations

import asyncio
import contextlib
import html
import importlib
import importlib.resources
import json
import math
import socket
import threading
import time
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import FileResponse, HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from pycnoctl.controller.record.catalog import STATUSES, CatalogError, RunRow, is_run_id
from pycnoctl.controller.service.daemon import Daemon, SubmitError
from pycnoctl.controller.service.security import COOKIE, Policy, SecurityMiddleware, token_matches

STREAM_POLL = 0.1  # s between event-bus polls of one stream client


def _error(status: int, message: str, **extra: Any) -> JSONResponse:
    return JSONResponse({"error": message, "status": status, **extra}, status_code=status)


def _run_json(row: RunRow) -> dict[str, Any]:
    def f(x: float | None, scale: float = 1.0) -> float | None:
        return None if x is None or not math.isfinite(x) else x * scale

    return {"run_id": row.id, "created": row.created, "status": row.status, "sample_id": row.sample_id,
            "sequence": row.sequence_name, "kind": row.kind, "started": row.started, "ended": row.ended,
            "volume_cm3": f(row.volume_m3, 1e6), "volume_u_cm3": f(row.u_volume_m3, 1e6),
            "density_g_cm3": f(row.density, 1e-3), "mass_g": f(row.mass, 1e3), "message": row.message}


class Api:
    """Handlers bound to one Daemon."""

    def __init__(self, daemon: Daemon, policy: Policy) -> None:
        self.d = daemon
        self.policy = policy
        self.runs_root = (daemon.data / "runs").resolve()

    # ------------------------------------------------------------------ helpers
    def _row(self, run_id: str) -> RunRow | Response:
        if not is_run_id(run_id):
            return _error(400, f"{run_id[:40]!r} is not a run ID this daemon issues (e.g. R20250314T101500Z-1a2b3c)")
        row = self.d.catalog.get_run(run_id)
        if row is None:
            return _error(404, f"no run {run_id}")
        return row

    def _folder(self, row: RunRow) -> Path | None:
        folder = (self.runs_root / (row.folder or row.id)).resolve()
        if folder.parent != self.runs_root or not folder.is_dir():
            return None
        return folder

    # ------------------------------------------------------------------ status and events
    async def status(self, request: Request) -> Response:
        return JSONResponse(self.d.snapshot())

    async def trace(self, request: Request) -> Response:
        try:
            seconds = float(request.query_params.get("seconds", "600"))
        except ValueError:
            return _error(400, "seconds must be a number")
        pts = self.d.recent_trace(seconds if math.isfinite(seconds) and seconds > 0 else None)
        return JSONResponse({"t": [p[0] for p in pts], "gauge_pa": [p[1] for p in pts]})

    async def events(self, request: Request) -> Response:
        from sse_starlette.sse import EventSourceResponse

        bus = self.d.bus
        try:
            seq = int(request.headers.get("last-event-id", "")) if request.headers.get("last-event-id") else None
        except ValueError:
            seq = None

        async def stream() -> AsyncIterator[dict[str, Any]]:
            nonlocal seq
            if seq is None:
                seq = bus.last_seq
                yield {"event": "status", "id": str(seq), "data": json.dumps(self.d.snapshot())}
            while True:
                items, lost = bus.since_text(seq)  # each event serialised once, shared by every stream
                if lost:
                    yield {"event": "lost", "data": json.dumps({"message": "some events were missed"})}
                for s, kind, text in items:
                    seq = s
                    yield {"event": kind, "id": str(s), "data": text}
                if await request.is_disconnected():
                    return
                await asyncio.sleep(STREAM_POLL)

        return EventSourceResponse(stream(), ping=10, send_timeout=5)

    # ------------------------------------------------------------------ runs
    async def submit(self, request: Request) -> Response:
        try:
            body = json.loads(await request.body() or b"{}")
        except (ValueError, UnicodeDecodeError):
            return _error(400, "the body is not valid JSON")
        if not isinstance(body, dict):
            return _error(400, "the body must be a JSON object")
        allowed = {"sequence", "sequence_text", "sample_id", "mass", "u_mass", "bulk_volume", "operator",
                   "expansion_volume", "note"}
        unknown = sorted(set(body) - allowed)
        if unknown:
            return _error(400, f"unknown field(s): {', '.join(unknown)}")
        for key in ("sequence", "sequence_text", "sample_id", "operator", "expansion_volume", "note"):
            if body.get(key) is not None and not isinstance(body[key], str):
                return _error(400, f"{key} must be text")
        for key in ("sample_id", "operator", "note"):
            if len(body.get(key) or "") > 200:
                return _error(400, f"{key} is longer than 200 characters")
        from pycnoctl.controller.domain.units import UnitError, parse_mass, parse_volume

        try:
            mass = parse_mass(body["mass"]) if body.get("mass") not in (None, "") else None
            u_mass = parse_mass(body["u_mass"]) if body.get("u_mass") not in (None, "") else 1e-7
            bulk = parse_volume(body["bulk_volume"]) if body.get("bulk_volume") not in (None, "") else None
        except (UnitError, ValueError, TypeError) as exc:
            return _error(400, f"mass/u_mass/bulk_volume: {exc}")
        kwargs = {"sequence": body.get("sequence") or None, "sequence_text": body.get("sequence_text"),
                  "sample_id": (body.get("sample_id") or "").strip(), "mass": mass, "u_mass": u_mass,
                  "bulk_volume": bulk, "operator": (body.get("operator") or "").strip(),
                  "expansion_volume": body.get("expansion_volume") or None, "note": body.get("note") or ""}
        loop = asyncio.get_running_loop()
        try:
            out = await loop.run_in_executor(None, lambda: self.d.submit(**kwargs))
        except SubmitError as exc:
            return _error(exc.status, str(exc), problems=exc.problems)
        return JSONResponse(out, status_code=201, headers={"location": f"/api/runs/{out['run_id']}"})

    def list_runs(self, request: Request) -> Response:
        q = request.query_params
        status = q.getlist("status") or None
        if status and any(s not in STATUSES for s in status):
            return _error(400, f"status must be one of: {', '.join(STATUSES)}")
        try:
            limit = min(max(int(q.get("limit", "50")), 1), 1000)
        except ValueError:
            return _error(400, "limit must be an integer")
        try:
            rows = self.d.catalog.list_runs(sample=q.get("sample") or None, status=status,
                                            since=q.get("since") or None, until=q.get("until") or None, limit=limit)
        except CatalogError as exc:
            return _error(400, str(exc))
        return JSONResponse({"runs": [_run_json(r) for r in rows]})

    def get_run(self, request: Request) -> Response:
        row = self._row(request.path_params["run_id"])
        if isinstance(row, Response):
            return row
        out = _run_json(row)
        folder = self._folder(row)
        summary = folder / "summary.json" if folder else None
        if summary is not None and summary.exists():
            with contextlib.suppress(OSError, ValueError):
                res = json.loads(summary.read_text(encoding="utf-8")).get("results", {})
                out["summary"] = res
        out["links"] = {k: f"/api/runs/{row.id}/{k}" for k in ("trace.csv", "summary.json", "report")}
        return JSONResponse(out)

    def run_file(self, request: Request) -> Response:
        row = self._row(request.path_params["run_id"])
        if isinstance(row, Response):
            return row
        name = request.url.path.rsplit("/", 1)[-1]
        folder = self._folder(row)
        path = folder / name if folder else None
        if path is None or not path.is_file():
            return _error(404, f"run {row.id} has no {name} (yet)")
        media = "text/csv; charset=utf-8" if name.endswith(".csv") else "application/json"
        return FileResponse(path, media_type=media, filename=f"{row.id}-{name}")

    def report(self, request: Request) -> Response:
        row = self._row(request.path_params["run_id"])
        if isinstance(row, Response):
            return row
        folder = self._folder(row)
        if folder is None or not (folder / "summary.json").exists():
            return _error(404, f"run {row.id} has no finished record to report on")
        try:
            mod = importlib.import_module("pycnoctl.controller.record.report")
        except ModuleNotFoundError:
            return _error(404, "HTML reports are not available in this installation (no report module)")
        try:
            out = Path(mod.render_report(folder)).resolve()
        except Exception as exc:
            return _error(500, f"report failed: {type(exc).__name__}: {exc}")
        if not out.is_file() or not out.is_relative_to(folder):
            return _error(500, "report was not written inside the run folder")
        return FileResponse(out, media_type="text/html; charset=utf-8")

    # ------------------------------------------------------------------ queue and control
    def queue(self, request: Request) -> Response:
        snap = self.d.snapshot()["queue"]
        return JSONResponse({**snap, "items": self.d.queue()})

    def dequeue(self, request: Request) -> Response:
        row = self._row(request.path_params["run_id"])
        if isinstance(row, Response):
            return row
        if not self.d.remove_queued(row.id):
            return _error(409, f"run {row.id} is not in the queue (status {row.status})")
        return JSONResponse({"removed": row.id})

    async def resume(self, request: Request) -> Response:
        self.d.resume()
        return JSONResponse(self.d.snapshot()["queue"])

    async def pause(self, request: Request) -> Response:
        self.d.pause()
        return JSONResponse(self.d.snapshot()["queue"])

    async def abort(self, request: Request) -> Response:
        if not self.d.abort():
            return _error(409, "no run is active")
        return JSONResponse({"aborting": True}, status_code=202)

    async def reset(self, request: Request) -> Response:
        try:
            ok, why = await asyncio.wait_for(asyncio.wrap_future(self.d.submit_reset()), 10.0)
        except (RuntimeError, TimeoutError) as exc:
            return _error(503, f"the control loop did not answer: {exc}")
        if not ok:
            return _error(409, f"reset refused: {why}", reason=why)
        return JSONResponse({"reset": True, "message": why, "interlock": self.d.snapshot()["interlock"]})

    async def sequences(self, request: Request) -> Response:
        return JSONResponse({"sequences": self.d.shipped_sequences()})

    # ------------------------------------------------------------------ pages
    async def login(self, request: Request) -> Response:
        token = request.query_params.get("token", "")
        if not self.policy.token:
            return RedirectResponse("/", status_code=303)
        if not token or not token_matches(self.policy, token):
            return _error(401, "wrong or missing token")
        resp = RedirectResponse("/", status_code=303)
        resp.set_cookie(COOKIE, token, httponly=True, samesite="strict", path="/")
        return resp

    async def index(self, request: Request) -> Response:
        return FileResponse(_static_dir() / "index.html", media_type="text/html; charset=utf-8",
                            headers={"cache-control": "no-store"})

    async def openapi(self, request: Request) -> Response:
        return JSONResponse(openapi_spec())

    async def docs(self, request: Request) -> Response:
        return HTMLResponse(render_docs(openapi_spec()))


def _static_dir() -> Path:
    return Path(str(importlib.resources.files("pycnoctl.controller.service") / "static"))


def create_app(daemon: Daemon, policy: Policy | None = None) -> Any:
    """The ASGI app (Starlette wrapped in the security screen)."""
    policy = policy or Policy()
    api = Api(daemon, policy)
    run = "/api/runs/{run_id}"
    routes = [
        Route("/", api.index, methods=["GET"]),
        Route("/login", api.login, methods=["GET"]),
        Route("/api/status", api.status, methods=["GET"]),
        Route("/api/trace", api.trace, methods=["GET"]),
        Route("/api/events", api.events, methods=["GET"]),
        Route("/api/sequences", api.sequences, methods=["GET"]),
        Route("/api/runs", api.submit, methods=["POST"]),
        Route("/api/runs", api.list_runs, methods=["GET"]),
        Route(run, api.get_run, methods=["GET"]),
        Route(run + "/trace.csv", api.run_file, methods=["GET"]),
        Route(run + "/summary.json", api.run_file, methods=["GET"]),
        Route(run + "/events.jsonl", api.run_file, methods=["GET"]),
        Route(run + "/cycles.csv", api.run_file, methods=["GET"]),
        Route(run + "/report", api.report, methods=["GET"]),
        Route("/api/queue", api.queue, methods=["GET"]),
        Route("/api/queue/resume", api.resume, methods=["POST"]),
        Route("/api/queue/pause", api.pause, methods=["POST"]),
        Route("/api/queue/{run_id}", api.dequeue, methods=["DELETE"]),
        Route("/api/abort", api.abort, methods=["POST"]),
        Route("/api/reset", api.reset, methods=["POST"]),
        Route("/api/openapi.json", api.openapi, methods=["GET"]),
        Route("/api/docs", api.docs, methods=["GET"]),
        Mount("/static", app=StaticFiles(directory=str(_static_dir())), name="static"),
    ]
    app = Starlette(routes=routes)
    app.state.daemon = daemon
    return SecurityMiddleware(app, policy)


# ----------------------------------------------------------------------------- OpenAPI
_RUN_ID = {"name": "run_id", "in": "path", "required": True,
           "schema": {"type": "string", "pattern": r"^R\d{8}T\d{6}Z-[0-9a-f]{6}$"},
           "description": "a run ID the daemon issued"}
_ERR = {"description": "error", "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}}


@contextlib.contextmanager
def serve_in_thread(daemon: Daemon) -> Iterator[str]:
    """The daemon and its API on a free loopback port, the server in a thread (tests, benchmarks).

    Yields the base URL; on leaving, the server, the control loop, the catalog and the instrument
    are shut down in that order."""
    import uvicorn

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(create_app(daemon, Policy(port=port)), host="127.0.0.1", port=port,
                                           log_level="warning", lifespan="off", timeout_graceful_shutdown=1))
    th = threading.Thread(target=server.run, daemon=True)
    daemon.start()
    th.start()
    try:
        while not server.started:
            time.sleep(0.02)
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        th.join(5)
        daemon.stop()
        daemon.catalog.close()
        daemon.instrument.close()


def _op(summary: str, desc: str = "", *, params: list[dict[str, Any]] | None = None, body: str | None = None,
        ok: tuple[str, str] = ("200", "application/json"), errors: tuple[str, ...] = ()) -> dict[str, Any]:
    op: dict[str, Any] = {"summary": summary, "description": desc,
                          "responses": {ok[0]: {"description": "success", "content": {ok[1]: {}}}}}
    if params:
        op["parameters"] = params
    if body:
        op["requestBody"] = {"required": True, "content": {"application/json": {
            "schema": {"$ref": f"#/components/schemas/{body}"}}}}
    for code in ("401", "403", *errors):
        op["responses"][code] = _ERR
    return op


def openapi_spec() -> dict[str, Any]:
    """A hand-written OpenAPI 3 document of the API (kept beside the routes it describes)."""
    q = [{"name": n, "in": "query", "required": False, "schema": {"type": t}, "description": d} for n, t, d in (
        ("sample", "string", "only runs of this sample ID"), ("status", "string", "queued, running, completed, "
         "fault, aborted or interrupted; repeat for several"), ("since", "string", "created at or after (UTC ISO)"),
        ("until", "string", "created before (UTC ISO)"), ("limit", "integer", "at most this many (default 50)"))]
    paths = {
        "/api/status": {"get": _op("Instrument and daemon status", "State, pressures, valves, interlock latch, "
                                   "current run, queue, last result and the instrument description (chambers "
                                   "and valve roles) a client draws its schematic from.")},
        "/api/trace": {"get": _op("Recent decimated pressure trace", "At most 10 points a second, for a "
                                  "dashboard that connects late.", params=[{"name": "seconds", "in": "query",
                                  "schema": {"type": "number"}}])},
        "/api/events": {"get": _op("Live event stream (server-sent events)", "Events: status (first), sample "
                                   "(<= 10/s), state, cycle, settled, cycle_done, purge_pulse, trip, reset, "
                                   "warning, queue, run_started, run_finished, daemon, lost. Reconnect with "
                                   "Last-Event-ID to continue.", ok=("200", "text/event-stream"))},
        "/api/sequences": {"get": _op("Names of the shipped sequences a run may name")},
        "/api/runs": {
            "post": _op("Queue a run", "Name a shipped sequence or send a sequence's YAML text (never a path). "
                        "The request is validated against the instrument first; 201 returns the issued run ID.",
                        body="RunRequest", ok=("201", "application/json"), errors=("400", "413", "415", "422")),
            "get": _op("List runs, newest first", params=q, errors=("400",)),
        },
        "/api/runs/{run_id}": {"get": _op("One run: catalog row and stored summary", params=[_RUN_ID],
                                          errors=("400", "404"))},
        "/api/runs/{run_id}/trace.csv": {"get": _op("The run's raw trace", params=[_RUN_ID],
                                                    ok=("200", "text/csv"), errors=("400", "404"))},
        "/api/runs/{run_id}/summary.json": {"get": _op("The run's summary file", params=[_RUN_ID],
                                                       errors=("400", "404"))},
        "/api/runs/{run_id}/events.jsonl": {"get": _op("The run's event log", params=[_RUN_ID],
                                                       ok=("200", "application/json"), errors=("400", "404"))},
        "/api/runs/{run_id}/cycles.csv": {"get": _op("The run's cycle table", params=[_RUN_ID],
                                                     ok=("200", "text/csv"), errors=("400", "404"))},
        "/api/runs/{run_id}/report": {"get": _op("HTML report of a finished run", "404 when the report module is "
                                                 "not installed.", params=[_RUN_ID], ok=("200", "text/html"),
                                                 errors=("400", "404"))},
        "/api/queue": {"get": _op("The queue and whether it is paused")},
        "/api/queue/{run_id}": {"delete": _op("Remove a queued run (it becomes 'aborted')", params=[_RUN_ID],
                                              errors=("400", "404", "409"))},
        "/api/queue/resume": {"post": _op("Resume the queue", "Needed after a restart that found an interrupted "
                                          "run, and after any run that did not complete.")},
        "/api/queue/pause": {"post": _op("Pause the queue (the active run goes on)")},
        "/api/abort": {"post": _op("Abort the active run into the safe state", ok=("202", "application/json"),
                                   errors=("409",))},
        "/api/reset": {"post": _op("Operator reset of a latched interlock", "Accepted only once the condition "
                                   "is gone; 409 with the reason when refused. Never restarts a run.",
                                   errors=("409", "503"))},
        "/api/openapi.json": {"get": _op("This document")},
        "/api/docs": {"get": _op("This document as a page", ok=("200", "text/html"))},
    }
    schemas = {
        "Error": {"type": "object", "properties": {"error": {"type": "string"}, "status": {"type": "integer"},
                                                    "problems": {"type": "array", "items": {"type": "string"}}}},
        "RunRequest": {"type": "object", "additionalProperties": False, "properties": {
            "sequence": {"type": "string", "description": "name of a shipped sequence, e.g. quick-demo"},
            "sequence_text": {"type": "string", "description": "the YAML text of a sequence (at most 64 KiB)"},
            "sample_id": {"type": "string"},
            "mass": {"type": ["string", "number"], "description": "specimen mass, '19.62 g' (a number is grams)"},
            "u_mass": {"type": ["string", "number"], "description": "standard uncertainty of the mass (0.1 mg)"},
            "bulk_volume": {"type": ["string", "number"], "description": "envelope volume ('6 cm^3'; number: cm^3)"},
            "operator": {"type": "string"},
            "expansion_volume": {"type": "string", "description": "override the sequence's choice"},
            "note": {"type": "string"}}},
    }
    return {
        "openapi": "3.1.0",
        "info": {"title": "pycnoctl daemon API", "version": "1",
                 "description": "Local API of the pycnometer daemon. Requests need a matching Host (and Origin, "
                                "when sent); on a non-loopback bind every request needs the bearer token."},
        "components": {"schemas": schemas, "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}}},
        "security": [{"bearer": []}, {}],
        "paths": paths,
    }


def render_docs(spec: dict[str, Any]) -> str:
    """A self-contained page listing every operation of the spec (no external assets)."""
    rows = []
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            codes = ", ".join(sorted(op["responses"]))
            rows.append(f"<tr><td class=m>{method.upper()}</td><td><code>{html.escape(path)}</code></td>"
                        f"<td><b>{html.escape(op['summary'])}</b><br>{html.escape(op.get('description', ''))}</td>"
                        f"<td>{codes}</td></tr>")
    return ("<!doctype html><html><head><meta charset=utf-8><title>pycnoctl API</title><style>"
            "body{font:14px system-ui,sans-serif;margin:2em;color:#1d2733}table{border-collapse:collapse}"
            "td{border-bottom:1px solid #dde3ea;padding:.5em;vertical-align:top}.m{font-weight:700;color:#1c5d99}"
            "</style></head><body><h1>pycnoctl daemon API</h1><p>" + html.escape(spec["info"]["description"])
            + " Machine-readable: <a href='/api/openapi.json'>/api/openapi.json</a>.</p><table>"
            + "".join(rows) + "</table></body></html>")
