"""A loop that holds on a shared host: the demo's goals beside the platform floor, same run.

Two cases, each R runs x S seconds (default 5 x 60):

(a) shared host: two runtimes of the demo (``corral run CONFIG --headless --arm`` on the
    in-process simulated rig, each with its own ``rig.name`` and ``log.dir`` so they do
    not collide) on this host plus CPU hogs (plain busy loops at normal priority, bounded:
    each ends by itself). Per runtime: timing trips (`runtime.realtime.hostcheck.TIMING_RULES`),
    lateness p99 (us) and the share of deadlines missed, from the run's JSON summary.
    Goal: zero timing trips, p99 <= 100 us and at most 0.1 % missed, for both.
(b) served rig: ``corral rig serve CONFIG --serial`` (the pedestal on its own clock in
    another process, over a pseudo-terminal at the config's rate) and ``corral run`` on
    it, armed through the operator socket. Stale trips per run (goal: zero, on an
    otherwise quiet host).

The platform floor (`runtime.realtime.hostcheck.measure`: the runtime's own
absolute-deadline clock pacing an empty tick at the same period, SCHED_FIFO when
allowed) is measured in the same run: quiet and with the same hogs as case (a) at the
start, and with the hogs again right after every run of case (a). During every run of
case (a) a witness (the same clock and empty tick, in this process, at the runtimes'
priority) runs beside the two runtimes: stalls it sees too are the host's, not the
runtimes' (`--no-witness` leaves it out). Before every run of case (b) the pty floor
(`runtime.realtime.linkfloor`: the same frame rate through a bare pseudo-terminal between two
SCHED_FIFO processes, no corral code) counts the frames that arrive older than the
config's stale limit.
The load average is printed at the start and after every run: figures taken on a
busy machine are provisional. Figures only; no assertions.

    python bench/bench_shared_host.py                          # 5 x 60 s each case
    python bench/bench_shared_host.py --runs 2 --seconds 15    # a quick look
    python bench/bench_shared_host.py --set loop.cpu=0 --set-b loop.cpu=1
    python bench/bench_shared_host.py --case shared --json
    python bench/bench_shared_host.py --case served --served-set watchdog.stale_periods=8
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.realtime import linkfloor  # noqa: E402

CORRAL = [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())"]
GOAL_P99_US = 100.0
GOAL_MISS_PCT = 0.1
START_SLACK_S = 120.0
"""Start-up allowance of a runtime (imports, compiled kernels) before its S seconds."""


def load_avg() -> str:
    """The 1, 5 and 15 minute load averages as text."""
    try:
        a = os.getloadavg()
    except OSError:
        return "n/a"
    return f"{a[0]:.2f} {a[1]:.2f} {a[2]:.2f}"


def hogs(n: int, seconds: float) -> list[subprocess.Popen[bytes]]:
    """N busy loops that end by themselves after `seconds` (bounded even if we are killed)."""
    code = (f"import time\nend = time.monotonic() + {seconds:.1f}\n"
            "while time.monotonic() < end: pass")
    return [subprocess.Popen([sys.executable, "-c", code]) for _ in range(n)]


def stop(procs: list[subprocess.Popen[Any]]) -> None:
    """Terminate and reap what we started (kill after 10 s)."""
    for p in procs:
        if p.poll() is None:
            p.terminate()
    for p in procs:
        try:
            p.wait(10)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(ROOT)}


def _summary(text: str) -> dict[str, Any]:
    """The JSON summary object `corral run --json` prints last on stdout."""
    start = text.find("{")
    if start < 0:
        return {}
    try:
        out = json.loads(text[start:])
    except ValueError:
        return {}
    return out if isinstance(out, dict) else {}


def runtime_figures(s: dict[str, Any]) -> dict[str, Any]:
    """Per runtime: timing trips, lateness p99 (us), deadline misses (count and % of ticks)."""
    from runtime.realtime.hostcheck import TIMING_RULES

    ticks = int(s.get("ticks") or 0)
    misses = int(s.get("deadline_misses") or 0)
    trips = [t.get("rule") for t in s.get("trips") or []]
    return {"ok": bool(s), "ticks": ticks, "misses": misses,
            "miss_pct": 100.0 * misses / ticks if ticks else float("nan"),
            "p99_us": float(s.get("lateness_p99_us") or float("nan")),
            "max_us": float(s.get("lateness_max_us") or float("nan")),
            "timing_trips": [r for r in trips if r in TIMING_RULES],
            "other_trips": [r for r in trips if r not in TIMING_RULES],
            "clock": s.get("clock"), "host_setup": s.get("host_setup")}


def shared_run(args: argparse.Namespace, tmp: Path, i: int,
               period: float) -> tuple[list[dict[str, Any]], dict[str, Any] | None]:
    """One run of case (a): two runtimes and the hogs; the two runtimes' figures and the
    witness's (None with --no-witness)."""
    procs: list[subprocess.Popen[Any]] = []
    witness = None if args.no_witness else Witness(period).start()
    try:
        procs += hogs(args.hogs, args.seconds + START_SLACK_S)
        runs = []
        for name, extra in (("A", args.set_a), ("B", args.set_b)):
            sets = [f"log.dir={tmp / f'shared{i}{name}'}", f"rig.name=shared-{name.lower()}",
                    *args.set, *extra]
            runs.append(subprocess.Popen(
                [*CORRAL, "run", args.config, "--headless", "--arm", "--json", "--duration",
                 str(args.seconds), *sum((["--set", kv] for kv in sets), [])],
                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, cwd=ROOT, env=_env()))
        procs += runs
        out = []
        for p in runs:
            try:
                text, _ = p.communicate(timeout=args.seconds + START_SLACK_S)
            except subprocess.TimeoutExpired:
                text = b""
            out.append(runtime_figures(_summary(text.decode(errors="replace"))))
        return out, (witness.stop() if witness is not None else None)
    finally:
        if witness is not None:
            witness.clock.stop()
        stop(procs)


