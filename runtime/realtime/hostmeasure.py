"""The host check's measurements: how late the runtime's clock ticks here, and what the
host allows.

- `measure` paces an empty tick with the runtime's own clock
  (`runtime.realtime.clock.DeadlineClock`: absolute deadlines, short spin, SCHED_FIFO
  when allowed) for a few seconds and returns the timer lateness (p50, p99,
  max), the worst stall (the longest time the pacing thread was held off:
  the larger of the worst lateness and the longest gap between two ticks
  beyond one period), the deadline misses and the hypervisor's steal over
  those seconds (`runtime.realtime.hostkernel`).
- `host_facts` reads what the host allows and how busy it is: real-time
  priority rights (a probe thread asks for SCHED_FIFO; RLIMIT_RTPRIO,
  CAP_SYS_NICE, root), memory locking (RLIMIT_MEMLOCK, CAP_IPC_LOCK), the CPU
  frequency governor, the load average, the cores this process may use, the
  kernel's preemption model and whether the host is a virtual machine
  (`runtime.realtime.hostkernel`).

What does not live here: judging the figures (`runtime.realtime.hostverdict`), the whole
check (`runtime.realtime.hostcheck`).
"""

from __future__ import annotations

import math
import os
import resource
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from runtime.realtime.clock import DeadlineClock
from runtime.realtime.hostkernel import read_cpu_times, read_kernel, read_virtual, steal_pct

CAP_IPC_LOCK = 14
CAP_SYS_NICE = 23


# ---------------------------------------------------------------------------
# Measuring
# ---------------------------------------------------------------------------

def measure(period: float, seconds: float, spin_us: float = 200.0, realtime: bool = True,
            progress: Callable[[float, float], None] | None = None) -> dict[str, Any]:
    """Pace an empty tick with `DeadlineClock` for `seconds`; the lateness and stall figures.

    Returns ``ticks``, ``lateness_p50_us``, ``lateness_p99_us``, ``lateness_max_us``,
    ``worst_stall_ms``, ``misses``, ``clock`` (what the clock thread was granted) and
    ``realtime`` (it ran at SCHED_FIFO) and ``steal_pct`` (the share of all CPU time the
    hypervisor took while the clock ran, %; None where ``/proc/stat`` does not tell).
    `progress(elapsed_s, seconds)` is called from
    this thread about four times a second while the clock runs.
    """
    clock = DeadlineClock(period, spin_us=spin_us, realtime=realtime)
    mono = time.monotonic
    state = {"last": math.nan, "gap": 0.0, "end": math.inf}
    done = threading.Event()

    def tick(k: int, deadline: float) -> None:
        now = mono()
        if k == 0:
            state["end"] = deadline + seconds
        else:
            gap = now - state["last"]
            if gap > state["gap"]:
                state["gap"] = gap
        state["last"] = now
        if now >= state["end"]:
            clock.stop()

    cpu_before = read_cpu_times()
    t0 = mono()
    clock.start(tick, done.set)
    try:
        while not done.wait(0.25):
            if progress is not None:
                progress(min(mono() - t0, seconds), seconds)
    finally:
        clock.stop()
        clock.join(5.0)
    cpu_after = read_cpu_times()
    if clock.error is not None:
        raise clock.error
    if progress is not None:
        progress(seconds, seconds)
    p50, p99, mx = clock.stats.percentiles_us()
    stall = max(mx * 1e-6 if math.isfinite(mx) else 0.0, state["gap"] - period, 0.0)
    return {"ticks": int(clock.stats.count), "seconds": float(seconds),
            "lateness_p50_us": _clean(p50), "lateness_p99_us": _clean(p99),
            "lateness_max_us": _clean(mx), "worst_stall_ms": stall * 1e3,
            "misses": int(clock.stats.misses), "clock": clock.granted,
            "realtime": "SCHED_FIFO" in clock.granted,
            "steal_pct": steal_pct(cpu_before, cpu_after)}


def _clean(v: float) -> float:
    return float(v) if math.isfinite(v) else 0.0


# ---------------------------------------------------------------------------
# What the host allows and how busy it is
# ---------------------------------------------------------------------------

def _capabilities() -> int:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("CapEff:"):
                return int(line.split()[1], 16)
    except (OSError, ValueError, IndexError):
        pass
    return 0


def _limit(which: int) -> int | None:
    """Soft limit (None = unlimited)."""
    try:
        soft, _ = resource.getrlimit(which)
    except (OSError, ValueError):
        return 0
    return None if soft == resource.RLIM_INFINITY else int(soft)


def probe_realtime() -> bool:
    """True when a thread of this process may switch itself to SCHED_FIFO (tried in a
    throw-away thread, so the caller keeps its policy)."""
    ok: list[bool] = []

    def attempt() -> None:
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(1))
            ok.append(True)
        except (PermissionError, OSError, AttributeError):
            ok.append(False)

    t = threading.Thread(target=attempt, name="corral-rt-probe", daemon=True)
    t.start()
    t.join(5.0)
    return bool(ok and ok[0])


def _governors() -> dict[str, str]:
    """scaling_governor per CPU, when the kernel exposes it (empty on most VMs)."""
    out = {}
    for path in sorted(Path("/sys/devices/system/cpu").glob("cpu[0-9]*/cpufreq/"
                                                            "scaling_governor")):
        try:
            out[path.parent.parent.name] = path.read_text().strip()
        except OSError:
            continue
    return out


def _rss_bytes() -> int:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def host_facts() -> dict[str, Any]:
    """Real-time rights, memory locking, governor, load and cores of this host, its kernel
    (``kernel``: ``release``, ``preempt``, ``how``) and ``virtual`` (a hypervisor's guest)."""
    caps = _capabilities()
    root = os.geteuid() == 0
    rtprio = _limit(resource.RLIMIT_RTPRIO)
    memlock = _limit(resource.RLIMIT_MEMLOCK)
    ipc_lock = root or bool(caps >> CAP_IPC_LOCK & 1)
    rss = _rss_bytes()
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan, math.nan, math.nan)
    try:
        cpus = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cpus = os.cpu_count() or 1
    return {
        "realtime_rights": {"sched_fifo_possible": probe_realtime(), "root": root,
                            "cap_sys_nice": bool(caps >> CAP_SYS_NICE & 1),
                            "rlimit_rtprio": rtprio},
        "memlock": {"rlimit_bytes": memlock, "cap_ipc_lock": ipc_lock,
                    "mlockall_possible": ipc_lock or memlock is None or memlock >= 2 * rss},
        "governor": _governors() or None,
        "load_1min": float(load[0]), "cpus": int(cpus), "cpus_online": os.cpu_count() or cpus,
        "kernel": read_kernel(), "virtual": read_virtual(),
    }
