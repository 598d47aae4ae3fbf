"""One run-log row, typed: `TickRecord` (positional on disk, no wire map).

The run log holds every tick as a positional msgpack list after a header naming the
fields and their widths (`runtime.records.logwriter.RunLogWriter`); `TickRecord.from_row`
and `to_row` turn a row into named, typed fields and back, unchanged.

What does not live here: the map records (`runtime.records.kinds`), the column reader
(`runtime.records.logs.read_run_log`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from runtime.records.kinds import RecordError

#: The run log's fixed fields, in row order; the ``sig_<rule>`` columns follow.
TICK_FIELDS: tuple[str, ...] = (
    "t", "tick", "mode", "latched", "c", "x", "xr", "e", "s", "eps", "ratio", "phi_d",
    "eff_rate", "step_gain", "u_cmd", "u", "w_norm", "sample_age_ms", "lateness_us",
    "outputs_on")


@dataclass(slots=True, kw_only=True)
class TickRecord:
    """One tick as the run log holds it: a positional row after the header's ``fields``
    and ``widths`` (1 per scalar, n per vector), written by `RunLogWriter` at the loop rate.

    Values stay as recorded (the row is floats: `tick` and `mode` too, see `tick_index`
    and `mode_code`). Units: `t` s; `mode` the supervisor mode's code (index of `MODES`); `latched`,
    `outputs_on` 0/1; `c`, `x`, `xr`, `e` the state/output units; `s` ‖e‖_P; `ratio`
    ‖e‖_P/eps; `u_cmd`, `u` the input units; `w_norm` ‖W‖_F; `sample_age_ms` ms;
    `lateness_us` µs; `signals` each rule's judged signal by rule id (its ``sig_<rule>``
    column, `runtime.records.runinfo.RULE_SIGNAL_UNITS`). A field a row lacks is NaN
    (empty for vectors); columns this version does not know go to `extra`.
    """

    t: float = math.nan
    tick: float = -1
    mode: float = -1
    latched: float = math.nan
    c: list[float] = field(default_factory=list)
    x: list[float] = field(default_factory=list)
    xr: list[float] = field(default_factory=list)
    e: list[float] = field(default_factory=list)
    s: float = math.nan
    eps: float = math.nan
    ratio: float = math.nan
    phi_d: float = math.nan
    eff_rate: float = math.nan
    step_gain: float = math.nan
    u_cmd: list[float] = field(default_factory=list)
    u: list[float] = field(default_factory=list)
    w_norm: float = math.nan
    sample_age_ms: float = math.nan
    lateness_us: float = math.nan
    outputs_on: float = math.nan
    signals: dict[str, float] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def tick_index(self) -> int:
        """The tick number as an integer."""
        return int(self.tick)

    @property
    def mode_code(self) -> int:
        """The supervisor mode's code (index of `runtime.records.logwriter.MODES`)."""
        return int(self.mode)

    @classmethod
    def from_row(cls, fields_: list[str], widths: list[int], row: list[Any]) -> TickRecord:
        """A positional row under its header's fields and widths; RecordError when the
        row's length does not match them."""
        total = sum(widths)
        if len(row) != total:
            raise RecordError(f"run log row: {len(row)} values, the header's widths "
                              f"say {total}")
        rec = cls()
        k = 0
        for name, w in zip(fields_, widths, strict=True):
            value: Any = row[k] if w == 1 else list(row[k:k + w])
            k += w
            if name.startswith("sig_"):
                rec.signals[name[4:]] = value
            elif name in TICK_FIELDS:
                setattr(rec, name, value)
            else:
                rec.extra[name] = value
        return rec

    def to_row(self, fields_: list[str], widths: list[int]) -> list[Any]:
        """The positional row under the header's fields and widths (the inverse of
        `from_row`)."""
        row: list[Any] = []
        for name, w in zip(fields_, widths, strict=True):
            if name.startswith("sig_"):
                value: Any = self.signals.get(name[4:], math.nan)
            elif name in TICK_FIELDS:
                value = getattr(self, name)
            else:
                value = self.extra.get(name, math.nan if w == 1 else [math.nan] * w)
            if w == 1:
                row.append(value)
            else:
                row.extend(value)
        return row
