"""Tick timing of the real-time loop: host-clocked (clock thread vs naive asyncio.sleep) and
rig-clocked against the served rig.

Default (``--link sim``): runs the simulated pedestal in real time at the
config's rate (1 kHz for the demo) through the real tick (estimator,
supervisor, law, watchdog, records, telemetry socket), with a spike fault
half-way to measure detection-to-action, then the same tick work paced by
asyncio.sleep in the same process.

``--link serial``: starts ``corral rig serve CONFIG --serial`` (the pedestal on
its own real-time clock in another process), closes the loop over the
pseudo-terminal with the real rig-clocked runner (default watchdog unless
``--set`` says otherwise), arms it, and reports sample-to-command latency,
lateness against each sample's expected arrival, deadline misses (samples
handled more than ``loop.miss_after_periods`` late, plus sequence skips),
ticks with no sample, trips, and the device's own figures. Beside it, the
platform floor measured in the same run: a bare pseudo-terminal one-way delay
and a bare real-time sleeper (no corral code). Prints figures only.

    python bench/bench_loop.py                           # 10 s each
    python bench/bench_loop.py --seconds 60              # the README figures
    python bench/bench_loop.py --link serial --seconds 20
"""

from __future__ import annotations

import argparse
import asyncio
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.realtime import linkfloor  # noqa: E402


def main() -> int:
    from runtime.config import load_config
    from runtime.realtime.clock import naive_asyncio_lateness
    from runtime.realtime.loop import Runner, RunSettings

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--config", default=str(ROOT / "configs" / "pedestal-sim.toml"))
    ap.add_argument("--law", choices=("reference", "fast"), default="reference")
    ap.add_argument("--link", choices=("sim", "serial"), default="sim",
                    help="sim: host-clocked in-process; serial: rig-clocked against "
                         "`corral rig serve --serial`")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="config override (--link serial; repeatable)")
    ap.add_argument("--floor-seconds", type=float, default=5.0,
                    help="--link serial: seconds of each platform-floor measurement (0: skip)")
    args = ap.parse_args()
    if args.link == "serial":
        return bench_serial(args)
    tmp = tempfile.mkdtemp(prefix="corral-bench-")
    sets = [f"log.dir={tmp}", f"loop.law={args.law}", "watchdog.overrun_misses=1000000"]
    cfg = load_config(args.config, sets)
    half = args.seconds / 2

    r = Runner(cfg, RunSettings(duration=args.seconds, auto_arm=True,
                                faults=[f"spike@{half:g}:size=0.3"], echo_trips=False))
    s = asyncio.run(r.run())
    period = r.design.Ts
    print(f"corral loop bench: {r.design.rig.name}, {1 / period:.0f} Hz, {args.seconds:g} s, "
          f"law {args.law}, python {sys.version.split()[0]}")
    print(f"  clock thread ({s['clock']}):")
    print(f"    ticks {s['ticks']}, lateness p50 {s['lateness_p50_us']:.1f} us, "
          f"p99 {s['lateness_p99_us']:.1f} us, max {s['lateness_max_us']:.0f} us, "
          f"deadline misses {s['deadline_misses']}")
    for t in s["trips"]:
        print(f"    trip {t['id']}: {t['rule']} at tick {t['tick']} -> {t['action']}, "
              f"detection to action {t['detect_to_action_us']:.1f} us")

    # The same tick work, paced by asyncio.sleep on the event loop.
    cfg2 = load_config(args.config, sets)
    r2 = Runner(cfg2, RunSettings(duration=None, auto_arm=True, echo_trips=False))
    core, link = r2.core, r2.link

    async def naive() -> tuple[float, float, float, int, int]:
        await link.open()
        core.submit("arm", lambda ok, msg: None)

        def work() -> None:
            t_nom = core.tick * core.Ts
            sample = link.sample_now(t_nom)
            cmd = core.step(sample, t_nom)
            t_sent = time.monotonic()
            link.apply(cmd)
            core.after_send(t_sent)

        stats = await naive_asyncio_lateness(period, args.seconds, work)
        await link.close()
        core.close()
        p50, p99, mx = stats.percentiles_us()
        return p50, p99, mx, stats.misses, stats.count

    p50, p99, mx, misses, count = asyncio.run(naive())
    print("  naive asyncio.sleep loop (same tick work):")
    print(f"    ticks {count}, lateness p50 {p50:.1f} us, p99 {p99:.1f} us, max {mx:.0f} us, "
          f"deadline misses {misses}")
    if s["lateness_p99_us"]:
        print(f"  p99 ratio naive / clock thread: {p99 / s['lateness_p99_us']:.1f}x")
    return 0


