"""Tick timing of the real-time loop: the host clock thread vs a naive asyncio.sleep loop.

Runs the simulated pedestal in real time at the config's rate (1 kHz for the
demo) through the real tick (estimator, supervisor, law, watchdog, records,
telemetry socket), with a spike fault half-way to measure detection-to-action,
then the same tick work paced by asyncio.sleep in the same process. Prints
figures only.

    python bench/bench_loop.py                # 10 s each
    python bench/bench_loop.py --seconds 60   # the README figures
"""

from __future__ import annotations

import argparse
import asyncio
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main() -> int:
    from runtime.clock import naive_asyncio_lateness
    from runtime.config import load_config
    from runtime.loop import Runner, RunSettings

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--config", default=str(ROOT / "configs" / "pedestal-sim.toml"))
    ap.add_argument("--law", choices=("reference", "fast"), default="reference")
    args = ap.parse_args()
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


if __name__ == "__main__":
    sys.exit(main())
