"""The instrument service core: one control thread owns the drivers; clients only ask.

Why a thread of its own: the interlocks must see every pressure sample whatever the web side
does, so the tick loop never waits on a client.  Clients talk to it through three thread-safe
channels only:

* a lock-protected status snapshot the loop refreshes on every sample (``Daemon.snapshot``);
* an event bus, a ring buffer the loop appends to in O(1) and readers poll by sequence number
  (a slow or vanished reader costs the loop nothing; it just misses old events);
* a command queue the loop drains between ticks (interlock reset, anything that touches the
  drivers), each command answered through a Future.

Runs come from the SQLite catalog's queue, so they survive a restart.  Start-up asserts the safe
state, marks any run a dead daemon left running as interrupted, never resumes it, and holds the
queue paused until the operator resumes it.  The queue also pauses after any run that does not
complete (fault, abort): an operator looks before the next specimen is pressurised.
"""

from __future__ import annotations

import bisect
import concurrent.futures
import contextlib
import dataclasses
import itertools
import json
import logging
import math
import os
import socket
import stat
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pycnoctl.controller.domain.yamlio import ConfigError, Problem
from pycnoctl.controller.jobs.calibration_use import CalibrationRefused, calibration_brief, find_calibration
from pycnoctl.controller.jobs.measurement import (
    RunFault,
    RunRequest,
    execute,
    prepare,
    specimen_problem,
    unknown_volume,
)
from pycnoctl.controller.maths import results
from pycnoctl.controller.record.catalog import Catalog, is_run_id
from pycnoctl.controller.record.runfolder import atomic_write
from pycnoctl.controller.record.storagefault import StorageFault
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.sequence import estimate_duration, list_shipped, not_for_a_run
from pycnoctl.drivers.instrument import Instrument

log = logging.getLogger(__name__)

MAX_SEQUENCE_TEXT = 64 * 1024  # bytes of sequence text a client may submit
SAMPLE_EVENT_INTERVAL = 0.1  # s of wall time between sample events on the bus (<= 10/s)
TRACE_POINTS = 3000  # decimated (t, gauge) points kept for a dashboard that connects late


#: What a specimen can weigh and occupy in a home-built pycnometer (common practice: cells of about
#: 1-500 cm^3): a value outside is a unit mistake, refused with the field named.


class _NotARun(Exception):
    """A sequence that is sound but cannot be a run of its own (run.sequence.not_for_a_run)."""


class SubmitError(Exception):
    """A run request the daemon refuses; ``problems`` lists file:line:col lines for sequence text."""

    def __init__(self, message: str, problems: list[str] | None = None, status: int = 422,
                 field: str | None = None) -> None:
        super().__init__(message)
        self.problems = problems or []
        self.status = status
        self.field = field  # the request field at fault, so a form can put the message beside it


# ----------------------------------------------------------------------------- systemd notify
def sd_notify(message: str) -> bool:
    """Send one sd_notify datagram (READY=1, WATCHDOG=1, STOPPING=1) when NOTIFY_SOCKET is set."""
    addr = os.environ.get("NOTIFY_SOCKET")
    if not addr:
        return False
    if addr.startswith("@"):  # abstract namespace
        addr = "\0" + addr[1:]
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as s:
            s.sendto(message.encode("ascii"), addr)
    except OSError as exc:
        log.warning("sd_notify %s failed: %s", message, exc)
        return False
    return True


def watchdog_interval() -> float | None:
    """Half the systemd watchdog period (WATCHDOG_USEC), when one is configured for this process."""
    usec = os.environ.get("WATCHDOG_USEC")
    pid = os.environ.get("WATCHDOG_PID")
    if not usec or (pid and pid != str(os.getpid())):
        return None
    try:
        return max(int(usec) / 2e6, 0.05)
    except ValueError:
        return None


# ----------------------------------------------------------------------------- structured log
class JsonLineFormatter(logging.Formatter):
    """One JSON object a line: time, level, logger, message, and any ``extra={'data': {...}}``."""

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        data = getattr(record, "data", None)
        if isinstance(data, dict):
            out.update({k: v for k, v in data.items() if k not in out})
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(_clean(out), default=str)


class _LogFileHandler(logging.FileHandler):
    """A log file on a full or failing disk: one line on stderr the first time, never a traceback
    (logging's default prints one per record), and the loop goes on."""

    failed: str | None = None

    def handleError(self, record: logging.LogRecord | None) -> None:
        import sys

        if self.failed is None:
            exc = sys.exc_info()[1]
            self.failed = f"{type(exc).__name__}: {exc}" if exc is not None else "unknown error"
            print(f"pycnoctl serve: daemon log {self.baseFilename} not written ({self.failed})", file=sys.stderr)

    def flush(self) -> None:
        try:
            super().flush()
        except OSError:
            self.handleError(None)

    def close(self) -> None:
        try:  # what is still buffered cannot be written either
            super().close()
        except OSError:
            self.handleError(None)


