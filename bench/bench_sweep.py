"""Sweep throughput: plant-steps per second of `runtime.sweep` vs per-plant scipy solve_ivp.

Usage: python bench/bench_sweep.py [--plants 2000] [--duration 5] [--workers 2]
       [--ivp-plants 3] [--ivp-duration 0.5] [--config configs/pedestal-sim.toml]

The sweep runs N plants (default 2000 for 5 s at the config's period, 1 kHz in
the demo) on `--workers` processes with the config's plant substeps and, for
comparison, with sweep.substeps = 1. The baseline integrates the same closed
loop per plant with scipy `solve_ivp` (RK45): the continuous pedestal ODE with
the input held over each tick (zero-order hold), one solve_ivp call per tick,
the law ticking between calls. Prints figures only.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.integrate import solve_ivp

from runtime.config import load_config
from runtime.design import design_from_config
from runtime.dryrun import plant_from_config
from runtime.law import AdaptiveLaw
from runtime.sweep import draw_plants, run_sweep


def ivp_rate(cfg, plants: int, duration: float) -> tuple[float, float]:
    """Plant-steps per second of per-plant solve_ivp (RK45, ZOH per tick); and worst ratio."""
    from runtime.commands import schedule_from_config, tracked_names
    from sim_rigs.pedestal import Pedestal

    d = design_from_config(cfg)
    truth = draw_plants(cfg, plants, 1)
    ticks = int(round(duration / d.Ts))
    cmd = schedule_from_config(cfg, tracked_names(d.rig.C, d.rig.states)).evaluate(
        np.arange(ticks) * d.Ts)
    proto = plant_from_config(cfg, d)
    worst = 0.0
    t0 = time.perf_counter()
    for i in range(plants):
        p = Pedestal.create({k: v[i] for k, v in truth.items()}, batch=1, x0=proto.x[0])
        law = AdaptiveLaw(d)
        x = p.x[0].copy()
        st = law.init_state(x)
        for k in range(ticks):
            out = law.step(st, x, cmd[k])
            worst = max(worst, float(out.ratio))
            v = np.clip(out.u, -12.0, 12.0)[None, :]
            sol = solve_ivp(lambda _t, z, v=v, p=p: p.deriv(z[None, :], v)[0], (0.0, d.Ts), x,
                            method="RK45", rtol=1e-8, atol=1e-10)
            x = sol.y[:, -1]
    wall = time.perf_counter() - t0
    return plants * ticks / wall, worst


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default="configs/pedestal-sim.toml")
    ap.add_argument("--plants", type=int, default=2000)
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--ivp-plants", type=int, default=3)
    ap.add_argument("--ivp-duration", type=float, default=0.5)
    a = ap.parse_args()
    cfg = load_config(a.config, [])
    d = design_from_config(cfg)
    print(f"sweep: {a.plants} plants x {a.duration:g} s at {1 / d.Ts:g} Hz "
          f"({a.plants * round(a.duration / d.Ts)} plant-steps), {a.workers} workers")
    rates = {}
    for label, over in (("config substeps", []), ("substeps = 1", ["sweep.substeps=1"])):
        c = cfg.with_overrides(over)
        r = run_sweep(c, plants=a.plants, duration=a.duration, workers=a.workers)
        s = r.summary
        rates[label] = s["plant_steps_per_second"]
        print(f"  {label:16s} (substeps {s['substeps']}): {s['plant_steps_per_second'] / 1e6:6.2f}"
              f" M plant-steps/s, wall {s['wall_seconds']:.2f} s, chunk {s['chunk']}, "
              f"engine {s['engine']}, worst ratio {s['worst_margin_ratio']:.6f}")
    ivp, worst = ivp_rate(cfg, a.ivp_plants, a.ivp_duration)
    print(f"solve_ivp RK45 per plant ({a.ivp_plants} plants x {a.ivp_duration:g} s): "
          f"{ivp:,.0f} plant-steps/s (worst ratio {worst:.4f})")
    for label, rate in rates.items():
        print(f"ratio sweep/solve_ivp ({label}): {rate / ivp:,.0f}x")
    print("goals: >= 5 M plant-steps/s on 2 cores, >= 100x solve_ivp")


if __name__ == "__main__":
    main()
