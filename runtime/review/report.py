"""One self-contained HTML file per run, for handing a run to a colleague.

`build_report(run_log)` reads a run log (`*.run`) and the trip log beside it (`*.trips`,
same stem) and returns the HTML text: the run (rig, link kind, simulated or not, times in
ISO 8601 with the UTC offset), how it ended, the config that ran, the design verdict
(recomputed from that config), the preflight and host-check results (when the run recorded
them), the margin over the whole run (a plot with the levels and the trips marked), every
trip with its capture plot and what crossed what threshold, the operator events, the link
and loop statistics. Plots are PNGs embedded as base64 ``data:`` URIs: the file opens with
no network and no other file.

What does not live here: the command line (`runtime.cli.cmd_report`), the trip plot
(`runtime.review.triplot`), reading logs (`runtime.records.logs`).
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from runtime.guard.supervisor import MODE_CODE
from runtime.records.kinds import Event, RunEnd
from runtime.records.logs import (
    TRIPS_SUFFIX,
    LogReadError,
    Trip,
    read_run_log,
    read_stream,
    read_trip_records,
)
from runtime.records.runinfo import END_HOW, LINK_KINDS, how_ended, iso_time, say_value

#: The section ids, in order (tests and readers find them by these ids).
SECTIONS = ("run", "ended", "config", "design", "preflight", "hostcheck", "margin", "trips",
            "events", "statistics")


def _e(v: Any) -> str:
    return html.escape(str(v))


def _num(v: Any, fmt: str = ".4g") -> str:
    if isinstance(v, bool) or v is None:
        return "&ndash;" if v is None else str(v)
    if isinstance(v, (int, float)):
        return format(v, fmt) if math.isfinite(v) else str(v)
    return _e(v)


def _png(fig: Any) -> str:
    """A matplotlib figure as an <img> with a base64 PNG data URI (the figure is closed)."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    plt.close(fig)
    return _img(buf.getvalue(), "plot")


def _img(data: bytes, alt: str) -> str:
    return (f'<img alt="{_e(alt)}" src="data:image/png;base64,'
            f'{base64.b64encode(data).decode("ascii")}">')


