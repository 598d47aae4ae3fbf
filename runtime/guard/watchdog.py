"""The watchdog: every rule on every tick, first-out and later trips.

Each rule is one small object with an id (the shared contract's names), the
signal it watches, a threshold, an on-delay (the condition must hold that
long before it trips), a clearing deadband (it counts as gone only below
threshold - deadband) and the reaction (fallback name) it asks for. The
rule's value is a plain function of the tick's `Signals`.

`Watchdog.check(sig)` runs every rule and returns the rules that tripped on
this tick, first-out first (rule order breaks ties: the most specific data
faults come before the margin). The loop reacts in the same tick. The
supervisor asks `Watchdog.clear()` whether a reset may be granted.

Config (all optional, declared with their defaults in `runtime.schema`): ``[watchdog]`` thresholds
(``margin_warning``, ``margin_trip``, ``predicted_horizon_s``,
``stale_periods``, ``seq_gap_max``, ``link_timeout_s``, ``saturation_s``,
``overrun_misses``, ``overrun_window``, ``weight_norm_max``,
``weight_rate_max``, ``jump_limit``), and per rule (except ``internal``, always
outputs off)
``[watchdog.rules.<id>]`` with ``reaction``, ``on_delay_s``, ``deadband``,
``enabled``.

The software watchdog is not a safety-rated function and not an emergency
stop; the device must fail safe on its own when commands stop arriving.

What does not live here: the fallbacks (`runtime.guard.fallback`), the mode
machine (`runtime.guard.supervisor`), the trip log (`runtime.records.logs`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from runtime import schema

REACTIONS = ("baseline", "controlled_stop", "outputs_off")
SEVERITY = {"none": 0, "baseline": 1, "controlled_stop": 2, "outputs_off": 3}

RULE_IDS = ("margin_warning", "margin", "predicted_crossing", "clamp", "stale", "seq_gap",
            "link_loss", "nonfinite", "jump", "saturation", "overrun", "weight_norm",
            "weight_rate", "internal")

# Safe default reaction per rule: data that cannot be trusted -> outputs off;
# the adaptive part misbehaving -> the fixed-gain baseline; the drive pinned
# at its limit -> a controlled stop.
DEFAULT_REACTIONS = {
    "margin_warning": "none", "margin": "baseline", "predicted_crossing": "baseline",
    "clamp": "baseline", "stale": "outputs_off", "seq_gap": "baseline",
    "link_loss": "outputs_off", "nonfinite": "outputs_off", "jump": "baseline",
    "saturation": "controlled_stop", "overrun": "baseline", "weight_norm": "baseline",
    "weight_rate": "baseline", "internal": "outputs_off",
}

FRESH_PERIODS = 2.5
"""A reading at most this many periods old is fresh (the estimator's jump check compares
with an estimate no older, `runtime.realtime.estimator.Estimator._fold`); the
error rules (`margin`, `margin_warning`, `clamp`, `predicted_crossing`) run on fresh
estimates only."""

DEFAULTS: dict[str, Any] = schema.defaults_of("watchdog")
"""The ``[watchdog]`` thresholds' defaults, as declared in `runtime.schema`."""


def over(value: float, threshold: float) -> bool:
    """The one comparison of every rule: the signal is at or past its threshold (NaN counts
    as over). The live rules call it, the sweep's numpy bookkeeping maps it over arrays and
    the sweep kernel compiles this very function (`runtime.kernels.fast`), so they cannot drift."""
    return not (value < threshold)


def on_delay_ticks(on_delay: float, period: float) -> int:
    """The on-delay in whole ticks at `period`: a condition first over at tick k0 trips at
    tick k0 + d, d the least with d * period + 1e-12 >= on_delay (as `Rule.evaluate` tests
    t - since on ticks t = k * period). The sweep trips a rule once its condition has held
    d + 1 ticks in a row."""
    d = max(0, math.ceil((on_delay - 1e-12) / period))
    while d > 0 and (d - 1) * period + 1e-12 >= on_delay:
        d -= 1
    while d * period + 1e-12 < on_delay:
        d += 1
    return d


