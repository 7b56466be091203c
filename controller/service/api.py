"""The daemon's local HTTP API and dashboard (FastAPI on Starlette).

Every handler only asks the Daemon: the control thread owns the drivers, so no request can
block a tick.  Catalog look-ups run in the thread pool (sync handlers); status and the event
stream read the lock-protected snapshot and the event bus.  Runs are named only by IDs the
daemon issued (``catalog.is_run_id`` and a catalog row), never by a path.

The OpenAPI document (/api/openapi.json) and the docs page (/api/docs) are generated from the
routes and the models in ``schemas``; refusals share one JSON shape (``schemas.Error``): 400 when a
request breaks the published schema, 404/409/422 when the daemon refuses what it asks.
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
import urllib.parse
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, Depends, FastAPI, Header, Query, Request
from fastapi import Path as PathParam
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.utils import get_openapi
from starlette.convertors import Convertor, register_url_convertor
from starlette.exceptions import HTTPException
from starlette.responses import FileResponse, HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.routing import Match
from starlette.staticfiles import StaticFiles

from pycnoctl.controller.domain.states import vocabulary
from pycnoctl.controller.record.catalog import CatalogError, RunRow, is_run_id
from pycnoctl.controller.record.runfolder import DamagedFile, read_summary
from pycnoctl.controller.service import schemas as s
from pycnoctl.controller.service.daemon import Daemon, SubmitError
from pycnoctl.controller.service.security import COOKIE, Policy, SecurityMiddleware, token_matches

STREAM_POLL = 0.1  # s between event-bus polls of one stream client
RUN_FILES = {"trace.csv": "text/csv", "summary.json": "application/json", "events.jsonl": "application/x-ndjson",
             "cycles.csv": "text/csv"}


class _RunIdConvertor(Convertor[str]):
    """Matches only run-ID-shaped segments, so /api/queue/pause is never taken for a run ID (405, not 400)."""

    regex = s.RUN_ID_PATTERN[1:-1]

    def convert(self, value: str) -> str:
        return value

    def to_string(self, value: str) -> str:
        return value


register_url_convertor("run_id", _RunIdConvertor())


def _daemon(request: Request) -> Daemon:
    return request.app.state.daemon  # type: ignore[no-any-return]


DaemonDep = Annotated[Daemon, Depends(_daemon)]
RunId = Annotated[str, PathParam(pattern=s.RUN_ID_PATTERN, description="a run ID the daemon issued")]
_WHY = {400: "the request does not match this schema", 401: "no or wrong token (non-loopback bind)",
        403: "foreign Host or Origin", 404: "no such run or file",
        409: "conflicts with the daemon's or the run's state (e.g. a file the run has not written yet)",
        413: "body or sequence text too large", 415: "body is not application/json",
        422: "the daemon refuses the request (sequence problems listed)",
        503: "the control loop (or the report worker) did not answer"}


def _errors(*codes: int) -> dict[int | str, dict[str, Any]]:
    return {c: {"model": s.Error, "description": _WHY[c]} for c in (401, 403, *codes)}


def _error(status: int, message: str, headers: dict[str, str] | None = None, **extra: Any) -> JSONResponse:
    return JSONResponse({"error": message, "status": status, **extra}, status_code=status, headers=headers)


def _run_json(row: RunRow) -> dict[str, Any]:
    def f(x: float | None, scale: float = 1.0) -> float | None:
        return None if x is None or not math.isfinite(x) else x * scale

    return {"run_id": row.id, "created": row.created, "status": row.status, "sample_id": row.sample_id,
            "sequence": row.sequence_name, "kind": row.kind, "started": row.started, "ended": row.ended,
            "volume_cm3": f(row.volume_m3, 1e6), "volume_u_cm3": f(row.u_volume_m3, 1e6),
            "density_g_cm3": f(row.density, 1e-3), "mass_g": f(row.mass, 1e3), "message": row.message}


def _row(d: Daemon, run_id: str) -> RunRow | Response:
    # a well-formed ID that is no valid time stamp cannot have been issued: as unknown as any other
    row = d.catalog.get_run(run_id) if is_run_id(run_id) else None
    return _error(404, f"no run {run_id}") if row is None else row


def _folder(d: Daemon, row: RunRow) -> Path | None:
    root = (d.data / "runs").resolve()
    folder = (root / (row.folder or row.id)).resolve()
    if folder.parent != root or not folder.is_dir():
        return None
    return folder


router = APIRouter()


# ----------------------------------------------------------------------------- status and events
@router.get("/api/status", response_model=s.Status, responses=_errors(),
            summary="Instrument and daemon status",
            description="State, pressures, valves, interlock latch, current run, queue, last result and the "
                        "instrument description (chambers and valve roles) a client draws its schematic from.")
def status(d: DaemonDep) -> dict[str, Any]:
    return d.snapshot()


@router.get("/api/trace", response_model=s.Trace, responses=_errors(400),
            summary="Recent decimated pressure trace",
            description="At most 10 points a second, for a dashboard that connects late.")
def trace(d: DaemonDep, seconds: Annotated[float, Query(gt=0, allow_inf_nan=False,
                                                        description="how far back, in s")] = 600.0) -> s.Trace:
    pts = d.recent_trace(seconds)
    return s.Trace(t=[p[0] for p in pts], gauge_pa=[p[1] for p in pts], state=[p[2] for p in pts])


@router.get("/api/states", response_model=list[s.StateInfo], responses=_errors(),
            summary="The run-state vocabulary",
            description="Every state a run passes through, with its label and shading colour, in order.")
def states() -> list[dict[str, object]]:
    return vocabulary()


@router.get("/api/events", responses={200: {"description": "server-sent events",
                                            "content": {"text/event-stream": {"schema": {"type": "string"}}}},
                                      **_errors()},
            summary="Live event stream (server-sent events)",
            description="Events: status (first), sample (<= 10/s), state, cycle, settled, cycle_done, purge_pulse, "
                        "trip, reset, warning, queue, run_started, run_finished, daemon, lost. Reconnect with "
                        "Last-Event-ID to continue.", response_class=Response)
async def events(request: Request, d: DaemonDep,
                 last_event_id: Annotated[str | None, Header(max_length=20)] = None) -> Response:
    from sse_starlette.sse import EventSourceResponse

    bus = d.bus
    seq = int(last_event_id) if last_event_id and last_event_id.isdigit() else None

    async def stream() -> AsyncIterator[dict[str, Any]]:
        nonlocal seq
        if seq is None:
            seq = bus.last_seq
            yield {"event": "status", "id": str(seq), "data": json.dumps(d.snapshot())}
        while True:
            items, lost = bus.since_text(seq)  # each event serialised once, shared by every stream
            if lost:
                yield {"event": "lost", "data": json.dumps({"message": "some events were missed"})}
            for n, kind, text in items:
                seq = n
                yield {"event": kind, "id": str(n), "data": text}
            if await request.is_disconnected():
                return
            await asyncio.sleep(STREAM_POLL)

    return EventSourceResponse(stream(), ping=10, send_timeout=5)


@router.get("/api/sequences", response_model=s.Sequences, responses=_errors(),
            summary="Names of the shipped sequences a run may name")
def sequences(d: DaemonDep) -> s.Sequences:
    return s.Sequences(sequences=d.shipped_sequences())


# ----------------------------------------------------------------------------- runs
@router.post("/api/runs", status_code=201, response_model=s.Submitted, responses=_errors(400, 413, 415, 422),
             summary="Queue a run",
             description="Name a shipped sequence or send a sequence's YAML text (never a path). The request is "
                         "validated against the instrument first; 201 returns the issued run ID and a Location.")
def submit(req: s.RunRequest, d: DaemonDep, response: Response) -> Any:
    from pycnoctl.controller.domain.units import UnitError, parse_mass, parse_volume

    values: dict[str, float | None] = {}
    for name, parse, default in (("mass", parse_mass, None), ("u_mass", parse_mass, 1e-7),
                                 ("bulk_volume", parse_volume, None), ("u_bulk_volume", parse_volume, 0.0)):
        text = getattr(req, name)
        try:  # one field at a time, so the refusal names the field a form puts it beside
            values[name] = parse(text) if text is not None else default
        except (UnitError, ValueError, TypeError) as exc:
            return _error(400, f"{name}: {exc}", field=name)
    mass, bulk = values["mass"], values["bulk_volume"]
    u_mass, u_bulk = float(values["u_mass"] or 0.0), float(values["u_bulk_volume"] or 0.0)
    try:
        out = d.submit(sequence=req.sequence, sequence_text=req.sequence_text, sample_id=req.sample_id.strip(),
                       mass=mass, u_mass=u_mass, bulk_volume=bulk, u_bulk_volume=u_bulk,
                       operator=req.operator.strip(),
                       expansion_volume=req.expansion_volume, note=req.note)
    except SubmitError as exc:
        extra: dict[str, Any] = {"field": exc.field} if exc.field else {}
        return _error(exc.status, str(exc), problems=exc.problems, **extra)
    response.headers["location"] = f"/api/runs/{out['run_id']}"
    return out


@router.get("/api/runs", response_model=s.RunList, responses=_errors(400), summary="List runs, newest first")
def list_runs(
    d: DaemonDep,
    sample: Annotated[str | None, Query(max_length=200, description="only runs of this sample ID")] = None,
    status: Annotated[list[s.RunStatus] | None, Query(description="repeat for several")] = None,
    since: Annotated[s.Instant | None, Query(description="created at or after (ISO 8601)")] = None,
    until: Annotated[s.Instant | None, Query(description="created before (ISO 8601)")] = None,
    limit: Annotated[int, Query(ge=1, le=1000, description="at most this many")] = 50,
) -> Any:
    try:
        rows = d.catalog.list_runs(sample=sample or None, status=status or None, since=since, until=until,
                                   limit=limit)
    except (CatalogError, OverflowError) as exc:
        return _error(400, str(exc))
    return {"runs": [_run_json(r) for r in rows]}


@router.get("/api/runs/{run_id}", response_model=s.Run, responses=_errors(400, 404),
            summary="One run: catalog row and stored summary")
def get_run(run_id: RunId, d: DaemonDep) -> Any:
    row = _row(d, run_id)
    if isinstance(row, Response):
        return row
    out = _run_json(row)
    folder = _folder(d, row)
    summary = folder / "summary.json" if folder else None
    if summary is not None and summary.exists():
        try:  # the run folder's own reader: damage is named as the report names it
            out["summary"] = (read_summary(summary) or {}).get("results", {})
        except (OSError, ValueError) as exc:  # said, not left as a silent null
            out["record_problems"] = [f"summary.json is damaged: {_unreadable(exc)}"]
        else:  # a summary or catalog row changed after the run disagrees with the other: said, not served as fact
            from pycnoctl.controller.record.integrity import disagreement_line, disagreements

            line = disagreement_line(disagreements(out["summary"], row))
            if line is not None:
                out["record_problems"] = [line]
    # links only to what exists: a run cancelled in the queue, or refused before it started, has no record
    have = {"trace.csv": folder is not None and (folder / "trace.csv").exists(),
            "summary.json": summary is not None and summary.exists()}
    have["report"] = have["summary.json"]
    out["links"] = {k: f"/api/runs/{row.id}/{k}" for k, ok in have.items() if ok}
    return out


def _unreadable(exc: BaseException) -> str:
    """What is wrong with a run file, in words that carry no path of this machine."""
    if isinstance(exc, DamagedFile):
        return exc.detail
    if isinstance(exc, OSError):
        return f"cannot be read ({exc.strerror or type(exc).__name__})"
    return type(exc).__name__


def _missing(row: RunRow, what: str) -> Response:
    """409 while the run may still write it (queued, running); 404 once it has ended without it."""
    if row.status in ("queued", "running"):
        return _error(409, f"run {row.id} is {row.status}: no {what} yet")
    return _error(404, f"run {row.id} has no {what}")


def _file_route(name: str, media: str) -> Any:
    def run_file(run_id: RunId, d: DaemonDep) -> Response:
        row = _row(d, run_id)
        if isinstance(row, Response):
            return row
        folder = _folder(d, row)
        path = folder / name if folder else None
        if path is None or not path.is_file():
            return _missing(row, name)
        # read whole: a running run appends to its trace, and a streamed file would outgrow its Content-Length
        try:
            body = path.read_bytes()
        except OSError as exc:
            return _error(404, f"run {row.id}: {name} cannot be read ({exc.strerror})")
        charset = "; charset=utf-8" if media.startswith("text/") else ""
        return Response(body, media_type=media + charset,
                        headers={"content-disposition": f'attachment; filename="{row.id}-{name}"'})

    return run_file


for _name, _media in RUN_FILES.items():
    _schema = {"type": "object"} if _media == "application/json" else {"type": "string"}
    router.add_api_route(f"/api/runs/{{run_id}}/{_name}", _file_route(_name, _media), methods=["GET"],
                         response_class=Response, summary=f"The run's {_name}",
                         responses={200: {"description": _name, "content": {_media: {"schema": _schema}}},
                                    **_errors(400, 404, 409)})


#: How long a report request waits for the worker before answering 202 (the render goes on).
REPORT_WAIT = 10.0


def _report_worker(request: Request) -> Any:
    """The app's one report worker process, started on the first report asked for."""
    worker = getattr(request.app.state, "report_worker", None)
    if worker is None:
        from pycnoctl.controller.record.worker import ReportWorker

        worker = request.app.state.report_worker = ReportWorker()
    return worker


