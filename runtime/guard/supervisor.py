"""The mode machine: idle, settling, engaged, fallback, stopped, and the trip latch.

- idle: outputs off, waiting for an arm (the state before the first arm).
- settling: the bumpless fixed-gain baseline holds the pose while the
  measured rates stay below ``supervisor.settle_rate_tol`` for
  ``supervisor.settle_time`` seconds; then engaged.
- engaged: the adaptive law runs; on entry the loop sets x_r = x (and the
  weights to zero), which the barrier guarantee needs (||e(0)||_P < eps).
- fallback: a fallback law runs (after a trip, or an operator disarm).
- stopped: outputs off after a stop, an outputs-off trip or a finished
  controlled stop.

Trips latch. Clearing a trip needs the condition gone, then a `reset`
(which never restarts anything: the mode stays as it is), then a separate
`arm`, which settles again and re-initialises x_r = x. `stop` is always
accepted. Every decision is returned as an event for the record.

Pure logic, no I/O and no clock: the loop calls `request`, `settle_step`,
`trip`, `fallback_done`. What does not live here: the rules
(`runtime.guard.watchdog`) and the fallback laws (`runtime.guard.fallback`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

MODES = ("idle", "settling", "engaged", "fallback", "stopped")
MODE_CODE = {m: i for i, m in enumerate(MODES)}
OPS = ("arm", "disarm", "reset", "stop")


@dataclass
class Decision:
    """What a request or a trip decided: accepted?, a message, and the fallback to start."""

    ok: bool
    message: str
    action: str | None = None
    """Fallback to start now ("baseline", "controlled_stop", "outputs_off") or None."""
    enter_settling: bool = False


@dataclass
class Supervisor:
    """Modes, latch and operator requests (see the module docstring)."""

    settle_time: float = 0.5
    settle_rate_tol: float = 0.05
    rate_states: tuple[int, ...] = ()
    mode: str = "idle"
    latched: bool = False
    trip_summary: dict[str, Any] | None = None
    fallback: str | None = None
    settled_for: float = 0.0
    events: list[tuple[str, str]] = field(default_factory=list)
    disarm_action: str = "controlled_stop"
    stop_action: str = "outputs_off"

    def _event(self, kind: str, detail: str) -> None:
        self.events.append((kind, detail))

    def _set_mode(self, mode: str) -> None:
        if mode != self.mode:
            self._event("mode", f"{self.mode} -> {mode}")
            self.mode = mode

    def request(self, op: str, present: list[str]) -> Decision:
        """An operator request; `present` lists trip conditions still present."""
        if op == "stop":
            self._event("stop", "operator stop")
            if self.stop_action == "outputs_off":
                self.fallback = None
                self._set_mode("stopped")
            else:
                self.fallback = self.stop_action
                self._set_mode("fallback")
            return Decision(True, "stopped: outputs off", self.stop_action)
        if op == "arm":
            if self.latched:
                return self._refuse(op, "a trip is latched: clear the condition, reset, then arm")
            if self.mode in ("settling", "engaged"):
                return self._refuse(op, f"already armed ({self.mode})")
            self._event("arm", f"from {self.mode}")
            self.fallback = None
            self.settled_for = 0.0
            self._set_mode("settling")
            return Decision(True, "armed: settling", None, enter_settling=True)
        if op == "disarm":
            if self.mode not in ("settling", "engaged"):
                return self._refuse(op, f"not armed ({self.mode})")
            self._event("disarm", f"from {self.mode}")
            self.fallback = self.disarm_action
            self._set_mode("fallback" if self.disarm_action != "outputs_off" else "stopped")
            return Decision(True, f"disarmed: {self.disarm_action}", self.disarm_action)
        if op == "reset":
            if not self.latched:
                return self._refuse(op, "nothing to reset (no trip latched)")
            if present:
                return self._refuse(op, "condition still present: " + ", ".join(present))
            self.latched = False
            self.trip_summary = None
            self._event("reset", f"trip cleared; mode stays {self.mode}; arm to restart")
            return Decision(True, f"reset: trip cleared, mode stays {self.mode}; arm to restart")
        return self._refuse(op, f"unknown request (use one of {', '.join(OPS)})")

    def refuse(self, op: str, why: str) -> Decision:
        """Refuse a request for a reason outside the mode machine (e.g. a preflight NO-GO)."""
        return self._refuse(op, why)

    def _refuse(self, op: str, why: str) -> Decision:
        self._event("refused", f"{op}: {why}")
        return Decision(False, f"{op} refused: {why}")

    def settle_step(self, x: NDArray[np.float64], dt: float) -> bool:
        """While settling: True on the tick the state counts as settled (mode -> engaged)."""
        if self.mode != "settling":
            return False
        idx = list(self.rate_states)
        still = bool(np.all(np.abs(x[idx]) <= self.settle_rate_tol)) if idx else True
        self.settled_for = self.settled_for + dt if still else 0.0
        if self.settled_for + 1e-12 >= self.settle_time:
            self._set_mode("engaged")
            self._event("engage", "settled: x_r = x")
            return True
        return False

    @property
    def current_reaction(self) -> str | None:
        """The fallback in force ("outputs_off" when stopped), None while idle/settling/engaged."""
        if self.mode == "fallback":
            return self.fallback
        return "outputs_off" if self.mode == "stopped" else None

    def trip(self, rule: str, reaction: str) -> str:
        """A trip: latch, switch to the reaction, or keep a fallback at least as severe.

        Returns the reaction in force afterwards; the loop starts a new fallback
        only when it differs from the one already running.
        """
        from runtime.guard.watchdog import SEVERITY

        self.latched = True
        current = self.current_reaction
        if current is not None and SEVERITY[reaction] <= SEVERITY[current]:
            return current
        if reaction == "outputs_off":
            self.fallback = None
            self._set_mode("stopped")
        else:
            self.fallback = reaction
            self._set_mode("fallback")
        return reaction

    def fallback_done(self) -> None:
        """The running fallback finished (outputs off): stopped."""
        self.fallback = None
        self._set_mode("stopped")

    @property
    def outputs_allowed(self) -> bool:
        """True in the modes that drive the rig."""
        return self.mode in ("settling", "engaged", "fallback")
