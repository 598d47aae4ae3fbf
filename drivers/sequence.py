"""Sample sequence numbers: wrap-aware order, gaps and duplicates, plausibility.

What lives here: `SEQ_MOD`, `seq_newer`, `SeqTracker` (gaps and duplicates)
and `SampleGate`, which checks every sample against the device's hello before
the loop sees it. What does not: decoding (`drivers.wire`).
"""

from __future__ import annotations

import math

from drivers.base import Hello, LinkStats, Sample

SEQ_MOD = 1 << 32
"""Sequence numbers are unsigned 32-bit and wrap."""


# --------------------------------------------------------------------------- sequences


class SeqTracker:
    """Counts sample sequence gaps and duplicates (32-bit wrap-aware).

    `accept(seq)` returns True for a sample newer than every one seen so far.
    A jump forward by k adds k - 1 to `stats.gaps` (samples missed). A sample
    not newer than the last accepted one (repeated or reordered) adds 1 to
    `stats.duplicates` and is rejected. Call `reset()` when the device
    re-announces itself (a new hello restarts its numbering).
    """

    __slots__ = ("stats", "last")

    def __init__(self, stats: LinkStats | None = None) -> None:
        self.stats = stats if stats is not None else LinkStats()
        self.last: int | None = None

    def reset(self) -> None:
        """Forget the last sequence number."""
        self.last = None

    def accept(self, seq: int) -> bool:
        """Record `seq`; True if it is new (forward), False if duplicate or old."""
        last = self.last
        if last is None:
            self.last = seq
            return True
        diff = (seq - last) % SEQ_MOD
        if diff == 0 or diff >= SEQ_MOD // 2:
            self.stats.duplicates += 1
            return False
        self.stats.gaps += diff - 1
        self.last = seq
        return True


class SampleGate:
    """Checks every sample against the device's hello before the loop sees it.

    A sample is refused (counted in `stats.rejected`, or `stats.duplicates`
    when it is not newer than the last one) when its reading count differs from
    the hello's channels, its device time is not finite, or it is implausible
    next to the last accepted sample: a sequence jump over `max_seq_jump`, or a
    device time that disagrees with the sequence step by more than
    `max_time_error_s`. Non-finite readings pass: a NaN from a sensor is the
    loop's `nonfinite` trip, not the link's to hide.

    One forged or corrupted sample cannot poison the stream: a refused sample
    is kept as a candidate, and only when the very next sample continues it
    (seq + 1, one period later) does the gate adopt the new numbering (a device
    that restarted without a hello), counting `stats.resyncs`; the real stream
    resynchronises back the same way. `accept` returns 0 (refused), 1
    (accepted) or 2 (accepted, new numbering: the device clock starts over).
    """

    __slots__ = ("stats", "channels", "period", "max_seq_jump", "max_time_error_s",
                 "last_seq", "last_t", "_cand", "_span")

    def __init__(self, stats: LinkStats | None = None, *, max_span_s: float = 1.0,
                 max_time_error_s: float = 0.5) -> None:
        self.stats = stats if stats is not None else LinkStats()
        self.channels: int | None = None
        self.period = 0.0
        self.max_seq_jump = 1000
        self.max_time_error_s = max_time_error_s
        self._span = max_span_s
        self.last_seq: int | None = None
        self.last_t = 0.0
        self._cand: tuple[int, float] | None = None

    def start(self, hello: Hello) -> None:
        """A new session with this device: its channel count and rate; numbering forgotten."""
        self.channels = len(hello.channels)
        rate = hello.sample_rate_hz
        self.period = 1.0 / rate if math.isfinite(rate) and rate > 0 else 0.0
        self.max_seq_jump = max(16, int(rate * self._span)) if self.period else 1000
        self.reset()

    def reset(self) -> None:
        """Forget the numbering (a new hello restarts it)."""
        self.last_seq = None
        self._cand = None

    def _plausible(self, seq: int, t: float, seq0: int, t0: float) -> bool:
        d = (seq - seq0) % SEQ_MOD
        if d == 0 or d >= SEQ_MOD // 2 or d > self.max_seq_jump:
            return False
        return abs((t - t0) - d * self.period) <= self.max_time_error_s + 0.1 * d * self.period

    def accept(self, s: Sample) -> int:
        """0: refused; 1: accepted; 2: accepted after a resynchronisation."""
        stats = self.stats
        t = s.t_device
        if (self.channels is not None and len(s.y) != self.channels) or not math.isfinite(t):
            stats.rejected += 1
            return 0
        seq = s.seq
        last = self.last_seq
        if last is None:
            self.last_seq, self.last_t = seq, t
            return 1
        if self._plausible(seq, t, last, self.last_t):
            stats.gaps += (seq - last) % SEQ_MOD - 1
            self.last_seq, self.last_t = seq, t
            self._cand = None
            return 1
        cand = self._cand
        if cand is not None and (seq - cand[0]) % SEQ_MOD == 1 \
                and self._plausible(seq, t, cand[0], cand[1]):
            self.last_seq, self.last_t = seq, t
            self._cand = None
            stats.resyncs += 1
            return 2
        d = (seq - last) % SEQ_MOD
        if d == 0:
            stats.duplicates += 1  # a plain repeat is never a resync candidate
            return 0
        self._cand = (seq, t)
        if d >= SEQ_MOD // 2:
            stats.duplicates += 1
        else:
            stats.rejected += 1
        return 0


def seq_newer(a: int, b: int) -> bool:
    """True if sequence number `a` is newer than `b` (32-bit serial arithmetic)."""
    return 0 < (a - b) % SEQ_MOD < SEQ_MOD // 2
