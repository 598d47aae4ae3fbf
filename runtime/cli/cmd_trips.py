"""`corral trips LOG...`: list, show, plot and export watchdog trips.

LOG is a trip log (`*.trips`) or a folder searched for them. Without an
action it lists every trip across the runs, one line each; `--show ID`
prints one trip in full, `--plot ID`, `--csv ID` and `--comtrade ID` write a
PNG, a CSV or a COMTRADE pair. ID is `FILE:N` (as listed) or just N when the
trips come from one log. Logs cut short by a crash or a kill are read up to
their last complete record and marked.

What does not live here: reading and writing logs (`runtime.records.logs`), the
plot (`runtime.review.triplot`), the exports (`runtime.review.comtrade_export`).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from runtime.cli.common import UserError
from runtime.realtime.hostcheck import explain_from_header
from runtime.records.kinds import WireRecord
from runtime.records.logs import RULES, LogReadError, Trip, find_logs, read_trip_records
from runtime.records.runinfo import iso_time, parse_when, say_value
from runtime.review.comtrade_export import export_comtrade, export_csv
from runtime.review.tripfilter import TripFilter, run_link_kind, summarize, summary_text
from runtime.review.triplot import plot_trip

#: Config sections `--show` prints (when present), in this order.
KEY_SECTIONS = ("rig", "design", "adaptation", "loop", "watchdog", "reactions", "fallback",
                "faults", "plant")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral trips`."""
    parser.epilog = ("examples: corral trips runs/ | corral trips runs/ --show FILE:1 | "
                     "corral trips runs/x.trips --plot 1 --out trip.png | "
                     "--csv 1 --out trip.csv | --comtrade 1 --out trip (writes trip.cfg, trip.dat)")
    parser.add_argument("logs", nargs="+", metavar="LOG",
                        help="trip logs (*.trips) or folders holding them")
    act = parser.add_mutually_exclusive_group()
    act.add_argument("--show", metavar="ID", help="print one trip: events, snapshot, config")
    act.add_argument("--plot", metavar="ID", help="draw one trip's capture to a PNG")
    act.add_argument("--csv", metavar="ID", help="export one trip's capture to CSV")
    act.add_argument("--comtrade", metavar="ID",
                     help="export one trip to COMTRADE (IEEE C37.111-2013, ASCII .cfg + .dat)")
    parser.add_argument("--out", type=Path, default=None,
                        help="output file (for --comtrade: the base name, no extension)")
    parser.add_argument("--json", action="store_true",
                        help="machine-readable output (the list, or the trip with --show)")
    act.add_argument("--summary", action="store_true",
                     help="counts per rule, rig, link kind and day; how the runs ended; "
                          "the worst margins")
    flt = parser.add_argument_group("filters (the list and --summary)")
    flt.add_argument("--since", metavar="WHEN",
                     help="trips at or after WHEN: ISO 8601 (2026-12-04T09:00, with an "
                          "offset or local time) or a span back from now (30m, 2h, 3d)")
    flt.add_argument("--until", metavar="WHEN", help="trips at or before WHEN (as --since)")
    flt.add_argument("--rule", action="append", default=[], metavar="RULE",
                     help="only this first-out rule (repeat for more)")
    flt.add_argument("--rig", action="append", default=[], metavar="NAME",
                     help="only this rig (or run name; repeat for more)")
    flt.add_argument("--link", action="append", default=[], metavar="KIND",
                     choices=("sim", "served_pty", "serial", "mqtt"),
                     help="only runs over this link kind: sim, served_pty, serial, mqtt")


# ---------------------------------------------------------------------------
# Loading and picking a trip
# ---------------------------------------------------------------------------