async def _arm(logdir: Path, timeout: float) -> str:
    """Arm the runtime whose operator socket appears in `logdir` (its name follows the link)."""
    from runtime.realtime.telemetry import TelemetryClient

    end = time.monotonic() + timeout
    while not (socks := sorted(logdir.glob("*.sock"))):
        if time.monotonic() > end:
            return "no operator socket"
        await asyncio.sleep(0.05)
    await asyncio.sleep(0.2)
    c = TelemetryClient(socks[0])
    try:
        await c.connect()
        rep = await c.request("arm", timeout=30.0)
        return "armed" if rep.get("ok") else f"arm refused: {rep.get('message')}"
    finally:
        await c.close()


def served_run(args: argparse.Namespace, tmp: Path, i: int) -> dict[str, Any]:
    """One run of case (b): the served rig over a pty and a runtime on it, armed."""
    procs: list[subprocess.Popen[Any]] = []
    logdir = tmp / f"served{i}"
    try:
        serve = subprocess.Popen(
            [*CORRAL, "rig", "serve", args.config, "--serial", "--json", "--duration",
             str(args.seconds + START_SLACK_S)],
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=ROOT, env=_env())
        procs.append(serve)
        path = serve.stdout.readline().strip() if serve.stdout is not None else ""
        if not path:
            return {"ok": False, "error": "rig serve printed no path"}
        sets = [f"log.dir={logdir}", "rig.name=served", "loop.hostcheck_s=0", *args.set,
                *args.served_set]
        run = subprocess.Popen(
            [*CORRAL, "run", args.config, "--headless", "--json", "--no-preflight", "--link",
             f"serial:{path}", "--duration", str(args.seconds),
             *sum((["--set", kv] for kv in sets), [])],
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, cwd=ROOT, env=_env())
        procs.append(run)
        armed = asyncio.run(_arm(logdir, START_SLACK_S))
        try:
            text, _ = run.communicate(timeout=args.seconds + START_SLACK_S)
        except subprocess.TimeoutExpired:
            text = b""
        s = _summary(text.decode(errors="replace"))
        fig = runtime_figures(s)
        fig["armed"] = armed
        fig["stale_trips"] = sum(1 for r in fig["timing_trips"] if r == "stale")
        fig["engagements"] = s.get("engagements")
        return fig
    finally:
        stop(procs)


class Witness:
    """The runtime's clock pacing an empty tick in this process, beside case (a)'s runtimes
    (same period, same real-time priority), until `stop`: the host's share of the stalls."""

    def __init__(self, period: float) -> None:
        from runtime.realtime.clock import DeadlineClock

        self.clock = DeadlineClock(period)
        self.done = threading.Event()

    def start(self) -> Witness:
        self.clock.start(lambda k, deadline: None, self.done.set)
        return self

    def stop(self) -> dict[str, Any]:
        self.clock.stop()
        self.done.wait(10.0)
        st = self.clock.stats
        p50, p99, mx = st.percentiles_us()
        ticks = max(int(st.count), 1)
        return {"p99_us": p99, "max_us": mx, "misses": int(st.misses), "ticks": int(st.count),
                "miss_pct": 100.0 * st.misses / ticks, "clock": self.clock.granted}


