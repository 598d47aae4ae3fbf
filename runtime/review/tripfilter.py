"""Finding trips among many runs: filters (`corral trips --since/--until/--rule/--rig/--link`)
and the summary of many runs (`corral trips --summary`).

Lives here:
- `TripFilter`: the filter a command line asks for, applied to `runtime.records.logs.Trip`s.
- `summarize`: trips per rule, per rig, per link kind and per day; how the runs ended; the
  worst margins (the highest margin ratio ||e||_P / eps each run reached, from its run log when
  it is beside the trip log, else from its trip captures).

What does not live here: reading the logs (`runtime.records.logs`), the command line and text
output (`runtime.cli.cmd_trips`).
"""

from __future__ import annotations

import datetime as _dt
import math
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runtime.records.logs import RUNLOG_SUFFIX, LogReadError, Trip, read_run_log, read_trip_records
from runtime.records.runinfo import END_HOW, LINK_KINDS, iso_time

#: Margin rules: their value is a margin ratio ||e||_P / eps (or its prediction).
MARGIN_RULES = ("margin", "margin_warning", "clamp", "predicted_crossing")


def run_link_kind(header: dict[str, Any]) -> str:
    """The link kind a run header names (older logs: "sim" when simulated, else "unknown")."""
    link = header.get("link")
    if isinstance(link, dict) and link.get("kind"):
        return str(link["kind"])
    if header.get("simulated") is True:
        return "sim"
    return "unknown"


@dataclass
class TripFilter:
    """Which trips to keep. Empty lists keep everything; times are epoch seconds."""

    since: float | None = None
    until: float | None = None
    rules: list[str] = field(default_factory=list)
    rigs: list[str] = field(default_factory=list)
    links: list[str] = field(default_factory=list)

    def keeps_run(self, header: dict[str, Any]) -> bool:
        """Rig and link filters on a run (a run with no trips is kept or dropped by these)."""
        rig = str(header.get("rig") or "?")
        names = {rig, str(header.get("run_name") or rig)}
        if self.rigs and not names & set(self.rigs):
            return False
        return not (self.links and run_link_kind(header) not in self.links)

    def keeps(self, trip: Trip) -> bool:
        """True when the trip passes every filter."""
        if self.since is not None and trip.t_wall < self.since:
            return False
        if self.until is not None and trip.t_wall > self.until:
            return False
        if self.rules and trip.rule not in self.rules:
            return False
        return self.keeps_run(trip.header)

    def apply(self, trips: list[Trip]) -> list[Trip]:
        return [t for t in trips if self.keeps(t)]

    @property
    def active(self) -> bool:
        return any((self.since is not None, self.until is not None, self.rules, self.rigs,
                    self.links))


def _day(t_wall: float) -> str:
    return iso_time(t_wall)[:10]


def run_margin(trip_log: Path) -> tuple[float | None, str]:
    """The highest margin ratio a run reached and where it was read: the run log beside the
    trip log (the whole run), else the trip captures (around each trip), else none."""
    run_path = trip_log.with_suffix(RUNLOG_SUFFIX)
    if run_path.exists():
        try:
            _, cols = read_run_log(run_path)
            ratio = cols.get("ratio")
            if ratio is not None and ratio.size and ratio.dtype != object:
                finite = ratio[np.isfinite(ratio)]
                if finite.size:
                    return float(np.max(finite)), "run log"
        except LogReadError:
            pass
    try:
        trips = read_trip_records(trip_log).trips
    except LogReadError:
        return None, "none"
    best: float | None = None
    for t in trips:
        col = t.capture().numeric("ratio")
        if col is not None and col.size:
            finite = col[np.isfinite(col)]
            if finite.size:
                best = max(best or 0.0, float(np.max(finite)))
    return best, "trip captures" if best is not None else "none"