def sweep_levels(rules: list[Rule], period: float) -> dict[str, float]:
    """What the sweep needs of the rules it can evaluate offline, from the live rule set:
    the margin and clamp thresholds (ratios), the saturation threshold in whole ticks (the
    live rule accumulates one period per tick at the limit and trips at its threshold), and
    each one's on-delay in ticks (`on_delay_ticks`: ``margin_delay``, ``clamp_delay``,
    ``saturation_delay``)."""
    by_id = {r.id: r for r in rules}
    out = {"margin": by_id["margin"].threshold, "clamp": by_id["clamp"].threshold,
           "saturation_ticks": by_id["saturation"].threshold / period}
    for rid in ("margin", "clamp", "saturation"):
        out[f"{rid}_delay"] = float(on_delay_ticks(by_id[rid].on_delay, period))
    return out


@dataclass
class Signals:
    """What the watchdog sees on one tick (filled in place by the loop)."""

    t: float = 0.0
    tick: int = 0
    engaged: bool = False
    """The adaptive law ran this tick (margin and weight rules apply)."""
    ratio: float = 0.0
    ratio_rate: float = 0.0
    """d(ratio)/dt (1/s), filtered."""
    clamped: bool = False
    sample_age: float = 0.0
    frozen_age: float = 0.0
    seq_gap: int = 0
    connected: bool = True
    since_sample: float = 0.0
    nonfinite: bool = False
    nonfinite_where: str = ""
    jump: float = 0.0
    sat_time: float = 0.0
    misses_window: int = 0
    w_norm: float = 0.0
    w_rate: float = 0.0
    internal: bool = False
    """An exception escaped the tick (set by the loop's last line of defence)."""


@dataclass
class Rule:
    """One watchdog rule."""

    id: str
    signal: str
    threshold: float
    value: Callable[[Signals], float]
    reaction: str = "baseline"
    on_delay: float = 0.0
    deadband: float = 0.0
    engaged_only: bool = False
    warning_only: bool = False
    enabled: bool = True
    fresh_within: float = math.inf
    """The rule judges a fresh estimate only: while the data age (the stale rule's signal)
    is past this, it is not evaluated and its state is held (neither trips nor clears)."""
    since: float = field(default=math.nan)
    active: bool = False
    last_value: float = 0.0

    def evaluate(self, sig: Signals) -> bool:
        """Update the rule's state; True when it trips (newly) on this tick."""
        if not self.enabled or (self.engaged_only and not sig.engaged):
            self.since = math.nan
            self.last_value = 0.0
            if self.active and self.engaged_only:
                self.active = False
            return False
        # (Rules that judge any estimate have fresh_within = inf: no age can pass it.)
        if (self.fresh_within != math.inf
                and max(sig.sample_age, sig.frozen_age) > self.fresh_within):
            return False
        v = self.value(sig)
        self.last_value = v
        is_over = over(v, self.threshold)
        if self.active:
            if v < self.threshold - self.deadband:
                self.active = False
                self.since = math.nan
            return False
        if not is_over:
            self.since = math.nan
            return False
        if math.isnan(self.since):
            self.since = sig.t
        if sig.t - self.since + 1e-12 >= self.on_delay:
            self.active = True
            return True
        return False

    def describe(self) -> dict[str, Any]:
        """Rule, signal, value and threshold (a first-out or later entry)."""
        v = self.last_value
        return {"rule": self.id, "signal": self.signal,
                "value": float(v) if math.isfinite(v) else str(v),
                "threshold": float(self.threshold)}