def pty_floor(period: float, seconds: float, stale_limit_s: float) -> dict[str, Any]:
    """The bare pty path at `period` for `seconds`: frames older than the stale limit."""
    return linkfloor.pty_summary(linkfloor.run("pty", period, seconds), stale_limit_s)


def floor(period: float, seconds: float, n_hogs: int) -> dict[str, Any]:
    """The platform floor: the runtime's clock pacing an empty tick, with `n_hogs` hogs."""
    from runtime.realtime.hostcheck import measure

    procs = hogs(n_hogs, seconds + 10.0) if n_hogs else []
    try:
        if procs:
            time.sleep(0.3)
        fig = measure(period, seconds)
    finally:
        stop(procs)
    ticks = max(int(fig["ticks"]), 1)
    return {"hogs": n_hogs, "p99_us": fig["lateness_p99_us"], "max_us": fig["lateness_max_us"],
            "misses": fig["misses"], "ticks": fig["ticks"],
            "miss_pct": 100.0 * fig["misses"] / ticks, "clock": fig["clock"]}


def _fmt(f: dict[str, Any]) -> str:
    if not f.get("ok"):
        return f"no summary ({f.get('error', 'the runtime printed none')})"
    return (f"trips {f['timing_trips'] or 'none'}, p99 {f['p99_us']:.0f} us, max "
            f"{f['max_us'] / 1e3:.1f} ms, missed {f['misses']}/{f['ticks']} "
            f"({f['miss_pct']:.3f} %)")