def _load(paths: list[str]) -> tuple[list[Path], list[Trip], dict[Path, bool]]:
    try:
        logs = find_logs(paths)
    except LogReadError as exc:
        raise UserError(f"{exc}. Give trip logs (*.trips) or the folder log.dir names.") \
            from exc
    if not logs:
        # `corral run` always writes a .trips file, so none means the wrong folder.
        raise UserError(f"no trip logs (*.trips) in {', '.join(paths)}. Fix: give the folder "
                        "log.dir names ('corral run' writes RIG-STAMP.trips there; dry runs "
                        "and sweeps write none).")
    trips: list[Trip] = []
    torn: dict[Path, bool] = {}
    for path in logs:
        try:
            got = read_trip_records(path)
        except LogReadError as exc:
            if len(logs) == 1:
                raise UserError(str(exc)) from exc
            if "cut short" in str(exc) or "empty log" in str(exc):
                torn[path] = True  # a crash before the header was complete: list it as cut
                continue
            # Not a trip log at all: say so on stderr, do not list it as cut short.
            print(f"corral: note: skipped {exc}", file=sys.stderr)
            continue
        for why in got.bad:  # each names its file and the field
            print(f"corral: note: skipped a record that does not match its schema: {why}",
                  file=sys.stderr)
        torn[path] = got.torn
        trips.extend(got.trips)
    trips.sort(key=lambda tr: (tr.t_wall, str(tr.source), tr.id))
    return logs, trips, torn


def resolve(trips: list[Trip], ident: str) -> Trip:
    """The trip an ID names: `FILE:N` (file name, stem or path) or N when one log holds them."""
    sources = sorted({str(t.source) for t in trips})
    available = ", ".join(t.key for t in trips[:30]) + (" ..." if len(trips) > 30 else "")
    if not trips:
        raise UserError("there are no trips in these logs.")
    file_part, _, num_part = ident.rpartition(":")
    try:
        num = int(num_part)
    except ValueError:
        raise UserError(f"trip id '{ident}' is not FILE:N or N; available: {available}") \
            from None
    if file_part:
        cands = [t for t in trips if file_part in (t.source.name, t.source.stem, str(t.source))
                 or str(t.source).endswith(file_part)]
        if not cands:
            raise UserError(f"no log named '{file_part}' among these; available ids: "
                            f"{available}")
    else:
        if len(sources) > 1:
            raise UserError(f"trip id '{ident}' is ambiguous across {len(sources)} logs; "
                            f"use FILE:N, one of: {available}")
        cands = trips
    hits = [t for t in cands if t.id == num]
    if len(hits) != 1:
        raise UserError(f"no trip '{ident}'; available ids: {available}")
    return hits[0]


# ---------------------------------------------------------------------------
# Text output
# ---------------------------------------------------------------------------

def _num(v: Any, digits: int = 4) -> str:
    if isinstance(v, bool) or v is None:
        return "-" if v is None else str(v)
    if isinstance(v, (int, float)):
        return f"{v:.{digits}g}" if math.isfinite(v) else str(v)
    return str(v)


def _when(t_wall: float) -> str:
    return iso_time(t_wall)


def _link(trip: Trip) -> str:
    return run_link_kind(trip.header)


