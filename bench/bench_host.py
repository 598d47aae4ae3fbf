"""The platform floor: timer lateness of the runtime's clock on this host, quiet and loaded.

Paces an empty tick with `runtime.realtime.clock.DeadlineClock` (the clock `corral run`
and `corral hostcheck` use) at the config's period and prints lateness p50 /
p99 / max, the worst stall and the deadline misses, first with nothing added,
then while N CPU hogs (plain busy loops at normal priority, each ending by
itself after the run, bounded) compete for the cores; each case at SCHED_FIFO
when this process may use it and at normal priority (``loop.realtime = false``),
so the effect of priority rights shows beside the load's. The verdict column is
`runtime.realtime.hostcheck.verdict` at the config's thresholds. Figures only; no
assertions.

    python bench/bench_host.py                   # 5 s per case, hogs = cores
    python bench/bench_host.py --seconds 20 --hogs 2
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def hogs(n: int, seconds: float) -> list[subprocess.Popen]:
    """N busy loops that end by themselves after `seconds` (bounded even if we are killed)."""
    code = (f"import time\nend = time.monotonic() + {seconds:.1f}\n"
            "while time.monotonic() < end: pass")
    return [subprocess.Popen([sys.executable, "-c", code]) for _ in range(n)]


def main() -> int:
    from runtime.config import load_config
    from runtime.realtime.hostcheck import host_facts, measure, thresholds_from_config, verdict

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default=str(ROOT / "configs" / "pedestal-sim.toml"))
    ap.add_argument("--seconds", type=float, default=5.0, help="per case (default 5)")
    ap.add_argument("--hogs", type=int, default=os.cpu_count() or 2,
                    help="CPU hogs in the loaded cases (default: the core count)")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE")
    args = ap.parse_args()
    if not 0 < args.seconds <= 600 or not 0 <= args.hogs <= 64:
        ap.error("--seconds in (0, 600], --hogs in [0, 64]")
    cfg = load_config(args.config, args.set)
    th = thresholds_from_config(cfg)
    facts = host_facts()
    print(f"host: {platform.node()}, {platform.machine()}, {facts['cpus']} cores usable, "
          f"Linux {platform.release()}, Python {platform.python_version()}; load "
          f"{facts['load_1min']:.2f} (1 min) at start; governor "
          f"{facts['governor'] or 'not exposed'}; SCHED_FIFO "
          f"{'possible' if facts['realtime_rights']['sched_fifo_possible'] else 'refused'}")
    print(f"clock: runtime.realtime.clock.DeadlineClock at {th.period_s * 1e3:g} ms, empty tick, "
          f"{args.seconds:g} s per case; thresholds stale {th.stale_periods:g} periods "
          f"(stall budget {th.stall_budget_s * 1e3:.2f} ms), overrun {th.overrun_misses:g} "
          f"in {th.overrun_window}")
    head = (f"{'case':<34} {'p50 us':>8} {'p99 us':>8} {'max ms':>8} {'stall ms':>9} "
            f"{'misses':>13}  verdict")
    print(head)
    print("-" * len(head))
    rows = []
    for n in (0, args.hogs):
        for rt in (True, False):
            procs = hogs(n, args.seconds + 2.0) if n else []
            try:
                time.sleep(0.3 if n else 0.0)  # let the hogs start
                fig = measure(th.period_s, args.seconds, realtime=rt)
            finally:
                for p in procs:
                    p.terminate()
                for p in procs:
                    try:
                        p.wait(5)
                    except subprocess.TimeoutExpired:
                        p.kill()
                        p.wait()
            v = verdict({**fig, **facts}, th, loop_realtime=rt)
            prio = "SCHED_FIFO" if fig["realtime"] else "normal priority"
            case = f"{'no hogs' if n == 0 else f'{n} CPU hogs'}, {prio}"
            rows.append((case, fig, v))
            print(f"{case:<34} {fig['lateness_p50_us']:8.1f} {fig['lateness_p99_us']:8.1f} "
                  f"{fig['lateness_max_us'] / 1e3:8.2f} {fig['worst_stall_ms']:9.2f} "
                  f"{fig['misses']:>6}/{fig['ticks']:<6}  {'OK' if v['ok'] else 'NOT OK'}",
                  flush=True)
    base = rows[0][1]["lateness_p99_us"]
    if base > 0:
        print("p99 against the no-hog SCHED_FIFO case (same run): " + ", ".join(
            f"{case}: {fig['lateness_p99_us'] / base:.2g}x" for case, fig, _ in rows[1:]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
