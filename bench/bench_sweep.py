"""Sweep throughput: plant-steps per second of `runtime.offline.sweep` engines vs per-plant
scipy solve_ivp.

Usage: python bench/bench_sweep.py [--plants 2000,8000] [--duration 5] [--workers 2]
       [--substeps 4,1] [--reference-plants 200] [--repeat 2] [--ivp-plants 3]
       [--ivp-duration 0.5] [--no-cold] [--config configs/pedestal-sim.toml]

For each plant count and RK4 substep count (the demo's 4, and 1) the same plants (same
seed) run through the `compiled` engine (numba threads, `--workers` of them; the default
engine) and, for the counts in `--reference-plants`, the `reference` engine (the batched
numpy law and plant over `--workers` processes), 5 s at the
config's period (1 kHz in the demo), with the config's sensor noise. The numba compile time
is reported apart and excluded from the rates: once cold (a fresh cache folder, in a
subprocess) and once as this process found it (normally a load from the on-disk cache).
The baseline integrates the same closed loop per plant with scipy `solve_ivp` (RK45,
rtol 1e-8): the rig's continuous ODE with the input held over each tick, one
solve_ivp call per tick, the law ticking between calls. On a shared machine the wall rate
depends on what else runs: engines are interleaved, the best of `--repeat` runs is shown,
and `M/CPU-s` (plant-steps per CPU-second of this process and its workers, compile time
taken off) shows the cost apart from the load; twice it is what two free cores would
give, less thread start-up and scheduling overhead. Last, the per-plant agreement of
the worst margin ratio and the outcome between substep counts, the evidence for the
sweep's substep default. Prints figures only.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
from scipy.integrate import solve_ivp

from runtime.config import load_config
from runtime.method.design import design_from_config
from runtime.method.law import AdaptiveLaw
from runtime.offline.dryrun import plant_from_config
from runtime.offline.sweep import draw_plants, run_sweep


def ivp_rate(cfg, plants: int, duration: float) -> tuple[float, float]:
    """Plant-steps per second of per-plant solve_ivp (RK45, ZOH per tick); and worst ratio."""
    from runtime.method.commands import schedule_from_config, tracked_names
    from sim_rigs.plant import RigPlant

    d = design_from_config(cfg)
    truth = draw_plants(cfg, plants, 1)
    ticks = int(round(duration / d.Ts))
    cmd = schedule_from_config(cfg, tracked_names(d.rig.C, d.rig.states)).evaluate(
        np.arange(ticks) * d.Ts)
    proto = plant_from_config(cfg, d)
    worst = 0.0
    t0 = time.perf_counter()
    for i in range(plants):
        p = RigPlant.create(d.rig.spec, {k: v[i] for k, v in truth.items()}, batch=1,
                            x0=proto.x[0])
        law = AdaptiveLaw(d)
        x = p.x[0].copy()
        st = law.init_state(x)
        for k in range(ticks):
            out = law.step(st, x, cmd[k])
            worst = max(worst, float(out.ratio))
            v = np.clip(out.u, -d.rig.input_limits, d.rig.input_limits)[None, :]
            sol = solve_ivp(lambda _t, z, v=v, p=p: p.deriv(z[None, :], v)[0], (0.0, d.Ts), x,
                            method="RK45", rtol=1e-8, atol=1e-10)
            x = sol.y[:, -1]
    wall = time.perf_counter() - t0
    return plants * ticks / wall, worst


def cold_compile(config: str) -> float | None:
    """Seconds to compile the sweep kernel with an empty numba cache (fresh subprocess)."""
    code = ("from runtime.config import load_config; from runtime.offline.sweep import run_sweep; "
            f"r = run_sweep(load_config({config!r}, []), plants=1, duration=0.01, workers=1, "
            "engine='compiled'); print(r.summary['compile_seconds'])")
    with tempfile.TemporaryDirectory() as tmp:
        env = {**os.environ, "NUMBA_CACHE_DIR": tmp}
        res = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                             text=True, check=False)
    try:
        return float(res.stdout.strip().splitlines()[-1])
    except (ValueError, IndexError):
        return None


def cpu_seconds() -> float:
    """CPU seconds of this process (all threads) and of its finished child processes."""
    import resource

    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def ints(text: str) -> list[int]:
    return [int(v) for v in text.split(",") if v.strip()]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default="configs/pedestal-sim.toml")
    ap.add_argument("--plants", type=ints, default=[2000, 8000])
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--substeps", type=ints, default=None,
                    help="RK4 substeps to measure (default: the config's plant.substeps, then 1)")
    ap.add_argument("--reference-plants", type=ints, default=[],
                    help="plant counts to run the numpy reference engine at too (slow)")
    ap.add_argument("--ivp-plants", type=int, default=3)
    ap.add_argument("--ivp-duration", type=float, default=0.5)
    ap.add_argument("--repeat", type=int, default=2,
                    help="runs per engine and setting, interleaved; the best is shown")
    ap.add_argument("--no-cold", action="store_true", help="skip the cold-compile subprocess")
    a = ap.parse_args()
    cfg = load_config(a.config, [])
    d = design_from_config(cfg)
    subs = a.substeps or sorted({int(cfg.number("plant.substeps", 4)), 1}, reverse=True)
    ref_n = a.reference_plants
    ticks = round(a.duration / d.Ts)
    print(f"sweep bench: {a.duration:g} s at {1 / d.Ts:g} Hz ({ticks} ticks), sensor noise "
          f"{'on' if cfg.flag('sweep.noise', True) else 'off'}, {a.workers} workers, "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.2f}")
    if not a.no_cold:
        cold = cold_compile(a.config)
        print(f"numba compile of the sweep kernel, empty cache: "
              f"{'failed' if cold is None else f'{cold:.1f} s'} (excluded from every rate)")
    ivp, worst = ivp_rate(cfg, a.ivp_plants, a.ivp_duration)
    print(f"solve_ivp RK45 per plant ({a.ivp_plants} plants x {a.ivp_duration:g} s): "
          f"{ivp:,.0f} plant-steps/s (worst ratio {worst:.4f})")
    ratio_by: dict[tuple[int, int], np.ndarray] = {}
    outcome_by: dict[tuple[int, int], np.ndarray] = {}
    print(f"{'plants':>7} {'substeps':>8} {'engine':>9} {'M steps/s':>10} {'wall s':>7} "
          f"{'compile s':>9} {'x solve_ivp':>11} {'M/CPU-s':>10} {'worst ratio':>12}")
    for n in a.plants:
        for sub in subs:
            c = cfg.with_overrides([f"sweep.substeps={sub}"])
            engines = ["compiled"] + (["reference"] if n in ref_n else [])
            best: dict[str, tuple[float, float, dict]] = {}
            for _rep in range(a.repeat):  # engines interleaved, best of the repeats
                for eng in engines:
                    cpu0 = cpu_seconds()
                    r = run_sweep(c, plants=n, duration=a.duration, workers=a.workers,
                                  engine=eng)
                    cpu = cpu_seconds() - cpu0 - r.summary.get("compile_seconds", 0.0)
                    rate = r.summary["plant_steps_per_second"]
                    if eng not in best or rate > best[eng][0]:
                        best[eng] = (rate, cpu, r.summary)
                    if eng == "compiled":
                        ratio_by[n, sub] = r.per_plant["max_ratio"]
                        outcome_by[n, sub] = r.per_plant["outcome"]
            for eng in engines:
                rate, cpu, s = best[eng]
                per_cpu = n * ticks / cpu if cpu > 0 else float("nan")
                print(f"{n:7d} {sub:8d} {eng:>9} {rate / 1e6:10.2f} {s['wall_seconds']:7.2f} "
                      f"{s.get('compile_seconds', 0.0):9.2f} {rate / ivp:11,.0f} "
                      f"{per_cpu / 1e6:10.2f} {s['worst_margin_ratio']:12.6f}", flush=True)
    if len(subs) > 1:
        ref = subs[0]
        print(f"substeps vs {ref} (compiled, same plants and noise): per-plant worst margin "
              f"ratio and outcome")
        for n in a.plants:
            for sub in subs[1:]:
                r0, r1 = ratio_by[n, ref], ratio_by[n, sub]
                fin = np.isfinite(r0) & np.isfinite(r1)
                diff = np.abs(r1[fin] - r0[fin])
                same = np.mean(outcome_by[n, ref] == outcome_by[n, sub])
                print(f"  {n} plants, {sub} substep(s): max |d ratio| {diff.max():.2e} "
                      f"(median {np.median(diff):.1e}), max relative "
                      f"{np.max(diff / np.maximum(r0[fin], 1e-12)):.2e}, same outcome "
                      f"{100 * same:.2f} %, worst {r0.max():.6f} vs {r1.max():.6f}")
    print("goals: >= 5 M plant-steps/s on 2 cores, >= 100x solve_ivp")


if __name__ == "__main__":
    main()