def attach_json_log(path: Path) -> logging.Handler:
    """Log everything pycnoctl says (INFO and up) as JSON lines to ``path``, flushed per line."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = _LogFileHandler(path, encoding="utf-8")
    handler.setFormatter(JsonLineFormatter())
    handler.setLevel(logging.INFO)
    root = logging.getLogger("pycnoctl")
    root.addHandler(handler)
    if root.level == logging.NOTSET or root.level > logging.INFO:
        root.setLevel(logging.INFO)
    return handler


# ----------------------------------------------------------------------------- event bus
class _Event:
    """One published event; its JSON text is made once, by the first stream that sends it."""

    __slots__ = ("_text", "data", "kind", "seq")

    def __init__(self, seq: int, kind: str, data: dict[str, Any]) -> None:
        self.seq, self.kind, self.data = seq, kind, data
        self._text: str | None = None

    @property
    def text(self) -> str:
        # a race between two readers only serialises twice; the text is the same
        if self._text is None:
            self._text = json.dumps(self.data, default=str)
        return self._text


class EventBus:
    """Ring buffer of (seq, kind, data); publish is O(1) under a short lock, readers poll by seq.

    Fan-out costs one serialisation per event whatever the number of stream clients: the first
    reader of an event makes its JSON text (``since_text``) and every other reader gets the same
    string.  The control thread never serialises.
    """

    def __init__(self, maxlen: int = 4096) -> None:
        self._buf: deque[_Event] = deque(maxlen=maxlen)
        self._seq = 0
        self._lock = threading.Lock()

    def publish(self, kind: str, data: dict[str, Any]) -> None:
        with self._lock:
            self._seq += 1
            self._buf.append(_Event(self._seq, kind, data))

    @property
    def last_seq(self) -> int:
        with self._lock:
            return self._seq

    def _since(self, seq: int, limit: int) -> tuple[list[_Event], bool]:
        with self._lock:
            if not self._buf or self._seq <= seq:
                return [], False
            first = self._buf[0].seq
            lost = seq + 1 < first
            start = max(seq + 1 - first, 0)
            return [self._buf[i] for i in range(start, min(start + limit, len(self._buf)))], lost

    def since(self, seq: int, limit: int = 500) -> tuple[list[tuple[int, str, dict[str, Any]]], bool]:
        """Events after ``seq`` (oldest first, at most ``limit``) and whether some were already lost."""
        events, lost = self._since(seq, limit)
        return [(e.seq, e.kind, e.data) for e in events], lost

    def since_text(self, seq: int, limit: int = 500) -> tuple[list[tuple[int, str, str]], bool]:
        """As ``since``, with each event's data as its JSON text (made once per event, shared)."""
        events, lost = self._since(seq, limit)
        return [(e.seq, e.kind, e.text) for e in events], lost


# ----------------------------------------------------------------------------- tick statistics
class LateHistogram:
    """Counts of tick lateness in fixed log-spaced bins: quantiles in time independent of the count.

    Bin 0 holds values below ``LOW`` (1 us, zero included); bin i >= 1 holds
    [LOW * RATIO**(i-1), LOW * RATIO**i); the last bin everything from ``HIGH`` (100 s) up.  A quantile
    is reported as the geometric centre of the bin that holds it, so it is within a factor
    sqrt(RATIO) (2.5 %) of the exact order statistic, or within 1 us below LOW; the caller clamps it
    to the exact maximum.  Fixed size: about 380 bins whatever the uptime.
    """

    LOW = 1e-6
    HIGH = 100.0
    RATIO = 1.05
    RESOLUTION = math.sqrt(RATIO)  # reported / exact lies in [1/RESOLUTION, RESOLUTION]
    N_BINS = 2 + math.ceil(math.log(HIGH / LOW) / math.log(RATIO))

    def __init__(self) -> None:
        self.counts = [0] * self.N_BINS
        self.n = 0

    @classmethod
    def bin_of(cls, x: float) -> int:
        if not x >= cls.LOW:  # NaN too: counted, reported as 0
            return 0
        if x >= cls.HIGH:
            return cls.N_BINS - 1
        return min(1 + int(math.log(x / cls.LOW) / math.log(cls.RATIO)), cls.N_BINS - 2)

    @classmethod
    def centre(cls, i: int) -> float:
        if i == 0:
            return 0.0
        return cls.LOW * cls.RATIO ** (i - 0.5)

    def add(self, x: float, k: int = 1) -> None:
        self.counts[self.bin_of(x)] += k
        self.n += k

    def quantiles(self, ps: list[float], counts: list[int] | None = None) -> list[float]:
        """Nearest-rank quantiles (index round(p * (n - 1)) of the sorted values), as bin centres."""
        cum = list(itertools.accumulate(self.counts if counts is None else counts))
        n = cum[-1]
        out = []
        for p in ps:
            k = min(n - 1, int(p * (n - 1) + 0.5))
            out.append(self.centre(bisect.bisect_right(cum, k)))
        return out


class LoopStats:
    """Lateness of the control loop's ticks (wall seconds after they were due), over the last ``maxlen`` ticks.

    ``summary`` (read by every /api/status and every new event stream) costs the same after 20 ticks
    or 20 million: p50/p99 come from a fixed histogram of the window (within LateHistogram.RESOLUTION),
    the maximum is exact (a monotonic queue of the window).  ``add`` stays O(1) amortised.
    """

    def __init__(self, maxlen: int = 20000) -> None:
        self._late: deque[float] = deque(maxlen=maxlen)
        self._hist = LateHistogram()
        self._peaks: deque[tuple[int, float]] = deque()  # (tick number, value), values decreasing
        self._lock = threading.Lock()
        self.ticks = 0

    def add(self, lateness: float) -> None:
        with self._lock:
            if len(self._late) == self._late.maxlen:
                self._hist.add(self._late[0], -1)  # the one about to leave the window
            self._late.append(lateness)
            self._hist.add(lateness)
            self.ticks += 1
            while self._peaks and not self._peaks[-1][1] > lateness:
                self._peaks.pop()
            self._peaks.append((self.ticks, lateness))
            while self._peaks[0][0] <= self.ticks - len(self._late):
                self._peaks.popleft()

    def clear(self) -> None:
        with self._lock:
            self._late.clear()
            self._hist = LateHistogram()
            self._peaks.clear()

    def values(self) -> list[float]:
        with self._lock:
            return list(self._late)

    def summary(self) -> dict[str, float | int | None]:
        with self._lock:
            n, ticks = len(self._late), self.ticks
            counts = list(self._hist.counts)
            peak = self._peaks[0][1] if self._peaks else None
        if not n or peak is None:
            return {"ticks": ticks, "n": 0, "p50_ms": None, "p99_ms": None, "max_ms": None}
        p50, p99 = (min(q, peak) * 1e3 for q in self._hist.quantiles([0.5, 0.99], counts))
        return {"ticks": ticks, "n": n, "p50_ms": p50, "p99_ms": p99, "max_ms": peak * 1e3}


