"""Dry-run and sweep speed of this checkout against another one, in the same run.

Usage: python bench/bench_against.py BASELINE_CHECKOUT [--rounds 3] [--plants 2000]
       [--duration 5] [--config configs/pedestal-sim.toml]

Alternates the two checkouts (fresh subprocesses, each with its own PYTHONPATH, kernels
loaded from numba's cache before the clock starts): the recorded dry run of the config
(realtime factor, best of 3 a round) and a compiled sweep (plant-steps per second), and
prints each round's figures and the ratio this / baseline. On a shared machine the load
moves between rounds; the alternation puts both checkouts under the same load, so the
ratios are the figures to compare. Prints figures only.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

DRY = """
import json
from runtime.config import load_config
from runtime.offline.dryrun import dry_run
c = load_config({config!r})
best = 0.0
for _ in range(3):
    r = dry_run(c)
    best = max(best, r.summary["realtime_factor"])
print(json.dumps([best, r.summary["max_margin_ratio"]]))
"""

SWEEP = """
import json
from runtime.config import load_config
from runtime.offline.sweep import run_sweep
c = load_config({config!r})
r = run_sweep(c, plants={plants}, duration={duration}, workers=2, engine="compiled")
print(json.dumps([r.summary["plant_steps_per_second"], r.summary["worst_margin_ratio"]]))
"""


def run(root: Path, code: str) -> list[float]:
    env = {**os.environ, "PYTHONPATH": str(root)}
    out = subprocess.run([sys.executable, "-c", code], cwd=root, env=env, capture_output=True,
                         text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{root}: {out.stderr.strip().splitlines()[-1:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("baseline", type=Path)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--plants", type=int, default=2000)
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--config", default="configs/pedestal-sim.toml")
    a = ap.parse_args()
    jobs = (("dry run, x real time", DRY.format(config=a.config)),
            ("sweep, M plant-steps/s", SWEEP.format(config=a.config, plants=a.plants,
                                                    duration=a.duration)))
    for name, code in jobs:
        ratios = []
        for rnd in range(a.rounds):
            base = run(a.baseline.resolve(), code)
            this = run(ROOT, code)
            scale = 1e-6 if "sweep" in name else 1.0
            ratios.append(this[0] / base[0])
            print(f"{name}: round {rnd}: baseline {base[0] * scale:.3g} (ratio {base[1]:.6f}), "
                  f"this {this[0] * scale:.3g} (ratio {this[1]:.6f}), this / baseline "
                  f"{ratios[-1]:.2f}, load {os.getloadavg()[0]:.1f}", flush=True)
        print(f"{name}: this / baseline, best {max(ratios):.2f}, median "
              f"{sorted(ratios)[len(ratios) // 2]:.2f}")


if __name__ == "__main__":
    main()