@router.get("/api/runs/{run_id}/report", response_class=HTMLResponse,
            responses={202: {"model": s.Error, "description": "the report is being rendered; ask again after "
                                                              "Retry-After seconds"}, **_errors(400, 404, 409)},
            summary="HTML report of a finished run",
            description="Rendered in a separate worker process and cached by the run's content, so a long trace "
                        "never stalls the control loop; 202 with Retry-After while it is being rendered.")
async def report(run_id: RunId, d: DaemonDep, request: Request) -> Response:
    row = _row(d, run_id)
    if isinstance(row, Response):
        return row
    folder = _folder(d, row)
    if folder is None or not (folder / "summary.json").exists():
        return _missing(row, "finished record to report on")
    from concurrent.futures.process import BrokenProcessPool

    try:
        fut = _report_worker(request).submit(folder)
    except BrokenProcessPool:  # the worker died (killed, out of memory): start a new one next time
        request.app.state.report_worker = None
        return _error(503, "the report worker stopped; ask again")
    try:
        done = fut.result() if fut.done() else await asyncio.wait_for(asyncio.shield(asyncio.wrap_future(fut)),
                                                                      REPORT_WAIT)
        out = Path(done).resolve()
    except TimeoutError:
        return _error(202, "the report is being rendered; ask again", headers={"retry-after": "2"})
    except BrokenProcessPool:
        request.app.state.report_worker = None
        return _error(503, "the report worker stopped; ask again")
    except DamagedFile as exc:  # the run's record, not the daemon, is at fault: say which file, not where
        return _error(409, f"run {row.id}: {exc.name} is damaged ({exc.detail}); no report can be made from it",
                      problems=[f"{exc.name}: {exc.detail}"])
    except Exception as exc:  # a bug: said without the server's paths
        text = str(exc).replace(str(folder), f"<run {row.id}>").replace(str(d.data.resolve()), "<data>")
        return _error(500, f"report failed: {type(exc).__name__}: {text}")
    if not out.is_file() or not out.is_relative_to(folder):
        return _error(500, "report was not written inside the run folder")
    return FileResponse(out, media_type="text/html; charset=utf-8")


