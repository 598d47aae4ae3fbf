#!/usr/bin/env python3
"""Loop lateness with the dashboard attached versus headless, measured in one run.

Runs the demo in real time (1 kHz) with `corral run --headless`, alternately
alone and with the textual dashboard attached in its own process (rendering
to a virtual screen at its normal 15 Hz), and prints tick lateness p50/p99
and deadline misses for each, with the ratio. Goal: attached at most 5 %
worse at p99. Prints figures only.

    python bench/bench_dashboard.py [--seconds 10] [--pairs 2]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"

DASHBOARD = """
import asyncio, sys
from runtime.dashboard.app import Dashboard
from runtime.dashboard.sources import SocketSource
async def main():
    async with SocketSource(sys.argv[1]) as src:
        app = Dashboard(src)
        async with app.run_test(size=(140, 48)):
            while True:
                await asyncio.sleep(1)
asyncio.run(main())
"""


def one_run(seconds: float, attached: bool) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        cmd = [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--headless", "--arm",
               "--duration", str(seconds), "--json", "--set", f"log.dir={tmp}",
               "--set", "watchdog.overrun_misses=100000"]
        run = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                               text=True)
        dash = None
        if attached:
            sock = Path(tmp) / "pedestal-sim.sock"
            while not sock.exists() and run.poll() is None:
                time.sleep(0.02)
            dash = subprocess.Popen([sys.executable, "-c", DASHBOARD, str(sock)], cwd=ROOT,
                                    stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        out, _ = run.communicate()
        if dash is not None:
            dash.kill()
            dash.wait()
        return json.loads(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--pairs", type=int, default=2)
    args = ap.parse_args()
    rows: dict[str, list[dict]] = {"headless": [], "attached": []}
    for _ in range(args.pairs):
        for mode in ("headless", "attached"):
            rows[mode].append(one_run(args.seconds, mode == "attached"))
    print(f"corral run, demo config, 1 kHz, {args.pairs} x {args.seconds:g} s each, alternating")
    print(f"{'':10} {'lateness p50 us':>16} {'p99 us':>10} {'max us':>10} {'misses':>8}")
    med = {}
    for mode, runs in rows.items():
        p50 = statistics.median(r["lateness_p50_us"] for r in runs)
        p99 = statistics.median(r["lateness_p99_us"] for r in runs)
        mx = max(r.get("lateness_max_us", float("nan")) for r in runs)
        miss = sum(r["deadline_misses"] for r in runs)
        med[mode] = p99
        print(f"{mode:10} {p50:16.1f} {p99:10.1f} {mx:10.0f} {miss:8d}")
    ratio = med["attached"] / med["headless"] if med["headless"] > 0 else float("nan")
    print(f"p99 attached / headless = {ratio:.2f} (goal <= 1.05)")


if __name__ == "__main__":
    main()
