"""The records the tick writes and announces, each built by ONE function here.

- `log_headers`: the trip log and run log headers;
- `hello_record`: the telemetry hello (docs/telemetry.md);
- `telemetry_record`: the decimated telemetry snapshot (docs/telemetry.md);
- `event_record`: an operator/supervisor/link event (trip log);
- `trip_record` (with `trip_snapshot` / `internal_snapshot` for its ``snapshot``) and
  `trip_summary` (the short form in the trip list, telemetry and the run summary);
- `run_end_record`: the end record (the last record of both logs).

Each is built as its typed record (`runtime.records.kinds`), so nothing downstream (the
writer thread, the socket, the MQTT bridge) parses a map from the tick; the records keep
the field order and values the maps had (tests/test_record_kinds.py).

The tick row (run log, pre/post capture) is filled by `runtime.realtime.capture.Capture.fill`;
the ``--json`` run summary is `runtime.realtime.runner.Runner.summary`.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Sequence
from typing import Any, cast

import numpy as np
from numpy.typing import NDArray

from drivers.base import Link
from runtime import __version__
from runtime.guard.supervisor import Supervisor
from runtime.method.bound import BoundSchedule
from runtime.method.design import Design
from runtime.realtime.links import link_stats_now
from runtime.realtime.tick_state import TickState
from runtime.realtime.timing import TickTiming
from runtime.records.kinds import (
    Event,
    FirstOut,
    Hello,
    LoopFigures,
    PostRecord,
    RunEnd,
    Telemetry,
    TripRecord,
    TripSummary,
)
from runtime.records.runinfo import end_record

Record = dict[str, Any]


def _finite(v: float) -> float | None:
    return v if math.isfinite(v) else None


def link_counters(link: Link) -> Record:
    """The link's counters now (empty when they cannot be read)."""
    out: Record = {}
    with contextlib.suppress(Exception):
        out = link_stats_now(link.stats)
    return out


def link_snapshot(link: Link, sample_age: float) -> Record:
    """The link's counters and the age of the last sample (ms) (telemetry, trip snapshot)."""
    out = link_counters(link)
    out["sample_age_ms"] = float(min(sample_age, 1e6) * 1e3)
    return out


def log_headers(*, design: Design, config_hash: str, config: dict[str, Any], tracked: list[str],
                bound: BoundSchedule, levels: dict[str, float], simulated: bool,
                link_info: dict[str, Any], run_name: str, watchdog: list[dict[str, Any]],
                hostcheck: dict[str, Any] | None, faults: dict[str, list[str]],
                fields: list[str], widths: list[int], units: list[str]) -> tuple[Record, Record]:
    """The trip log header and the run log header (the run's identity and the row layout)."""
    rig = design.rig
    common = {"rig": rig.name, "config_hash": config_hash,
              "software_version": __version__, "config": config, "period": design.Ts,
              "states": list(rig.states), "state_units": list(rig.state_units),
              "inputs": list(rig.inputs), "input_units": list(rig.input_units),
              "input_limits": np.asarray(rig.input_limits, dtype=float).tolist(),
              "tracked": list(tracked), "eps": float(bound.eps(0.0)), "bound": bound.to_json(),
              "levels": levels, "simulated": simulated,
              "link": link_info, "run_name": run_name,
              "watchdog": watchdog,
              "hostcheck": hostcheck,
              # Injected faults as `KIND@SECONDS:...` labels, by where they were set.
              "faults": faults}
    trip = {**common, "capture_fields": fields, "capture_units": units,
            "capture_widths": widths}
    run = {**common, "fields": fields, "widths": widths, "units": units}
    return trip, run