# ----------------------------------------------------------------------------- queue and control
@router.get("/api/queue", response_model=s.Queue, responses=_errors(), summary="The queue and whether it is paused")
def queue(d: DaemonDep) -> dict[str, Any]:
    return {**d.snapshot()["queue"], "items": d.queue()}


@router.post("/api/queue/resume", response_model=s.QueueState, responses=_errors(), summary="Resume the queue",
             description="Needed after a restart that found an interrupted run, and after any run that did not "
                         "complete.")
def resume(d: DaemonDep) -> dict[str, Any]:
    d.resume()
    return d.snapshot()["queue"]  # type: ignore[no-any-return]


@router.post("/api/queue/pause", response_model=s.QueueState, responses=_errors(),
             summary="Pause the queue (the active run goes on)")
def pause(d: DaemonDep) -> dict[str, Any]:
    d.pause()
    return d.snapshot()["queue"]  # type: ignore[no-any-return]


@router.delete("/api/queue/{run_id:run_id}", response_model=s.Removed, responses=_errors(404, 409),
               summary="Remove a queued run (it becomes 'aborted')")
def dequeue(run_id: RunId, d: DaemonDep) -> Any:
    row = _row(d, run_id)
    if isinstance(row, Response):
        return row
    if not d.remove_queued(row.id):
        return _error(409, f"run {row.id} is not in the queue (status {row.status})")
    return {"removed": row.id}


