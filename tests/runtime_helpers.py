"""Shared helpers for the runtime tests: temp configs built from the demo config."""

from __future__ import annotations

import asyncio
from pathlib import Path

from runtime.config import load_config
from runtime.realtime.loop import Runner, RunSettings

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"

# Short settling, and an overrun rule that a loaded CI machine cannot trip by itself
# (these tests are about the injected faults, not about host timing).
BASE = ["supervisor.settle_time=0.2", "watchdog.overrun_misses=100000",
        "log.pre_capture_s=0.2", "log.post_capture_s=0.1"]


def runner(tmp_path: Path, faults: list[str] = (), overrides: list[str] = (),
           arm: bool = True, duration: float | None = None) -> Runner:
    cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}", *overrides])
    return Runner(cfg, RunSettings(duration=duration, auto_arm=arm, faults=list(faults),
                                   echo_trips=False))


def run_unpaced(tmp_path: Path, seconds: float, faults: list[str] = (),
                overrides: list[str] = ()) -> tuple[Runner, dict]:
    r = runner(tmp_path, faults, overrides)
    summary = asyncio.run(r.run_ticks(int(round(seconds / r.design.Ts))))
    return r, summary
