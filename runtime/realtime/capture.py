"""The layout of a tick row: the run log fields, the pre/post trip capture, their units."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from runtime.method.design import Design
from runtime.records.runinfo import RULE_SIGNAL_UNITS


def _capture_layout(design: Design, p: int,
                    rules: Any = ()) -> tuple[list[str], list[int], list[str]]:
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


def _finite(v: float) -> float | None:
    return v if math.isfinite(v) else None