def build_rules(cfg: Any, period: float, clamp_margin: float) -> list[Rule]:
    """The rules a config asks for, in first-out tie-break order."""

    def num(key: str) -> float:
        return float(cfg.number(f"watchdog.{key}") if cfg is not None
                     else DEFAULTS[key])

    stale_s = num("stale_periods") * period
    horizon = num("predicted_horizon_s")
    # The rules on the tracking error judge measured states only. On a held estimate (data
    # lost, late or frozen) the error is the reference moving away from a state nobody
    # measured and its trend an extrapolation of that: lost data must end in `stale` /
    # `link_loss`, whatever the stale limit (docs/faults.md). Fresh: at most FRESH_PERIODS
    # old, the estimator's own notion of a recent estimate (its jump check).
    fresh = FRESH_PERIODS * period
    rules = [
        Rule("nonfinite", "non-finite value", 0.5, lambda s: float(s.nonfinite)),
        Rule("link_loss", "seconds without a sample (inf: disconnected)", num("link_timeout_s"),
             lambda s: s.since_sample if s.connected else math.inf),
        Rule("stale", "sample age (s)", stale_s + 0.5 * period,
             lambda s: max(s.sample_age, s.frozen_age)),
        Rule("seq_gap", "samples missed", num("seq_gap_max") + 0.5, lambda s: float(s.seq_gap)),
        Rule("jump", "innovation / jump limit", 1.0, lambda s: s.jump),
        Rule("clamp", "||e||_P / eps with the phi_d clamp engaged", 1.0 - clamp_margin,
             lambda s: s.ratio if s.clamped else 0.0, engaged_only=True, fresh_within=fresh),
        Rule("margin", "||e||_P / eps", num("margin_trip"), lambda s: s.ratio,
             engaged_only=True, deadband=0.05, fresh_within=fresh),
        Rule("predicted_crossing", "predicted ||e||_P / eps", 1.0,
             lambda s: s.ratio + max(0.0, s.ratio_rate) * horizon,
             engaged_only=True, deadband=0.05, fresh_within=fresh),
        Rule("weight_norm", "||W||_F", num("weight_norm_max"), lambda s: s.w_norm,
             engaged_only=True),
        Rule("weight_rate", "||dW/dt||_F (1/s)", num("weight_rate_max"), lambda s: s.w_rate,
             engaged_only=True),
        Rule("saturation", "seconds at the input limit", num("saturation_s"),
             lambda s: s.sat_time),
        Rule("overrun", "deadline misses in the window", num("overrun_misses") - 0.5,
             lambda s: float(s.misses_window)),
        Rule("margin_warning", "||e||_P / eps", num("margin_warning"), lambda s: s.ratio,
             engaged_only=True, deadband=0.05, warning_only=True, fresh_within=fresh),
        # The last line of defence: an exception inside the tick. The loop trips it
        # directly (`runtime.realtime.loop.TickCore.internal_trip`); its reaction is always outputs
        # off and it cannot be disabled (nothing computed by a broken tick can be trusted).
        Rule("internal", "exception inside the tick", 0.5, lambda s: float(s.internal)),
    ]
    for rule in rules:
        rule.reaction = DEFAULT_REACTIONS[rule.id]
        if cfg is None or rule.id == "internal":
            continue
        base = f"watchdog.rules.{rule.id}"
        if rule.warning_only:
            rule.reaction = "none"
        else:
            rule.reaction = cfg.choice(f"{base}.reaction", REACTIONS, rule.reaction)
        rule.on_delay = float(cfg.number(f"{base}.on_delay_s", rule.on_delay, minimum=0.0,
                                         unit="s"))
        rule.deadband = float(cfg.number(f"{base}.deadband", rule.deadband, minimum=0.0))
        rule.enabled = bool(cfg.flag(f"{base}.enabled"))
    return rules


class Watchdog:
    """All rules; `check` per tick returns the rules that newly tripped (first-out first)."""

    def __init__(self, rules: list[Rule], overrun_window: int = 1000) -> None:
        self.rules = rules
        self.by_id = {r.id: r for r in rules}
        self.window = np.zeros(max(1, overrun_window), dtype=np.int8)
        self.window_sum = 0
        self.warning = False

    @classmethod
    def from_config(cls, cfg: Any, period: float, clamp_margin: float) -> Watchdog:
        """Rules and overrun window from ``[watchdog]``."""
        window = (int(cfg.number("watchdog.overrun_window")) if cfg is not None
                  else DEFAULTS["overrun_window"])
        return cls(build_rules(cfg, period, clamp_margin), window)

    def note_miss(self, tick: int, missed: int) -> int:
        """Record this tick's deadline misses (skipped deadlines count); misses in the window."""
        i = tick % self.window.size
        missed = min(int(missed), 127)
        self.window_sum += missed - int(self.window[i])
        self.window[i] = missed
        return self.window_sum

    def check(self, sig: Signals) -> list[Rule]:
        """Every rule on this tick; the trips (warnings excluded), first-out first."""
        tripped = []
        for rule in self.rules:
            if rule.evaluate(sig) and not rule.warning_only:
                tripped.append(rule)
        self.warning = self.by_id["margin_warning"].active
        return tripped

    def conditions_present(self) -> list[str]:
        """Ids of trip rules whose condition is still present (not cleared)."""
        return [r.id for r in self.rules if r.active and not r.warning_only]

    def clear(self) -> bool:
        """True when no trip condition is present (a reset may be granted)."""
        return not self.conditions_present()

    def settings(self) -> list[dict[str, Any]]:
        """The rules as configured (for the run header and the docs)."""
        return [{"rule": r.id, "signal": r.signal, "threshold": r.threshold,
                 "on_delay_s": r.on_delay, "deadband": r.deadband, "reaction": r.reaction,
                 "enabled": r.enabled} for r in self.rules]