def summarize(logs: list[Path], trips: list[Trip], flt: TripFilter | None = None,
              worst: int = 5) -> dict[str, Any]:
    """Counts per rule, rig, link kind and day; how the runs ended; the worst margins.

    `trips` are the trips already filtered; `logs` every trip log read (runs without trips
    count in ``runs`` and the margins, subject to the rig and link filters).
    """
    flt = flt or TripFilter()
    runs: list[dict[str, Any]] = []
    for path in logs:
        try:
            got = read_trip_records(path)
        except LogReadError:
            continue
        header, torn = got.header, got.torn
        if not flt.keeps_run(header):
            continue
        started = header.get("started_wall")
        if isinstance(started, (int, float)):
            if flt.since is not None and started < flt.since and not any(
                    t.source == path for t in trips):
                continue
            if flt.until is not None and started > flt.until:
                continue
        from runtime.records.logs import read_stream
        from runtime.records.runinfo import how_ended

        _, records, _ = read_stream(path)
        ended = how_ended(records, header)
        ratio, where = run_margin(path)
        runs.append({"log": str(path), "rig": str(header.get("rig") or "?"),
                     "link_kind": run_link_kind(header), "started_iso": iso_time(started),
                     "ended": ended.get("how"), "max_margin_ratio": ratio,
                     "margin_from": where, "trips": sum(1 for t in trips if t.source == path),
                     "torn": torn})
    per_day: Counter[str] = Counter(_day(t.t_wall) for t in trips)
    margins = sorted((r for r in runs if isinstance(r["max_margin_ratio"], float)
                      and math.isfinite(r["max_margin_ratio"])),
                     key=lambda r: -r["max_margin_ratio"])[:worst]
    worst_trips = sorted((t for t in trips if t.rule in MARGIN_RULES
                          and isinstance(t.value, (int, float))),
                         key=lambda t: -float(t.value or 0.0))[:worst]
    return {
        "trips": len(trips), "runs": len(runs),
        "per_rule": dict(Counter(t.rule for t in trips).most_common()),
        "per_rig": dict(Counter(t.rig for t in trips).most_common()),
        "per_link": dict(Counter(run_link_kind(t.header) for t in trips).most_common()),
        "per_day": dict(sorted(per_day.items())),
        "per_rule_per_day": {d: dict(Counter(t.rule for t in trips if _day(t.t_wall) == d))
                             for d in sorted(per_day)},
        "runs_ended": dict(Counter(str(r["ended"]) for r in runs).most_common()),
        "worst_margins": [{"log": r["log"], "rig": r["rig"], "link_kind": r["link_kind"],
                           "max_margin_ratio": r["max_margin_ratio"], "from": r["margin_from"]}
                          for r in margins],
        "worst_margin_trips": [{"key": t.key, "rule": t.rule, "value": t.value,
                                "threshold": t.threshold, "time_iso": iso_time(t.t_wall)}
                               for t in worst_trips],
        "run_list": runs,
    }


def summary_text(s: dict[str, Any]) -> str:
    """The summary in lines."""
    out = [f"{s['trips']} trip(s) in {s['runs']} run(s)"]

    def table(title: str, counts: dict[str, int], words: dict[str, str] | None = None) -> None:
        out.append(f"{title}:" + ("" if counts else " none"))
        for k, n in counts.items():
            extra = f"  ({words[k]})" if words and k in words else ""
            out.append(f"  {k:<22} {n}{extra}")

    table("trips per rule", s["per_rule"])
    table("trips per rig", s["per_rig"])
    table("trips per link kind", s["per_link"], LINK_KINDS)
    out.append("trips per day (per rule):" + ("" if s["per_day"] else " none"))
    for d, n in s["per_day"].items():
        rules = ", ".join(f"{r} {c}" for r, c in s["per_rule_per_day"][d].items())
        out.append(f"  {d}  {n}  ({rules})")
    table("how the runs ended", s["runs_ended"], END_HOW)
    out.append("worst margins (highest margin ratio ||e||_P/eps a run reached):"
               + ("" if s["worst_margins"] else " none recorded"))
    for r in s["worst_margins"]:
        out.append(f"  {r['max_margin_ratio']:.3f} of eps  {r['rig']} ({r['link_kind']})  "
                   f"{r['log']}  [from the {r['from']}]")
    if s["worst_margin_trips"]:
        out.append("margin trips with the highest value:")
        for t in s["worst_margin_trips"]:
            out.append(f"  {t['key']}  {t['rule']}  {t['value']:.3f} of eps (limit "
                       f"{t['threshold']:.3g})  at {t['time_iso']}")
    return "\n".join(out)


def now_iso() -> str:
    return _dt.datetime.now().astimezone().isoformat(timespec="seconds")