@router.post("/api/abort", status_code=202, response_model=s.Aborting, responses=_errors(409),
             summary="Abort the active run into the safe state")
def abort(d: DaemonDep) -> Any:
    if not d.abort():
        return _error(409, "no run is active")
    return {"aborting": True}


@router.post("/api/reset", response_model=s.ResetDone, responses=_errors(409, 503),
             summary="Operator reset of a latched interlock",
             description="Accepted only once the condition is gone; 409 with the reason when refused. Never "
                         "restarts a run.")
async def reset(d: DaemonDep) -> Any:
    try:
        ok, why = await asyncio.wait_for(asyncio.wrap_future(d.submit_reset()), 10.0)
    except (RuntimeError, TimeoutError) as exc:
        return _error(503, f"the control loop did not answer: {exc}")
    if not ok:
        return _error(409, f"reset refused: {why}", reason=why)
    return {"reset": True, "message": why, "interlock": d.snapshot()["interlock"]}


# ----------------------------------------------------------------------------- pages
_LOGIN_PAGE = ("<!doctype html><html><head><meta charset=utf-8><title>pycnoctl: log in</title></head><body>"
               "<form method=post action=/login><label>API token <input name=token type=password "
               "autocomplete=current-password autofocus></label> <button>Log in</button></form></body></html>")