# ----------------------------------------------------------------------------- the daemon
def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def describe_instrument(instrument: Instrument) -> dict[str, Any]:
    """What a client needs to draw the gas system: chambers (cm^3), valve roles, limits."""
    roles = instrument.roles
    ch = instrument.chambers
    return {
        "name": instrument.name,
        "gas": instrument.gas,
        "pressure_is_gauge": instrument.pressure_is_gauge,
        "sample_period_s": instrument.sample_period,
        "max_pressure_pa": instrument.limits.max_pressure,
        "relief_setting_pa": instrument.limits.relief_setting,
        "valves": list(instrument.valves.valve_names),
        "roles": {"inlet": roles.inlet, "vent": roles.vent, "expansion": dict(roles.expansion),
                  "other": list(roles.other)},
        "chambers": {
            "cell_cm3": ch.cell * 1e6,
            "expansion_cm3": {name: ch.for_expansion(name).vr * 1e6 for name in roles.expansion},
        },
        "thermometer": instrument.thermometer is not None,
        "barometer": instrument.barometer is not None,
        "identity": instrument.identity,
        "simulated": instrument.simulated,
    }


STATE_FILE = "daemon-state.json"  # the queue's pause and the interlock latch, kept over a restart
DAMAGED_STATE_TRIP = "saved_state_damaged"  # the latch a damaged state file leaves: it may have held one
_BEFORE_RESTART = "before the daemon restarted: "


def load_daemon_state(path: Path) -> tuple[dict[str, Any], str | None]:
    """The saved pause and latch, and a problem when the file is there but cannot be trusted.

    A missing file is a first start (nothing saved); anything unreadable is reported, and the caller
    starts paused, because what it said is not known.  Only a regular file is opened: opening a FIFO
    in its place blocked ``serve`` before it listened, and opening a device may act on the device.  What
    is not a readable file is reported with its path to remove or replace: a directory above all, which
    no save can replace, so until it goes every start latches again.
    """
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return {}, None
    except OSError as exc:
        return {}, f"{type(exc).__name__}: {exc.strerror or exc}; remove or replace {path}"
    if stat.S_ISDIR(st.st_mode):  # a rename cannot replace it: no state is ever saved until it goes
        return {}, (f"it is a directory, not a file, and the daemon cannot save its state over a directory, "
                    f"so every start would latch again; remove or replace {path}")
    if not stat.S_ISREG(st.st_mode):
        return {}, f"it is {_file_kind(st.st_mode)}, not a file, and was not opened; remove or replace {path}"
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_NOCTTY", 0))
        with os.fdopen(fd, "rb") as f:
            if not stat.S_ISREG(os.fstat(f.fileno()).st_mode):  # replaced between the stat and the open
                return {}, f"it is not a file; remove or replace {path}"
            raw = f.read()
    except FileNotFoundError:
        return {}, None
    except OSError as exc:
        return {}, f"{type(exc).__name__}: {exc.strerror or exc}; remove or replace {path}"
    try:
        state = json.loads(raw)
    except (ValueError, UnicodeDecodeError) as exc:
        return {}, f"not JSON ({type(exc).__name__})"
    version = state.get("version") if isinstance(state, dict) else None
    # true == 1 in Python: a version must be the int 1 itself, not a bool (nor 1.0)
    if not isinstance(state, dict) or type(version) is not int or version != 1 \
            or not isinstance(state.get("paused"), bool) \
            or not (state.get("latched") is None or isinstance(state.get("latched"), dict)):
        return {}, "not a version 1 state"
    latch = state.get("latched")
    if latch is not None and not (isinstance(latch.get("kind"), str) and latch["kind"].strip()):
        return {}, "a latch without its kind"  # it said latched, but not which rule: not known
    return state, None


def _file_kind(mode: int) -> str:
    """What is at a path that is not a regular file, in words."""
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "a special file"


@dataclasses.dataclass
class _Command:
    fn: Callable[[Controller], Any]
    future: concurrent.futures.Future[Any]


