"""The adaptive control of the engaged tick (`AdaptiveControl`): the command schedule, the
bound eps(t), the law's step and the figures the watchdog, records and telemetry read."""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from runtime.method.bound import BoundSchedule
from runtime.method.commands import CommandSchedule
from runtime.method.design import Design
from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.tick_state import TickState

Array = NDArray[np.float64]


class AdaptiveControl:
    """Engage the law and run its engaged ticks, writing the law's figures to `TickState`.

    Inside `LawAdapter.step` the law runs its own tick order (docs/method.md §8: update
    first, then control with the new weights, then the reference step); this part feeds
    it the command c_k and the bound eps_k, and keeps what it reports.
    """

    def __init__(self, design: Design, law: LawAdapter, bound: BoundSchedule,
                 schedule: CommandSchedule, engage_slew: float, st: TickState) -> None:
        self.design = design
        self.law = law
        Ts = self.Ts = design.Ts
        n_cmd = int(round(schedule.duration / Ts)) + 1
        self.cmd_table = np.ascontiguousarray(schedule.evaluate(np.arange(n_cmd) * Ts))
        # The bound eps(t), t = seconds since the law engaged (constant design.eps when
        # [adaptation.bound] is absent). The law, the margin rules (the ratio is
        # ||e||_P / eps_k), telemetry, trip snapshots and the run log all use eps_k.
        self.bound = bound
        self.bound_varies = bound.kind != "constant"
        self.eps0 = float(bound.eps(0.0))
        self.engage_slew = engage_slew
        self._st = st
        self.c_offset: Array | None = None
        self.engage_tick = 0
        self.engagements: list[dict[str, object]] = []
        """Each engage: tick, x and x_r at that moment (tests and review)."""
        self.W_prev = np.zeros((design.n_regressors, design.rig.m))
        self._dW = np.zeros_like(self.W_prev)
        self._sq = np.zeros_like(self.W_prev)
        # d(ratio)/dt through a 20 Hz first-order low-pass (the margin-rate rule's signal).
        self._alpha_rr = math.exp(-2 * math.pi * 20.0 * Ts)

    def engage(self, x: Array) -> None:
        """x_r = x, weights zero, adaptation on; the command slews from where the rig is."""
        st = self._st
        self.law.engage(x)
        self.engage_tick = st.tick
        self.W_prev[:] = 0.0
        # The command starts at the measured pose and slews onto the schedule, so the
        # reference model does not start with a step the untrained law cannot follow.
        off = self.design.rig.C @ x - self.cmd_table[0]
        self.c_offset = off if np.any(off) else None
        st.ratio = st.ratio_rate = 0.0
        st.e[:] = 0.0
        st.eps_now = self.eps0
        self.engagements.append({"tick": st.tick, "x": x.tolist(),
                                 "xr": np.array(self.law.xr).tolist()})

    def step(self, x: Array) -> Array:
        """One engaged tick at state x: the input the law asks for (a copy)."""
        st, Ts = self._st, self.Ts
        i = st.tick - self.engage_tick
        c = self.cmd_table[i if i < len(self.cmd_table) else -1]
        off = self.c_offset
        if off is not None:
            c = c + off
            off -= np.clip(off, -self.engage_slew * Ts, self.engage_slew * Ts)
            if not np.any(off):
                self.c_offset = None
        st.c = c
        if self.bound_varies:
            st.eps_now = float(self.bound.eps(i * Ts))
        out = self.law.step(x, c, st.eps_now)
        # The fast law's results are views it overwrites next tick: copy. Per tick the
        # arithmetic stays on numpy methods (no `np.sum` wrappers) and preallocated buffers:
        # the same operations in the same order, so the same figures to the bit.
        u: Array = out.u.copy()
        st.e[:] = out.e
        st.s = float(out.s)
        ratio = float(out.ratio)
        a = self._alpha_rr
        st.ratio_rate = a * st.ratio_rate + (1 - a) * (ratio - st.ratio) / Ts
        st.ratio = ratio
        st.phi_d = float(out.phi_d)
        st.eff_rate = float(out.eff_rate)
        st.step_gain = float(out.step_gain)
        st.clamped = bool(out.clamped)
        st.u_cmd = np.array(out.u_raw, dtype=float)
        if ratio > st.max_ratio:
            st.max_ratio = ratio
        W = self.law.W
        sq, add = self._sq, np.add.reduce  # what `ndarray.sum()` calls, without its wrapper
        st.w_norm = math.sqrt(add(np.multiply(W, W, out=sq), None))
        dW = np.subtract(W, self.W_prev, out=self._dW)
        st.w_rate = math.sqrt(add(np.multiply(dW, dW, out=sq), None)) / Ts
        self.W_prev[:] = W
        return u