@router.get("/login", include_in_schema=False)
def login_page() -> HTMLResponse:
    """The token is typed into a form and POSTed, so it never sits in a URL, a history or a log."""
    return HTMLResponse(_LOGIN_PAGE, headers={"cache-control": "no-store"})


@router.post("/login", include_in_schema=False)
async def login(request: Request) -> Response:
    policy: Policy = request.app.state.policy
    if not policy.token:
        return RedirectResponse("/", status_code=303)
    form = urllib.parse.parse_qs((await request.body()).decode("utf-8", "replace"), max_num_fields=4)
    token = (form.get("token") or [""])[0]
    if not token or not token_matches(policy, token):
        return _error(401, "wrong or missing token")
    resp = RedirectResponse("/", status_code=303)
    resp.set_cookie(COOKIE, token, httponly=True, samesite="strict", path="/")
    return resp


@router.get("/", include_in_schema=False)
def index() -> Response:
    return FileResponse(_static_dir() / "index.html", media_type="text/html; charset=utf-8",
                        headers={"cache-control": "no-store"})


@router.get("/api/docs", include_in_schema=False)
def docs(request: Request) -> HTMLResponse:
    return HTMLResponse(render_docs(request.app.openapi()))


def _static_dir() -> Path:
    return Path(str(importlib.resources.files("pycnoctl.controller.service") / "static"))


# ----------------------------------------------------------------------------- errors
async def _invalid(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    errs = exc.errors()
    problems = [f"{'.'.join(str(p) for p in e.get('loc', ()))}: {e.get('msg', '')}"[:300] for e in errs[:20]]
    if any(e.get("type") == "json_invalid" for e in errs):
        return _error(400, "the body is not valid JSON", problems=problems)
    loc = tuple(errs[0].get("loc", ())) if errs else ()
    extra = {"field": str(loc[1])} if len(loc) == 2 and loc[0] == "body" else {}  # a form puts it beside the field
    return _error(400, "the request does not match the API schema" + (f": {problems[0]}" if problems else ""),
                  problems=problems, **extra)


async def _http_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, HTTPException)
    headers = {k.lower(): v for k, v in (exc.headers or {}).items()}
    if exc.status_code == 405:  # name every method the path takes, not only those of the first route found
        headers["allow"] = ", ".join(sorted(_methods_for(request.scope)))
    return _error(exc.status_code, str(exc.detail), headers=headers)


def _methods_for(scope: dict[str, Any]) -> set[str]:
    methods: set[str] = set()
    for route in router.routes:
        if getattr(route, "methods", None) and route.matches(scope)[0] != Match.NONE:
            methods |= route.methods  # type: ignore[attr-defined]
    return methods