class Daemon:
    """Owns one instrument: control thread, persistent queue, status snapshot, event bus."""

    def __init__(self, instrument: Instrument, data: Path | str, *, catalog: Catalog | None = None,
                 on_fatal: Callable[[BaseException], None] | None = None) -> None:
        self.instrument = instrument
        self.data = Path(data)
        self.data.mkdir(parents=True, exist_ok=True)
        (self.data / "runs").mkdir(exist_ok=True)
        (self.data / "sequences").mkdir(exist_ok=True)
        self.catalog = catalog or Catalog(self.data / "catalog.sqlite")
        self.on_fatal = on_fatal
        self.bus = EventBus()
        self.stats = LoopStats()
        self.description = describe_instrument(instrument)
        # (t, gauge Pa, run state) at the sample events' pace: a dashboard that connects late draws the
        # history with its phase shading from it
        self.trace: deque[tuple[float, float | None, str]] = deque(maxlen=TRACE_POINTS)
        self._lock = threading.Lock()
        self._runnable: list[str] | None = None  # shipped_sequences, read once
        self._commands: deque[_Command] = deque()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._stop_reason = "the daemon shut down"
        self._abort = threading.Event()
        self._thread: threading.Thread | None = None
        # the saved state is written off the control thread (an fsync on a slow card must not hold a tick)
        self._state_due = threading.Event()
        self._state_writer: threading.Thread | None = None
        self._next_sample_pub = -math.inf
        self._last_trace_t = -math.inf
        self._watchdog = watchdog_interval()
        self._watchdog_due = 0.0
        self.failed: BaseException | None = None
        self._idle_due: float | None = None
        self._run_wall_last: float | None = None
        clock = instrument.clock
        self._realtime = bool(getattr(clock, "realtime", True))  # WallClock has no attribute: real time
        self._speed = float(getattr(clock, "speed", 1.0)) if self._realtime else 1.0
        # safe state first, before anything else is looked at (Controller() asserts it too)
        self.controller = Controller(instrument)
        self.controller.listeners.append(self._on_event)
        interrupted = self.catalog.mark_interrupted_on_startup(runs_dir=self.data / "runs")
        orphans = self._orphaned_queued()
        self._state_lock = threading.Lock()  # one writer of the saved queue state at a time
        saved, state_problem = load_daemon_state(self.data / STATE_FILE)
        self._saved_state: dict[str, Any] | None = saved  # what the file holds: a save that changes nothing is skipped
        self._snap: dict[str, Any] = {
            "state": "idle",
            "activity": "starting",
            "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "safe_state_on_start": True,
            "pressure": {"gauge_pa": None, "valid": None, "t": None, "ambient_pa": None, "temperature_k": None},
            "valves": {},
            "interlock": {"latched": False},
            "current_run": None,
            "last_run": None,
            "queue": {"length": 0, "paused": False, "paused_reason": None},
            "interrupted_on_start": interrupted + orphans,
        }
        reasons: list[str] = []
        if interrupted or orphans:
            reasons.append(f"run {', '.join(interrupted + orphans)} was interrupted when the daemon stopped; "
                           "it is not resumed - check the instrument, then resume the queue")
            log.warning("runs interrupted by the previous daemon: %s; queue paused",
                        ", ".join(interrupted + orphans),
                        extra={"data": {"event": "interrupted_on_start", "runs": interrupted + orphans}})
        if state_problem is not None:
            reasons.append(f"the saved queue state ({STATE_FILE}) is damaged: {state_problem}; paused to be safe - "
                           "check the instrument and reset any interlock, then resume the queue")
        if saved.get("paused"):
            why = str(saved.get("paused_reason") or "paused by the operator")
            reasons.append(why if why.startswith(_BEFORE_RESTART) else _BEFORE_RESTART + why)
        latch = saved.get("latched")
        if state_problem is not None:  # it may have held a latch: what it said is not known, so it is latched
            latch = {"kind": DAMAGED_STATE_TRIP,
                     "message": f"the saved daemon state ({STATE_FILE}) is damaged ({state_problem}), so an "
                                "interlock it may have held is not known: check the instrument, then reset"}
        if isinstance(latch, dict):
            trip = self.controller.monitor.restore_latch(
                str(latch.get("kind") or "unknown"), self.instrument.clock.now(),
                str(latch.get("message") or ""), _num(latch.get("value")), _num(latch.get("limit")))
            self._refresh_interlock(save=False)
            # latched but not paused (a file from before trips paused the queue): paused now
            if not saved.get("paused") and state_problem is None:
                reasons.append(f"interlock {trip.kind} latched before the daemon restarted: reset it, then resume "
                               "the queue")
            log.warning("interlock %s latched before the restart is still latched: %s; an operator reset clears it",
                        trip.kind, trip.message, extra={"data": {"event": "latched_on_start", "interlock": trip.kind}})
        waiting = len(self.catalog.queue_list())
        if waiting and not reasons:  # no run starts after a restart without an operator's go-ahead
            reasons.append(f"{waiting} run{'s' if waiting != 1 else ''} waiting from before the daemon restarted; "
                           "resume the queue to start them")
        if reasons:
            self._snap["queue"].update(paused=True, paused_reason="; ".join(reasons))
            log.warning("queue paused on start: %s", "; ".join(reasons),
                        extra={"data": {"event": "paused_on_start"}})
        log.info("safe state asserted on start", extra={"data": {"event": "safe_state", "why": "start"}})
        self._refresh_queue_len()
        self._save_state()

    def _orphaned_queued(self) -> list[str]:
        """Runs still 'queued' but gone from the queue table (popped just before a crash): interrupted."""
        queued = {e.run_id for e in self.catalog.queue_list()}
        out = []
        for row in self.catalog.list_runs(status="queued", limit=10000):
            if row.id not in queued:
                self.catalog.update_status(row.id, "interrupted", "daemon stopped before the run began; not resumed")
                out.append(row.id)
        return out

    # ------------------------------------------------------------------ lifecycle
    def start(self) -> None:
        self._state_writer = threading.Thread(target=self._write_state_when_due, name="pycnoctl-state", daemon=True)
        self._state_writer.start()
        self._thread = threading.Thread(target=self._main, name="pycnoctl-control", daemon=True)
        self._thread.start()

    def _write_state_when_due(self) -> None:
        while not self._stop.is_set():
            if self._state_due.wait(0.5):
                self._state_due.clear()
                self._save_state()

    def stop(self, timeout: float = 10.0, reason: str = "the daemon shut down") -> None:
        """Abort any run, leave the instrument in the safe state and end the control thread.

        ``reason`` (what stopped the daemon: a signal, say) becomes an active run's abort reason and is
        logged with the safe state, so the record does not blame an operator who asked nothing.
        """
        self._stop_reason = reason
        self._stop.set()
        self._abort.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
        if self._state_writer is not None:
            self._state_writer.join(timeout)
        self._save_state()  # whatever the control thread left for the writer
        if self.instrument.safe_state():
            log.info("safe state asserted on stop (%s)", reason,
                     extra={"data": {"event": "safe_state", "why": "stop", "reason": reason}})
        sd_notify("STOPPING=1")

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def _main(self) -> None:
        try:
            self._set(activity="tripped" if self.controller.monitor.latched is not None else "idle")
            while not self._stop.is_set():
                self._drain_commands()
                if self._next_run_allowed():
                    self._run_next()
                    continue
                self._idle_tick()
        except BaseException as exc:  # the loop is the safety: any escape means safe state and exit
            self.failed = exc
            log.critical("control loop failed: %s: %s", type(exc).__name__, exc, exc_info=True,
                         extra={"data": {"event": "control_failed"}})
            self.instrument.safe_state()
            self._set(activity="failed", state="stopped")
            self.bus.publish("daemon", {"activity": "failed", "message": f"{type(exc).__name__}: {exc}"})
            if self.on_fatal is not None:
                self.on_fatal(exc)
        finally:
            self.instrument.safe_state()
            self._fail_pending("the control loop has stopped")
            if not self.failed:
                self._set(activity="stopped", state="stopped")

    # ------------------------------------------------------------------ idle pacing
    def _idle_tick(self) -> None:
        period = self.instrument.sample_period
        clock = self.instrument.clock
        if not self._realtime:  # a simulated clock: advance its time one period per short wall wait
            self.controller.tick()
            if self._wake.wait(min(period, 0.02)):
                self._wake.clear()
            clock.sleep(period)
            return
        now = clock.now()
        due = self._idle_due
        if due is None or now - due > 5 * period:  # first idle tick, or just back from a run
            due, measured = now, False
        else:
            measured = True
        if now < due:  # early (woken by a command): wait for the slot, then come back round
            self._wake.wait((due - now) / self._speed)
            self._wake.clear()
            return
        if measured:
            self.stats.add((now - due) / self._speed)
        self.controller.tick()
        self._idle_due = due + period

    def _ping_watchdog(self) -> None:
        if self._watchdog is None:
            return
        now = time.monotonic()
        if now >= self._watchdog_due:
            self._watchdog_due = now + self._watchdog
            sd_notify("WATCHDOG=1")

    # ------------------------------------------------------------------ commands
    def call(self, fn: Callable[[Controller], Any], timeout: float = 5.0) -> Any:
        """Run ``fn(controller)`` in the control thread between ticks and return its result."""
        if not self.running:
            raise RuntimeError("the control loop is not running")
        fut: concurrent.futures.Future[Any] = concurrent.futures.Future()
        with self._lock:
            self._commands.append(_Command(fn, fut))
        self._wake.set()
        return fut.result(timeout)

    def submit_call(self, fn: Callable[[Controller], Any]) -> concurrent.futures.Future[Any]:
        """Like call() but returns the Future (an event loop awaits it without blocking)."""
        fut: concurrent.futures.Future[Any] = concurrent.futures.Future()
        if not self.running:
            fut.set_exception(RuntimeError("the control loop is not running"))
            return fut
        with self._lock:
            self._commands.append(_Command(fn, fut))
        self._wake.set()
        return fut

    def _drain_commands(self) -> None:
        while True:
            with self._lock:
                if not self._commands:
                    return
                cmd = self._commands.popleft()
            if not cmd.future.set_running_or_notify_cancel():
                continue
            try:
                cmd.future.set_result(cmd.fn(self.controller))
            except Exception as exc:
                cmd.future.set_exception(exc)

    def _fail_pending(self, why: str) -> None:
        with self._lock:
            pending, self._commands = list(self._commands), deque()
        for cmd in pending:
            if cmd.future.set_running_or_notify_cancel():
                cmd.future.set_exception(RuntimeError(why))

    def submit_reset(self) -> concurrent.futures.Future[tuple[bool, str]]:
        def do(c: Controller) -> tuple[bool, str]:
            if c.engine is not None and not c.engine.terminal:
                return False, "a run is active; nothing is latched while it runs"
            was = c.monitor.latched
            if was is None:
                return True, "nothing was latched"
            ok = c.reset()
            why = "" if ok else (c.monitor.last_reset_refusal or "the condition is still present")
            log.warning("interlock reset %s%s", "accepted" if ok else "refused", f": {why}" if why else "",
                        extra={"data": {"event": "reset", "accepted": ok, "was": was.kind, "reason": why}})
            self._refresh_interlock()
            return ok, (f"cleared {was.kind}" if ok else why)

        return self.submit_call(do)

    def abort(self) -> bool:
        """Abort the active run (safe state through the engine). False when nothing runs."""
        with self._lock:
            active = self._snap.get("current_run") is not None
        if active:
            self._abort.set()
            self._wake.set()
            log.warning("abort requested", extra={"data": {"event": "abort"}})
        return active

    def pause(self, reason: str = "paused by the operator") -> None:
        with self._lock:
            self._snap["queue"]["paused"] = True
            self._snap["queue"]["paused_reason"] = reason
        self._save_state()
        self.bus.publish("queue", self._queue_event())

    def resume(self) -> None:
        with self._lock:
            self._snap["queue"]["paused"] = False
            self._snap["queue"]["paused_reason"] = None
        self._save_state()
        log.info("queue resumed", extra={"data": {"event": "queue_resume"}})
        self.bus.publish("queue", self._queue_event())
        self._wake.set()

    # ------------------------------------------------------------------ queue
    def shipped_sequences(self) -> list[str]:
        """The shipped sequences a run may name: a calibration sequence is calibrate's (not_for_a_run)."""
        from pycnoctl.controller.run.sequence import load_sequence

        if self._runnable is None:  # the shipped files do not change while the daemon runs
            self._runnable = [name for name, path in list_shipped().items()
                              if not_for_a_run(load_sequence(path)) is None]
        return list(self._runnable)

    def submit(self, *, sequence: str | None = None, sequence_text: str | None = None, sample_id: str = "",
               mass: float | None = None, u_mass: float = 0.0, bulk_volume: float | None = None,
               operator: str = "", expansion_volume: str | None = None, note: str = "",
               u_bulk_volume: float = 0.0) -> dict[str, Any]:
        """Validate a run request against the instrument, queue it and return its issued ID.

        The sequence is a shipped sequence's name or the text of one; never a path on this machine.
        """
        if (sequence is None) == (sequence_text is None):
            raise SubmitError("give exactly one of 'sequence' (a shipped name) or 'sequence_text'")
        if sequence is not None:
            shipped = list_shipped()
            stem = sequence[:-5] if sequence.endswith(".yaml") else sequence
            if stem not in shipped:
                raise SubmitError(f"no shipped sequence {sequence!r}; shipped: {', '.join(shipped)}",
                                  field="sequence")
            sequence = stem
        elif len(sequence_text.encode("utf-8")) > MAX_SEQUENCE_TEXT:  # type: ignore[union-attr]
            raise SubmitError(f"sequence text over {MAX_SEQUENCE_TEXT} bytes", status=413)
        problem = specimen_problem(mass, u_mass, bulk_volume, u_bulk_volume)
        if problem is not None:
            raise SubmitError(problem[1], field=problem[0])
        unknown = None if expansion_volume is None else \
            unknown_volume(expansion_volume, list(self.instrument.roles.expansion))
        if unknown is not None:  # as prepare says it, at its field, for a form
            raise SubmitError(unknown, field="expansion_volume")
        request = {"sequence": sequence, "sequence_text": sequence_text, "sample_id": sample_id, "mass": mass,
                   "u_mass": u_mass, "bulk_volume": bulk_volume, "u_bulk_volume": u_bulk_volume,
                   "operator": operator,
                   "expansion_volume": expansion_volume, "note": note}
        run_id = self.catalog.new_run_id()
        prepared = self._prepare(run_id, request)  # raises SubmitError; nothing is queued then
        self.catalog.create_run(kind=prepared.sequence.kind, sample_id=sample_id or None,
                                sequence_name=prepared.sequence.name, status="queued", run_id=run_id)
        self.catalog.queue_push(run_id, request)
        log.info("run %s queued (%s, sample %r)", run_id, prepared.sequence.name, sample_id,
                 extra={"data": {"event": "queued", "run_id": run_id, "sequence": prepared.sequence.name}})
        self._refresh_queue_len()
        self.bus.publish("queue", self._queue_event())
        self._wake.set()
        return {"run_id": run_id, "sequence": prepared.sequence.name, "kind": prepared.sequence.kind,
                "expansion_volume": prepared.expansion_volume, "warnings": prepared.warnings,
                "expected_s": estimate_duration(prepared.sequence)}

    def _sequence_path(self, run_id: str, request: dict[str, Any]) -> Path:
        if request.get("sequence") is not None:
            return list_shipped()[request["sequence"]]
        if not is_run_id(run_id):
            raise SubmitError("bad run ID")
        path = self.data / "sequences" / f"{run_id}.yaml"
        text = request.get("sequence_text") or ""
        if not path.exists() or path.read_text(encoding="utf-8") != text:
            tmp = path.with_name(f".{path.name}.tmp")
            tmp.write_text(text, encoding="utf-8")
            os.replace(tmp, path)
        return path

    def _prepare(self, run_id: str, request: dict[str, Any]) -> Any:
        path = self._sequence_path(run_id, request)
        rr = RunRequest(path, sample_id=request.get("sample_id") or "", mass=request.get("mass"),
                        u_mass=request.get("u_mass") or 0.0, bulk_volume=request.get("bulk_volume"),
                        u_bulk_volume=request.get("u_bulk_volume") or 0.0,
                        operator=request.get("operator") or "", expansion_volume=request.get("expansion_volume"),
                        note=request.get("note") or "")
        try:
            prepared = prepare(rr, self.instrument, self.catalog)
            why = not_for_a_run(prepared.sequence)
            if why is not None:
                raise _NotARun(why)
            if prepared.sequence.kind == "measure":  # no calibration and no stated nominal u: refused now
                find_calibration(self.instrument, self.catalog, expansion_volume=prepared.expansion_volume,
                                 gas=prepared.sequence.gas)
            return prepared
        except (ConfigError, ValueError, RecursionError, _NotARun) as exc:
            if request.get("sequence") is None:  # submitted text that will never run leaves no file behind
                with contextlib.suppress(OSError):
                    path.unlink()
            if isinstance(exc, _NotARun):
                raise SubmitError(str(exc), field="sequence") from None
            if isinstance(exc, ConfigError):
                raise SubmitError("the sequence has problems",
                                  [_problem_text(p, path) for p in exc.problems]) from None
            if isinstance(exc, RecursionError):  # a hostile text nested hundreds deep: refused, not a 500
                raise SubmitError("the sequence text is nested too deeply to read") from None
            raise SubmitError(str(exc)) from None

    def queue(self) -> list[dict[str, Any]]:
        out = []
        # position: 1 for the next to start (the catalog's row number only orders them: it grew without end,
        # and the only waiting run showed as 15 - a sweep)
        for position, e in enumerate(self.catalog.queue_list(), 1):
            r = e.request
            out.append({"position": position, "run_id": e.run_id,
                        "sequence": r.get("sequence") or "(submitted text)", "sample_id": r.get("sample_id"),
                        "operator": r.get("operator"), "mass_g": r["mass"] * 1e3 if r.get("mass") else None})
        return out

    def remove_queued(self, run_id: str) -> bool:
        """Take a queued run off the queue (it becomes 'cancelled' in the catalog: it never started)."""
        if not self.catalog.queue_remove(run_id):
            return False
        with contextlib.suppress(Exception):
            self.catalog.update_status(run_id, "cancelled", "removed from the queue by the operator before it started")
        log.info("run %s removed from the queue", run_id, extra={"data": {"event": "dequeued", "run_id": run_id}})
        self._refresh_queue_len()
        self.bus.publish("queue", self._queue_event())
        return True

    def _queue_event(self) -> dict[str, Any]:
        with self._lock:
            q = dict(self._snap["queue"])
        return {**q, "items": self.queue()}

    def _refresh_queue_len(self) -> None:
        n = len(self.catalog.queue_list())
        with self._lock:
            self._snap["queue"]["length"] = n

    # ------------------------------------------------------------------ running
    def _next_run_allowed(self) -> bool:
        with self._lock:
            paused = self._snap["queue"]["paused"]
            n = self._snap["queue"]["length"]
        return not paused and n > 0 and self.controller.monitor.latched is None and not self._stop.is_set()

    def _run_next(self) -> None:
        entry = self.catalog.queue_pop()
        self._refresh_queue_len()
        if entry is None:
            return
        rid, req = entry.run_id, entry.request
        try:
            prepared = self._prepare(rid, req)
        except SubmitError as exc:
            msg = "; ".join([str(exc), *exc.problems])
            self.catalog.update_status(rid, "fault", msg)
            log.error("run %s not started: %s", rid, msg, extra={"data": {"event": "not_started", "run_id": rid}})
            self.bus.publish("run_finished", {"run_id": rid, "status": "fault", "message": msg})
            return
        self._abort.clear()
        seq = prepared.sequence
        current = {"run_id": rid, "sample_id": req.get("sample_id"), "operator": req.get("operator"),
                   "sequence": seq.name, "kind": seq.kind, "expansion_volume": prepared.expansion_volume,
                   "cycles_total": seq.cycles.count if seq.expands else 0, "cycle": 0, "cycles": [],
                   "expected_s": estimate_duration(seq), "t_start": self.instrument.clock.now(),
                   "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "purge_pulse": None,
                   "warnings": [], "calibration": self._calibration_brief(prepared)}  # warnings: as they come
        self._set(current_run=current, activity="running")
        self.bus.publish("run_started", {k: v for k, v in current.items() if k != "cycles"})
        self.bus.publish("queue", self._queue_event())
        log.info("run %s started (%s)", rid, seq.name, extra={"data": {"event": "run_started", "run_id": rid}})
        self._run_wall_last = None
        try:
            summary = execute(prepared, self.controller, root=self.data / "runs", catalog=self.catalog,
                              run_id=rid, should_stop=self._should_stop)
        except CalibrationRefused as exc:  # the calibrations changed since it was queued; nothing moved
            log.error("run %s refused: %s", rid, exc, extra={"data": {"event": "not_started", "run_id": rid}})
            self.bus.publish("run_finished", {"run_id": rid, "status": "aborted", "message": f"refused: {exc}"})
            self._set(activity="idle")
            self.pause(f"run {rid} refused: {exc}")
            return
        except (StorageFault, RunFault) as exc:  # safe state reached, row closed where it could be written:
            # the loop goes on (the interlocks watch while idle); the queue waits for the operator
            log.error("run %s not stored: %s", rid, exc, extra={"data": {"event": "not_stored", "run_id": rid}})
            self.bus.publish("run_finished", {"run_id": rid, "status": "fault", "message": str(exc)})
            self._set(activity="idle")
            self.pause(f"run {rid} not stored: {exc}; check the data folder, then resume the queue")
            return
        finally:
            self._run_wall_last = None
            self._set(current_run=None)
        brief = brief_result(summary)
        status = summary["status"]
        with self._lock:
            self._snap["last_run"] = brief
            self._snap["activity"] = "idle"
        self._refresh_interlock()
        self.bus.publish("run_finished", brief)
        log.info("run %s ended: %s", rid, status, extra={"data": {"event": "run_finished", **brief}})
        if status != "completed" and not self._stop.is_set():
            self.pause(f"run {rid} ended {status}" + (f" ({brief['message']})" if brief.get("message") else "")
                       + "; check the instrument, then resume the queue")

    def _calibration_brief(self, prepared: Any) -> dict[str, Any] | None:
        """The calibration the run will compute with (id and age, or uncalibrated); None for a run that
        computes no volume."""
        if prepared.sequence.kind != "measure":
            return None
        try:
            return calibration_brief(self.instrument, self.catalog, expansion_volume=prepared.expansion_volume,
                                     gas=prepared.sequence.gas)
        except CalibrationRefused:
            return None  # execute() refuses it with the reason

    def _should_stop(self) -> bool | str:
        # Called by the tick loop on every tick of a run: answer waiting commands (a reset is refused
        # while running) and honour abort / shutdown (a shutdown gives its reason for the record).
        self._drain_commands()
        if self._stop.is_set():
            return self._stop_reason
        return self._abort.is_set()

    # ------------------------------------------------------------------ listener (control thread)
    def _on_event(self, kind: str, data: dict[str, Any]) -> None:
        """Controller listener: O(1) bookkeeping only; never blocks."""
        if kind == "sample":
            self._on_sample(data)
            return
        self._ping_watchdog()
        with self._lock:
            cur = self._snap.get("current_run")
            if kind == "state":
                self._snap["state"] = data.get("state")
            elif kind == "cycle" and cur is not None:
                cur["cycle"] = data.get("cycle", cur["cycle"])
            elif kind == "purge_pulse" and cur is not None:
                cur["purge_pulse"] = f"{data.get('pulse')} of {data.get('of')}"
            elif kind == "warning" and cur is not None and data.get("message"):
                cur["warnings"] = [*cur.get("warnings", []), str(data["message"])]
        if kind == "cycle_done":
            brief = {"cycle": data.get("cycle"), **self._cycle_brief(data)}
            with self._lock:
                cur = self._snap.get("current_run")
                if cur is not None:
                    out = set(data.get("left_out") or ())
                    cur["cycles"] = [*({**c, "kept": False} if c.get("cycle") in out else c for c in cur["cycles"]),
                                     brief]
        if kind in ("trip", "reset"):
            self._refresh_interlock()
            if kind == "trip":
                log.error("interlock trip %s: %s", data.get("interlock"), data.get("message"),
                          extra={"data": {"event": "trip", **{k: v for k, v in data.items() if k != "message"}}})
        self.bus.publish(kind, _clean(data))

    @staticmethod
    def _cycle_brief(data: dict[str, Any]) -> dict[str, Any]:
        """The dashboard's row of a finished cycle: the engine's cycle result as it came (SI units)."""
        r = data.get("result") or {}
        keep = ("p1_gauge_pa", "p2_gauge_pa", "volume_m3", "u_volume_m3", "kept", "flags")
        return {k: r[k] for k in keep if k in r}

    def _on_sample(self, data: dict[str, Any]) -> None:
        last = self.controller.last
        gauge = _num(data.get("gauge"))
        t = data.get("t")
        wall = time.monotonic()
        if self.controller.engine is not None and self._realtime:  # run ticks: lateness from spacing
            prev = self._run_wall_last
            if prev is not None:
                self.stats.add(max(wall - prev - self.instrument.sample_period / self._speed, 0.0))
            self._run_wall_last = wall
        temp = last.temperature if last is not None else None
        with self._lock:
            self._snap["state"] = data.get("state", "idle")
            self._snap["pressure"] = {
                "gauge_pa": gauge, "valid": data.get("valid"), "t": t,
                "ambient_pa": _num(last.ambient) if last is not None else None,
                "temperature_k": _num(temp.value) if temp is not None and temp.valid else None,
            }
            self._snap["valves"] = dict(data.get("valves") or {})
            cur = self._snap.get("current_run")
            if cur is not None and isinstance(t, (int, float)):
                cur["elapsed_s"] = t - cur["t_start"]
        self._ping_watchdog()
        if wall >= self._next_sample_pub:  # a schedule, not a gap: <= 10/s on average, none lost to jitter
            self._next_sample_pub = max(self._next_sample_pub + SAMPLE_EVENT_INTERVAL, wall - SAMPLE_EVENT_INTERVAL / 2)
            self.trace.append((float(t) if t is not None else math.nan, gauge, str(data.get("state") or "idle")))
            self.bus.publish("sample", {"t": t, "gauge_pa": gauge, "valid": data.get("valid"),
                                        "state": data.get("state"), "valves": dict(data.get("valves") or {})})

    def _refresh_interlock(self, *, save: bool = True) -> None:
        trip = self.controller.monitor.latched
        info: dict[str, Any] = {"latched": trip is not None}
        if trip is not None:
            info.update({"kind": trip.kind, "message": trip.message, "t": trip.t,
                         "value": _num(trip.value), "limit": _num(trip.limit)})
        with self._lock:
            newly = trip is not None and not self._snap["interlock"].get("latched")
            self._snap["interlock"] = info
            if trip is not None and self._snap["activity"] == "idle":
                self._snap["activity"] = "tripped"
            elif trip is None and self._snap["activity"] == "tripped":
                self._snap["activity"] = "idle"
            unpaused = not self._snap["queue"]["paused"]
        if newly and unpaused and save:
            # a trip pauses the queue too, so that the reset that clears it starts nothing (found by a sweep:
            # a trip while idle left the queue running, and the operator's reset started the next run at once)
            assert trip is not None
            self.pause(f"interlock {trip.kind} tripped: check the instrument, reset the interlock, then resume "
                       "the queue")
            log.warning("queue paused by interlock %s", trip.kind,
                        extra={"data": {"event": "queue_pause", "interlock": trip.kind}})
        elif save:
            self._save_state()

    # ------------------------------------------------------------------ saved queue state
    def _save_state(self) -> None:
        """Write the pause and the latch to the data folder when they changed, so a restart keeps them.

        Never raises: a state that cannot be written is logged, and the daemon goes on with it in memory
        (the next start then finds the runs waiting and comes up paused all the same). On the control
        thread it only asks the writer thread, after the safe state, so no tick waits on the disk.
        """
        writer = self._state_writer
        if threading.current_thread() is self._thread and writer is not None and writer.is_alive():
            self._state_due.set()
            return
        with self._state_lock:
            with self._lock:
                q = self._snap["queue"]
                il = self._snap["interlock"]
                state: dict[str, Any] = {
                    "version": 1, "paused": bool(q["paused"]), "paused_reason": q["paused_reason"],
                    "latched": ({k: il.get(k) for k in ("kind", "message", "value", "limit")}
                                if il.get("latched") else None)}
            if state == self._saved_state:
                return
            try:
                atomic_write(self.data / STATE_FILE, (json.dumps(state, indent=1) + "\n").encode("utf-8"))
            except Exception as exc:
                log.error("queue state not saved: %s: %s", type(exc).__name__, exc,
                          extra={"data": {"event": "state_not_saved"}})
                return
            self._saved_state = state

    # ------------------------------------------------------------------ snapshot
    def _set(self, **kv: Any) -> None:
        with self._lock:
            self._snap.update(kv)
        if "activity" in kv:
            self.bus.publish("daemon", {"activity": kv["activity"]})

    def snapshot(self) -> dict[str, Any]:
        """A consistent copy of the status for a client (JSON-ready)."""
        with self._lock:
            snap = json.loads(json.dumps(self._snap, default=str))
        snap["instrument"] = self.description
        snap["loop"] = {"running": self.running, **self.stats.summary(), "realtime": self._realtime,
                        "speed": self._speed}
        snap["events_seq"] = self.bus.last_seq
        return snap

    def recent_trace(self, seconds: float | None = None) -> list[tuple[float, float | None, str]]:
        pts = list(self.trace)
        if seconds is not None and pts:
            t_end = pts[-1][0]
            pts = [p for p in pts if p[0] >= t_end - seconds]
        return pts


