"""Daemon under load: control-loop tick lateness and /api/status latency, with and without clients.

Runs the daemon in-process on the real-time simulator (speed 1: a 10 Hz loop, as on hardware),
serves it with uvicorn on 127.0.0.1, and measures for a fixed time:
  * quiet: no clients at all (tick lateness only), then one status poller (latency baseline);
  * loaded: 50 concurrent clients, half polling /api/status, half holding /api/events streams.
Prints p50/p99/max of tick lateness (ms after the tick was due) and of /api/status latency, and
the loaded/quiet ratios.  Loopback only; bounded client count and duration.

    python bench/bench_daemon.py [--seconds 8] [--clients 50]
"""

from __future__ import annotations

import argparse
import asyncio
import tempfile
import time

import httpx

from pycnoctl.controller.service.api import serve_in_thread
from pycnoctl.controller.service.daemon import Daemon
from pycnoctl.drivers.simulated import build_sim_instrument


def pct(vals: list[float], p: float) -> float:
    s = sorted(vals)
    return s[min(len(s) - 1, int(p * (len(s) - 1) + 0.5))] if s else float("nan")


def line(name: str, vals: list[float]) -> str:
    ms = [v * 1e3 for v in vals]
    return f"{name:<34} n={len(ms):>6}  p50 {pct(ms, .5):7.2f} ms  p99 {pct(ms, .99):7.2f} ms  max {max(ms):7.2f} ms"


async def pollers(url: str, n: int, seconds: float) -> list[float]:
    lat: list[float] = []
    t_end = time.monotonic() + seconds
    limits = httpx.Limits(max_connections=n + 5)
    async with httpx.AsyncClient(base_url=url, timeout=10, limits=limits) as c:
        async def one() -> None:
            while time.monotonic() < t_end:
                t0 = time.perf_counter()
                r = await c.get("/api/status")
                lat.append(time.perf_counter() - t0)
                r.raise_for_status()
                await asyncio.sleep(0.05)

        await asyncio.gather(*(one() for _ in range(n)))
    return lat


async def streamers(url: str, n: int, seconds: float, counts: list[int]) -> None:
    t_end = time.monotonic() + seconds
    async with httpx.AsyncClient(base_url=url, timeout=httpx.Timeout(10, read=seconds + 5),
                                 limits=httpx.Limits(max_connections=n + 5)) as c:
        async def one() -> None:
            k = 0
            async with c.stream("GET", "/api/events") as r:
                async for ln in r.aiter_lines():
                    if ln.startswith("event:"):
                        k += 1
                    if time.monotonic() > t_end:
                        break
            counts.append(k)

        await asyncio.gather(*(one() for _ in range(n)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=8.0)
    ap.add_argument("--clients", type=int, default=50)
    args = ap.parse_args()
    n = max(2, min(args.clients, 200))
    secs = max(2.0, min(args.seconds, 60.0))
    inst = build_sim_instrument(None, realtime=True)
    with tempfile.TemporaryDirectory() as d:
        daemon = Daemon(inst, d)
        with serve_in_thread(daemon) as url:
            time.sleep(1.0)
            daemon.stats.clear()
            time.sleep(secs)
            quiet_ticks = daemon.stats.values()
            daemon.stats.clear()
            base_lat = asyncio.run(pollers(url, 1, secs))
            base_ticks = daemon.stats.values()
            daemon.stats.clear()
            counts: list[int] = []

            async def loaded() -> list[float]:
                res = await asyncio.gather(pollers(url, n // 2, secs), streamers(url, n - n // 2, secs, counts))
                return res[0]

            load_lat = asyncio.run(loaded())
            load_ticks = daemon.stats.values()
    print(f"daemon bench: real-time simulator, sample period {inst.sample_period * 1e3:.0f} ms, {secs:g} s per phase, "
          f"{n} clients under load ({n // 2} status pollers at <= 20/s each, {n - n // 2} event streams)")
    print(line("tick lateness, no clients", quiet_ticks))
    print(line("tick lateness, 1 status poller", base_ticks))
    print(line(f"tick lateness, {n} clients", load_ticks))
    print(line("/api/status latency, 1 poller", base_lat))
    print(line(f"/api/status latency, {n} clients", load_lat))
    print(f"stream events received per client: min {min(counts)}  max {max(counts)}")
    q99, l99 = pct(quiet_ticks, .99), pct(load_ticks, .99)
    print(f"ratio tick lateness p99 loaded/quiet: {l99 / q99:.2f}" if q99 > 0 else "quiet p99 is 0")
    print(f"ratio /api/status p99 loaded/1 poller: {pct(load_lat, .99) / pct(base_lat, .99):.2f}")
    expected = secs / inst.sample_period
    print(f"ticks counted loaded/expected: {len(load_ticks)}/{expected:.0f}")


if __name__ == "__main__":
    main()
