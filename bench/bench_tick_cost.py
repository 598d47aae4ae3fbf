"""CPU time of the live tick, unpaced: where the 1 kHz period goes on our side.

Usage: python bench/bench_tick_cost.py [--ticks 12000] [--config configs/pedestal-sim.toml]
       [--profile] [--baseline REF [--rounds 4]]

Builds the real runtime (`Runner`: the in-process simulated rig, `TickCore` with its parts,
the record writer threads, the telemetry record at the telemetry rate; no socket is served,
publishing only offers the newest record as in a live run; the clock's lateness
statistics get a fixed draw of lateness values, as a paced run records them; ``gc.freeze`` and
the interpreter's switch interval as `Runner.run` sets them) and calls the tick back to back
in a plain thread at normal priority, without the real-time clock: idle for 0.5 s of rig
time, then arm, settle and engaged under the demo's commands for the rest. Per tick it
measures the thread's CPU time (``time.thread_time_ns``) and wall time (``perf_counter_ns``)
of our part: ``core.step`` (requests, estimate, supervisor, law, watchdog, command) plus
``core.after_send`` (row, ring, events, telemetry); the simulated rig's own sample and
integration (``sample_now``, ``apply``) are left out (on a real rig the device does that).
Prints p50/p90/p99/p99.9/max in microseconds per phase (and of wall minus CPU time:
the tick thread not running, preempted by another process or waiting for the GIL that a
writer thread holds), and with ``--profile`` a cProfile
top 30 by cumulative and by internal time (profiling slows the tick; its figures are not
the timing figures).

``--baseline REF`` extracts git REF (``git archive REF | tar -x``) to a temporary folder
and runs the same measurement there, each side in a fresh interpreter, alternating the order
over ``--rounds`` rounds (A B, B A, ...); prints each round and the ratios baseline / this
of the medians and the p99s (> 1: this checkout is cheaper). The machine may be shared:
the load average is printed beside every figure; the figures are provisional, compare the
ratios within one run.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = r"""
import asyncio, cProfile, gc, io, json, pstats, shutil, sys, tempfile, threading, time
import numpy as np
from runtime.config import load_config
from runtime.realtime.loop import Runner, RunSettings

TICKS, IDLE, PROFILE = {ticks}, {idle}, {profile}
tmp = tempfile.mkdtemp(prefix="corral-tickcost-")
cfg = load_config({config!r}, [f"log.dir={{tmp}}"])
r = Runner(cfg, RunSettings(duration=None, auto_arm=False, echo_trips=False, preflight=False))
core, link = r.core, r.link
asyncio.run(link.open())
# The clock's lateness statistics as in a paced run (telemetry reads their last second):
# a fixed draw of lateness values, recorded before each tick, outside the measurement.
stats = r.clock.stats
late = np.random.default_rng(3).exponential(20e-6, TICKS)
gc.collect()
gc.freeze()  # as `Runner.run` does before the loop starts, with its switch interval
sys.setswitchinterval(r.switch_interval)
cpu = np.zeros(TICKS, dtype=np.int64)
wall = np.zeros(TICKS, dtype=np.int64)
modes = []
prof = cProfile.Profile() if PROFILE else None

def work():
    tt, pc = time.thread_time_ns, time.perf_counter_ns
    if prof is not None:
        prof.enable()
    for k in range(TICKS):
        if k == IDLE:
            core.submit("arm", lambda ok, msg: None)
        stats.add(late[k])
        core.timing.lateness = late[k]
        t_nom = core.tick * core.Ts
        sample = link.sample_now(t_nom)
        c0, w0 = tt(), pc()
        cmd = core.step(sample, t_nom)
        c1, w1 = tt(), pc()
        link.apply(cmd)
        c2, w2 = tt(), pc()
        core.after_send(time.monotonic())
        c3, w3 = tt(), pc()
        cpu[k] = (c1 - c0) + (c3 - c2)
        wall[k] = (w1 - w0) + (w3 - w2)
        modes.append(core.sup.mode)
        if core.internal is not None:
            raise SystemExit(f"internal trip at tick {{k}}: {{core.internal!r}}")
    if prof is not None:
        prof.disable()

th = threading.Thread(target=work, name="tick-cost")
th.start()
th.join()
asyncio.run(link.close())
core.close()
r.lock.release()
shutil.rmtree(tmp, ignore_errors=True)
if prof is not None:
    for key in ("cumulative", "tottime"):
        s = io.StringIO()
        pstats.Stats(prof, stream=s).sort_stats(key).print_stats(30)
        print(f"--- cProfile top 30 by {{key}} ---", file=sys.stderr)
        print("\n".join(s.getvalue().splitlines()[:45]), file=sys.stderr)

def pct(a):
    a = a / 1000.0
    return {{"p50": float(np.percentile(a, 50)), "p90": float(np.percentile(a, 90)),
            "p99": float(np.percentile(a, 99)), "p99.9": float(np.percentile(a, 99.9)),
            "max": float(a.max()), "n": int(a.size)}}

m = np.array(modes)
out = {{"all": {{"cpu": pct(cpu), "wall": pct(wall), "wait": pct(np.maximum(wall - cpu, 0))}}}}
for mode in ("idle", "armed", "disarmed", "settling", "engaged"):
    sel = m == mode
    if sel.sum() > 10:
        out[mode] = {{"cpu": pct(cpu[sel]), "wall": pct(wall[sel])}}
