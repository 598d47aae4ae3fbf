"""The host clock that paces a host-clocked loop, and the lateness bookkeeping.

Choice (measured with `bench/bench_loop.py` on the 2-core development VM, see
the README for the figures of a 60 s run): a dedicated thread that sleeps to
ABSOLUTE deadlines (``t0 + k * period``, so errors never accumulate), wakes
``spin_us`` early and spins on the monotonic clock for the last stretch, with
the Linux timer slack set to 1 ns and SCHED_FIFO when the process may use it
(root or CAP_SYS_NICE; otherwise it stays at normal priority and says so).
The alternative, `asyncio.sleep`/`call_at` on the event loop, cannot hold
1 kHz: the epoll selector rounds every timeout up to whole milliseconds, so
ticks land ~0.5 ms late on average and over 1 ms late at p99, the whole
period. Measured here over 60 s at 1 kHz with the simulated pedestal and the
same tick work: clock thread p50 0.4 us, p99 20 us lateness (max 8.3 ms, 239
deadline misses); asyncio.sleep p50 580 us, p99 4.4 ms (21837 misses). A
`timerfd` needs Python 3.13 (or ctypes) and still wakes the same
way as an absolute sleep; the thread with a short spin is simpler and gave
p99 lateness in the tens of microseconds here. Multi-millisecond outliers
still happen on a shared VM, so the watchdog's overrun rule expects them.

When a tick overruns by more than a whole period the missed deadlines are
counted as deadline misses and the clock resynchronises to the next future
deadline instead of firing a burst of catch-up ticks.

The spin adapts (`DeadlineClock.adaptive`, on by default): the thread wakes
early by the host's running p99 wake-up latency plus `EARLY_MARGIN_US`, never
more than ``spin_us``. Every microsecond spun at SCHED_FIFO is taken from the
host's shared real-time budget (the kernel throttles all real-time threads
for the rest of a second once they used 95 % of it; runtimes sharing a busy
host were seen held off ~50 ms at a time) and from the other runtimes' cores.
Measured on the 2-core VM at load average 16-20, 3 x 6 s alternating, empty
tick at 1 kHz: fixed 200 us spin 19.5-20.2 % of a core, p99 1.3-31 us;
adaptive 9.0-11.2 % of a core (early wake 70-114 us), p99 1.0-10 us.

A real-time tick thread that falls behind never starves the rest of the
machine: at SCHED_FIFO a thread that never blocks keeps its core from every
normal-priority thread (its own event-loop thread, which may hold the GIL the
tick then waits for, and other processes) until the kernel's real-time
throttle (by default 95 % of each second) lets them run. With many runtimes
on a loaded 2-core host every tick overran its period, so no clock thread ever
slept: they ran back to back at real-time priority and the machine crawled for
minutes. So a clock thread at SCHED_FIFO that has not slept for
`BUSY_LIMIT_PERIODS` periods in a row (a sleep shorter than a tenth of a
period does not count) sleeps one period anyway, counted as missed deadlines
the overrun rule sees. The spin is bounded by ``spin_us`` per tick and a late
tick never spins. A healthy loop sleeps most of every period and never meets
the bound: the guard changes nothing until the loop is already failing.

What lives here: `DeadlineClock` (the thread-side pacer), `LatencyStats`
(preallocated lateness record), `try_realtime`, `naive_asyncio_lateness`
(the comparison the bench prints). What does not: the tick itself
(`runtime.realtime.loop`).
"""

from __future__ import annotations

import asyncio
import ctypes
import math
import os
import threading
import time
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

PR_SET_TIMERSLACK = 29
FIFO_NOT_INHERITED = os.SCHED_FIFO | getattr(os, "SCHED_RESET_ON_FORK", 0)
"""SCHED_FIFO that no thread or process started by the thread inherits (sched(7),
"Resetting scheduling policy for child processes"). Without the flag a helper raised to
real-time priority handed it to everything it started: `corral rig serve` processes
started by a test whose main thread a run had raised to SCHED_FIFO 1 ran their start-up,
and a busy loop after serving, at SCHED_FIFO 1, holding both cores of the shared host for
minutes (seen live: two such processes at 100 % each for over 7 minutes; every runtime's
FIFO-1 helpers, which hold the GIL the tick waits for, stopped with them)."""
P99_STEP = 0.5e-6
"""Step (s) of the running p99 estimate of the wake-up latency (adaptive spin)."""
EARLY_MARGIN_US = 20.0
"""The adaptive spin wakes this much earlier than the host's p99 wake-up latency."""
BUSY_LIMIT_PERIODS = 3
"""A clock thread at SCHED_FIFO that has not slept for this many periods (its ticks are
overrunning) sleeps one period before the next tick, so lower-priority threads and other
processes on its core get to run (see the module docstring)."""


