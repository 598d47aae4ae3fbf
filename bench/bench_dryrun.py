"""Dry-run speed: simulated seconds per wall second, compiled engine vs numpy reference.

Runs the demo config (`configs/pedestal-sim.toml`, recording every tick into
the preallocated columns) with the fast engine over its full duration and
with the reference engine over a short slice, and prints both rates and
their ratio. `--cold-compile` also measures the numba compile time on an
empty cache (in a child process with a fresh NUMBA_CACHE_DIR). Figures only,
no pass/fail. Run: `python bench/bench_dryrun.py [--reference-seconds 2] [--cold-compile]`.

What does not live here: correctness (tests/test_fast.py compares the engines).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from runtime.config import load_config
from runtime.offline.dryrun import dry_run

DEMO = Path(__file__).resolve().parents[1] / "configs" / "pedestal-sim.toml"

COLD = """
import json, time
t0 = time.perf_counter()
from runtime.config import load_config
from runtime.offline.dryrun import dry_run
imp = time.perf_counter() - t0
s = dry_run(load_config({path!r}, ["commands.duration=0.01"])).summary
from runtime.kernels.fast import warm_up
law = warm_up()
print(json.dumps({{"import": imp, "compile": s["compile_seconds"], "law": law}}))
"""


def cold_compile() -> dict[str, float]:
    """Compile time of the dry-run kernels with an empty numba cache (child process)."""
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        out = subprocess.run([sys.executable, "-c", COLD.format(path=str(DEMO))], env=env,
                             capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    """Measure and print."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", type=Path, default=DEMO)
    ap.add_argument("--reference-seconds", type=float, default=2.0,
                    help="simulated seconds for the (slow) reference engine")
    ap.add_argument("--repeats", type=int, default=3, help="fast-engine repeats (best and median)")
    ap.add_argument("--cold-compile", action="store_true",
                    help="also time numba compilation on an empty cache")
    args = ap.parse_args()

    cfg = load_config(args.config)
    first = dry_run(cfg, engine="fast").summary  # loads (or compiles) the kernels
    runs = [first] + [dry_run(cfg, engine="fast").summary for _ in range(args.repeats - 1)]
    rates = sorted(r["sim_seconds"] / r["wall_seconds"] for r in runs)
    sim = first["sim_seconds"]
    fast_rate = rates[len(rates) // 2]

    short = load_config(args.config, [f"commands.duration={args.reference_seconds}"])
    t0 = time.perf_counter()
    ref = dry_run(short, engine="reference").summary
    ref_total = time.perf_counter() - t0
    ref_rate = ref["sim_seconds"] / ref["wall_seconds"]

    print(f"config: {args.config.name}, Ts = {1e3 * sim / first['ticks']:.3g} ms, recording on")
    print(f"{'engine':>10} {'sim s':>7} {'wall s':>8} {'sim s / wall s':>15} {'us / tick':>10}")
    for name, s, rate in (("fast", runs[0], fast_rate), ("reference", ref, ref_rate)):
        print(f"{name:>10} {s['sim_seconds']:>7.1f} {s['sim_seconds'] / rate:>8.3f} {rate:>15.1f}"
              f" {1e6 * s['sim_seconds'] / rate / s['ticks']:>10.2f}")
    print(f"fast / reference: {fast_rate / ref_rate:.0f}x  (fast best of {len(rates)}: "
          f"{rates[-1]:.0f}x real time; reference run incl. setup {ref_total:.2f} s)")
    print(f"kernel load in this process: {first['compile_seconds']:.2f} s "
          "(from the on-disk cache when warm)")
    if args.cold_compile:
        cold = cold_compile()
        print(f"cold cache: numba compile of the dry-run kernels {cold['compile']:.2f} s, "
              f"of the stand-alone law tick (FastLaw) {cold['law']:.2f} s more "
              f"(import of runtime.offline.dryrun {cold['import']:.2f} s)")


if __name__ == "__main__":
    main()
