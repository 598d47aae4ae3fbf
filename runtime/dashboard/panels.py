"""What the dashboard shows, as pure functions of the telemetry records.

Each function takes the runtime's hello (static facts about the rig) and/or one
telemetry record (`runtime.records.kinds.Hello`, `Telemetry`; docs/telemetry.md)
and returns plain strings and numbers. A plain map is accepted too (a peer on the
broker, a test): it is read as a partial record (`WireRecord.from_partial`), so a
missing field shows as "-". The textual widgets in `runtime.dashboard.app` only lay these out,
so every number on the screen is tested here without a screen.

What does not live here: widgets, sockets, MQTT.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from runtime.dashboard.typed import (
    HelloLike,
    TelemetryLike,
    TripLike,
    as_hello,
    as_live,
    as_telemetry,
    as_trip,
)
from runtime.records.kinds import Event, LoopFigures, Reply, TripSummary, WireRecord

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


def levels(hello: HelloLike) -> tuple[float, float]:
    """Warning and trip levels of the margin ratio (defaults 0.8 and 0.9)."""
    h = as_hello(hello)
    return _num(h.levels.get("warning"), 0.8), _num(h.levels.get("trip"), 0.9)


def margin_level(ratio: float, warning: float, trip: float) -> str:
    """ok below warning, warning below trip, trip below 1, breach at or beyond the bound."""
    if math.isnan(ratio) or ratio >= 1.0:
        return LEVEL_BREACH
    if ratio >= trip:
        return LEVEL_TRIP
    if ratio >= warning:
        return LEVEL_WARNING
    return LEVEL_OK


def margin_view(hello: HelloLike, tel: TelemetryLike) -> MarginView:
    """The margin panel's content."""
    h, t = as_hello(hello), as_telemetry(tel)
    warning, trip = levels(h)
    ratio = _num(t.ratio)
    eps = t.eps if "eps" not in t.missing else h.eps
    if t.mode != "engaged" and not ratio > 0:
        # The adaptive law is not running: there is no margin to show.
        return MarginView(ratio=math.nan, ratio_text="-", level=LEVEL_OFF,
                          eps_text=fmt(eps or h.eps), s_text="-",
                          time_to_bound_text="-", warning=warning, trip=trip)
    ttb = t.time_to_bound
    if ttb is None or math.isnan(_num(ttb)):
        ttb_text = "not approaching"
    else:
        ttb_text = f"{_num(ttb):.2f} s"
    return MarginView(
        ratio=ratio,
        ratio_text="-" if math.isnan(ratio) else f"{ratio:.3f}",
        level=margin_level(ratio, warning, trip),
        eps_text=fmt(eps),
        s_text=fmt(t.s),
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


def learning_view(tel: TelemetryLike) -> LearningView:
    """gamma*phi_d, phi_d and g_k / cap (marked frozen while the adaptive law is off)."""
    t = as_telemetry(tel)
    g = _num(t.step_gain)
    cap = _num(t.step_gain_cap, 1.0)
    cap = 1.0 if math.isnan(cap) else cap
    frac = g / cap if cap > 0 and not math.isnan(g) else math.nan
    frozen = "mode" not in t.missing and t.mode != "engaged"
    return LearningView(
        eff_rate_text=fmt(t.eff_rate) + (" (adaptation frozen)" if frozen else ""),
        phi_d_text=fmt(t.phi_d),
        step_gain_text=fmt(g, 3),
        cap_text=fmt(cap, 3),
        cap_fraction=frac,
    )


def tracking_rows(hello: HelloLike, tel: TelemetryLike) -> list[tuple[str, ...]]:
    """Per state: "name [unit]", command, reference, measured, error, envelope.

    The unit goes with the name, once, so the numbers stay narrow enough for the panel.
    """
    h, t = as_hello(hello), as_telemetry(tel)
    states: Sequence[str] = h.states
    units: Sequence[str] = h.state_units or [""] * len(states)
    envelope: Sequence[float] = h.envelope
    tracked: Sequence[str] = h.tracked
    c, x, xr = t.c, t.x, t.xr
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


def input_rows(hello: HelloLike, tel: TelemetryLike) -> list[tuple[str, ...]]:
    """Per input: name, applied value, limit, time in saturation (with units)."""
    h, t = as_hello(hello), as_telemetry(tel)
    names: Sequence[str] = h.inputs
    units: Sequence[str] = h.input_units or [""] * len(names)
    limits: Sequence[float] = h.input_limits
    u, sat = t.u, t.sat_time
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


def weight_view(tel: TelemetryLike) -> tuple[str, str]:
    """Weight norm and its rate of change (1/s)."""
    t = as_telemetry(tel)
    return fmt(t.w_norm), fmt(t.w_rate, 3, "1/s")


def health_rows(tel: TelemetryLike) -> list[tuple[str, str]]:
    """Loop and link health as (label, value) rows."""
    t = as_telemetry(tel)
    loop: LoopFigures = t.loop
    link = t.link  # the link's own counters: a map, they differ by link kind
    misses = loop.deadline_misses if "deadline_misses" not in loop.missing else None
    ticks = loop.ticks if "ticks" not in loop.missing else None
    rows = [
        ("loop rate", fmt(loop.rate_hz, 5, "Hz")),
        ("lateness p50 / p99", f"{fmt(loop.lateness_p50_us, 3)} / "
                               f"{fmt(loop.lateness_p99_us, 3)} us"),
        ("deadline misses", fmt(misses, 6)),
        ("ticks", fmt(ticks, 9)),
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


def trip_line(trip: TripLike) -> str:
    """One line for a trip summary: rule, value against threshold, action, tick."""
    tr = as_trip(trip)
    tick = tr.tick if "tick" not in tr.missing else "?"
    return (f"{tr.rule or '?'}: {fmt(tr.value, 4)} vs {fmt(tr.threshold, 4)} -> "
            f"{tr.action or '?'} (tick {tick})")


def supervisor_view(tel: TelemetryLike) -> SupervisorView:
    """The supervisor panel's content."""
    t = as_telemetry(tel)
    fallback = t.fallback
    return SupervisorView(
        mode=t.mode or "?",
        latched=t.latched,
        trip_text=("first out: " + trip_line(t.trip)) if t.trip else "no trip latched",
        fallback_text=f"FALLBACK ACTIVE: {fallback}" if fallback else "adaptive law in charge"
        if t.mode == "engaged" else "-",
        trips=tuple(trip_line(tr) for tr in t.trips),
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


# -- the margin chart over time -----------------------------------------------
CHART_LABEL = 13
"""Width of the margin chart's row labels ("0.90 trip ┤")."""
LEVEL_RULE = "┄"
BOUND_RULE = "━"


def resample_max(times: Sequence[float], values: Sequence[float], t_end: float,
                 window_s: float, width: int) -> list[float]:
    """The largest value in each of `width` equal time columns over ``(t_end - window_s, t_end]``.

    The largest, not the mean: a short excursion towards the bound must stay visible.
    A column without a sample is NaN (drawn empty); a NaN sample (no margin: the law
    was off) is skipped.
    """
    out = [math.nan] * width
    if width <= 0 or window_s <= 0:
        return out
    t0 = t_end - window_s
    dt = window_s / width
    for t, v in zip(times, values, strict=False):
        if not (t0 < t <= t_end) or math.isnan(v):
            continue
        j = min(width - 1, int((t - t0) / dt))
        if math.isnan(out[j]) or v > out[j]:
            out[j] = v
    return out


def chart_levels(warning: float, trip: float) -> list[tuple[float, str]]:
    """The horizontal rules of the margin chart: (value, name), highest first."""
    return [(1.0, "bound"), (trip, "trip"), (warning, "warn")]


def chart_band(height: int, warning: float, trip: float) -> float:
    """The ratio one chart row spans.

    The whole range 0..1 when the rows allow it; else the smallest gap between the
    levels, so bound, trip and warning fall on rows of their own (the chart then shows
    the top of the range, where they are); and never so fine that the warning level
    falls below the last row (on very few rows two levels then share one).
    """
    rows_below = max(1, height - 1)
    full = 1.0 / rows_below
    gaps = [g for g in (1.0 - trip, trip - warning) if g > 0]
    d = min(full, min(gaps)) if gaps else full
    return max(d, (1.0 - min(warning, trip)) / rows_below)


def margin_chart(times: Sequence[float], ratios: Sequence[float], t_end: float,
                 window_s: float, width: int, height: int, warning: float,
                 trip: float) -> list[str]:
    """The margin ratio over the last `window_s` seconds as text rows, top row first.

    Row r spans ``[top - (r + 1) d, top - r d)`` with ``d = chart_band(...)`` and
    ``top = 1 + d``, so the bound (1) is the bottom edge of the top row and each
    level is the bottom edge of its own row. Every row starts with a
    `CHART_LABEL`-character label; a level's row is labelled with that level's own
    value and name and shows the level as a rule where the trace does not reach it.
    Each column is the largest ratio in its slice of time (`resample_max`), drawn
    in eighths of a row. The last two rows are the time axis: ``-N s`` at the left,
    the middle, and ``now`` at the right.
    """
    label_w = CHART_LABEL
    plot_w = max(4, width - label_w)
    cols = resample_max(times, ratios, t_end, window_s, plot_w)
    d = chart_band(height, warning, trip)
    top = 1.0 + d
    rules = chart_levels(warning, trip)

    def row_of(v: float) -> int:
        return math.ceil((top - v) / d - 1e-9) - 1

    rows: list[str] = []
    for r in range(height):
        lo = top - (r + 1) * d
        here = [(v, name) for v, name in rules if row_of(v) == r]
        if here:
            label = (f"{here[0][0]:.2f} {here[0][1]}" if len(here) == 1
                     else "/".join(f"{v:.2f}" for v, _ in here))
            fill = BOUND_RULE if any(name == "bound" for _, name in here) else LEVEL_RULE
        else:
            label = f"{max(lo, 0.0):.2f}" if (r % 2 == 1 or r == height - 1) else ""
            fill = " "
        label = label[:label_w - 2].rjust(label_w - 2) + " ┤"
        chars = []
        for v in cols:
            if math.isnan(v):
                chars.append(fill)
                continue
            frac = (v + 1e-9 - lo) / d
            if frac >= 1:
                chars.append(BLOCKS[-1])
            elif frac > 1e-6:
                chars.append(BLOCKS[max(1, int(frac * 8))])
            else:
                chars.append(fill)
        rows.append(label + "".join(chars))
    rows.append(" " * (label_w - 1) + "└" + "─" * plot_w)
    rows.append(" " * label_w + time_axis(window_s, plot_w))
    return rows


def time_axis(window_s: float, width: int) -> str:
    """'-N s' at the left, '-N/2 s' in the middle, 'now' at the right, `width` wide."""
    left, mid, right = f"-{window_s:g} s", f"-{window_s / 2:g} s", "now"
    line = [" "] * width
    for pos, text in ((0, left), (max(0, width // 2 - len(mid) // 2), mid),
                      (width - len(right), right)):
        for i, ch in enumerate(text):
            if 0 <= pos + i < width:
                line[pos + i] = ch
    return "".join(line)


def strip_scale(values: Sequence[float]) -> tuple[float, float]:
    """The learning-rate strip's range: min to max of the values, widened around a constant.

    A constant rate (the barrier's 1/eps at zero error, or adaptation frozen) gets
    +-10 % of itself (or 0..1 at zero), so it draws as a steady half-height strip
    with readable end labels, not as a full block or an empty row.
    """
    vals = [v for v in values if not math.isnan(v)]
    if not vals:
        return 0.0, 1.0
    lo, hi = min(vals), max(vals)
    if hi - lo <= 1e-9 * max(1.0, abs(hi)):
        pad = 0.1 * abs(hi) if hi != 0 else 1.0
        return lo - pad, hi + pad
    return lo, hi


def strip_lines(values: Sequence[float], width: int, height: int) -> tuple[list[str], str]:
    """A trace of `values` over its own range (`strip_scale`) and its range label."""
    lo, hi = strip_scale(values)
    shifted = [v - lo for v in values]
    rows = trace_lines(shifted, width, height, hi - lo)
    vals = [v for v in values if not math.isnan(v)]
    if vals and max(vals) - min(vals) <= 1e-9 * max(1.0, abs(max(vals))):
        return rows, f"constant {fmt(vals[0], 4)}"
    return rows, f"{fmt(lo, 3)} .. {fmt(hi, 3)}"


# -- per tracked axis: command, reference, measured ----------------------------
def axis_traces(hello: HelloLike, history: Sequence[TelemetryLike], width: int,
                height: int) -> list[tuple[str, list[str]]]:
    """Per tracked axis: a title and rows of text where c, r and y are drawn over time.

    `history` holds telemetry records (oldest first). Each column is one record,
    the last `width` of them; the vertical range spans the three signals. Marks:
    ``c`` the command, ``r`` the reference model, ``y`` the measured state (drawn
    last, so it shows where it covers the others); ``*`` where all three coincide.
    """
    h = as_hello(hello)
    states: Sequence[str] = h.states
    units: Sequence[str] = h.state_units or [""] * len(states)
    tracked: Sequence[str] = h.tracked
    recs = [as_telemetry(r) for r in list(history)[-width:]]
    out: list[tuple[str, list[str]]] = []
    for j, name in enumerate(tracked):
        if name not in states:
            continue
        i = list(states).index(name)
        series: dict[str, list[float]] = {"c": [], "r": [], "y": []}
        for rec in recs:
            c, xr, x = rec.c, rec.xr, rec.x
            series["c"].append(_num(c[j]) if j < len(c) else math.nan)
            series["r"].append(_num(xr[i]) if i < len(xr) else math.nan)
            series["y"].append(_num(x[i]) if i < len(x) else math.nan)
        finite = [v for s in series.values() for v in s if not math.isnan(v)]
        lo, hi = (min(finite), max(finite)) if finite else (0.0, 1.0)
        if hi - lo < 1e-12:
            lo, hi = lo - 0.5 * max(abs(lo), 1e-3), hi + 0.5 * max(abs(hi), 1e-3)
        grid = [[" "] * width for _ in range(height)]
        offset = width - len(recs)
        for mark in ("c", "r", "y"):
            for k, v in enumerate(series[mark]):
                if math.isnan(v):
                    continue
                row = height - 1 - int(round((v - lo) / (hi - lo) * (height - 1)))
                cell = grid[row][offset + k]
                grid[row][offset + k] = mark if cell in (" ", mark) else "*"
        unit = units[i] if i < len(units) else ""
        xs, cs = (recs[-1].x, recs[-1].c) if recs else ([], [])
        title = (f"{name} [{unit}]  c {fmt(cs[j] if j < len(cs) else None, 4)}  "
                 f"y {fmt(xs[i] if i < len(xs) else None, 4)}  range {fmt(lo, 3)} .. "
                 f"{fmt(hi, 3)}")
        out.append((title, ["".join(r) for r in grid]))
    return out


# -- what the glance strip says -------------------------------------------------
def trip_explanation(trip: TripLike, hello: HelloLike,
                     tel: TelemetryLike | None = None) -> str:
    """The trip in words: the record's own explanation when it carries one, the timing
    rules' words (`runtime.realtime.hostcheck.explain_trip`, with the host check from the hello),
    else the rule's value against its threshold."""
    from runtime.realtime.hostcheck import explain_trip

    tr, h = as_trip(trip), as_hello(hello)
    explanation = (trip.get("explanation") if isinstance(trip, Mapping)
                   else tr.extra.get("explanation"))
    if explanation:
        return str(explanation)
    rule, value, thr = tr.rule or "?", tr.value, tr.threshold
    window = h.extra.get("overrun_window")
    loop = as_telemetry(tel).loop.to_wire() if tel is not None else None
    why = explain_trip(rule, value, thr, _num(h.period, 0.0) or None,
                       int(window) if window else None, h.hostcheck or None,
                       loop or None)
    if why:
        return why
    if rule in ("margin", "margin_warning"):
        return (f"the margin ratio ||e||_P / eps reached {fmt(value, 4)}; trip level "
                f"{fmt(thr, 3)} (the bound is 1)")
    if rule == "predicted":
        return (f"the margin ratio, extrapolated over the reaction time, reached "
                f"{fmt(value, 4)}; limit {fmt(thr, 3)}")
    text = f"{rule}: {fmt(value, 4)} against the limit {fmt(thr, 4)}"
    if tr.detail:
        text += f" ({tr.detail})"
    return text


def device_flags(hello: HelloLike, tel: TelemetryLike) -> list[tuple[str, bool]]:
    """The device's own declared status flags (hello ``status_flags``) and whether
    each is set in the last sample's status bits (telemetry ``status``).

    The flag named at index k is status bit ``STATUS_DEVICE_BASE_BIT + k``
    (docs/wire-protocol.md, section "Status bits").
    """
    from drivers.wire import STATUS_DEVICE_BASE_BIT

    names: Sequence[str] = as_hello(hello).status_flags
    bits = as_telemetry(tel).status
    return [(str(n), bool(bits >> (STATUS_DEVICE_BASE_BIT + k) & 1))
            for k, n in enumerate(names)]


def hostcheck_line(hello: HelloLike) -> str:
    """The host check's verdict from the hello, in one line ('' when none ran), with the
    host causes it found (a non-preemptible kernel, a virtual machine)."""
    from runtime.realtime.hostverdict import host_cause_tag  # as trip_explanation's import

    hc = as_hello(hello).hostcheck  # `corral hostcheck --json`: its own open map
    if not hc:
        return ""
    ok = "OK" if hc.get("ok") else "NOT OK"
    return (f"host check {ok}: lateness p99 {fmt(hc.get('lateness_p99_us'), 3)} us, "
            f"worst stall {fmt(hc.get('worst_stall_ms'), 3)} ms, "
            + ("SCHED_FIFO" if hc.get("realtime") else "normal priority") + host_cause_tag(hc))


def preflight_line(hello: HelloLike) -> str:
    """The preflight verdict from the hello ('' when none ran)."""
    pf = as_hello(hello).preflight  # the preflight verdict: its own open map
    if not pf:
        return ""
    reasons = " ".join(str(r) for r in pf.get("reasons") or [])
    return ("preflight GO" if pf.get("go") else "preflight NO-GO") + (
        f": {reasons}" if reasons else "")


# -- the event list -------------------------------------------------------------
def event_line(rec: WireRecord | Mapping[str, Any],
               received: float | None = None) -> str | None:
    """One record (event, trip, reply) as a time-stamped line; None for other records.

    The stamp is the record's own wall time (``t_wall``), else `received` (when the
    dashboard got it: trip summaries and replies carry none)."""
    import time as _time

    typed = as_live(rec)
    t_wall = typed.t_wall if isinstance(typed, Event) and typed.t_wall is not None \
        else received
    stamp = (_time.strftime("%H:%M:%S", _time.localtime(float(t_wall)))
             if isinstance(t_wall, (int, float)) else "--:--:--")
    if isinstance(typed, Event):
        return f"{stamp} {typed.kind or '?'}: {typed.detail}".rstrip()
    if isinstance(typed, TripSummary):
        return f"{stamp} TRIP {trip_line(typed)}"
    if isinstance(typed, Reply):
        ok = "ok" if typed.ok else "REFUSED"
        return f"{stamp} request {typed.op or '?'}: {ok} {typed.message}".rstrip()
    return None


def event_rows(lines: Sequence[str], acknowledged: int, rows: int) -> list[str]:
    """The last `rows` event lines, each marked ``!`` until acknowledged (the first
    `acknowledged` lines are), with the count still to acknowledge on top."""
    unacked = max(0, len(lines) - acknowledged)
    head = (f"events: {unacked} to acknowledge (k)" if unacked
            else f"events: {len(lines)}, all acknowledged")
    first = max(0, len(lines) - max(0, rows - 1))
    body = [("! " if i >= acknowledged else "  ") + lines[i] for i in range(first, len(lines))]
    return [head, *body]