def _table(rows: list[tuple[Any, ...]], head: tuple[str, ...] | None = None) -> str:
    out = ["<table>"]
    if head:
        out.append("<tr>" + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr>")
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>")
    out.append("</table>")
    return "".join(out)


def _kv(items: dict[str, Any]) -> str:
    return _table([(_e(k), _num(v) if not isinstance(v, (dict, list)) else
                    f"<code>{_e(json.dumps(v, default=str))}</code>") for k, v in items.items()])


def _margin_figure(cols: dict[str, Any], header: dict[str, Any], trips: list[Trip]) -> str:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t, ratio = cols.get("t"), cols.get("ratio")
    fig, ax = plt.subplots(figsize=(10, 3.2), constrained_layout=True)
    if t is not None and ratio is not None and len(t):
        ax.plot(t, ratio, color="tab:purple", lw=0.8, label="margin ratio ||e||_P / eps")
    levels = header.get("levels") or {"warning": 0.8, "trip": 0.9}
    ax.axhline(levels.get("warning", 0.8), color="tab:orange", ls="--", lw=1,
               label=f"warning {levels.get('warning', 0.8):g}")
    ax.axhline(levels.get("trip", 0.9), color="tab:red", ls="--", lw=1,
               label=f"trip {levels.get('trip', 0.9):g}")
    ax.axhline(1.0, color="k", lw=0.8, alpha=0.5, label="bound")
    period = float(header.get("period") or 0.001)
    for tr in trips:
        ax.axvline(tr.tick * period, color="tab:red", lw=1.2)
        ax.annotate(f"trip {tr.id}: {tr.rule}", xy=(tr.tick * period, 1.0),
                    xycoords=("data", "axes fraction"), rotation=90, fontsize=7,
                    color="tab:red", ha="right", va="top")
    ax.set_xlabel("time in the run [s]")
    ax.set_ylabel("margin ratio [of eps]")
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", fontsize=7, ncol=4)
    return _png(fig)


def _trip_plot(trip: Trip) -> str:
    from runtime.review.triplot import plot_trip

    if not trip.capture_fields or len(trip.capture()) == 0:
        return "<p>No captured ticks for this trip.</p>"
    with tempfile.TemporaryDirectory() as tmp:
        path = plot_trip(trip, Path(tmp) / "trip.png", dpi=80)
        return _img(path.read_bytes(), f"trip {trip.id} capture")


def _design_section(config: dict[str, Any]) -> str:
    try:
        from runtime.config import Config
        from runtime.method.design import design_from_config

        d = design_from_config(Config(raw=config))
    except Exception as exc:  # noqa: BLE001 - a config from another version must not stop the report
        return f"<p>The design could not be recomputed from the recorded config: {_e(exc)}</p>"
    verdict = "feasible" if d.feasible else "refused"
    rows = {
        "verdict": verdict, "law": d.law, "barrier": d.barrier, "bound eps": d.eps,
        "binding state": d.binding_state, "sample period [s]": d.Ts,
        # Labelled so neither is taken for the other: the law applies min(g, cap).
        "step gain at nominal, before the cap": d.step_gain,
        "step gain at the trip level, before the cap": d.step_gain_at_trip,
        "step gain cap (adaptation.step_gain_cap)": d.step_gain_cap,
        "step gain at the trip level, as applied (capped)": min(d.step_gain_at_trip,
                                                                d.step_gain_cap),
    }
    out = [_kv(rows)]
    if d.reasons:
        out.append("<p>Reasons:</p><ul>" + "".join(f"<li>{_e(r)}</li>" for r in d.reasons)
                   + "</ul>")
    if d.warnings:
        out.append("<p>Warnings:</p><ul>" + "".join(f"<li>{_e(w)}</li>" for w in d.warnings)
                   + "</ul>")
    return "".join(out)


def _stats(values: Any) -> tuple[float, float, float]:
    arr = np.asarray(values, dtype=float)
    arr = arr[np.isfinite(arr)]
    if not arr.size:
        return (math.nan,) * 3
    p50, p99 = np.percentile(arr, [50, 99])
    return float(p50), float(p99), float(np.max(arr))


def _pointing_error(header: dict[str, Any], cols: dict[str, Any]) -> dict[str, Any]:
    """``rms_error_final`` and what it measures (``rms_error_final_against``), by the one
    definition (`runtime.method.commands.rms_error_final`, over the engaged ticks) when this build
    has it, else as the run file carries them, else None. Never a second definition here."""
    out = {"rms_error_final": header.get("rms_error_final"),
           "rms_error_final_against": header.get("rms_error_final_against")}
    if out["rms_error_final"] is not None:
        return out
    try:
        from runtime.method import commands

        fn = commands.rms_error_final
        against = commands.RMS_ERROR_FINAL_AGAINST
    except AttributeError:
        return out
    states, tracked = header.get("states") or [], header.get("tracked") or []
    x, c, t, mode = cols.get("x"), cols.get("c"), cols.get("t"), cols.get("mode")
    if (x is None or c is None or t is None or mode is None or not tracked
            or any(name not in states for name in tracked)):
        return out
    engaged = mode == MODE_CODE["engaged"]
    if not np.any(engaged):
        return out
    idx = [states.index(name) for name in tracked]
    out["rms_error_final"] = float(fn(t[engaged], x[engaged][:, idx], c[engaged]))
    out["rms_error_final_against"] = against
    return out


def report_data(run_log: str | Path) -> dict[str, Any]:
    """What the report shows, as plain values (also the ``--json`` of `corral report`)."""
    run_log = Path(run_log)
    header, cols = read_run_log(run_log)
    _, records, torn = read_stream(run_log)
    trip_path = run_log.with_suffix(TRIPS_SUFFIX)
    trips: list[Trip] = []
    events: list[Event] = []
    trip_end: RunEnd | None = None
    if trip_path.exists():
        try:
            got = read_trip_records(trip_path)
            trips, events, trip_end = got.trips, got.events, got.end
        except LogReadError:
            pass
    end = RunEnd.from_wire(how_ended(records, header))
    if (end.how in ("cut_short", "unknown") and trip_end is not None
            and trip_end.how not in ("cut_short", "unknown")):
        end = trip_end  # the trip log is fsynced per record: it may hold what the run log lost
    ended = end.to_wire()
    ratio = cols.get("ratio")
    max_ratio = float(np.nanmax(ratio)) if ratio is not None and ratio.size else None
    levels = header.get("levels") or {"warning": 0.8, "trip": 0.9}
    period = float(header.get("period") or 0.001)
    above = (float(np.sum(ratio >= levels.get("warning", 0.8)) * period)
             if ratio is not None and ratio.size else 0.0)
    preflight = next((ev.extra.get("preflight") for ev in events if ev.kind == "preflight"),
                     None)
    late = cols.get("lateness_us")
    age = cols.get("sample_age_ms")
    raw_link = header.get("link")
    link: dict[str, Any] = raw_link if isinstance(raw_link, dict) else {}
    return {
        "run_log": str(run_log), "trip_log": str(trip_path) if trip_path.exists() else None,
        "rig": header.get("rig"), "run_name": header.get("run_name"),
        "link_kind": link.get("kind", "sim" if header.get("simulated") else "unknown"),
        "link": link, "simulated": header.get("simulated"),
        "started_iso": iso_time(header.get("started_wall")),
        "software_version": header.get("software_version"),
        "config_hash": header.get("config_hash"), "ticks": int(len(cols.get("t", []))),
        "period_s": period, "torn": torn, "ended": ended,
        "max_margin_ratio": max_ratio, "seconds_at_or_above_warning": above,
        "levels": levels, "eps": header.get("eps"),
        **_pointing_error(header, cols),
        "preflight": preflight, "hostcheck": header.get("hostcheck"),
        "trips": [t.summary() for t in trips],
        "events": [{k: v for k, v in ev.to_wire().items() if k != "preflight"}
                   for ev in events],
        "loop_from_run_log": dict(zip(("lateness_p50_us", "lateness_p99_us", "lateness_max_us"),
                                      _stats(late if late is not None else []), strict=True)),
        "sample_age_ms": dict(zip(("p50", "p99", "max"),
                                  _stats(age if age is not None else []), strict=True)),
        "_header": header, "_cols": cols, "_trips": trips,
    }


def _config_text(cfg: dict[str, Any]) -> str:
    """The config as TOML-like lines: [section], then key = value (values as JSON)."""
    lines: list[str] = []

    def walk(prefix: str, table: dict[str, Any]) -> None:
        plain = {k: v for k, v in table.items() if not isinstance(v, dict)}
        if plain or not prefix:
            if prefix:
                lines.append(f"[{prefix}]")
            lines.extend(f"{k} = {json.dumps(v, default=str)}" for k, v in plain.items())
        for k, v in table.items():
            if isinstance(v, dict):
                walk(f"{prefix}.{k}" if prefix else k, v)

    walk("", cfg)
    return "\n".join(lines)


CSS = """
body{font-family:sans-serif;max-width:1100px;margin:1em auto;color:#222}
h1{font-size:1.4em} h2{font-size:1.15em;border-bottom:1px solid #ccc;margin-top:1.6em}
table{border-collapse:collapse;margin:.4em 0} td,th{border:1px solid #ddd;padding:2px 8px;
text-align:left;font-size:.9em;vertical-align:top} img{max-width:100%}
pre{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.85em}
.caution{background:#fff4e0;border-left:4px solid #e90;padding:.4em .8em}
"""


def build_report(run_log: str | Path) -> str:
    """The whole HTML report of one run (self-contained)."""
    d = report_data(run_log)
    header, cols, trips = d["_header"], d["_cols"], d["_trips"]
    ended = d["ended"]
    title = f"corral run report: {d['run_name'] or d['rig']} ({Path(run_log).name})"
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>"
             f"{_e(title)}</title><style>{CSS}</style></head><body>", f"<h1>{_e(title)}</h1>",
             '<p class="caution">The software watchdog is not a safety-rated function and '
             'not an emergency stop; motors hurt people.</p>']

    def section(sid: str, heading: str, body: str) -> None:
        parts.append(f'<section id="{sid}"><h2>{_e(heading)}</h2>{body}</section>')

    link = d["link"]
    section("run", "The run", _kv({
        "rig": d["rig"], "run name": d["run_name"],
        "link kind": f"{d['link_kind']} ({LINK_KINDS.get(d['link_kind'], '?')})",
        "link": link.get("spec"), "simulated": d["simulated"],
        "device's own name": ended.get("device_rig"),
        "started": d["started_iso"], "software version": d["software_version"],
        "config hash": d["config_hash"], "ticks recorded": d["ticks"],
        "period [s]": d["period_s"], "run log": d["run_log"], "trip log": d["trip_log"],
    }))
    section("ended", "How the run ended", _kv({
        "ended": END_HOW.get(str(ended.get("how")), ended.get("how")),
        "at": ended.get("time_iso") or "not recorded", "detail": ended.get("detail") or "",
        "mode at the end": ended.get("mode"), "latched": ended.get("latched"),
        "trips": len(trips),
    }))
    cfg = header.get("config") or {}
    section("config", "The config that ran", f"<pre>{_e(_config_text(cfg))}</pre>")
    section("design", "Design verdict (recomputed from that config)", _design_section(cfg))
    pf = d["preflight"]
    section("preflight", "Preflight", _kv(pf) if isinstance(pf, dict) else
            "<p>No preflight in this run (simulated rig, or --no-preflight).</p>")
    hc = d["hostcheck"]
    section("hostcheck", "Host check", _kv(hc) if isinstance(hc, dict) else
            "<p>No host check in this run's header (the simulated rig, or none ran).</p>")
    margin = _kv({
        "highest margin ratio ||e||_P/eps over the run [of eps]": d["max_margin_ratio"],
        "time at or above the warning level [s]": d["seconds_at_or_above_warning"],
        "warning / trip level [of eps]": f"{d['levels'].get('warning')} / "
                                          f"{d['levels'].get('trip')}",
        "bound eps at start": d["eps"],
        "pointing error rms_error_final [rad]": d["rms_error_final"]
            if d["rms_error_final"] is not None else "not available in this build or file",
        "rms_error_final_against": d["rms_error_final_against"] or "",
    }) + _margin_figure(cols, header, trips)
    section("margin", "The margin over the whole run", margin)
    tparts = [] if trips else ["<p>No trips.</p>"]
    for tr in trips:
        fo = tr.rec.first_out
        later = ", ".join(
            f"{_e(r.rule)} ({_e(say_value(r.rule, r.value, r.threshold))})"
            for r in tr.rec.later) or "none"
        tparts.append(f'<div class="trip" id="trip-{tr.id}"><h3>Trip {tr.id}: {_e(tr.rule)}'
                      f"</h3>" + _kv({
                          "at": iso_time(tr.t_wall), "tick": tr.tick,
                          "time in the run [s]": tr.rec.t,
                          "what crossed": say_value(tr.rule, tr.value, tr.threshold,
                                                    fo.on_delay_s),
                          "signal": fo.signal or None, "on-delay [s]": fo.on_delay_s,
                          "action": tr.action,
                          "detection to action [us]": tr.detect_to_action_us,
                          "later rules": later,
                          "post-trip capture": "yes" if tr.post is not None else "no",
                      }) + _trip_plot(tr) + "</div>")
    section("trips", f"Trips ({len(trips)})", "".join(tparts))
    ev_rows = [(_e(iso_time(ev.get("t_wall"))), _num(ev.get("tick")), _e(ev.get("kind")),
                _e(ev.get("detail", ""))) for ev in d["events"]]
    section("events", "Operator events",
            _table(ev_rows, ("time", "tick", "event", "detail")) if ev_rows
            else "<p>No operator events recorded.</p>")
    stats = {f"run log: tick lateness {k.split('_')[1]} [us]": v
             for k, v in d["loop_from_run_log"].items()}
    stats.update({f"run log: sample age {k} [ms]": v for k, v in d["sample_age_ms"].items()})
    loop = ended.get("loop") if isinstance(ended.get("loop"), dict) else {}
    stats.update({f"loop: {k}": v for k, v in loop.items()})
    lstats = ended.get("link_stats") if isinstance(ended.get("link_stats"), dict) else {}
    stats.update({f"link: {k}": v for k, v in lstats.items()})
    if not lstats and trips:
        stats.update({f"link at the last trip: {k}": v
                      for k, v in (trips[-1].rec.snapshot.get("link") or {}).items()})
    section("statistics", "Link and loop statistics", _kv(stats))
    parts.append("</body></html>")
    return "\n".join(parts)
