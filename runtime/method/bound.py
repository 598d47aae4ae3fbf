"""The time-varying error bound eps(t): schedules and their admissibility check.

Why a rate limit (our own derivation, checked numerically in
tests/test_bound.py). Take the barrier law with the rational barrier
``phi(s, eps) = s^2 / (eps - s)``, s = ||e||_P, and the Lyapunov function
``V = phi(s, eps(t)) + tr(W~' Gamma^-1 W~)``. With z = s^2,

    dV/dt = phi_d(s, eps) dz/dt + (d phi / d eps) eps' + 2 tr(W~' Gamma^-1 W~')
          = -phi_d e'Re                        (the usual cancellation)
            - s^2 eps' / (eps - s)^2           (d phi / d eps = -s^2 / (eps - s)^2)

since the weight terms cancel exactly as for a constant bound. With
``e'Re >= lambda_min(R) |e|^2 >= c_bar s^2``, c_bar = lambda_min(R)/lambda_max(P),
and ``phi_d = (2 eps - s) / (2 (eps - s)^2)``:

    dV/dt <= -s^2 / (eps - s)^2 * ( c_bar (eps - s/2) + eps' ).

On 0 <= s < eps the bracket is at least ``c_bar eps / 2 + eps'``, so V never
increases whenever

    eps'(t) >= -(c_bar / 2) eps(t),   eps(t) >= eps_inf > 0,

and eps is continuous with this rate condition holding wherever it is
differentiable (V is then absolutely continuous, which is all the argument
needs; our piecewise-linear and re-widening schedules are of that kind).
Growing (eps' >= 0) is always allowed. For the exponential schedule
``eps_inf + (eps_0 - eps_inf) exp(-alpha t)`` the condition reads
``alpha (eps - eps_inf) <= (c_bar/2) eps``, guaranteed by ``alpha <= c_bar / 2``.

Schedules (config ``[adaptation.bound]``, absent = constant design.eps):

- ``constant``: eps0 for ever;
- ``exponential``: eps_inf + (eps0 - eps_inf) exp(-alpha t);
- ``piecewise``: linear between knots ``times`` / ``values``, held after;
- ``widen_on_command``: narrows exponentially like ``exponential``; whenever a
  command moves more than ``change`` (command units, inf-norm) away from its
  value at the last widening, the bound ramps back up to eps0 over
  ``widen_time`` seconds (a smooth C^1 ramp), then narrows again. The command
  changes are read from ``[commands]`` ahead of time, so eps(t) is a plain
  function of time.

``on_violation = "refuse"`` (default) raises ConfigError naming the field, the
admissible rate and why; ``"rate_limit"`` slows the schedule to the admissible
rate and leaves a note the design report prints.

What does not live here: the law that takes eps per tick (`runtime.method.law`), the
design report (`runtime.method.design` appends this module's notes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runtime.config import Config, ConfigError
from runtime.method.commands import schedule_from_config as commands_from_config
from runtime.method.commands import tracked_names

Array = NDArray[np.float64]

KINDS = ("constant", "exponential", "piecewise", "widen_on_command")
ON_VIOLATION = ("refuse", "rate_limit")


@dataclass(frozen=True)
class BoundSchedule:
    """eps(t) as a plain function of time (seconds since the law engaged)."""

    kind: str
    eps0: float
    eps_inf: float
    alpha: float = 0.0
    """Narrowing rate (1/s) of the exponential parts."""
    times: tuple[float, ...] = ()
    """Piecewise knots (s)."""
    values: tuple[float, ...] = ()
    """Piecewise knot values (||e||_P units)."""
    events: tuple[float, ...] = ()
    """Re-widening instants (s) for widen_on_command."""
    widen_time: float = 0.1
    """Duration of the re-widening ramp (s)."""
    alpha_max: float = math.inf
    """The admissible narrowing rate c_bar / 2 (1/s)."""
    notes: tuple[str, ...] = field(default=())
    """What the design report should say (rate limiting applied, ...)."""
    _starts: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        if self.kind == "widen_on_command" and len(self._starts) != len(self.events):
            starts: list[float] = []
            for k, tk in enumerate(self.events):
                prev = -1 if k == 0 else k - 1
                starts.append(float(self._segment(np.array([tk]), prev, starts)[0][0]))
            object.__setattr__(self, "_starts", tuple(starts))

    # ---------------------------------------------------------------- evaluation
    def _exp(self, tau: Array) -> tuple[Array, Array]:
        tau = np.maximum(tau, 0.0)
        decay = np.exp(-self.alpha * tau)
        span = self.eps0 - self.eps_inf
        return self.eps_inf + span * decay, -self.alpha * span * decay

    def _segment(self, t: Array, k: int, starts: Any) -> tuple[Array, Array]:
        """Value and rate on the piece that begins at event k (k = -1: before any event)."""
        if k < 0:
            return self._exp(t)
        tk, v0, tw = self.events[k], starts[k], self.widen_time
        tau = t - tk
        r = np.clip(tau / tw, 0.0, 1.0)
        ramp_v = v0 + (self.eps0 - v0) * (3 * r * r - 2 * r**3)
        ramp_d = (self.eps0 - v0) * (6 * r - 6 * r * r) / tw
        ev, ed = self._exp(tau - tw)
        inside = tau < tw
        return np.where(inside, ramp_v, ev), np.where(inside, ramp_d, ed)

    def _eval(self, t: ArrayLike) -> tuple[Array, Array]:
        t = np.asarray(t, dtype=float)
        if self.kind == "constant":
            return np.full(t.shape, self.eps0), np.zeros(t.shape)
        if self.kind == "exponential":
            return self._exp(t)
        if self.kind == "piecewise":
            tt, vv = np.asarray(self.times), np.asarray(self.values)
            val = np.interp(t, tt, vv)
            slopes = np.diff(vv) / np.diff(tt) if tt.size > 1 else np.zeros(0)
            i = np.searchsorted(tt, t, side="right") - 1
            inside = (i >= 0) & (i < tt.size - 1)
            rate = np.where(inside, slopes[np.clip(i, 0, max(tt.size - 2, 0))]
                            if slopes.size else 0.0, 0.0)
            return val, rate
        idx = np.searchsorted(np.asarray(self.events), t, side="right") - 1
        val = np.empty(t.shape)
        rate = np.empty(t.shape)
        for k in np.unique(idx):
            sel = idx == k
            v, d = self._segment(t[sel], int(k), self._starts)
            val[sel], rate[sel] = v, d
        return val, rate

    def eps(self, t: ArrayLike) -> Array:
        """The bound at times t (s), same shape as t."""
        return self._eval(t)[0]

    def rate(self, t: ArrayLike) -> Array:
        """d eps / dt at times t (1/s times ||e||_P units)."""
        return self._eval(t)[1]

    @property
    def minimum(self) -> float:
        """The smallest value the bound ever takes (eps_inf for narrowing schedules)."""
        if self.kind == "piecewise":
            return float(min(self.values))
        return float(min(self.eps0, self.eps_inf))

    def admissible(self, c_bar: float, t: ArrayLike) -> bool:
        """True when eps' >= -(c_bar/2) eps and eps > 0 at every time in t."""
        v, d = self._eval(t)
        return bool(np.all(v > 0) and np.all(d >= -(c_bar / 2) * v * (1 + 1e-9)))

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready summary for the design report."""
        return {"kind": self.kind, "eps0": self.eps0, "eps_inf": self.eps_inf,
                "alpha": self.alpha, "alpha_max": self.alpha_max,
                "times": list(self.times), "values": list(self.values),
                "widen_events": len(self.events), "notes": list(self.notes)}


# ---------------------------------------------------------------- from a config
def _command_events(cfg: Config, design: Any, change: float) -> list[float]:
    """Times at which a command has moved more than `change` since the last event."""
    rig = design.rig
    sched = commands_from_config(cfg, tracked_names(rig.C, rig.states))
    dt = min(float(design.Ts), 0.01)
    t = np.arange(0.0, sched.duration, dt)
    c = np.asarray(sched.evaluate(t), dtype=float).reshape(t.size, -1)
    events: list[float] = []
    anchor = c[0]
    for k in range(1, t.size):
        if np.max(np.abs(c[k] - anchor)) > change:
            events.append(float(t[k]))
            anchor = c[k]
    return events


def _violation(key: str, on_violation: str, what: str, alpha_max: float, fix: str) -> None:
    if on_violation == "refuse":
        raise ConfigError(
            key, f"{what}, faster than the admissible narrowing rate c_bar/2 = "
            f"{alpha_max:.4g} 1/s. Shrinking faster makes the barrier term of the Lyapunov "
            "function grow (its derivative gains -s^2 eps'/(eps - s)^2), so the bound is "
            "no longer guaranteed.",
            f"{fix}, or set adaptation.bound.on_violation = \"rate_limit\".")


def schedule_from_config(cfg: Config, design: Any) -> BoundSchedule:
    """The bound schedule `[adaptation.bound]` describes (constant design.eps when absent).

    Raises ConfigError (naming the field, the admissible rate and why) when the
    schedule shrinks too fast and on_violation = "refuse"; slows it to the
    admissible rate, with a note, when on_violation = "rate_limit".
    """
    c_bar = float(design.c_bar)
    alpha_max = c_bar / 2.0
    if not cfg.has("adaptation.bound"):
        return BoundSchedule("constant", float(design.eps), float(design.eps),
                             alpha_max=alpha_max)
    kind = cfg.choice("adaptation.bound.kind")
    on_violation = cfg.choice("adaptation.bound.on_violation")
    eps0 = cfg.number("adaptation.bound.eps0", float(design.eps))
    notes: list[str] = []
    if kind == "constant":
        return BoundSchedule("constant", eps0, eps0, alpha_max=alpha_max)
    if kind == "piecewise":
        times = cfg.vector("adaptation.bound.times")
        values = cfg.vector("adaptation.bound.values", times.size)
        if times.size < 1 or times[0] != 0.0 or np.any(np.diff(times) <= 0):
            raise ConfigError("adaptation.bound.times", "must start at 0 and increase strictly.",
                              "write e.g. times = [0.0, 10.0, 20.0].")
        t_new = [0.0]
        for i in range(1, times.size):
            dt = times[i] - times[i - 1]
            drop = values[i - 1] - values[i]
            need = drop / (alpha_max * values[i]) if drop > 0 else 0.0
            if dt < need * (1 - 1e-12):
                _violation("adaptation.bound.times", on_violation,
                           f"the segment {times[i - 1]:g} s -> {times[i]:g} s narrows eps "
                           f"from {values[i - 1]:.4g} to {values[i]:.4g} at "
                           f"{drop / dt / values[i]:.4g} 1/s (relative to its end value)",
                           alpha_max, f"give that segment at least {need:.3g} s")
                notes.append(f"bound segment {i} stretched from {dt:.3g} s to {need:.3g} s "
                             f"to respect the narrowing rate c_bar/2 = {alpha_max:.4g} 1/s")
                dt = need
            t_new.append(t_new[-1] + dt)
        return BoundSchedule("piecewise", float(values[0]), float(values[-1]),
                             times=tuple(t_new), values=tuple(values.tolist()),
                             alpha_max=alpha_max, notes=tuple(notes))
    eps_inf = cfg.number("adaptation.bound.eps_inf")
    alpha = cfg.number("adaptation.bound.alpha")
    if alpha > alpha_max * (1 + 1e-12) and eps_inf < eps0:
        _violation("adaptation.bound.alpha", on_violation,
                   f"alpha = {alpha:.4g} 1/s narrows the bound", alpha_max,
                   f"lower adaptation.bound.alpha to {alpha_max:.4g} or less (narrowing from "
                   f"{eps0:.4g} to {eps_inf:.4g} then takes about "
                   f"{3 / alpha_max:.3g} s to 95 %)")
        notes.append(f"bound narrowing slowed from alpha = {alpha:.4g} to the admissible "
                     f"c_bar/2 = {alpha_max:.4g} 1/s")
        alpha = alpha_max
    if kind == "exponential":
        return BoundSchedule("exponential", eps0, eps_inf, alpha=alpha, alpha_max=alpha_max,
                             notes=tuple(notes))
    change = cfg.number("adaptation.bound.change")
    widen = cfg.number("adaptation.bound.widen_time")
    events = _command_events(cfg, design, change)
    return BoundSchedule("widen_on_command", eps0, eps_inf, alpha=alpha, events=tuple(events),
                         widen_time=widen, alpha_max=alpha_max, notes=tuple(notes))