# ----------------------------------------------------------------------------- the app
def _openapi(app: FastAPI) -> dict[str, Any]:
    """The generated document, with our 400 in place of FastAPI's default 422 validation reply."""
    if app.openapi_schema is None:
        doc = get_openapi(title=app.title, version=app.version, description=app.description, routes=app.routes)
        error = {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}
        for ops in doc["paths"].values():
            for op in ops.values():
                if "HTTPValidationError" in json.dumps(op["responses"].get("422", "")):
                    del op["responses"]["422"]
                for code, resp in op["responses"].items():
                    if code.isdigit() and int(code) >= 400:  # refusals are JSON whatever the route serves
                        resp["content"] = error
        for name in ("HTTPValidationError", "ValidationError"):
            doc.get("components", {}).get("schemas", {}).pop(name, None)
        # the shipped names are known when the app is built: publish them, so a client (or a tester) can pick one
        names = app.state.daemon.shipped_sequences()
        doc["components"]["schemas"]["RunRequest"]["properties"]["sequence"]["enum"] = names
        doc.setdefault("components", {})["securitySchemes"] = {"bearer": {"type": "http", "scheme": "bearer"}}
        doc["security"] = [{"bearer": []}, {}]
        app.openapi_schema = doc
    return app.openapi_schema


def create_app(daemon: Daemon, policy: Policy | None = None) -> Any:
    """The ASGI app (FastAPI wrapped in the security screen)."""
    policy = policy or Policy()
    app = FastAPI(title="pycnoctl daemon API", version="1", openapi_url="/api/openapi.json", docs_url=None,
                  redoc_url=None,
                  description="Local API of the pycnometer daemon. Requests need a matching Host (and Origin, "
                              "when sent); on a non-loopback bind every request needs the bearer token.")
    app.state.daemon = daemon
    app.state.policy = policy
    app.state.report_worker = None  # started by the first report asked for (_report_worker)
    app.include_router(router)
    app.mount("/static", StaticFiles(directory=str(_static_dir())), name="static")
    app.add_exception_handler(RequestValidationError, _invalid)
    app.add_exception_handler(HTTPException, _http_error)
    app.openapi = lambda: _openapi(app)  # type: ignore[method-assign]
    return SecurityMiddleware(app, policy)


def close_workers(asgi_app: Any) -> None:
    """Stop the report worker process of an app made by create_app, if it ever started one."""
    inner = getattr(asgi_app, "app", asgi_app)
    worker = getattr(getattr(inner, "state", None), "report_worker", None)
    if worker is not None:
        worker.close()
        inner.state.report_worker = None


@contextlib.contextmanager
def serve_in_thread(daemon: Daemon) -> Iterator[str]:
    """The daemon and its API on a free loopback port, the server in a thread (tests, benchmarks).

    Yields the base URL; on leaving, the server, the control loop, the catalog and the instrument
    are shut down in that order."""
    import uvicorn

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    app = create_app(daemon, Policy(port=port))
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port,
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
        close_workers(app)
        daemon.stop()
        daemon.catalog.close()
        daemon.instrument.close()


def render_docs(spec: dict[str, Any]) -> str:
    """A self-contained page listing every operation of the spec (no external assets, works offline)."""
    rows = []
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            codes = ", ".join(sorted(op["responses"]))
            rows.append(f"<tr><td class=m>{method.upper()}</td><td><code>{html.escape(path)}</code></td>"
                        f"<td><b>{html.escape(op.get('summary', ''))}</b><br>"
                        f"{html.escape(op.get('description', ''))}</td><td>{codes}</td></tr>")
    return ("<!doctype html><html><head><meta charset=utf-8><title>pycnoctl API</title><style>"
            "body{font:14px system-ui,sans-serif;margin:2em;color:#1d2733}table{border-collapse:collapse}"
            "td{border-bottom:1px solid #dde3ea;padding:.5em;vertical-align:top}.m{font-weight:700;color:#1c5d99}"
            "</style></head><body><h1>pycnoctl daemon API</h1><p>" + html.escape(spec["info"]["description"])
            + " Machine-readable: <a href='/api/openapi.json'>/api/openapi.json</a>.</p><table>"
            + "".join(rows) + "</table></body></html>")
