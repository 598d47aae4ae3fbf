"""What the dashboard shows, as pure functions of the telemetry records.

Each function takes the runtime's `hello` map (static facts about the rig)
and/or one `telemetry` map (see docs/telemetry.md) and returns plain strings
and numbers. The textual widgets in `runtime.dashboard.app` only lay these out,
so every number on the screen is tested here without a screen.

What does not live here: widgets, sockets, MQTT.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

Record = Mapping[str, Any]

LEVEL_OK = "ok"
LEVEL_WARNING = "warning"
LEVEL_TRIP = "trip"
LEVEL_BREACH = "breach"
LEVEL_OFF = "not engaged"


def _num(value: Any, default: float = math.nan) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        return default
    return out


def fmt(value: Any, digits: int = 4, unit: str = "") -> str:
    """A number with `digits` significant digits and its unit; '-' when missing."""
    v = _num(value)
    if math.isnan(v):
        return "-"
    text = f"{v:.{digits}g}"
    return f"{text} {unit}".rstrip()


@dataclass(frozen=True)
class MarginView:
    """The margin panel: ratio now, its level, the bound and the time to it."""

    ratio: float
    ratio_text: str
    level: str
    eps_text: str
    s_text: str
    time_to_bound_text: str
    warning: float
    trip: float


def levels(hello: Record) -> tuple[float, float]:
    """Warning and trip levels of the margin ratio (defaults 0.8 and 0.9)."""
    lv = hello.get("levels") or {}
    return _num(lv.get("warning"), 0.8), _num(lv.get("trip"), 0.9)


def margin_level(ratio: float, warning: float, trip: float) -> str:
    """ok below warning, warning below trip, trip below 1, breach at or beyond the bound."""
    if math.isnan(ratio) or ratio >= 1.0:
        return LEVEL_BREACH
    if ratio >= trip:
        return LEVEL_TRIP
    if ratio >= warning:
        return LEVEL_WARNING
    return LEVEL_OK


def margin_view(hello: Record, tel: Record) -> MarginView:
    """The margin panel's content."""
    warning, trip = levels(hello)
    ratio = _num(tel.get("ratio"))
    if tel.get("mode") != "engaged" and not ratio > 0:
        # The adaptive law is not running: there is no margin to show.
        return MarginView(ratio=math.nan, ratio_text="-", level=LEVEL_OFF,
                          eps_text=fmt(tel.get("eps") or hello.get("eps")), s_text="-",
                          time_to_bound_text="-", warning=warning, trip=trip)
    ttb = tel.get("time_to_bound")
    if ttb is None or math.isnan(_num(ttb)):
        ttb_text = "not approaching"
    else:
        ttb_text = f"{_num(ttb):.2f} s"
    return MarginView(
        ratio=ratio,
        ratio_text="-" if math.isnan(ratio) else f"{ratio:.3f}",
        level=margin_level(ratio, warning, trip),
        eps_text=fmt(tel.get("eps", hello.get("eps"))),
        s_text=fmt(tel.get("s")),
        time_to_bound_text=ttb_text,
        warning=warning,
        trip=trip,
    )


@dataclass(frozen=True)
class LearningView:
    """Effective learning rate and the per-step gain against its cap."""

    eff_rate_text: str
    phi_d_text: str
    step_gain_text: str
    cap_text: str
    cap_fraction: float


def learning_view(tel: Record) -> LearningView:
    """gamma*phi_d, phi_d and g_k / cap (marked frozen while the adaptive law is off)."""
    g = _num(tel.get("step_gain"))
    cap = _num(tel.get("step_gain_cap"), 1.0)
    frac = g / cap if cap > 0 and not math.isnan(g) else math.nan
    frozen = tel.get("mode", "engaged") != "engaged"
    return LearningView(
        eff_rate_text=fmt(tel.get("eff_rate")) + (" (adaptation frozen)" if frozen else ""),
        phi_d_text=fmt(tel.get("phi_d")),
        step_gain_text=fmt(g, 3),
        cap_text=fmt(cap, 3),
        cap_fraction=frac,
    )


def tracking_rows(hello: Record, tel: Record) -> list[tuple[str, ...]]:
    """Per state: "name [unit]", command, reference, measured, error, envelope.

    The unit goes with the name, once, so the numbers stay narrow enough for the panel.
    """
    states: Sequence[str] = hello.get("states") or []
    units: Sequence[str] = hello.get("state_units") or [""] * len(states)
    envelope: Sequence[float] = hello.get("envelope") or []
    tracked: Sequence[str] = hello.get("tracked") or []
    c = tel.get("c") or []
    x = tel.get("x") or []
    xr = tel.get("xr") or []
    rows: list[tuple[str, ...]] = []
    for i, name in enumerate(states):
        unit = units[i] if i < len(units) else ""
        cmd = "-"
        if name in tracked:
            j = list(tracked).index(name)
            cmd = fmt(c[j] if j < len(c) else None, 4)
        xi = x[i] if i < len(x) else None
        ri = xr[i] if i < len(xr) else None
        err = _num(xi) - _num(ri)
        env = envelope[i] if i < len(envelope) else None
        label = f"{name} [{unit}]" if unit else name
        rows.append((label, cmd, fmt(ri, 4), fmt(xi, 4), fmt(err, 3),
                     "+-" + fmt(env, 3) if env is not None else "-"))
    return rows