out["trips"] = [t.rule if hasattr(t, "rule") else str(t) for t in core.trips]
print(json.dumps(out))
"""

KEYS = ("p50", "p90", "p99", "p99.9", "max")


def run(root: Path, code: str, show_stderr: bool) -> dict:
    """`code` in a fresh interpreter with `root` first on the path; its last JSON line."""
    env = {**os.environ, "PYTHONPATH": str(root)}
    out = subprocess.run([sys.executable, "-c", code], cwd=root, env=env, capture_output=True,
                         text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{root}: {out.stderr.strip().splitlines()[-5:]}")
    if show_stderr:
        print(out.stderr, end="")
    return json.loads(out.stdout.strip().splitlines()[-1])


def line(label: str, fig: dict) -> str:
    return (f"{label}: " + ", ".join(f"{k} {fig[k]:.0f}" for k in KEYS) + f" us (n {fig['n']})")


def show(side: str, got: dict) -> None:
    load = os.getloadavg()
    print(f"  {side}  [load {load[0]:.1f} {load[1]:.1f} {load[2]:.1f}]"
          + (f"  trips {got['trips']}" if got["trips"] else ""))
    for phase in ("all", "idle", "armed", "disarmed", "settling", "engaged"):
        if phase in got:
            print("    " + line(f"{phase:9s} CPU ", got[phase]["cpu"]))
    print("    " + line("all       wall", got["all"]["wall"]))
    if "wait" in got["all"]:  # wall - CPU: preempted, or waiting for the GIL
        print("    " + line("all  not running", got["all"]["wait"]))


def extract(ref: str) -> Path:
    """git REF extracted to a temporary folder (`git archive REF | tar -x`)."""
    dest = Path(tempfile.mkdtemp(prefix="corral-baseline-"))
    arch = subprocess.run(["git", "archive", ref], cwd=ROOT, capture_output=True, check=False)
    if arch.returncode != 0:
        raise SystemExit(f"git archive {ref}: {arch.stderr.decode().strip()}")
    subprocess.run(["tar", "-x", "-C", str(dest)], input=arch.stdout, check=True)
    return dest


def main() -> int:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--ticks", type=int, default=12000)
    ap.add_argument("--idle", type=int, default=500, help="ticks before the arm request")
    ap.add_argument("--config", default="configs/pedestal-sim.toml")
    ap.add_argument("--profile", action="store_true")
    ap.add_argument("--baseline", metavar="REF", help="git ref to compare against")
    ap.add_argument("--rounds", type=int, default=4)
    a = ap.parse_args()
    config = str((ROOT / a.config).resolve())
    code = CHILD.format(ticks=a.ticks, idle=a.idle, profile=a.profile, config=config)
    print(f"corral tick cost: {Path(config).name}, {a.ticks} ticks unpaced (idle {a.idle}, "
          f"then arm), python {sys.version.split()[0]}; CPU/wall us a tick of "
          "core.step + core.after_send; provisional (shared machine)")
    plain = CHILD.format(ticks=a.ticks, idle=a.idle, profile=False, config=config)
    if a.baseline is None:
        if a.profile:
            print("profile (its timing is not counted):")
            run(ROOT, code, True)
        show("this", run(ROOT, plain, False))
        return 0
    base_root = extract(a.baseline)
    try:
        return compare(a, config, code, plain, base_root)
    finally:
        shutil.rmtree(base_root, ignore_errors=True)


def compare(a: argparse.Namespace, config: str, code: str, plain: str, base_root: Path) -> int:
    """The alternating rounds against the extracted baseline; prints rounds and ratios."""
    sides = {"baseline": base_root, "this": ROOT}
    for root in sides.values():  # warm-up: load (or compile) the kernels, not counted
        run(root, CHILD.format(ticks=200, idle=50, profile=False, config=config), False)
    if a.profile:
        print("profile of this checkout (not counted):")
        run(ROOT, code, True)
    med: list[float] = []
    p99: list[float] = []
    for rnd in range(a.rounds):
        order = ("baseline", "this") if rnd % 2 == 0 else ("this", "baseline")
        got = {}
        print(f"round {rnd} ({' then '.join(order)}):")
        for side in order:
            got[side] = run(sides[side], plain, False)
            show(side, got[side])
        b, t = got["baseline"]["all"]["cpu"], got["this"]["all"]["cpu"]
        med.append(b["p50"] / t["p50"])
        p99.append(b["p99"] / t["p99"])
        print(f"  baseline / this: median {med[-1]:.2f}, p99 {p99[-1]:.2f}")
    load = os.getloadavg()
    print(f"baseline {a.baseline} / this over {a.rounds} rounds (CPU time, > 1: this is "
          f"cheaper): median of the median ratios {statistics.median(med):.2f} "
          f"(min {min(med):.2f}, max {max(med):.2f}), of the p99 ratios "
          f"{statistics.median(p99):.2f} (min {min(p99):.2f}, max {max(p99):.2f}); "
          f"load {load[0]:.1f} {load[1]:.1f} {load[2]:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
