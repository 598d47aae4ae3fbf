"""Exports of one trip's capture: CSV and COMTRADE (IEEE C37.111-2013).

Lives here: `trip_channels(trip)` (the capture flattened into named analogue
and digital channels with units), `export_csv(trip, path)` and
`export_comtrade(trip, path)` (ASCII .cfg + .dat, rev_year 2013).

COMTRADE mapping (our choices within the standard):
- one analogue channel per element of every numeric capture field (error,
  reference, states, commands, inputs, margin ratio, learning rate, weight
  norm, ...), stored as integers in [-99998, 99998] with per-channel
  multiplier a and offset b (value = a * sample + b), 99999 marking a missing
  (non-finite) sample;
- digital channels: one per supervisor mode, `fallback` (fallback active),
  `latched` when recorded, and one per watchdog rule (active from the tick it
  fired, or as recorded in a `rules` capture field);
- time stamps in microseconds from the first sample, one sample rate
  (1 / capture period), the first sample and the trip instant as the two
  date-time lines (UTC, time code 0), the trip as the trigger.

What does not live here: reading logs (`runtime.records.logs`), plots
(`runtime.review.triplot`), the command line (`runtime.cli.cmd_trips`).
"""

from __future__ import annotations

import csv
import datetime as dt
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.records.logs import MODES, RULES, Trip

#: Capture fields that are flags or modes, never analogue channels.
DIGITAL_FIELDS = frozenset({"mode", "fallback", "latched", "rules", "active_rules",
                            "clamped", "capped", "outputs_on"})
#: Capture fields that index time, not signals.
TIME_FIELDS = frozenset({"t", "tick", "t_mono", "t_wall"})
ASCII_LIMIT = 99998          # largest analogue sample magnitude we write
ASCII_MISSING = 99999        # C37.111 ASCII missing-data marker (1999 and later)

_STATE_FIELDS = ("x", "xr", "e", "x_meas", "y")
_INPUT_FIELDS = ("u", "u_raw", "u_cmd", "u_applied", "u_n", "sat_time")


@dataclass
class Channel:
    """One exported signal: its name, unit and values over the capture."""

    name: str
    unit: str
    values: NDArray[np.float64]
    digital: bool = False


def _element_names(trip: Trip, field: str, width: int) -> list[str]:
    names = trip.names()
    if field in _STATE_FIELDS and len(names.get("states", [])) == width:
        labels = names["states"]
    elif field in _INPUT_FIELDS and len(names.get("inputs", [])) == width:
        labels = names["inputs"]
    elif field == "c" and len(names.get("tracked", [])) == width:
        labels = names["tracked"]
    else:
        labels = [str(j) for j in range(width)]
    return [f"{field}_{lab}" for lab in labels]


def _element_units(trip: Trip, field: str, width: int) -> list[str]:
    cap = trip.capture()
    units = [cap.unit(field, j) for j in range(width)]
    if any(units):
        return units
    names = trip.names()
    if field in _STATE_FIELDS and len(names.get("state_units", [])) == width:
        return list(names["state_units"])
    if field in _INPUT_FIELDS and len(names.get("input_units", [])) == width:
        return list(names["input_units"])
    return units


def _truthy(v: object) -> float:
    if isinstance(v, str):
        return 1.0 if v.strip().lower() not in ("", "0", "false", "no", "none") else 0.0
    if isinstance(v, (int, float)):
        return 1.0 if (math.isfinite(v) and v != 0) else 0.0
    return 1.0 if v else 0.0