def hello_record(*, design: Design, bound: BoundSchedule, levels: dict[str, float],
                 simulated: bool, tracked: list[str], hostcheck: dict[str, Any] | None,
                 link_info: dict[str, Any], run_name: str,
                 status_flags: Sequence[str]) -> Hello:
    """The telemetry hello (``preflight`` is added by the runner once it has run)."""
    d, rig = design, design.rig
    return Hello(rig=rig.name, states=list(rig.states),
                 state_units=list(rig.state_units), inputs=list(rig.inputs),
                 input_units=list(rig.input_units),
                 input_limits=np.asarray(rig.input_limits, dtype=float).tolist(),
                 limits=np.asarray(d.limits).tolist(),
                 envelope=np.asarray(d.envelope).tolist(), eps=float(bound.eps(0.0)),
                 bound=bound.to_json(),
                 levels=levels, period=d.Ts, simulated=simulated,
                 tracked=list(tracked), hostcheck=hostcheck,
                 link=link_info, run_name=run_name,
                 status_flags=list(status_flags), missing=("preflight",))


def telemetry_record(st: TickState, sup: Supervisor, timing: TickTiming, link: Record,
                     step_gain_cap: float, trip: TripSummary | None,
                     trips: list[TripSummary]) -> Telemetry:
    """The decimated telemetry record (docs/telemetry.md); `link` is `link_snapshot`."""
    p50, p99 = timing.last_second_us()
    engaged = st.law_ran
    ttb = None
    if engaged and st.ratio_rate > 1e-9 and st.ratio < 1.0:
        ttb = (1.0 - st.ratio) / st.ratio_rate
    for key, v in list(link.items()):
        if isinstance(v, float) and not math.isfinite(v):
            link[key] = None
    xr = (st.x - st.e) if engaged else st.x
    return Telemetry(
        t=st.t, tick=st.tick, mode=sup.mode,
        latched=sup.latched, fallback=sup.fallback,
        ratio=st.ratio if engaged else 0.0, s=st.s if engaged else 0.0,
        eps=st.eps_now, phi_d=st.phi_d, eff_rate=st.eff_rate,
        step_gain=st.step_gain, step_gain_cap=step_gain_cap,
        c=st.c.tolist(), x=st.x.tolist(), xr=xr.tolist(),
        e=(st.e if engaged else np.zeros(st.n)).tolist(),
        u=st.u.tolist(), u_raw=np.asarray(st.u_cmd).tolist(),
        w_norm=st.w_norm, w_rate=st.w_rate, sat_time=st.sat_time.tolist(),
        time_to_bound=ttb,
        loop=LoopFigures(rate_hz=1.0 / timing.period, lateness_p50_us=_finite(p50),
                         lateness_p99_us=_finite(p99),
                         deadline_misses=timing.misses,
                         ticks=st.tick),
        link=link, status=st.device_status,
        trip=trip if sup.latched else None,
        trips=list(trips[-20:]),
    )


def event_record(tick: int, kind: str, detail: str, extra: dict[str, Any]) -> Event:
    """One event (a mode change, a refused request, the link, a preflight verdict...);
    `extra` the kind's own fields (``count``, ``preflight``)."""
    return Event(t_mono=time.monotonic(), t_wall=time.time(), tick=tick, kind=kind,
                 detail=detail, extra=extra)


def rule_entry(entry: Record) -> FirstOut:
    """A first-out or later rule entry (a map of `FirstOut` fields, in any order; fields
    it lacks stay out of the record, unknown ones such as ``action`` are kept after)."""
    known = FirstOut._names()
    return FirstOut.given(extra={k: v for k, v in entry.items() if k not in known},
                          **{k: v for k, v in entry.items() if k in known})


