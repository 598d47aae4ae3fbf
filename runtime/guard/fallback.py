"""The fallback laws a trip hands over to (and the operator's stops use).

- `Baseline` ("baseline", stop category 2 analogue): the fixed-gain law
  ``u = -K1 x + K2 c_hold`` holding the pose at handover, adaptation frozen,
  starting from the input applied at handover and rate-limited
  (``fallback.rate_limit`` V/s), so the drive never sees a step.
- `ControlledStop` ("controlled_stop", category 1 analogue): the same
  bumpless baseline while the held command ramps to the park pose at
  ``fallback.park_rate`` (units of the tracked outputs per second); when the
  outputs are within ``fallback.park_tolerance`` of the park pose (or after
  ``fallback.stop_timeout_s``) the input ramps to zero and the outputs go off.
- `OutputsOff` ("outputs_off", category 0 analogue): zero input, outputs off,
  at once.

Each has ``step(x) -> (u, outputs_on, done)``. Pure numpy, no I/O. What does
not live here: choosing which one runs (`runtime.guard.supervisor`) and the rules
that ask for them (`runtime.guard.watchdog`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime import schema

Array = NDArray[np.float64]

DEFAULTS: dict[str, Any] = schema.defaults_of("fallback")
"""The ``[fallback]`` settings' defaults, as declared in `runtime.schema`."""


class Baseline:
    """Fixed-gain hold, bumpless from the applied input, rate-limited."""

    name = "baseline"

    def __init__(self, K1: Array, K2: Array, C: Array, u_max: Array, period: float,
                 rate_limit: float, u_applied: Array, x: Array) -> None:
        self.K1, self.K2, self.C = K1, K2, C
        self.u_max = np.asarray(u_max, dtype=float)
        self.du = float(rate_limit) * period
        self.u = np.array(u_applied, dtype=float)
        self.c = C @ np.asarray(x, dtype=float)
        self.period = period

    def target(self, x: Array) -> Array:
        """The unlimited baseline input for state x and the held command."""
        return np.clip(self.K2 @ self.c - self.K1 @ x, -self.u_max, self.u_max)

    def _ramp_to(self, goal: Array) -> Array:
        self.u = self.u + np.clip(goal - self.u, -self.du, self.du)
        return self.u

    def step(self, x: Array) -> tuple[Array, bool, bool]:
        """(u, outputs_on, done): the baseline never finishes by itself."""
        if not np.all(np.isfinite(x)):
            return self._ramp_to(np.zeros_like(self.u)), True, False
        return self._ramp_to(self.target(x)), True, False


class ControlledStop(Baseline):
    """Ramp the held command to the park pose, then the input to zero, then outputs off."""

    name = "controlled_stop"

    def __init__(self, *args: Any, park: Array, park_rate: float, tolerance: float,
                 timeout_s: float, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.park = np.asarray(park, dtype=float)
        self.dc = float(park_rate) * self.period
        self.tol = float(tolerance)
        self.timeout = float(timeout_s)
        self.t = 0.0
        self.parked = False
        self.off = False

    def step(self, x: Array) -> tuple[Array, bool, bool]:
        """(u, outputs_on, done)."""
        if self.off:
            return np.zeros_like(self.u), False, True
        self.t += self.period
        self.c = self.c + np.clip(self.park - self.c, -self.dc, self.dc)
        finite = bool(np.all(np.isfinite(x)))
        if not self.parked and finite:
            at_park = np.all(np.abs(self.C @ x - self.park) <= self.tol)
            if (at_park and np.allclose(self.c, self.park)) or self.t >= self.timeout:
                self.parked = True
        if not finite or self.parked:
            u = self._ramp_to(np.zeros_like(self.u))
            if np.all(u == 0.0):
                self.off = True
                return u, False, True
            return u, True, False
        return self._ramp_to(self.target(x)), True, False


class OutputsOff:
    """Zero input, outputs off, at once."""

    name = "outputs_off"

    def __init__(self, m: int) -> None:
        self.u = np.zeros(m)

    def step(self, x: Array) -> tuple[Array, bool, bool]:
        """(u, outputs_on, done)."""
        return self.u, False, True


def make_fallback(kind: str, design: Any, settings: dict[str, Any], u_applied: Array,
                  x: Array) -> Baseline | ControlledStop | OutputsOff:
    """The fallback named `kind`, starting from the applied input and state at handover."""
    rig = design.rig
    if kind == "outputs_off":
        return OutputsOff(rig.m)
    args = (design.K1, design.K2, rig.C, rig.input_limits, design.Ts, settings["rate_limit"],
            u_applied, x)
    if kind == "baseline":
        return Baseline(*args)
    if kind == "controlled_stop":
        return ControlledStop(*args, park=settings["park"], park_rate=settings["park_rate"],
                              tolerance=settings["park_tolerance"],
                              timeout_s=settings["stop_timeout_s"])
    raise ValueError(f"unknown fallback {kind!r}")


def settings_from_config(cfg: Any, p: int) -> dict[str, Any]:
    """``[fallback]`` settings with defaults (park pose: zeros of the tracked outputs)."""
    out: dict[str, Any] = {}
    for key in ("rate_limit", "park_rate", "park_tolerance", "stop_timeout_s"):
        out[key] = float(cfg.number(f"fallback.{key}"))
    out["park"] = np.asarray(cfg.vector("fallback.park", p), dtype=float)
    return out