# ------------------------------------------------------------------ --link serial
CORRAL = [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())"]


def _pct(a: Any) -> str:
    a = np.asarray(a, dtype=float)
    if a.size == 0:
        return "n/a"
    return (f"p50 {np.percentile(a, 50):.0f} us, p99 {np.percentile(a, 99):.0f} us, "
            f"p99.9 {np.percentile(a, 99.9):.0f} us, max {a.max():.0f} us")


def _floor(kind: str, seconds: float) -> list[float]:
    """A platform floor (`runtime.realtime.linkfloor`): pty one-way delays or sleeper
    lateness, us."""
    fig = linkfloor.run(kind, 1e-3, seconds)
    return list(fig.get("transit_us" if kind == "pty" else "delays_us", []))


def bench_serial(args: argparse.Namespace) -> int:
    """Rig-clocked run against `corral rig serve --serial`; prints the figures."""
    from runtime.config import load_config
    from runtime.realtime.loop import Runner, RunSettings

    tmp = tempfile.mkdtemp(prefix="corral-bench-")
    serve = subprocess.Popen([*CORRAL, "rig", "serve", args.config, "--serial", "--json",
                              "--duration", str(args.seconds + 60), *sum(
                                  (["--set", kv] for kv in args.set), [])],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    path = serve.stdout.readline().strip() if serve.stdout is not None else ""
    if not path:
        print("rig serve printed no path:", serve.communicate()[1], file=sys.stderr)
        return 1
    cfg = load_config(args.config, [f"log.dir={tmp}", f"loop.law={args.law}", *args.set])
    r = Runner(cfg, RunSettings(duration=args.seconds, link=f"serial:{path}", preflight=False,
                                echo_trips=False))
    none_ticks = [0]
    step = r.core.step

    def counting_step(sample: Any, now: float) -> Any:
        if sample is None:
            none_ticks[0] += 1
        return step(sample, now)

    r.core.step = counting_step  # type: ignore[method-assign]

    async def run() -> dict[str, Any]:
        async def arm() -> None:
            while not r.ready.is_set():
                await asyncio.sleep(0.01)
            r.core.submit("arm", lambda ok, msg: None)

        arming = asyncio.ensure_future(arm())
        try:
            return await r.run()
        finally:
            arming.cancel()

    try:
        s = asyncio.run(run())
    finally:
        serve.terminate()
        out, _ = serve.communicate(timeout=30)
    dev: dict[str, Any] = {}
    for line in reversed(out.splitlines()):
        try:
            dev = json.loads(line)
            break
        except ValueError:
            continue
    period = r.design.Ts
    lat = r.link.stats.latencies_us
    print(f"corral loop bench: {r.design.rig.name}, rig-clocked over a pseudo-terminal at "
          f"{1 / period:.0f} Hz, {args.seconds:g} s, law {args.law}, python "
          f"{sys.version.split()[0]}, overrides {args.set or 'none'}")
    print(f"  priority: {s['clock']}")
    print(f"  ticks {s['ticks']} ({none_ticks[0]} with no sample within 2 periods)")
    print(f"  sample-to-command (host receipt to command written): {_pct(lat)}")
    print(f"  lateness (handled minus expected arrival): p50 {s['lateness_p50_us']:.0f} us, "
          f"p99 {s['lateness_p99_us']:.0f} us, max {s['lateness_max_us']:.0f} us")
    print(f"  deadline misses {s['deadline_misses']} (later than "
          f"{r.miss_after:g} period(s), or skipped), link gaps {r.link.stats.gaps}, "
          f"late frames {r.link.stats.late_frames}")
    print(f"  trips: {[(t['rule'], round(t['t'], 3)) for t in s['trips']] or 'none'}")
    if dev:
        print(f"  device: lateness p99 {dev['lateness_p99_us']:.0f} us, max "
              f"{dev['lateness_max_us']:.0f} us, deadline misses {dev['deadline_misses']}, "
              f"round trip p50 {dev['round_trip_p50_us']:.0f} us, p99 "
              f"{dev['round_trip_p99_us']:.0f} us, timeouts {dev['timeouts']}")
    if args.floor_seconds > 0:
        print(f"  platform floor, no corral code, {args.floor_seconds:g} s each:")
        print(f"    bare pty one-way delay (both ends SCHED_FIFO): "
              f"{_pct(_floor('pty', args.floor_seconds))}")
        print(f"    bare SCHED_FIFO sleeper lateness at 1 kHz: "
              f"{_pct(_floor('sleep', args.floor_seconds))}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
