"""Law tick, dry-run and sweep speed of this checkout against another one, in the same run.

Usage: python bench/bench_against.py BASELINE_CHECKOUT [--repeats 5] [--plants 2000]
       [--duration 5] [--config configs/pedestal-sim.toml] [--jobs law,dry,sweep]

BASELINE_CHECKOUT is another checkout of corral (e.g. an old commit extracted with
``git archive COMMIT | tar -x -C DIR``); the modules are looked up under both layouts
(``runtime.kernels.fast`` / ``runtime.fast``, ``runtime.offline.sweep`` / ``runtime.sweep``).

Each side runs in a fresh subprocess with its own PYTHONPATH; a first, uncounted round per
side loads (or compiles) its kernels. Then the two sides are interleaved over `--repeats`
rounds, the order alternating (A B, B A, ...) so that neither side always runs first after
the other's load: the law tick (`FastLaw.step`, median microseconds a tick on the demo design),
the recorded dry run of the config (realtime factor, best of 3 a round) and a compiled sweep
(plant-steps per second). Printed per round: both figures, the speed ratio this / baseline
(> 1: this checkout is faster) by wall time and by CPU time (the process's CPU seconds: the
law tick's loop, the whole dry-run call, the sweep call after a small warm-up sweep; less
moved by other processes than wall time, though not immune: they share caches) and the
1-minute load average; then the median ratios per job with the range of the load averages
seen. Law tick: the best of 15 loops of 2000 ticks a round. On a shared machine the load
moves between rounds; the interleaving puts both sides under the same load, so the median
ratios are the figures to compare. Prints figures only.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

IMPORTS = """
import importlib, json, time
import numpy as np
from runtime.config import load_config
def first(*names):
    for name in names:
        try:
            return importlib.import_module(name)
        except ImportError:
            pass
    raise ImportError(names)
"""

LAW = IMPORTS + """
fast = first("runtime.kernels.fast", "runtime.fast")
design_mod = first("runtime.method.design", "runtime.design")
d = design_mod.design_from_config(load_config({config!r}))
law = fast.FastLaw(d)
law.init_state(np.zeros(d.rig.n))
rng = np.random.default_rng(1)
xs = rng.normal(size=(2000, d.rig.n)) * 0.01
c = np.zeros(d.K2.shape[1])
for x in xs[:200]:
    law.step(x, c)
wall, cpu = [], []
for _ in range(15):
    t0, c0 = time.perf_counter(), time.process_time()
    for x in xs:
        law.step(x, c)
    wall.append((time.perf_counter() - t0) / len(xs) * 1e6)
    cpu.append((time.process_time() - c0) / len(xs) * 1e6)
print(json.dumps([min(wall), float(law.tick.ratio), min(cpu)]))
"""

DRY = IMPORTS + """
dry_run = first("runtime.offline.dryrun", "runtime.dryrun").dry_run
c = load_config({config!r})
best = cpu = 0.0
for _ in range(3):
    c0 = time.process_time()
    r = dry_run(c)
    used = time.process_time() - c0
    best = max(best, r.summary["realtime_factor"])
    cpu = max(cpu, len(r.t) * c.number("loop.period") / used)
print(json.dumps([best, r.summary["max_margin_ratio"], cpu]))
"""

SWEEP = IMPORTS + """
run_sweep = first("runtime.offline.sweep", "runtime.sweep").run_sweep
c = load_config({config!r})
run_sweep(c, plants=8, duration=0.05, workers=2, engine="compiled")  # load the kernels
c0 = time.process_time()
r = run_sweep(c, plants={plants}, duration={duration}, workers=2, engine="compiled")
used = time.process_time() - c0
steps = r.summary["plants"] * r.summary["ticks"]
print(json.dumps([r.summary["plant_steps_per_second"], r.summary["worst_margin_ratio"],
                  steps / used]))
"""

# (name, unit, scale, higher is better)
JOBS = {"law": ("law tick", "us a tick", 1.0, False),
        "dry": ("dry run", "x real time", 1.0, True),
        "sweep": ("sweep", "M plant-steps/s", 1e-6, True)}


def run(root: Path, code: str) -> list[float]:
    """Run `code` in a fresh interpreter with `root` first on the path; its last JSON line."""
    env = {**os.environ, "PYTHONPATH": str(root)}
    out = subprocess.run([sys.executable, "-c", code], cwd=root, env=env, capture_output=True,
                         text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{root}: {out.stderr.strip().splitlines()[-3:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("baseline", type=Path)
    ap.add_argument("--repeats", "--rounds", type=int, default=5)
    ap.add_argument("--plants", type=int, default=2000)
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--config", default="configs/pedestal-sim.toml")
    ap.add_argument("--jobs", default="law,dry,sweep")
    a = ap.parse_args()
    config = str((ROOT / a.config).resolve())
    codes = {"law": LAW.format(config=config), "dry": DRY.format(config=config),
             "sweep": SWEEP.format(config=config, plants=a.plants, duration=a.duration)}
    sides = {"baseline": a.baseline.resolve(), "this": ROOT}
    summary = []
    for job in a.jobs.split(","):
        name, unit, scale, higher = JOBS[job]
        for root in sides.values():  # load or compile the kernels, not counted
            run(root, codes[job])
        ratios: list[float] = []
        cpu_ratios: list[float] = []
        loads: list[float] = []
        for rnd in range(a.repeats):
            order = ("baseline", "this") if rnd % 2 == 0 else ("this", "baseline")
            got = {}
            for side in order:
                got[side] = run(sides[side], codes[job])
                loads.append(os.getloadavg()[0])
            (base, b_chk, b_cpu), (this, t_chk, t_cpu) = got["baseline"], got["this"]
            ratios.append(this / base if higher else base / this)
            cpu_ratios.append(t_cpu / b_cpu if higher else b_cpu / t_cpu)
            print(f"{name}: round {rnd} ({' then '.join(order)}): baseline "
                  f"{base * scale:.3g} {unit} (check {b_chk:.6f}), this {this * scale:.3g} "
                  f"{unit} (check {t_chk:.6f}); speed this / baseline: wall "
                  f"{ratios[-1]:.2f}, CPU time {cpu_ratios[-1]:.2f}; load {loads[-1]:.1f}",
                  flush=True)
        line = (f"{name}: speed this / baseline over {a.repeats} rounds: wall median "
                f"{statistics.median(ratios):.2f} (min {min(ratios):.2f}, max "
                f"{max(ratios):.2f}), CPU time median {statistics.median(cpu_ratios):.2f} "
                f"(min {min(cpu_ratios):.2f}, max {max(cpu_ratios):.2f}); load average "
                f"{min(loads):.1f}-{max(loads):.1f} on {os.cpu_count()} cores")
        print(line, flush=True)
        summary.append(line)
    print("\n".join(["", "summary (provisional unless the machine was quiet):", *summary]))


if __name__ == "__main__":
    main()