def input_rows(hello: Record, tel: Record) -> list[tuple[str, ...]]:
    """Per input: name, applied value, limit, time in saturation (with units)."""
    names: Sequence[str] = hello.get("inputs") or []
    units: Sequence[str] = hello.get("input_units") or [""] * len(names)
    limits: Sequence[float] = hello.get("input_limits") or []
    u = tel.get("u") or []
    sat = tel.get("sat_time") or []
    rows: list[tuple[str, ...]] = []
    for i, name in enumerate(names):
        unit = units[i] if i < len(units) else ""
        value = u[i] if i < len(u) else None
        lim = limits[i] if i < len(limits) else None
        at_limit = (lim is not None and value is not None
                    and abs(_num(value)) >= 0.999 * _num(lim))
        rows.append((name, fmt(value, 4, unit), "+-" + fmt(lim, 3, unit),
                     fmt(sat[i] if i < len(sat) else 0.0, 3, "s"),
                     "SATURATED" if at_limit else ""))
    return rows


def weight_view(tel: Record) -> tuple[str, str]:
    """Weight norm and its rate of change (1/s)."""
    return fmt(tel.get("w_norm")), fmt(tel.get("w_rate"), 3, "1/s")


def health_rows(tel: Record) -> list[tuple[str, str]]:
    """Loop and link health as (label, value) rows."""
    loop = tel.get("loop") or {}
    link = tel.get("link") or {}
    rows = [
        ("loop rate", fmt(loop.get("rate_hz"), 5, "Hz")),
        ("lateness p50 / p99", f"{fmt(loop.get('lateness_p50_us'), 3)} / "
                               f"{fmt(loop.get('lateness_p99_us'), 3)} us"),
        ("deadline misses", fmt(loop.get("deadline_misses"), 6)),
        ("ticks", fmt(loop.get("ticks"), 9)),
        ("sample age", fmt(link.get("sample_age_ms"), 3, "ms")),
        ("frames in / out",
         f"{fmt(link.get('frames_in'), 9)} / {fmt(link.get('frames_out'), 9)}"),
        ("CRC errors", fmt(link.get("crc_errors", 0), 6)),
        ("gaps / duplicates",
         f"{fmt(link.get('gaps', 0), 6)} / {fmt(link.get('duplicates', 0), 6)}"),
        ("link latency p50 / p99", f"{fmt(link.get('latency_p50_us'), 3)} / "
                                   f"{fmt(link.get('latency_p99_us'), 3)} us"),
    ]
    return rows


@dataclass(frozen=True)
class SupervisorView:
    """Mode, the latched trip (first-out) and the fallback in charge."""

    mode: str
    latched: bool
    trip_text: str
    fallback_text: str
    trips: tuple[str, ...]


def trip_line(trip: Record) -> str:
    """One line for a trip summary: rule, value against threshold, action, tick."""
    rule = trip.get("rule") or (trip.get("first_out") or {}).get("rule", "?")
    value = trip.get("value", (trip.get("first_out") or {}).get("value"))
    thr = trip.get("threshold", (trip.get("first_out") or {}).get("threshold"))
    action = trip.get("action", "?")
    tick = trip.get("tick", "?")
    return f"{rule}: {fmt(value, 4)} vs {fmt(thr, 4)} -> {action} (tick {tick})"


def supervisor_view(tel: Record) -> SupervisorView:
    """The supervisor panel's content."""
    trip = tel.get("trip")
    fallback = tel.get("fallback")
    return SupervisorView(
        mode=str(tel.get("mode", "?")),
        latched=bool(tel.get("latched", False)),
        trip_text=("first out: " + trip_line(trip)) if trip else "no trip latched",
        fallback_text=f"FALLBACK ACTIVE: {fallback}" if fallback else "adaptive law in charge"
        if tel.get("mode") == "engaged" else "-",
        trips=tuple(trip_line(t) for t in (tel.get("trips") or [])),
    )


BLOCKS = " ▁▂▃▄▅▆▇█"


def trace_lines(values: Sequence[float], width: int, height: int, top: float,
                marks: Sequence[float] = ()) -> list[str]:
    """A cheap multi-row bar trace of the last `width` values scaled to [0, top].

    Rows whose level holds one of `marks` (e.g. the warning and trip levels)
    show a dotted rule where the bar does not reach it. Returned top row first.
    """
    vals = list(values)[-width:]
    vals = [0.0] * (width - len(vals)) + vals
    rows = []
    for r in range(height - 1, -1, -1):
        lo = top * r / height
        hi = top * (r + 1) / height
        mark_here = any(lo <= m < hi for m in marks)
        chars = []
        for v in vals:
            if math.isnan(v):
                chars.append("?")
                continue
            frac = (v - lo) / (hi - lo)
            if frac >= 1:
                chars.append(BLOCKS[-1])
            elif frac > 0:
                chars.append(BLOCKS[max(1, int(frac * 8))])
            else:
                chars.append("┄" if mark_here else " ")
        rows.append("".join(chars))
    return rows
