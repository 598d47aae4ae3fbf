"""Simulated rigs for the fleet tests: real `corral run` processes publishing on a broker.

Each rig is the runtime a user runs (``corral run CONFIG --headless --telemetry-mqtt
HOST:PORT``) on the demo's simulated pedestal, with its own rig name (the topic's rig
level), its own log folder and its own injected faults. Nothing is synthetic: the
records the fleet view reads are the runtime's telemetry, retained hello and mode,
trip summaries and the mode topic's last will (runtime/realtime/telemetry.py).

Settings that keep five of them calm on a loaded 2-core machine:

- ``loop.period = 0.002`` (500 Hz, a fifth of the demo's ticks) and ``loop.spin_us = 0``
  (no busy-wait) and ``loop.realtime = false`` (no SCHED_FIFO): five runtimes cost
  little CPU. Measured on this machine: the demo's design at 0.005 s or slower trips
  its margin within a second, so 0.002 s is the slowest period that runs it calmly.
- ``commands.az = []``, ``commands.el = []``: the rigs hold their pose, so the margin
  stays far under the warning level unless a test lowers that level;
- ``watchdog.overrun_misses``, ``watchdog.stale_periods`` (5 s) and
  ``watchdog.link_timeout_s`` (5 s) raised, as the other runtime tests do
  (tests/runtime_helpers.py): these rigs are about the fleet view, not about host
  timing, and a machine loaded to a load average of 40 must not trip them by itself.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from collections.abc import Iterable, Mapping
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"

PERIOD_S = 0.002
"""The rigs' tick period (see the module docstring)."""

CALM = ["loop.period=0.002", "loop.spin_us=0", "loop.realtime=false",
        "commands.az=[]", "commands.el=[]", "supervisor.settle_time=0.2",
        "watchdog.overrun_misses=100000", "watchdog.stale_periods=2500",
        "watchdog.link_timeout_s=5"]


def start_rig(broker_url: str, rig: str, log_dir: Path, *, arm: bool = True,
              faults: Iterable[str] = (), sets: Iterable[str] = (),
              env: Mapping[str, str] | None = None) -> subprocess.Popen[str]:
    """Start one `corral run` on the simulated rig named `rig`, publishing on `broker_url`.

    ``--duration 600`` only guards against a leaked process (`stop_rigs` ends it)."""
    log_dir.mkdir(parents=True, exist_ok=True)
    cmd = [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--headless",
           "--duration", "600", "--telemetry-mqtt", broker_url]
    if arm:
        cmd.append("--arm")
    for fault in faults:
        cmd += ["--fault", fault]
    for kv in [*CALM, f"rig.name={rig}", f"log.dir={log_dir}", *sets]:
        cmd += ["--set", kv]
    with open(log_dir / "stderr.txt", "w") as err:  # the child keeps its own copy
        return subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=err,
                                text=True, env=None if env is None else dict(env))


def stderr_of(log_dir: Path) -> str:
    """What a rig printed on stderr (for failure messages)."""
    path = log_dir / "stderr.txt"
    return path.read_text(errors="replace")[-2000:] if path.exists() else ""


def stop_rigs(procs: Iterable[subprocess.Popen[str]]) -> None:
    """End each rig as an operator would (Ctrl-C), killing one that hangs; never raises."""
    procs = list(procs)
    for proc in procs:
        if proc.poll() is None:
            proc.send_signal(signal.SIGINT)
    for proc in procs:
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(30)


def kill_rig(proc: subprocess.Popen[str]) -> None:
    """SIGKILL: the runtime gets no chance to say goodbye; its broker publishes the will."""
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(60)
