"""The tick's timing figures (`TickTiming`): lateness, deadline misses, their percentiles."""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from runtime.realtime.clock import LatencyStats


class TickTiming:
    """Lateness of this tick and the run's latency statistics, as the records report them.

    `stats` is the clock's `LatencyStats`, set by the runner once the clock exists (None
    before: every percentile is then NaN and no miss is counted).
    """

    def __init__(self, period: float) -> None:
        self.period = period
        self.stats: LatencyStats | None = None
        self.lateness = 0.0
        """Seconds this tick started after its deadline (set by the runner)."""
        self.misses_seen = 0

    @property
    def misses(self) -> int:
        """Deadline misses so far."""
        return self.stats.misses if self.stats is not None else 0

    def new_misses(self) -> int | None:
        """Misses since the last call (None: no statistics yet)."""
        stats = self.stats
        if stats is None:
            return None
        missed = stats.misses - self.misses_seen
        self.misses_seen = stats.misses
        return missed

    def whole_run_us(self) -> tuple[float, float, float]:
        """Lateness p50, p99 and max over the run (us; NaN without statistics)."""
        if self.stats is None:
            return math.nan, math.nan, math.nan
        return self.stats.percentiles_us()

    def last_second_us(self) -> tuple[float, float]:
        """Lateness p50 and p99 over the last second (us): the whole-run percentiles cost
        milliseconds in the tick."""
        if self.stats is None:
            return math.nan, math.nan
        stats = self.stats
        n = min(stats.count, stats.buf.size, int(round(1.0 / self.period)))
        if n <= 0:
            return math.nan, math.nan
        end = stats.count % stats.buf.size
        if end >= n:
            recent = stats.buf[end - n:end]
        else:
            recent = np.concatenate((stats.buf[stats.buf.size - (n - end):], stats.buf[:end]))
        p50, p99 = percentiles(recent, (50.0, 99.0))
        return p50 * 1e6, p99 * 1e6


def percentiles(a: NDArray[np.float64], qs: tuple[float, ...]) -> list[float]:
    """`np.percentile(a, qs)` (its default, linear interpolation between the closest ranks),
    the same figures to the bit, by one `np.partition` on the ranks it needs: in the tick
    (telemetry at 25 Hz) `np.percentile`'s own overhead was ~0.1 ms on a loaded 2-core VM,
    about ten times the partition's."""
    n = a.size
    picks = []
    for q in qs:
        v = (n - 1) * (q / 100.0)
        lo = math.floor(v)
        picks.append((lo, min(lo + 1, n - 1), v - lo))
    part = np.partition(a, sorted({i for lo, hi, _ in picks for i in (lo, hi)}))
    out = []
    for lo, hi, g in picks:
        below, above = float(part[lo]), float(part[hi])
        diff = above - below
        # numpy's `_lerp`: from below under one half, from above at one half and past.
        out.append(above - diff * (1 - g) if g >= 0.5 else below + diff * g)
    return out