def _rule_activity(trip: Trip) -> dict[str, NDArray[np.float64]]:
    """Each watchdog rule's activity per row (1 active, 0 not)."""
    cap = trip.capture()
    n = len(cap)
    out = {r: np.zeros(n) for r in RULES}
    recorded = cap.columns.get("rules", cap.columns.get("active_rules"))
    if recorded is not None:
        for i, v in enumerate(recorded.tolist()):
            if isinstance(v, (int, float)) and math.isfinite(v):
                for b, r in enumerate(RULES):
                    out[r][i] = float((int(v) >> b) & 1)
            elif isinstance(v, (list, tuple)):
                for r in v:
                    if r in out:
                        out[r][i] = 1.0
        return out
    # Not recorded per tick: a trip rule counts as active from the tick it fired (trips latch).
    tick_col = cap.numeric("tick")
    ticks: NDArray[Any]
    if tick_col is not None and tick_col.ndim == 1:
        ticks = tick_col
    else:
        ticks = trip.tick + (np.arange(n) - cap.trip_index)
    fired = [(trip.rule, trip.tick)] + [(r.rule, r.tick if "tick" not in r.missing
                                         else trip.tick) for r in trip.rec.later]
    for rule, tick in fired:
        if rule in out:
            out[rule] = np.maximum(out[rule], np.asarray(ticks >= tick, dtype=float))
    ratio = cap.numeric("ratio")
    if ratio is not None and ratio.ndim == 1:
        with np.errstate(invalid="ignore"):
            out["margin_warning"] = (ratio >= trip.levels()["warning"]).astype(float)
    return out


def trip_channels(trip: Trip) -> list[Channel]:
    """The capture as flat channels: analogue ones first, then digital ones."""
    cap = trip.capture()
    n = len(cap)
    analog: list[Channel] = []
    fields = list(cap.fields)
    cols = dict(cap.columns)
    x, xr = cap.numeric("x"), cap.numeric("xr")
    if "e" not in cols and x is not None and xr is not None and x.shape == xr.shape:
        cols["e"] = x - xr
        fields.insert(fields.index("xr") + 1, "e")
    for f in fields:
        if f in TIME_FIELDS or f in DIGITAL_FIELDS:
            continue
        col = cols[f]
        if col.dtype == object:
            continue
        if col.ndim == 1:
            analog.append(Channel(f, cap.unit(f), col))
            continue
        width = col.shape[1]
        src = "x" if f == "e" and "e" not in cap.units else f
        for name, unit, j in zip(_element_names(trip, f, width),
                                 _element_units(trip, src, width), range(width), strict=True):
            analog.append(Channel(name, unit, col[:, j]))
    digital: list[Channel] = []
    modes = trip.modes() if "mode" in cols else None
    if modes is not None:
        order = [str(m) for m in trip.header.get("modes") or MODES]
        for m in order:
            digital.append(Channel(f"mode_{m}", "", np.array([float(v == m) for v in modes]),
                                   True))
    fb = cols.get("fallback")
    if fb is not None:
        fallback = np.array([_truthy(v) for v in fb.tolist()])
    elif modes is not None:
        fallback = np.array([float(v == "fallback") for v in modes])
    else:
        fallback = None
    if fallback is not None:
        digital.append(Channel("fallback", "", fallback, True))
    for f in ("latched", "outputs_on", "clamped", "capped"):
        if f in cols:
            digital.append(Channel(f, "", np.array([_truthy(v) for v in cols[f].tolist()]), True))
    for rule, active in _rule_activity(trip).items():
        digital.append(Channel(f"rule_{rule}", "", active, True))
    assert all(len(ch.values) == n for ch in analog + digital)
    return analog + digital


# ---------------------------------------------------------------------------
# CSV
# ---------------------------------------------------------------------------

def export_csv(trip: Trip, path: str | Path) -> Path:
    """One header row (`name [unit]`), then one row per captured tick.

    The first column is `t_trip [s]` (seconds from the trip instant), then
    `tick` when captured, then every channel of `trip_channels`, then the
    mode as text when captured.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    cap = trip.capture()
    chans = trip_channels(trip)
    tick = cap.numeric("tick")
    mode_col = cap.columns.get("mode")
    head = ["t_trip [s]"] + (["tick"] if tick is not None else [])
    head += [f"{c.name} [{c.unit}]" if c.unit else c.name for c in chans]
    head += ["mode"] if mode_col is not None else []
    modes = trip.modes()
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(head)
        for i in range(len(cap)):
            row: list[object] = [repr(float(cap.t[i]))]
            if tick is not None:
                row.append(int(tick[i]) if math.isfinite(tick[i]) else "")
            for c in chans:
                v = float(c.values[i])
                row.append(int(v) if c.digital else repr(v))
            if mode_col is not None:
                row.append(modes[i])
            w.writerow(row)
    return path


# ---------------------------------------------------------------------------
# COMTRADE
# ---------------------------------------------------------------------------

def _clean(text: str, limit: int = 64) -> str:
    """Names and units in a .cfg: no commas, printable ASCII only."""
    text = re.sub(r"[^ -~]", "?", str(text)).replace(",", ";").strip()
    return text[:limit]


def _stamp(unix: float) -> str:
    """dd/mm/yyyy,hh:mm:ss.ssssss (UTC)."""
    when = dt.datetime.fromtimestamp(round(unix, 6), tz=dt.UTC)
    return when.strftime("%d/%m/%Y,%H:%M:%S.%f")


def scaling(values: NDArray[np.float64]) -> tuple[float, float]:
    """Multiplier a and offset b so that every finite value is a*k + b, |k| <= 99998."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return 1.0, 0.0
    lo, hi = float(finite.min()), float(finite.max())
    b = 0.5 * (lo + hi)
    half = 0.5 * (hi - lo)
    if half <= 0.0:
        half = max(abs(b), 1.0) * 1e-6
    return half / ASCII_LIMIT, b


