"""Fallback transitions (`Handover`): which fallback law drives the rig, and the handovers
between it and the adaptive law (adaptation frozen whenever a fallback or nothing drives)."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.guard.fallback import Baseline, ControlledStop, OutputsOff, make_fallback
from runtime.method.design import Design
from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.tick_state import TickState

Array = NDArray[np.float64]
Fallback = Baseline | ControlledStop | OutputsOff


class Handover:
    """The active fallback law (`fb`, None: none) and the transitions to and from it.

    A fallback starts bumplessly from the input applied last tick and the state now
    (`runtime.guard.fallback.make_fallback`); the adaptive law's weights are frozen.
    """

    def __init__(self, design: Design, settings: dict[str, Any], law: LawAdapter,
                 st: TickState) -> None:
        self.design = design
        self.settings = settings
        self.law = law
        self._st = st
        self.fb: Fallback | None = None

    def start(self, kind: str) -> None:
        """Hand over to fallback `kind` (adaptation frozen)."""
        self.law.frozen = True
        self.fb = make_fallback(kind, self.design, self.settings, self._st.u_prev, self._st.x)

    def outputs_off(self) -> None:
        """No law drives the rig (adaptation frozen)."""
        self.fb = None
        self.law.frozen = True

    def clear(self) -> None:
        """Drop the fallback (the adaptive law engages, or a fresh settling hold starts)."""
        self.fb = None

    def step(self, x: Array) -> tuple[Array, bool, bool]:
        """The active fallback's (u, outputs_on, done) for state x."""
        fb = self.fb
        if fb is None:  # a mode without its law: the tick's `internal` trip
            raise RuntimeError("no fallback law is active")
        return fb.step(x)
