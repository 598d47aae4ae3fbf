"""The tick's lateness percentiles (`runtime.realtime.timing`) against numpy's own
`np.percentile` (the outside reference: its default linear interpolation between the
closest ranks, Hyndman & Fan's definition 7), to the bit."""

from __future__ import annotations

import math

import numpy as np
import pytest

from runtime.realtime.clock import LatencyStats
from runtime.realtime.timing import TickTiming, percentiles


@pytest.mark.parametrize("n", [1, 2, 3, 7, 8, 99, 100, 101, 999, 1000, 1001])
def test_percentiles_equal_numpy_to_the_bit(n: int) -> None:
    rng = np.random.default_rng(n)
    qs = (0.0, 1.0, 37.5, 50.0, 90.0, 99.0, 99.9, 100.0)
    for _ in range(25):
        a = rng.exponential(2e-5, n)
        if n > 2:  # ties, as a quantised clock gives
            a[rng.integers(n, size=n // 3)] = a[0]
        want = np.percentile(a, list(qs)).tolist()
        assert percentiles(a, qs) == want


def test_percentiles_leave_the_ring_untouched() -> None:
    a = np.random.default_rng(1).normal(size=500)
    before = a.copy()
    percentiles(a, (50.0, 99.0))
    assert np.array_equal(a, before)


def test_last_second_is_numpy_over_the_last_window_across_the_wrap() -> None:
    stats = LatencyStats(capacity=1500)
    timing = TickTiming(0.001)  # a 1000-tick window
    assert all(math.isnan(v) for v in timing.last_second_us())  # no statistics yet
    timing.stats = stats
    assert all(math.isnan(v) for v in timing.last_second_us())  # no tick yet
    values = np.random.default_rng(2).exponential(3e-5, 4000)
    for k, v in enumerate(values, start=1):
        stats.add(float(v))
        if k in (1, 10, 999, 1000, 1001, 1499, 1500, 1501, 2300, 4000):
            recent = values[max(0, k - 1000):k]
            p50, p99 = np.percentile(recent, [50, 99])
            assert timing.last_second_us() == (float(p50 * 1e6), float(p99 * 1e6))
