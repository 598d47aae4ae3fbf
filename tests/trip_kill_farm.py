"""Fork many short runtimes that each trip on a rehearsed spike (kill-at-announcement test).

``python tests/trip_kill_farm.py BASE N PARALLEL``: the parent loads the code and compiles
the law once (no threads yet, so forking is safe), then forks N children, at most PARALLEL
at a time. Child i runs the demo config (simulated rig, not armed: the test arms it over
the socket once connected) with ``log.dir = BASE/i`` and a spike at 2 s, for at most 4 s.
For each child the parent prints ``i pid`` on stdout as soon as it is forked, and
``end i status`` when it is reaped, so the test can connect to
``BASE/i/pedestal-sim.sock`` and SIGKILL the child the moment the trip is announced.
"""

from __future__ import annotations

import asyncio
import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.config import load_config  # noqa: E402
from runtime.method.design import design_from_config  # noqa: E402
from runtime.realtime.loop import LawAdapter, Runner, RunSettings  # noqa: E402

DEMO = ROOT / "configs" / "pedestal-sim.toml"
# loop.realtime=false: many runtimes at SCHED_FIFO on a loaded 2-core host were seen to
# starve their own event-loop threads and spin for minutes; this test is about durability,
# not timing, so its runtimes run at normal priority.
BASE = ["supervisor.settle_time=0.2", "watchdog.overrun_misses=100000",
        "log.pre_capture_s=0.2", "log.post_capture_s=0.1", "loop.spin_us=0",
        "loop.realtime=false"]


def child(base: Path, i: int) -> None:
    cfg = load_config(DEMO, [*BASE, f"log.dir={base / str(i)}"])
    r = Runner(cfg, RunSettings(duration=4.0, auto_arm=False, faults=["spike@2.0:size=0.5"],
                                echo_trips=False, preflight=False))
    asyncio.run(r.run())


def main() -> None:
    base, n, parallel = Path(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3])
    cfg = load_config(DEMO, BASE)
    LawAdapter(design_from_config(cfg), "fast", cfg)  # compile (or load) the kernels once
    running: dict[int, int] = {}
    nxt = 0
    while nxt < n or running:
        while nxt < n and len(running) < parallel:
            pid = os.fork()
            if pid == 0:
                code = 0
                try:
                    child(base, nxt)
                except BaseException:  # noqa: BLE001 - report, never return into the farm
                    import traceback

                    traceback.print_exc()
                    code = 1
                os._exit(code)
            running[pid] = nxt
            print(f"{nxt} {pid}", flush=True)
            nxt += 1
        pid, status = os.wait()
        i = running.pop(pid, None)
        if i is not None:
            print(f"end {i} {status}", flush=True)


if __name__ == "__main__":
    main()
