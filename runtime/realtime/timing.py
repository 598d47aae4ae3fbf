"""The tick's timing figures (`TickTiming`): lateness, deadline misses, their percentiles."""

from __future__ import annotations

import math

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
        return self.stats.recent_percentiles_us(int(round(1.0 / self.period)))
