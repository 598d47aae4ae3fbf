"""The tick row (`Capture`): its layout (run log fields, units), how a tick fills it, and
the pre/post trip capture around it (a ring of recent rows, the rows after a trip)."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.guard.supervisor import MODE_CODE
from runtime.guard.watchdog import Rule
from runtime.method.design import Design
from runtime.realtime.tick_records import post_record
from runtime.realtime.tick_state import TickState
from runtime.records.kinds import PostRecord
from runtime.records.runinfo import RULE_SIGNAL_UNITS

Array = NDArray[np.float64]


def _capture_layout(design: Design, p: int,
                    rules: Sequence[Rule] = ()) -> tuple[list[str], list[int], list[str]]:
    rig = design.rig
    su = ",".join(rig.state_units)
    iu = ",".join(rig.input_units)
    out_units = ",".join(rig.state_units[i] for i in np.argmax(rig.C != 0, axis=1))
    fields = [("t", 1, "s"), ("tick", 1, "1"), ("mode", 1, "code"), ("latched", 1, "1"),
              ("c", p, out_units), ("x", rig.n, su), ("xr", rig.n, su), ("e", rig.n, su),
              ("s", 1, "1"), ("eps", 1, "1"), ("ratio", 1, "1"), ("phi_d", 1, "1"),
              ("eff_rate", 1, "1"),
              ("step_gain", 1, "1"), ("u_cmd", rig.m, iu), ("u", rig.m, iu),
              ("w_norm", 1, "1"), ("sample_age_ms", 1, "ms"), ("lateness_us", 1, "us"),
              ("outputs_on", 1, "1")]
    # What each watchdog rule judged this tick (`Rule.last_value`), one field per rule.
    fields += [(f"sig_{r.id}", 1, RULE_SIGNAL_UNITS.get(r.id, "1")) for r in rules]
    return [f[0] for f in fields], [f[1] for f in fields], [f[2] for f in fields]


class Capture:
    """The tick row and the trip capture around it.

    `fill` writes this tick's row (the run log row) and keeps it in the pre-trip ring
    (`pre_s` seconds); after a trip, `start_post` collects the next `post_s` seconds of
    rows and hands them to `put` as one ``post`` record (`flush_post`), with the rules
    that tripped meanwhile.
    """

    def __init__(self, design: Design, p: int, rules: Sequence[Rule], pre_s: float,
                 post_s: float, put: Callable[[PostRecord], None]) -> None:
        Ts = design.Ts
        self.fields, self.widths, self.units = _capture_layout(design, p, rules)
        self.row_len = sum(self.widths)
        offs = np.cumsum([0] + self.widths)
        self.slot = {f: slice(int(offs[i]), int(offs[i + 1])) for i, f in enumerate(self.fields)}
        # Each rule's judged signal, at the end of the row in this order (`fill`).
        self._sig_rules = list(rules)
        self.pre_n = max(1, int(round(pre_s / Ts)))
        self.post_n = int(round(post_s / Ts))
        self.ring = np.zeros((self.pre_n, self.row_len))
        self.post_buf = np.zeros((max(1, self.post_n), self.row_len))
        self.post_count = 0
        self.post_trip: int | None = None
        """The trip whose post capture is being collected (None: none)."""
        self.post_later: list[dict[str, Any]] = []
        self.row = np.zeros(self.row_len)
        self._zeros_n = [0.0] * design.rig.n
        self._put = put

    def fill(self, st: TickState, mode: str, latched: bool, sample_age: float,
             lateness: float) -> Array:
        """This tick's row (a buffer reused every tick), also kept in the pre-trip ring."""
        k = st.tick
        row = self.row
        # One list in field order, then one assignment: a numpy slice assignment per field
        # cost more than the whole row (`_capture_layout`; a wrong width still raises).
        x = st.x.tolist()
        # The law's figures whenever it ran this tick, also when the tick ended in a
        # fallback (the tick that tripped the margin rule is in the log with its ratio).
        if st.law_ran:
            e = st.e.tolist()
            xr = (st.x - st.e).tolist()
            s, ratio = st.s, st.ratio
        else:
            xr, e, s, ratio = x, self._zeros_n, 0.0, 0.0
        row[:] = [st.t, k, MODE_CODE[mode], float(latched), *st.c.tolist(), *x, *xr, *e,
                  s, st.eps_now, ratio, st.phi_d, st.eff_rate, st.step_gain,
                  *np.asarray(st.u_cmd, dtype=float).tolist(), *st.u.tolist(), st.w_norm,
                  min(sample_age, 1e6) * 1e3, lateness * 1e6, float(st.outputs_on),
                  *[r.last_value for r in self._sig_rules]]
        self.ring[k % self.pre_n] = row
        return row

    def pre_rows(self, k: int) -> Array:
        """The ring's rows up to and including tick k, oldest first (a copy)."""
        n_pre = min(k + 1, self.pre_n)
        idx = (np.arange(k + 1 - n_pre, k + 1)) % self.pre_n
        return self.ring[idx].copy()

    def pre_rows_before(self, k: int) -> list[list[float]]:
        """The ring's rows before tick k, oldest first (the `internal` trip: tick k's row
        was never filled)."""
        n_pre = min(k, self.pre_n)
        idx = np.arange(k - n_pre, k) % self.pre_n
        rows: list[list[float]] = self.ring[idx].tolist()
        return rows

    # ------------------------------------------------------------- post capture
    def start_post(self, trip_id: int) -> None:
        """Collect the rows after trip `trip_id` (flushing at once when post_s is 0)."""
        self.post_trip = trip_id
        self.post_count = 0
        self.post_later = []
        if self.post_n == 0:
            self.flush_post()

    def add_post(self) -> None:
        """This tick's row into the post capture (flushed once full)."""
        self.post_buf[self.post_count] = self.row
        self.post_count += 1
        if self.post_count >= self.post_n:
            self.flush_post()

    def flush_post(self) -> None:
        """Hand the post capture collected so far to the writer as one ``post`` record."""
        if self.post_trip is None:
            return
        self._put(post_record(self.post_trip, self.post_buf[:self.post_count].copy(),
                              list(self.post_later)))
        self.post_trip = None
        self.post_count = 0