def trip_snapshot(st: TickState, mode: str, W: NDArray[np.float64] | None,
                  timing: TickTiming, link: Record) -> Record:
    """The state at a trip (its record's ``snapshot``); `W` None: the law never ran."""
    p50, p99, mx = timing.whole_run_us()
    return {
        "mode": mode, "W": np.array(W).tolist() if W is not None else [],
        "x": st.x.tolist(), "xr": (st.x - st.e).tolist(), "e": st.e.tolist(),
        "u_cmd": np.asarray(st.u_cmd).tolist(), "u_applied": st.u.tolist(),
        "eps": st.eps_now, "phi_d": st.phi_d, "ratio": st.ratio,
        "loop": {"ticks": st.tick + 1, "lateness_p50_us": p50, "lateness_p99_us": p99,
                 "lateness_max_us": mx,
                 "deadline_misses": timing.misses,
                 "lateness_us": timing.lateness * 1e6},
        "link": link,
    }


def internal_snapshot(st: TickState, mode: str) -> Record:
    """The (smaller) snapshot of the `internal` trip: outputs are off already."""
    return {"mode": mode, "x": np.asarray(st.x).tolist(), "u_applied": [0.0] * st.m,
            "u_cmd": np.asarray(st.u_cmd).tolist(), "eps": st.eps_now, "ratio": st.ratio}


def trip_record(*, trip_id: int, t_detect: float, tick: int, t: float, first_out: Record,
                later: list[Record], action: str, detect_to_action_us: float,
                snapshot: Record, rig: str, config_hash: str, events: list[Event],
                pre: NDArray[np.float64] | list[list[float]],
                exception: str | None = None) -> TripRecord:
    """The trip record (trip log): first-out, later rules, action, snapshot, the events
    before it and the pre-trip capture rows (`pre`: an array the writer thread turns into
    lists, so the tick does not pay for it). `exception`: the `internal` trip's traceback."""
    return TripRecord(
        id=trip_id, t_mono=t_detect, t_wall=time.time(), tick=tick, t=t,
        first_out=rule_entry(first_out), later=[rule_entry(e) for e in later],
        action=action, detect_to_action_us=detect_to_action_us,
        exception=exception or "", snapshot=snapshot, config_hash=config_hash,
        software_version=__version__, rig=rig, events=events,
        pre=cast(list[list[Any]], pre),
        missing=() if exception is not None else ("exception",))


def post_record(trip_id: int, rows: NDArray[np.float64],
                later: list[Record]) -> PostRecord:
    """A trip's post capture (`rows`: an array the writer thread turns into lists) and
    the rule entries that tripped meanwhile."""
    return PostRecord(trip_id=trip_id, rows=cast(list[list[Any]], rows),
                      later=[rule_entry(e) for e in later])


def trip_summary(*, trip_id: int, first_out: Record, tick: int, t: float, action: str,
                 detect_to_action_us: float, later: list[str]) -> TripSummary:
    """A trip in short (the trip list: telemetry, the socket, the run summary)."""
    detail = first_out.get("detail")
    return TripSummary(id=trip_id, rule=first_out["rule"], tick=tick, t=t, action=action,
                       detect_to_action_us=detect_to_action_us, value=first_out["value"],
                       threshold=first_out["threshold"], later=later, detail=detail or "",
                       missing=() if detail is not None else ("detail",))


def run_end_record(how: str, detail: str, *, st: TickState, sup: Supervisor,
                   timing: TickTiming, trips: int, rig: str, device_rig: str | None,
                   link_info: dict[str, Any], link_stats: Record,
                   run_log_dropped: int) -> RunEnd:
    """The end record: how the run ended (`runtime.records.runinfo.END_HOW`), its loop
    figures and the link's counters."""
    p50, p99, mx = timing.whole_run_us()
    loop = {"ticks": st.tick, "period_s": timing.period, "lateness_p50_us": _finite(p50),
            "lateness_p99_us": _finite(p99), "lateness_max_us": _finite(mx),
            "deadline_misses": timing.misses,
            "run_log_dropped": run_log_dropped, "max_margin_ratio": st.max_ratio}
    return end_record(how, tick=st.tick, trips=trips, mode=sup.mode,
                      latched=sup.latched, detail=detail, rig=rig,
                      device_rig=device_rig, link=link_info, link_stats=link_stats,
                      loop=loop)