def try_realtime(priority: int = 50) -> str:
    """Ask for SCHED_FIFO and 1 ns timer slack for the calling thread; say what was granted.

    Save `thread_policy()` first and hand it to `set_thread_policy` to undo it (for a
    thread that goes on to other work, such as the event-loop thread after a
    rig-clocked run).
    """
    notes = []
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        if libc.prctl(PR_SET_TIMERSLACK, 1, 0, 0, 0) == 0:
            notes.append("timer slack 1 ns")
    except (OSError, AttributeError):
        pass
    try:
        prio = min(priority, os.sched_get_priority_max(os.SCHED_FIFO))
        os.sched_setscheduler(0, FIFO_NOT_INHERITED, os.sched_param(prio))
        notes.append(f"SCHED_FIFO priority {prio}")
    except (PermissionError, OSError, AttributeError):
        notes.append("normal priority (SCHED_FIFO not permitted)")
    return ", ".join(notes)


def thread_policy() -> tuple[int, int]:
    """The calling thread's (scheduling policy, priority), for `set_thread_policy`."""
    try:
        return os.sched_getscheduler(0), os.sched_getparam(0).sched_priority
    except (OSError, AttributeError):
        return 0, 0


def set_thread_policy(policy: tuple[int, int]) -> None:
    """Put the calling thread back to a policy from `thread_policy`; never raises."""
    try:
        if (os.sched_getscheduler(0), os.sched_getparam(0).sched_priority) != policy:
            os.sched_setscheduler(0, policy[0], os.sched_param(policy[1]))
    except (PermissionError, OSError, AttributeError):
        pass


def raise_helper_threads(priority: int) -> list[int]:
    """Give this process's other normal-priority threads SCHED_FIFO at `priority`.

    For a tick thread at a higher real-time priority that shares the GIL with
    helper threads (run-log and trip-log writers, executor threads): a helper
    at normal priority can be preempted by any other process while it holds the
    GIL, and the tick then waits for it (measured rig-clocked over a pty: ticks
    started up to 3.7 ms after their sample was read). At real-time priority
    below the tick a helper finishes its short burst and hands the GIL back
    within the switch interval. Threads already at a real-time policy are left
    alone. Returns the native ids changed, for `restore_threads`; an empty list
    when not permitted.
    """
    me = threading.get_native_id()
    changed = []
    for t in threading.enumerate():
        tid = t.native_id
        if tid is None or tid == me or not t.is_alive():
            continue
        try:
            if os.sched_getscheduler(tid) != os.SCHED_OTHER:
                continue
            os.sched_setscheduler(tid, FIFO_NOT_INHERITED, os.sched_param(priority))
        except (PermissionError, OSError, AttributeError):
            continue
        changed.append(tid)
    return changed


def restore_threads(tids: list[int]) -> None:
    """Put threads changed by `raise_helper_threads` back to normal priority; never raises."""
    for tid in tids:
        try:
            os.sched_setscheduler(tid, os.SCHED_OTHER, os.sched_param(0))
        except (PermissionError, OSError, AttributeError):
            pass


class LatencyStats:
    """Tick lateness (s) kept in a preallocated ring; percentiles on demand."""

    def __init__(self, capacity: int = 600_000) -> None:
        self.buf: NDArray[np.float64] = np.zeros(capacity)
        self.count = 0
        self.misses = 0
        self.max = 0.0

    def add(self, lateness: float) -> None:
        """Record one tick's lateness (s)."""
        self.buf[self.count % self.buf.size] = lateness
        self.count += 1
        if lateness > self.max:
            self.max = lateness

    def percentiles_us(self) -> tuple[float, float, float]:
        """(p50, p99, max) lateness in microseconds (NaN before the first tick)."""
        n = min(self.count, self.buf.size)
        if n == 0:
            return float("nan"), float("nan"), float("nan")
        p50, p99 = np.percentile(self.buf[:n], [50, 99])
        return float(p50 * 1e6), float(p99 * 1e6), float(self.max * 1e6)


class ArrivalTracker:
    """Lateness and misses of a rig-clocked loop, judged against each sample's expected arrival.

    A rig-clocked tick has no host deadline; its deadline is the sample. The
    expected arrival of a sample is its device time mapped to the host clock
    by the smallest transit seen (``t_host - t_device``), a floor that may
    creep upward by ``creep`` seconds per second of device time so a device
    crystal slower than the host (tens of ppm) never reads as growing
    lateness. ``handle`` returns the lateness of the tick handling the sample
    (handled minus expected arrival, s) and its misses: one when the sample is
    handled more than ``miss_after`` periods after its expected arrival, plus
    one per sample the sequence skipped. A stall of the host or of the device
    of d seconds therefore counts about d / period misses: each sample queued
    behind it is handled late.
    """

    def __init__(self, period: float, miss_after: float = 1.0, creep: float = 5e-4) -> None:
        self.period = float(period)
        self.limit = float(miss_after) * self.period
        self.creep = float(creep)
        self.offset = math.inf
        self.last_device = -math.inf
        self.last_seq: int | None = None

    def handle(self, seq: int, t_device: float, t_host: float, now: float) -> tuple[float, int]:
        """(lateness s, misses) for the sample (seq, t_device) received at t_host, handled now."""
        off = t_host - t_device
        dt = t_device - self.last_device
        if self.offset == math.inf or dt < 0:
            self.offset = off  # first sample, or the device clock restarted
        else:
            self.offset = min(self.offset + self.creep * dt, off)
        self.last_device = t_device
        lateness = now - (t_device + self.offset)
        missed = 1 if lateness > self.limit else 0
        last = self.last_seq
        if last is not None and seq > last + 1:
            missed += seq - last - 1
        self.last_seq = seq
        return lateness, missed


