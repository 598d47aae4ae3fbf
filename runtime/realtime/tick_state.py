"""The live values of the tick (`TickState`): what its parts read and write each tick."""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


class TickState:
    """The values one tick leaves for the next, the records and telemetry.

    One object shared by the parts of `runtime.realtime.tick.TickCore`: each part writes
    its own fields (the control part the law's figures, the tick the command) and reads
    the others'. Nothing here decides anything.
    """

    def __init__(self, n: int, m: int, p: int, eps0: float) -> None:
        self.n, self.m, self.p = n, m, p
        self.tick = 0
        self.t = 0.0
        self.seq = 0
        """Commands sent (the seq of a command when no sample was ever seen)."""
        self.x: Array = np.zeros(n)
        self.c: Array = np.zeros(p)
        self.u: Array = np.zeros(m)
        """Input applied (sent with outputs on) this tick."""
        self.u_prev: Array = np.zeros(m)
        self.u_cmd: Array = np.zeros(m)
        self.outputs_on = False
        # The law's figures (`runtime.realtime.control.AdaptiveControl` writes them).
        self.e: Array = np.zeros(n)
        self.s = self.ratio = self.phi_d = self.eff_rate = self.step_gain = 0.0
        self.clamped = False
        self.ratio_rate = 0.0
        self.max_ratio = 0.0
        self.w_norm = self.w_rate = 0.0
        self.eps_now = eps0
        """The bound eps_k of this tick (eps(t) since the law engaged)."""
        self.law_ran = False
        """The adaptive law ran this tick (its ratio, s, e are recorded even on a trip)."""
        self.sat_time: Array = np.zeros(m)
        """Seconds each input has been at its limit (the saturation rule's signal)."""
        self.device_status = 0
        """The status bits of the last sample (telemetry ``status``; docs/wire-protocol.md)."""
        self.last_sample_t = -math.inf
        self.link_up = True
        """False from a link loss until the link is back (the `link_loss` rule sees it)."""
        self.link_detail = ""
        """Why the link is down (the `link_loss` first-out's ``detail``)."""
