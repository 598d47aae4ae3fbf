"""What a telemetry record costs now that the tick builds it typed.

Runs the simulated pedestal unpaced for a second (a spike at 0.5 s, so the record carries
a trip), then times, on the state it ended in:

- tick thread: building the record (`runtime.realtime.tick_records.telemetry_record`)
  against building the plain map the tick built before typed records (the baseline, kept
  here for this figure only);
- event loop (it shares the GIL with the tick): what the socket does with it, now
  ``to_wire`` + pack, before ``parse_live_record`` (the boundary check) + pack.

Prints figures and ratios against the baseline measured in the same run, with the load
average beside them (a loaded machine inflates both sides alike, roughly).

    python bench/bench_records.py
    python bench/bench_records.py --repeat 20000
"""

from __future__ import annotations

import argparse
import asyncio
import math
import os
import sys
import tempfile
import timeit
from pathlib import Path
from typing import Any

import msgpack
import numpy as np

from runtime.config import load_config
from runtime.realtime.loop import Runner, RunSettings
from runtime.realtime.tick_records import _finite, link_snapshot
from runtime.records.kinds import parse_live_record

ROOT = Path(__file__).resolve().parents[1]


def _old_map(core: Any, trips: list[dict[str, Any]]) -> dict[str, Any]:
    """The telemetry map as the tick built it before typed records (the baseline); `trips`
    the trip summaries as the maps the tick kept then."""
    st, sup, timing = core.state, core.sup, core.timing
    link = link_snapshot(core.link, core.est.age)
    p50, p99 = timing.last_second_us()
    engaged = st.law_ran
    ttb = None
    if engaged and st.ratio_rate > 1e-9 and st.ratio < 1.0:
        ttb = (1.0 - st.ratio) / st.ratio_rate
    for key, v in list(link.items()):
        if isinstance(v, float) and not math.isfinite(v):
            link[key] = None
    xr = (st.x - st.e) if engaged else st.x
    return {
        "type": "telemetry", "t": st.t, "tick": st.tick, "mode": sup.mode,
        "latched": sup.latched, "fallback": sup.fallback,
        "ratio": st.ratio if engaged else 0.0, "s": st.s if engaged else 0.0,
        "eps": st.eps_now, "phi_d": st.phi_d, "eff_rate": st.eff_rate,
        "step_gain": st.step_gain, "step_gain_cap": core.design.step_gain_cap,
        "c": st.c.tolist(), "x": st.x.tolist(), "xr": xr.tolist(),
        "e": (st.e if engaged else np.zeros(st.n)).tolist(),
        "u": st.u.tolist(), "u_raw": np.asarray(st.u_cmd).tolist(),
        "w_norm": st.w_norm, "w_rate": st.w_rate, "sat_time": st.sat_time.tolist(),
        "time_to_bound": ttb,
        "loop": {"rate_hz": 1.0 / timing.period, "lateness_p50_us": _finite(p50),
                 "lateness_p99_us": _finite(p99), "deadline_misses": timing.misses,
                 "ticks": st.tick},
        "link": link, "status": st.device_status,
        "trip": trips[-1] if sup.latched and trips else None,
        "trips": trips[-20:],
    }


def _us(fn: Any, repeat: int) -> float:
    """Best of 5 runs of `repeat` calls, µs per call."""
    return min(timeit.repeat(fn, number=repeat, repeat=5)) / repeat * 1e6


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default=str(ROOT / "configs" / "pedestal-sim.toml"))
    ap.add_argument("--repeat", type=int, default=5000)
    args = ap.parse_args()
    tmp = tempfile.mkdtemp(prefix="corral-bench-")
    cfg = load_config(args.config, [f"log.dir={tmp}", "supervisor.settle_time=0.2",
                                     "watchdog.overrun_misses=1000000"])
    r = Runner(cfg, RunSettings(auto_arm=True, faults=["spike@0.5"], echo_trips=False))
    asyncio.run(r.run_ticks(int(round(1.0 / r.design.Ts))))
    core = r.core
    new = core.telemetry_record()
    trips = [t.to_wire(tag=False) for t in core.trips]
    old = _old_map(core, trips)
    pack = msgpack.Packer(use_bin_type=True).pack
    if pack(new.to_wire()) != pack(old):
        print("bench_records: the baseline map differs from the record's map; "
              "the figures compare different work", file=sys.stderr)
        return 1
    n = args.repeat
    build_new = _us(core.telemetry_record, n)
    build_old = _us(lambda: _old_map(core, trips), n)
    send_new = _us(lambda: pack(new.to_wire()), n)
    send_old = _us(lambda: pack(old) if parse_live_record(old) else b"", n)
    load = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    print(f"corral records bench: telemetry record, {len(core.trips)} trip(s) in it, "
          f"best of 5 x {n}, python {sys.version.split()[0]}, load average {load} "
          f"(provisional when loaded)")
    print(f"  tick thread, build:       typed {build_new:7.1f} us   map (before) "
          f"{build_old:7.1f} us   ratio {build_new / build_old:.2f}")
    print(f"  event loop, check + pack: typed {send_new:7.1f} us   map (before) "
          f"{send_old:7.1f} us   ratio {send_new / send_old:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