def main() -> int:
    from runtime.config import load_config

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default=str(ROOT / "configs" / "pedestal-sim.toml"))
    ap.add_argument("--runs", type=int, default=5, help="runs per case (default 5)")
    ap.add_argument("--seconds", type=float, default=60.0, help="seconds per run (default 60)")
    ap.add_argument("--hogs", type=int, default=1, help="CPU hogs in case (a) (default 1)")
    ap.add_argument("--case", choices=("both", "shared", "served"), default="both")
    ap.add_argument("--floor-seconds", type=float, default=10.0,
                    help="seconds of each platform-floor measurement (default 10)")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="config override for every runtime (repeatable)")
    ap.add_argument("--set-a", action="append", default=[], metavar="KEY=VALUE",
                    help="override for runtime A of case (a) only, e.g. loop.cpu=0")
    ap.add_argument("--set-b", action="append", default=[], metavar="KEY=VALUE",
                    help="override for runtime B of case (a) only")
    ap.add_argument("--served-set", action="append", default=[], metavar="KEY=VALUE",
                    help="override for case (b) only, e.g. watchdog.stale_periods=8")
    ap.add_argument("--no-witness", action="store_true",
                    help="case (a) without the witness clock beside the runtimes")
    ap.add_argument("--json", action="store_true", help="print one JSON object at the end")
    args = ap.parse_args()
    if not (1 <= args.runs <= 100 and 1 <= args.seconds <= 3600 and 0 <= args.hogs <= 16
            and 0 < args.floor_seconds <= 600):
        ap.error("--runs in [1, 100], --seconds in [1, 3600], --hogs in [0, 16], "
                 "--floor-seconds in (0, 600]")
    cfg = load_config(args.config, [*args.set, *args.served_set])
    period = float(cfg.number("loop.period"))
    stale_limit_s = (float(cfg.number("watchdog.stale_periods")) + 0.5) * period
    say = (lambda *a, **k: None) if args.json else print
    result: dict[str, Any] = {"config": args.config, "period_s": period, "runs": args.runs,
                              "seconds": args.seconds, "hogs": args.hogs,
                              "overrides": {"all": args.set, "a": args.set_a, "b": args.set_b,
                                            "served": args.served_set},
                              "cpus": os.cpu_count(), "load_start": load_avg()}
    say(f"corral shared-host bench: {args.config}, period {period * 1e3:g} ms, {args.runs} x "
        f"{args.seconds:g} s, {os.cpu_count()} cores, load {load_avg()} (1/5/15 min) at start")
    if load_avg() != "n/a" and os.getloadavg()[0] > 0.5 * (os.cpu_count() or 1):
        say("  the machine is busy: these figures are provisional")
    fl = [floor(period, args.floor_seconds, 0), floor(period, args.floor_seconds, args.hogs)]
    result["floor"] = fl
    for f in fl:
        say(f"platform floor ({f['hogs']} hogs; runtime clock, empty tick, {f['clock']}): p99 "
            f"{f['p99_us']:.0f} us, max {f['max_us'] / 1e3:.1f} ms, missed {f['misses']}/"
            f"{f['ticks']} ({f['miss_pct']:.3f} %)")
    with tempfile.TemporaryDirectory(prefix="corral-shared-") as td:
        tmp = Path(td)
        if args.case in ("both", "shared"):
            say(f"(a) two runtimes of the demo + {args.hogs} CPU hog(s); goal per runtime: no "
                f"timing trip, p99 <= {GOAL_P99_US:g} us, missed <= {GOAL_MISS_PCT:g} %")
            rows = []
            for i in range(args.runs):
                pair, wit = shared_run(args, tmp, i, period)
                # The floor again right after, under the load of the moment (hogs only).
                fr = floor(period, args.floor_seconds, args.hogs)
                rows.append({"run": i + 1, "a": pair[0], "b": pair[1], "witness": wit,
                             "floor": fr, "load": load_avg()})
                seen = ("" if wit is None else
                        f"; witness beside them: p99 {wit['p99_us']:.0f} us, max "
                        f"{wit['max_us'] / 1e3:.1f} ms, missed {wit['miss_pct']:.3f} %")
                say(f"  run {i + 1}: A {_fmt(pair[0])}; B {_fmt(pair[1])}{seen}; floor just "
                    f"after: p99 {fr['p99_us']:.0f} us, max {fr['max_us'] / 1e3:.1f} ms, missed "
                    f"{fr['miss_pct']:.3f} %; load {load_avg()}", flush=True)
            result["shared"] = rows
            every = [r[k] for r in rows for k in ("a", "b") if r[k].get("ok")]
            held = [f for f in every if not f["timing_trips"] and f["p99_us"] <= GOAL_P99_US
                    and f["miss_pct"] <= GOAL_MISS_PCT]
            result["shared_goal_met"] = f"{len(held)}/{2 * args.runs}"
            if every:
                floors = [fl[1], *(r["floor"] for r in rows)]
                say(f"  goal met by {len(held)} of {2 * args.runs} runtime-runs; timing trips "
                    f"{sum(len(f['timing_trips']) for f in every)}; worst p99 "
                    f"{max(f['p99_us'] for f in every):.0f} us (floor with hogs, worst of the "
                    f"run: {max(f['p99_us'] for f in floors):.0f} us); worst missed "
                    f"{max(f['miss_pct'] for f in every):.3f} % (floor "
                    f"{max(f['miss_pct'] for f in floors):.3f} %)")
        if args.case in ("both", "served"):
            say(f"(b) the served rig over a pty + corral run on it, armed; goal: no stale trip "
                f"(stale limit {stale_limit_s * 1e3:g} ms)")
            served = []
            for i in range(args.runs):
                pf = pty_floor(period, args.seconds, stale_limit_s)
                f = served_run(args, tmp, i)
                f["load"] = load_avg()
                f["pty_floor"] = pf
                served.append(f)
                fl_txt = ("pty floor failed" if not pf.get("ok") else
                          f"pty floor just before ({args.seconds:g} s, no corral code): "
                          f"{pf['over_stale_limit']} of {pf['frames']} frames older than the "
                          f"stale limit, age p99 {pf['age_p99_us']:.0f} us, max "
                          f"{pf['age_max_ms']:.1f} ms")
                say(f"  run {i + 1}: {f.get('armed', '')}; stale trips "
                    f"{f.get('stale_trips', '?')}; {_fmt(f)}; {fl_txt}; load {load_avg()}",
                    flush=True)
            result["served"] = served
            result["served_stale_trips"] = sum(int(f.get("stale_trips") or 0) for f in served)
            over = sum(int(f["pty_floor"].get("over_stale_limit") or 0) for f in served)
            result["pty_floor_over_limit"] = over
            say(f"  stale trips in {args.runs} x {args.seconds:g} s: "
                f"{result['served_stale_trips']}; the bare pty path delivered {over} frames "
                f"older than the stale limit in as many seconds")
    result["load_end"] = load_avg()
    say(f"load {load_avg()} (1/5/15 min) at the end")
    if args.json:
        print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
