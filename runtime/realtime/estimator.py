"""The state estimate the loop acts on, built from the rig's samples.

`Estimator.update(sample, now)` turns one `drivers.base.Sample` (or ``None``:
nothing arrived this period) into the state x, with:

- rates by a first-order filtered differentiator when the rig sends only
  the position channels (angles only); rate states are recognised from the
  nominal A (a row ``x_i' = x_j`` makes j the rate of i);
- plausibility: non-finite readings and implausible jumps (the innovation
  against a one-period prediction beyond ``jump_limit``) are rejected, the
  previous estimate is held and the flags tell the watchdog;
- the data age: time since the freshest trustworthy reading was measured
  (device time mapped to host time by the smallest offset seen), and a
  frozen-reading age (the whole reading bit-identical to the previous one,
  which a noisy sensor never produces).

What does not live here: the rules that trip on these flags
(`runtime.guard.watchdog`) and the link that delivers samples (`drivers`, `sim_rigs`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from drivers.base import Sample

Array = NDArray[np.float64]


def rate_pairs(A: Array) -> list[tuple[int, int]]:
    """(position i, rate j) pairs: rows of A that read x_i' = x_j."""
    pairs = []
    for i in range(A.shape[0]):
        row = A[i]
        nz = np.flatnonzero(row)
        if nz.size == 1 and row[nz[0]] == 1.0 and nz[0] != i:
            pairs.append((i, int(nz[0])))
    return pairs


class Estimator:
    """x from samples, with plausibility checks and data age (see the module docstring)."""

    def __init__(self, A: Array, period: float, jump_limit: Sequence[float] | Array,
                 channels: int | None = None, cutoff_hz: float = 50.0) -> None:
        self.n = A.shape[0]
        self.period = float(period)
        self.pairs = rate_pairs(A)
        self.channels = self.n if channels is None else int(channels)
        self.angles_only = self.channels < self.n
        if self.angles_only and self.channels != len(self.pairs):
            raise ValueError(f"the rig sends {self.channels} channels; expected {self.n} "
                             f"(full state) or {len(self.pairs)} (positions only)")
        self.alpha = math.exp(-2 * math.pi * cutoff_hz * self.period)
        self.jump_limit = np.asarray(jump_limit, dtype=float)
        self.x: Array = np.zeros(self.n)
        self.valid = False
        self.offset = math.inf
        self._offset_t: float | None = None
        self.last_seq: int | None = None
        self.seq_gap = 0
        """Samples missed just before this one (sequence gap)."""
        self.fresh_t = -math.inf
        self.change_t = -math.inf
        self.prev_y: tuple[float, ...] | None = None
        self.nonfinite = False
        self.jump = 0.0
        """Largest innovation / jump_limit of this tick (>= 1 means rejected)."""
        self.jump_state = -1
        self.status = 0
        self.age = math.inf
        self.frozen_age = 0.0
        self.received = False
        self.refused = 0
        """Samples refused for a reading count other than the rig's channels (held as lost)."""

    def restart_link(self) -> None:
        """A new link session (reconnect, device restart, resynchronised stream): the
        device clock and sequence numbers start over, so the host-minus-device offset,
        the last seq and the last reading are forgotten (the next reading re-acquires
        the state instead of being judged against the old session)."""
        self.offset = math.inf
        self._offset_t = None
        self.last_seq = None
        self.prev_y = None
        self.valid = False

    def reset_to(self, x: Array) -> None:
        """Start from a known state (tests)."""
        self.x[:] = x
        self.valid = True

    def update(self, sample: Sample | None, now: float) -> Array:
        """Fold in this period's sample (or none); returns the estimate (a live view)."""
        self.nonfinite = False
        self.jump = 0.0
        self.seq_gap = 0
        if sample is not None and len(sample.y) != self.channels:
            # A sample that does not match the rig's channels is refused here, whatever
            # link brought it (the serial and MQTT links refuse it against the hello
            # already): it counts as lost, so its data age grows and `stale` judges it.
            self.refused += 1
            sample = None
        self.received = sample is not None
        if sample is not None:
            if self.last_seq is not None and sample.seq > self.last_seq + 1:
                self.seq_gap = sample.seq - self.last_seq - 1
            self.last_seq = sample.seq
            self.status = sample.status
            y = sample.y
            t_meas = self._host_time(sample)
            if self.prev_y is None or y != self.prev_y:
                self.change_t = t_meas
            self.prev_y = y
            ya = np.asarray(y, dtype=float)
            if not np.all(np.isfinite(ya)):
                self.nonfinite = True
            else:
                self._fold(ya, t_meas)
        self.age = now - self.fresh_t
        self.frozen_age = now - self.change_t if self.change_t > -math.inf else 0.0
        return self.x

    OFFSET_CREEP = 5e-4
    """How fast (s per s of device time) the smallest host-minus-device offset may rise.

    The smallest offset seen maps device time to host time without the transit
    jitter. A device clock that runs slow makes the true offset grow; without
    creep the mapped time would fall behind and the data age would grow until
    the stale rule trips on a healthy link. 500 ppm covers any crystal clock
    (common practice: tens of ppm) and still lets a real stall show at once.
    """

    def _host_time(self, s: Sample) -> float:
        off = s.t_host - s.t_device
        if self._offset_t is not None and self.offset < math.inf:
            self.offset += self.OFFSET_CREEP * max(0.0, s.t_device - self._offset_t)
        self._offset_t = s.t_device
        if off < self.offset:
            self.offset = off
        return s.t_device + self.offset

    def _fold(self, y: Array, t_meas: float) -> None:
        T = self.period
        if self.angles_only:
            new = self.x.copy()
            for k, (i, j) in enumerate(self.pairs):
                new[i] = y[k]
                if self.valid:
                    raw = (y[k] - self.x[i]) / T
                    new[j] = self.alpha * self.x[j] + (1 - self.alpha) * raw
                else:
                    new[j] = 0.0
        else:
            new = y
        dt = t_meas - self.fresh_t
        if self.valid and dt <= 2.5 * T:
            # Compared with a recent estimate only: after a gap (dropout, NaN, a
            # rejected reading or two) the next reading re-acquires the state.
            pred = self.x.copy()
            for i, j in self.pairs:
                pred[i] += dt * self.x[j]
            ratios = np.abs(new - pred) / self.jump_limit
            if self.angles_only:
                ratios[[j for _, j in self.pairs]] = 0.0
            k = int(np.argmax(ratios))
            self.jump = float(ratios[k])
            self.jump_state = k
            if self.jump >= 1.0:
                return
        self.x[:] = new
        self.valid = True
        if t_meas > self.fresh_t:
            self.fresh_t = t_meas