def brief_result(summary: dict[str, Any]) -> dict[str, Any]:
    """The few numbers a dashboard shows for a finished run."""
    keys = ("run_id", "status", "sample_id", "operator", "volume_cm3", "volume_u_cm3", "k", "density_g_cm3",
            "density_u_g_cm3", "rsd", "n_kept", "porosity", "porosity_u", "leak_rate_pa_s", "leak_ok",
            "expansion_volume", "started_utc", "ended_utc", "instrument_time_s", "mass_g")
    out = {k: summary.get(k) for k in keys}
    out["sequence"] = (summary.get("sequence") or {}).get("name")
    out["message"] = (summary.get("fault") or {}).get("message") or summary.get("abort_reason") or (
        results.not_a_measurement(summary["impossible"]) if summary.get("impossible") else None)
    out["impossible"] = summary.get("impossible")  # a result no specimen can have: the dashboard says so
    out["warnings"] = list(summary.get("warnings") or [])
    out["converged"] = summary.get("converged")
    out["simulated"] = summary.get("simulated")
    out["calibrated"] = summary.get("calibrated")
    cal = summary.get("calibration") or {}
    out["calibration_id"] = cal.get("record_id")
    out["calibration_created"] = (cal.get("record") or {}).get("created")
    return _clean(out)


def _clean(d: dict[str, Any]) -> dict[str, Any]:
    """NaN/inf become null so every event is valid JSON."""
    out: dict[str, Any] = {}
    for k, v in d.items():
        if isinstance(v, float) and not math.isfinite(v):
            out[k] = None
        elif isinstance(v, dict):
            out[k] = _clean(v)
        else:
            out[k] = v
    return out


def _problem_text(p: Problem, path: Path) -> str:
    """A problem in submitted text, positioned as <submitted>:line:col (the server path is not shown)."""
    name = "<submitted>" if Path(p.file).name == path.name else Path(p.file).name
    return f"{name}:{p.line}:{p.col}: {p.message}"
