"""The platform's own floor, with no corral loop code: what this host does to a 1 kHz loop.

Two measurements, each in a child process of its own so the caller's priority and
threads are not touched (``python -m runtime.realtime.linkfloor KIND --period P
--seconds S`` prints JSON; `run` starts it and `pty_summary` judges the pty path
against the stale rule's limit):

- ``sleep``: a SCHED_FIFO thread sleeping to absolute deadlines; its lateness (us).
- ``pty``: the served rig's path in miniature. A "device" process at SCHED_FIFO 40
  writes one 40-byte frame at each deadline (waiting in select() for the host's
  replies in between, as `sim_rigs.device` does); a "host" process at SCHED_FIFO 50
  reads the slave end and answers every frame with 24 bytes (the command). Per frame:
  ``age_us``, the arrival after the frame's deadline (what the stale rule judges: the
  data age when it arrives), and ``transit_us``, the arrival after the write.
  Both directions cross the kernel's tty layer, whose flip-buffer work runs in
  normal-priority kernel workers: on a kernel without full preemption a real-time
  reader waits for that work (measured with ftrace on the development VM, see the
  README "A loop that holds on a shared host").

Used by the host check for a serial link (`runtime.realtime.hostcheck`), by
`bench/bench_loop.py` and by `bench/bench_shared_host.py` (one floor for all three).
"""

from __future__ import annotations

import argparse
import json
import os
import select
import struct
import subprocess
import sys
import time
import tty
from pathlib import Path
from typing import Any

import numpy as np

from runtime.realtime.clock import try_realtime

ROOT = Path(__file__).resolve().parents[2]
FRAME = 40
REPLY = 24


def _realtime(priority: int) -> None:
    """SCHED_FIFO for this thread when allowed, not handed on to children (as the runtime)."""
    try_realtime(priority)


def sleep_floor(period: float, seconds: float) -> dict[str, Any]:
    """Lateness (us) of a SCHED_FIFO thread sleeping to absolute deadlines."""
    _realtime(40)
    t0 = time.monotonic()
    late = []
    for k in range(1, int(seconds / period) + 1):
        d = t0 + k * period
        while (left := d - time.monotonic()) > 0:
            time.sleep(left)
        late.append((time.monotonic() - d) * 1e6)
    return {"delays_us": late}


def pty_floor(period: float, seconds: float) -> dict[str, Any]:
    """The pseudo-terminal round trip at `period` (see the module docstring)."""
    master, slave = os.openpty()
    tty.setraw(slave)
    n = int(seconds / period)
    t0 = time.monotonic() + 0.2
    pid = os.fork()
    if pid == 0:  # the device
        os.close(slave)
        _realtime(40)
        for k in range(n):
            d = t0 + k * period
            while (left := d - time.monotonic()) > 0:
                r, _, _ = select.select([master], [], [], left)
                if r:
                    os.read(master, 4096)
            os.write(master, struct.pack("<Id", k, time.monotonic()) + bytes(FRAME - 12))
        os._exit(0)
    _realtime(50)
    age, transit, buf = [], [], b""
    end = t0 + seconds + 1.0
    k = -1
    while k < n - 1 and time.monotonic() < end:
        r, _, _ = select.select([slave], [], [], 0.05)
        if not r:
            continue
        now = time.monotonic()
        buf += os.read(slave, 4096)
        while len(buf) >= FRAME:
            k, sent = struct.unpack("<Id", buf[:12])
            buf = buf[FRAME:]
            age.append((now - (t0 + k * period)) * 1e6)
            transit.append((now - sent) * 1e6)
            os.write(slave, bytes(REPLY))
    os.waitpid(pid, 0)
    os.close(slave)
    os.close(master)
    return {"age_us": age, "transit_us": transit, "frames": n}


def run(kind: str, period: float, seconds: float) -> dict[str, Any]:
    """One floor measurement in a child process (its figures; empty if it failed)."""
    try:
        out = subprocess.run([sys.executable, "-m", "runtime.realtime.linkfloor", kind,
                              "--period", str(period), "--seconds", str(seconds)],
                             capture_output=True, text=True, cwd=ROOT, timeout=seconds + 60)
    except (OSError, subprocess.TimeoutExpired):
        return {}
    if out.returncode != 0:
        return {}
    fig: dict[str, Any] = json.loads(out.stdout)
    return fig


def pty_summary(fig: dict[str, Any], stale_limit_s: float) -> dict[str, Any]:
    """The pty path's figures against the stale rule's limit: ``frames``, ``age_p99_us``,
    ``age_max_ms``, ``over_stale_limit`` (frames that arrived older than the limit) and
    ``stale_limit_ms``; ``ok`` False when nothing was measured."""
    age = np.asarray(fig.get("age_us") or [], dtype=float)
    if age.size == 0:
        return {"ok": False}
    return {"ok": True, "frames": int(age.size), "age_p99_us": float(np.percentile(age, 99)),
            "age_max_ms": float(age.max()) / 1e3,
            "over_stale_limit": int((age > stale_limit_s * 1e6).sum()),
            "stale_limit_ms": stale_limit_s * 1e3}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("kind", choices=("sleep", "pty"))
    ap.add_argument("--period", type=float, default=1e-3)
    ap.add_argument("--seconds", type=float, default=10.0)
    a = ap.parse_args()
    fig = (pty_floor if a.kind == "pty" else sleep_floor)(a.period, a.seconds)
    print(json.dumps(fig))
    return 0


if __name__ == "__main__":
    sys.exit(main())