def list_text(logs: list[Path], trips: list[Trip], torn: dict[Path, bool]) -> str:
    """The default listing: one line per trip, then the logs cut short."""
    if not logs:
        return "no trip logs (*.trips) found"
    out = []
    if trips:
        rows = [("TIME", "RIG", "LINK", "ID", "FIRST-OUT", "WHAT CROSSED", "ACTION",
                 "DETECT->ACT us", "RUN ENDED", "")]
        for t in trips:
            rows.append((
                _when(t.t_wall), t.rig, _link(t), t.key, t.rule,
                say_value(t.rule, t.value, t.threshold, t.rec.first_out.on_delay_s),
                t.action, _num(t.detect_to_action_us, 3), t.end.how,
                "*" if t.cut_short else "",
            ))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        for r in rows:
            out.append("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())
    n_runs = len(logs)
    out.append(f"{len(trips)} trip{'s' if len(trips) != 1 else ''} in {n_runs} "
               f"log{'s' if n_runs != 1 else ''}")
    short = [p for p, cut in torn.items() if cut]
    no_post = [t.key for t in trips if t.post is None and not torn.get(t.source)]
    if short:
        out.append("cut short (crash or kill; read up to the last complete record): "
                   + ", ".join(str(p) for p in short))
    if no_post:
        out.append("no post-trip capture (the run ended before it was complete): "
                   + ", ".join(no_post))
    if any(t.cut_short for t in trips):
        out.append("* = from a log cut short")
    if trips:
        out.append(f"more: corral trips LOG --show {trips[0].key}  (also --plot, --csv, "
                   "--comtrade, --json)")
    return "\n".join(out)


def _vec(values: Any, names: list[str], units: list[str]) -> str:
    if not isinstance(values, (list, tuple)):
        return _num(values)
    parts = []
    for j, v in enumerate(values):
        nm = names[j] if j < len(names) and len(names) == len(values) else str(j)
        un = units[j] if j < len(units) and len(units) == len(values) else ""
        parts.append(f"{nm} = {_num(v)}" + (f" {un}" if un else ""))
    return ", ".join(parts)


def _got(rec: WireRecord, name: str, default: Any) -> Any:
    """A field of `rec`, or `default` when the file had none (an older corral's record)."""
    return default if name in rec.missing else getattr(rec, name)


def _sequence(trip: Trip, all_trips: list[Trip]) -> list[tuple[float, int, str]]:
    """Operator events and trips of the trip's run, in order (monotonic time, tick)."""
    seq: list[tuple[float, int, str]] = []
    events = trip.events or list(trip.rec.events)
    seen = set()
    for ev in events + list(trip.rec.events):
        key = (ev.kind, _got(ev, "tick", None), ev.t_mono)
        if key in seen:
            continue
        seen.add(key)
        detail = f" ({ev.detail})" if ev.detail else ""
        seq.append((float(ev.t_mono or 0.0), ev.tick, f"{ev.kind}{detail}"))
    for t in all_trips:
        if t.source != trip.source:
            continue
        mark = "  <- this trip" if t is trip else ""
        seq.append((float(t.t_mono or 0.0), t.tick,
                    f"TRIP {t.id}: {t.rule} ({_num(t.value)} vs {_num(t.threshold)}) "
                    f"-> {t.action}{mark}"))
        for later in t.rec.later:
            seq.append((float(t.t_mono or 0.0), int(_got(later, "tick", t.tick)),
                        f"  later: {later.rule} ({_got(later, 'signal', '?')} = "
                        f"{_num(later.value)} vs {_num(later.threshold)})"))
    seq.sort(key=lambda s: (s[1] if s[1] >= 0 else -1, s[0]))
    return seq


def _config_lines(config: dict[str, Any]) -> list[str]:
    out = []
    for sec in KEY_SECTIONS:
        body = config.get(sec)
        if body is None:
            continue
        out.append(f"  [{sec}]")
        items = body.items() if isinstance(body, dict) else [("", body)]
        for k, v in items:
            text = json.dumps(v, default=str)
            if len(text) > 90:
                text = text[:87] + "..."
            out.append(f"    {k} = {text}" if k else f"    {text}")
    rest = [k for k in config if k not in KEY_SECTIONS]
    if rest:
        out.append(f"  (also: {', '.join(rest)})")
    return out


def _watchdog_lines(wd: Any) -> list[str]:
    """The run's watchdog rules as recorded in the header (a list of rule maps, or a map)."""
    if isinstance(wd, dict):
        wd = [{"rule": k, **v} if isinstance(v, dict) else {"rule": k, "value": v}
              for k, v in wd.items()]
    if not isinstance(wd, list) or not wd:
        return []
    out = ["watchdog rules of the run:"]
    for r in wd:
        if not isinstance(r, dict):
            continue
        rest = ", ".join(f"{k} {_num(v)}" for k, v in r.items() if k not in ("rule", "signal"))
        out.append(f"  {str(r.get('rule', '?')):<20} {r.get('signal', '')}: {rest}")
    return out


def show_text(trip: Trip, all_trips: list[Trip]) -> str:
    """`--show`: the trip, its sequence of events, snapshot with units, later rules, config."""
    names = trip.names()
    states, s_units = names.get("states", []), names.get("state_units", [])
    inputs, i_units = names.get("inputs", []), names.get("input_units", [])
    fo = trip.rec.first_out
    out = [
        f"trip {trip.key}   ({trip.source})",
        f"  rig {trip.rig}, software {trip.software_version or '?'}, "
        f"config {trip.config_hash or '?'}",
        f"  at {_when(trip.t_wall)}, tick {trip.tick}"
        + (f", t_mono {trip.t_mono:.6f} s" if isinstance(trip.t_mono, (int, float)) else ""),
        f"  link: {_link(trip)} ({(trip.header.get('link') or {}).get('spec', '?')}), "
        f"simulated: {trip.header.get('simulated')}",
        f"  first out: {trip.rule}  {_got(fo, 'signal', '?')} = {_num(trip.value)} "
        f"vs threshold {_num(trip.threshold)}",
        f"    that is: {say_value(trip.rule, trip.value, trip.threshold, fo.on_delay_s)}"
        + (f"; on-delay {_num(fo.on_delay_s)} s, deadband {_num(fo.deadband)}"
           if "on_delay_s" not in fo.missing else ""),
        f"  the run ended: {_got(trip.end, 'how_text', '?')}"
        + (f" at {trip.end.time_iso}" if trip.end.time_iso else ""),
    ]
    why = explain_from_header(trip.rule, trip.value, trip.threshold, trip.header,
                              trip.rec.snapshot.get("loop"))
    if why:
        out.append(f"  why: {why}")
    out += [
        f"  action: {trip.action}, detection to action "
        f"{_num(trip.detect_to_action_us, 3)} us",
    ]
    if trip.cut_short:
        out.append("  NOTE: log cut short (crash or kill)"
                   + ("; no post-trip capture" if trip.post is None else ""))
    out.append("later rules (in order):" if trip.rec.later else "later rules: none")
    for r in trip.rec.later:
        out.append(f"  tick {_got(r, 'tick', '?')}  {r.rule}  {_got(r, 'signal', '?')} = "
                   f"{_num(r.value)} vs {_num(r.threshold)}")
    out.append("sequence of events (this run):")
    for t_mono, tick, text in _sequence(trip, all_trips):
        out.append(f"  tick {tick:>9}  t_mono {t_mono:12.6f}  {text}")
    snap = trip.rec.snapshot
    out.append("snapshot at the trip:")
    vec_units = {"x": (states, s_units), "xr": (states, s_units), "e": (states, s_units),
                 "u_cmd": (inputs, i_units), "u_applied": (inputs, i_units)}
    for key, val in snap.items():
        if key in vec_units:
            out.append(f"  {key:<10} {_vec(val, *vec_units[key])}")
        elif key == "W" and isinstance(val, list):
            rows = len(val)
            cols = len(val[0]) if rows and isinstance(val[0], list) else 1
            flat = [abs(v) for row in val for v in (row if isinstance(row, list) else [row])
                    if isinstance(v, (int, float))]
            if not flat:
                out.append(f"  {'W':<10} (empty: the adaptive law had not run)")
                continue
            norm = math.sqrt(sum(v * v for v in flat)) if flat else float("nan")
            out.append(f"  {'W':<10} {rows} x {cols}, Frobenius norm {_num(norm)}, "
                       f"max |w| {_num(max(flat) if flat else float('nan'))}")
        elif isinstance(val, dict):
            out.append(f"  {key:<10} " + ", ".join(f"{k} = {_num(v)}" for k, v in val.items()))
        else:
            out.append(f"  {key:<10} {_num(val)}")
    cap = trip.capture()
    out.append(f"capture: {cap.n_pre} ticks before (to the trip), {len(cap) - cap.n_pre} after, "
               f"period {_num(cap.period * 1e3)} ms; fields {', '.join(cap.fields) or '-'}")
    out.extend(_watchdog_lines(trip.header.get("watchdog")))
    out.append(f"config that ran (hash {trip.config_hash or '?'}):")
    out.extend(_config_lines(trip.config) or ["  (not recorded)"])
    return "\n".join(out)


def show_json(trip: Trip) -> dict[str, Any]:
    """`--show --json`: the summary plus snapshot, later rules and events."""
    d = trip.summary()
    rec = trip.rec
    d.update({"first_out": rec.first_out.to_wire(),
              "later_rules": [e.to_wire() for e in rec.later], "snapshot": rec.snapshot,
              "events": [e.to_wire() for e in trip.events],
              "software_version": trip.software_version,
              "capture_fields": trip.capture_fields, "capture_ticks": len(trip.capture()),
              "explanation": explain_from_header(trip.rule, trip.value, trip.threshold,
                                                 trip.header, rec.snapshot.get("loop")),
              "hostcheck": trip.header.get("hostcheck")})
    return d


# ---------------------------------------------------------------------------
# Entry point
# ---------------------------------------------------------------------------

def _default_out(trip: Trip, suffix: str) -> Path:
    return Path(f"{trip.source.stem}-trip{trip.id}{suffix}")


PLOT_SUFFIXES = (".png", ".pdf", ".svg")


def _out_path(out: Path | None, trip: Trip, suffix: str) -> Path:
    """Where an export goes: --out as given, inside --out when it is a folder, else the
    default name in the working folder. A plot without a suffix gets .png."""
    if out is None:
        return _default_out(trip, suffix)
    out = Path(out)
    if out.is_dir():
        return out / _default_out(trip, suffix)
    if suffix == ".png":
        if not out.suffix:
            return out.with_suffix(".png")
        if out.suffix.lower() not in PLOT_SUFFIXES:
            raise UserError(f"--out '{out}': a trip plot cannot be saved as "
                            f"'{out.suffix}'. Fix: end the name with "
                            f"{', '.join(PLOT_SUFFIXES)}.")
    return out


def _filter(args: argparse.Namespace) -> Any:
    out = TripFilter(rules=list(getattr(args, "rule", []) or []),
                     rigs=list(getattr(args, "rig", []) or []),
                     links=list(getattr(args, "link", []) or []))
    for name in ("since", "until"):
        text = getattr(args, name, None)
        if text:
            try:
                setattr(out, name, parse_when(text))
            except ValueError as exc:
                raise UserError(f"--{name}: {exc}") from None

    bad = [r for r in out.rules if r not in RULES]
    if bad:
        raise UserError(f"--rule {bad[0]!r} is not a watchdog rule; use one of "
                        f"{', '.join(RULES)}")
    return out


def main(args: argparse.Namespace) -> int:
    """List, show, plot or export."""
    logs, trips, torn = _load(args.logs)
    # `is not None`: an empty id (`--show ""`) is a bad id, not a request for the list.
    ident = next((v for v in (args.show, args.plot, args.csv, args.comtrade) if v is not None),
                 None)
    flt = _filter(args)
    if getattr(args, "summary", False):
        summ = summarize(logs, flt.apply(trips), flt)
        print(json.dumps(summ, indent=2, default=str) if args.json else summary_text(summ))
        return 0
    if ident is None:
        trips = flt.apply(trips)
        if args.json:
            print(json.dumps([t.summary() for t in trips], indent=2, default=str))
        else:
            print(list_text(logs, trips, torn))
        return 0
    trip = resolve(trips, str(ident))
    if args.show is not None:
        if args.json:
            print(json.dumps(show_json(trip), indent=2, default=str))
        else:
            print(show_text(trip, trips))
        return 0
    if not trip.capture_fields or len(trip.capture()) == 0:
        raise UserError(f"trip {trip.key} has no captured ticks (capture_fields or pre rows "
                        "missing), so there is nothing to plot or export.")
    suffix = ".png" if args.plot else ".csv" if args.csv else ""
    out = _out_path(args.out, trip, suffix)
    try:
        if args.plot:
            written = [plot_trip(trip, out)]
        elif args.csv:
            written = [export_csv(trip, out)]
        else:
            written = list(export_comtrade(trip, out))
    except OSError as exc:
        why = ("a file is in the way" if isinstance(exc, FileExistsError | NotADirectoryError)
               else exc.strerror or str(exc))
        raise UserError(f"--out: cannot write '{exc.filename or out}' ({why}). Fix: give "
                        "--out a path in a folder you can write to.") from None
    if args.json:
        print(json.dumps({"trip": trip.key, "written": [str(p) for p in written]}))
    else:
        for p in written:
            print(f"wrote {p}")
    return 0