class DeadlineClock:
    """Calls ``tick(k, deadline)`` at absolute deadlines ``t0 + k * period`` (monotonic s).

    Run it in a dedicated thread (`start`) and stop it with `stop`. The tick
    runs in the clock thread; it should be short and must not block.
    """

    def __init__(self, period: float, spin_us: float = 200.0, realtime: bool = True,
                 priority: int = 50, adaptive: bool = True) -> None:
        self.period = float(period)
        self.spin = spin_us * 1e-6
        self.adaptive = adaptive
        self.early = self.spin
        """How early the thread wakes before a deadline (s): `spin_us` at most; with
        `adaptive`, the host's p99 wake-up latency plus `EARLY_MARGIN_US` (see the module
        docstring)."""
        self.realtime = realtime
        self.priority = priority
        self.stats = LatencyStats()
        self.granted = ""
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.error: BaseException | None = None
        self.yields = 0
        """How often the clock thread, behind at SCHED_FIFO, slept a period to let others run."""

    def run(self, tick: Callable[[int, float], None],
            on_exit: Callable[[], None] | None = None) -> None:
        """The pacing loop (blocks until `stop`); exceptions end it and are kept in `error`."""
        if self.realtime:
            self.granted = try_realtime(self.priority)
        period, spin, stats = self.period, self.spin, self.stats
        mono, sleep = time.monotonic, time.sleep
        # Only a real-time thread can starve others by not sleeping (see the docstring).
        busy_limit = BUSY_LIMIT_PERIODS * period if "SCHED_FIFO" in self.granted else math.inf
        min_rest = 0.1 * period
        early = self.early = spin
        adaptive, wake_p99, margin = self.adaptive, spin, EARLY_MARGIN_US * 1e-6
        t0 = mono() + period
        rested = t0
        k = 0
        try:
            while not self._stop.is_set():
                deadline = t0 + k * period
                now = mono()
                rest = deadline - now - early
                if rest > 0:
                    sleep(rest)
                    if rest >= min_rest:
                        rested = deadline
                    if adaptive:
                        # Track the p99 of how late the sleep ends (a quantile by stochastic
                        # approximation: up 99 steps when above, down one when not).
                        if mono() - (deadline - early) > wake_p99:
                            wake_p99 = min(wake_p99 + 99 * P99_STEP, spin)
                        else:
                            wake_p99 = max(wake_p99 - P99_STEP, 0.0)
                        early = min(spin, wake_p99 + margin)
                elif now - rested > busy_limit:
                    self.yields += 1
                    sleep(period)
                    rested = mono()
                while mono() < deadline:  # at most spin_us: the sleep ended that close
                    pass
                stats.add(mono() - deadline)
                self.early = early
                tick(k, deadline)
                k += 1
                # Deadline missed if the tick ended after the next deadline.
                behind = mono() - (t0 + k * period)
                if behind > 0:
                    stats.misses += 1
                    if behind > period:
                        skipped = int(behind // period)
                        stats.misses += skipped
                        t0 += skipped * period
        except BaseException as exc:  # noqa: BLE001 - handed to the owner
            self.error = exc
        finally:
            if on_exit is not None:
                on_exit()

    def start(self, tick: Callable[[int, float], None],
              on_exit: Callable[[], None] | None = None) -> None:
        """Run the pacing loop in its own thread."""
        self._stop.clear()
        self._thread = threading.Thread(target=self.run, args=(tick, on_exit),
                                        name="corral-tick", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Ask the loop to end after the current tick."""
        self._stop.set()

    def join(self, timeout: float | None = None) -> None:
        """Wait for the clock thread."""
        if self._thread is not None:
            self._thread.join(timeout)


async def naive_asyncio_lateness(period: float, seconds: float,
                                 work: Callable[[], None] | None = None) -> LatencyStats:
    """Lateness of a loop paced by `asyncio.sleep` to absolute deadlines (the naive way)."""
    stats = LatencyStats(int(seconds / period) + 16)
    loop = asyncio.get_running_loop()
    t0 = loop.time() + period
    k = 0
    end = t0 + seconds
    while True:
        deadline = t0 + k * period
        if deadline >= end:
            break
        await asyncio.sleep(max(0.0, deadline - loop.time()))
        stats.add(loop.time() - deadline)
        if work is not None:
            work()
        k += 1
        if loop.time() > t0 + k * period:
            stats.misses += 1
    return stats
