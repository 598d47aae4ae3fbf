"""The watchdog re-checked over a series of recorded (or replayed) ticks.

`check_watchdog(cfg, series, ...)`: the runtime's own rules
(`runtime.guard.watchdog.Watchdog`) fed tick by tick from recorded columns; the rules a
recording holds no signal for are listed in `UNRECORDED_RULES` and not evaluated.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config

Array = NDArray[np.float64]

#: Override keys accepted under another name (the first is what the watchdog reads).

#: Rules a recording has no signal for: they depend on the link and the host
#: clock, which neither the run file nor the simulated replay carries.
UNRECORDED_RULES = {
    "stale": "sample freshness is a property of the link, not of the recorded ticks",
    "seq_gap": "sequence numbers are not recorded",
    "link_loss": "link state is not recorded",
    "jump": "the estimator's innovation is not recorded",
    "overrun": "deadline misses belong to the host clock, not replayable",
    "weight_rate": "the weight matrix per tick is not recorded (only its norm)",
    "internal": "an exception inside the tick is a software fault, not a replayable signal",
}

#: The loop filters d(ratio)/dt with a 20 Hz first-order low-pass
#: (runtime.realtime.control.AdaptiveControl).
RATIO_RATE_CUTOFF_HZ = 20.0



# ---------------------------------------------------------------------------
# The watchdog over a series of ticks
# ---------------------------------------------------------------------------

@dataclass
class Series:
    """What the watchdog and the summary need of a run of ticks."""

    t: Array
    tick: Array
    engaged: NDArray[np.bool_]
    ratio: Array
    clamped: NDArray[np.bool_]
    u_cmd: Array
    outputs_on: NDArray[np.bool_]
    w_norm: Array
    y: Array
    u: Array
    c: Array


@dataclass
class WatchdogCheck:
    """The rules' verdict over a series: first-out trip, later trips, first warning."""

    trip: dict[str, Any] | None
    trips: list[dict[str, Any]]
    warning: dict[str, Any] | None
    levels: dict[str, float]


def check_watchdog(cfg: Config, series: Series, period: float, clamp_margin: float,
                   input_limits: Array) -> WatchdogCheck:
    """Run the runtime's `Watchdog` over recorded (or replayed) ticks.

    Signals are rebuilt from the columns exactly as `runtime.realtime.tick.TickCore`
    fills them: ratio and clamp only while engaged, d(ratio)/dt through the
    loop's 20 Hz low-pass (`runtime.realtime.control.AdaptiveControl`), saturation
    time accumulated while outputs are on.
    The rules in `UNRECORDED_RULES` are disabled (no signal in a record).
    """
    from runtime.guard.watchdog import Signals, Watchdog

    wd = Watchdog.from_config(cfg, period, clamp_margin)
    for rule in wd.rules:
        if rule.id in UNRECORDED_RULES:
            rule.enabled = False
    sig = Signals()
    alpha = math.exp(-2 * math.pi * RATIO_RATE_CUTOFF_HZ * period)
    u_max = np.asarray(input_limits, dtype=float)
    sat_time = np.zeros(u_max.size)
    ratio_prev = ratio_rate = 0.0
    was_engaged = False
    trips: list[dict[str, Any]] = []
    warning = None
    finite_rows = (np.all(np.isfinite(series.y), axis=1) & np.all(np.isfinite(series.u), axis=1)
                   & (np.isfinite(series.w_norm) | ~series.engaged)
                   & (np.isfinite(series.ratio) | ~series.engaged))
    sat_rows = np.abs(series.u_cmd) >= u_max
    for k in range(series.t.size):
        engaged = bool(series.engaged[k])
        if engaged and not was_engaged:
            ratio_prev = ratio_rate = 0.0  # the loop resets both when it engages
        was_engaged = engaged
        ratio = float(series.ratio[k]) if engaged else 0.0
        if engaged:
            ratio_rate = alpha * ratio_rate + (1 - alpha) * (ratio - ratio_prev) / period
            ratio_prev = ratio
        if series.outputs_on[k]:
            sat_time = np.where(sat_rows[k], sat_time + period, 0.0)
        else:
            sat_time[:] = 0.0
        sig.t = float(series.t[k])
        sig.tick = int(series.tick[k])
        sig.engaged = engaged
        sig.ratio = ratio
        sig.ratio_rate = ratio_rate if engaged else 0.0
        sig.clamped = bool(series.clamped[k]) and engaged
        sig.nonfinite = not bool(finite_rows[k])
        sig.sat_time = float(np.max(sat_time)) if sat_time.size else 0.0
        sig.w_norm = float(series.w_norm[k]) if engaged else 0.0
        tripped = wd.check(sig)
        if warning is None and wd.warning:
            warning = _describe(wd.by_id["margin_warning"], sig)
        for rule in tripped:
            trips.append(_describe(rule, sig))
    margin_w = wd.by_id["margin_warning"].threshold
    margin_t = wd.by_id["margin"].threshold
    return WatchdogCheck(trip=trips[0] if trips else None, trips=trips[:50], warning=warning,
                         levels={"warning": float(margin_w), "trip": float(margin_t)})


def _describe(rule: Any, sig: Any) -> dict[str, Any]:
    d = rule.describe()
    d.update(t=float(sig.t), tick=int(sig.tick), reaction=rule.reaction)
    return d