def export_comtrade(trip: Trip, path: str | Path, station: str | None = None) -> tuple[Path, Path]:
    """Write `<path>.cfg` and `<path>.dat` (ASCII, IEEE C37.111-2013); returns both paths."""
    base = Path(path)
    if base.suffix.lower() in (".cfg", ".dat"):
        base = base.with_suffix("")
    base.parent.mkdir(parents=True, exist_ok=True)
    cap = trip.capture()
    n = len(cap)
    if n == 0:
        raise ValueError(f"trip {trip.key} has no captured ticks to export")
    chans = trip_channels(trip)
    analog = [c for c in chans if not c.digital]
    digital = [c for c in chans if c.digital]
    period = cap.period if cap.period > 0 else 0.001
    t_us = np.round((cap.t - cap.t[0]) * 1e6).astype(np.int64)
    start_wall = trip.t_wall + float(cap.t[0])
    lines = [
        f"{_clean(station or trip.rig)},{_clean('corral ' + trip.software_version)},2013",
        f"{len(analog) + len(digital)},{len(analog)}A,{len(digital)}D",
    ]
    ints: list[NDArray[np.int64]] = []
    for k, ch in enumerate(analog, start=1):
        a, b = scaling(ch.values)
        with np.errstate(invalid="ignore"):
            q = np.round((ch.values - b) / a)
        q = np.where(np.isfinite(q), np.clip(q, -ASCII_LIMIT, ASCII_LIMIT), ASCII_MISSING)
        ints.append(q.astype(np.int64))
        # An,ch_id,ph,ccbm,uu,a,b,skew,min,max,primary,secondary,PS
        lines.append(f"{k},{_clean(ch.name)},,,{_clean(ch.unit, 32)},{a!r},{b!r},0,"
                     f"{-ASCII_LIMIT},{ASCII_LIMIT},1,1,P")
    for k, ch in enumerate(digital, start=1):
        # Dn,ch_id,ph,ccbm,y (y = the normal state)
        lines.append(f"{k},{_clean(ch.name)},,,0")
    lines += [
        "0",                                   # lf: no line frequency (not a power system)
        "1",                                   # nrates
        f"{1.0 / period:.9g},{n}",             # samp, endsamp
        _stamp(start_wall),                    # first data point
        _stamp(trip.t_wall),                   # trigger point: the trip instant
        "ASCII",
        "1",                                   # timemult: time stamps in microseconds
        "0,0",                                 # time_code, local_code: UTC
        "F,0",                                 # tmq_code (host clock, no traceable sync), leap_s
    ]
    cfg_path = base.with_suffix(".cfg")
    dat_path = base.with_suffix(".dat")
    cfg_path.write_text("\r\n".join(lines) + "\r\n", encoding="ascii")
    bits = [np.asarray(ch.values > 0.5, dtype=np.int64) for ch in digital]
    cols = [np.arange(1, n + 1), t_us, *ints, *bits]
    table = np.column_stack(cols) if cols else np.zeros((n, 0), dtype=np.int64)
    with open(dat_path, "w", encoding="ascii", newline="") as fh:
        for row in table.tolist():
            fh.write(",".join(map(str, row)) + "\r\n")
    return cfg_path, dat_path
