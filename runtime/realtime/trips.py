"""Trip handling (`TripHandler`): first-out, the reaction's handover in the same tick, the
trip record with its pre/post capture, durable before announced, and the `internal` trip."""

from __future__ import annotations

import contextlib
import time
import traceback
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from drivers.base import Link
from runtime.guard.supervisor import Supervisor
from runtime.guard.watchdog import Rule, Watchdog
from runtime.realtime.capture import Capture
from runtime.realtime.estimator import Estimator
from runtime.realtime.events import EventLog
from runtime.realtime.handover import Handover
from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.record_writer import RecordWriter
from runtime.realtime.tick_records import (
    internal_snapshot,
    link_snapshot,
    trip_record,
    trip_snapshot,
    trip_summary,
)
from runtime.realtime.tick_state import TickState
from runtime.realtime.timing import TickTiming
from runtime.records.kinds import Event, TripSummary

Array = NDArray[np.float64]
Record = dict[str, Any]


@dataclass
class TripContext:
    """What the tick decided about the rules that tripped, for the record after the send."""

    first: Record | None
    """The first-out entry (None: the runtime was latched already; these rules are later)."""
    later: list[Record]
    action: str
    u: Array
    on: bool
    new: bool
    t_detect: float = field(default=0.0)


class TripHandler:
    """Trips in the order a trip must happen: decide in the tick (`on_trips`: latch,
    first-out, reaction, the fallback's command this same tick), record after the send
    (`finish`: the trip record with the pre-trip rows, queued to the writer thread which
    announces it once it is on disk, then the post capture).

    `trips` is the run's list of trip summaries (telemetry, the socket, the summary).
    """

    def __init__(self, *, st: TickState, sup: Supervisor, watchdog: Watchdog,
                 handover: Handover, capture: Capture, writer: RecordWriter,
                 events: EventLog, timing: TickTiming, law: LawAdapter, est: Estimator,
                 link: Link, rig: str, config_hash: str) -> None:
        self._st = st
        self.sup, self.watchdog, self.handover = sup, watchdog, handover
        self.capture, self.writer, self.events, self.timing = capture, writer, events, timing
        self.law, self.est, self.link = law, est, link
        self.rig, self.config_hash = rig, config_hash
        self.trips: list[TripSummary] = []
        self.trip_id = 0
        self.current_trip: TripSummary | None = None
        self.pending: TripContext | None = None
        """This tick's trip, recorded by `finish` after the command is sent."""

    # ------------------------------------------------------------- in the tick
    def on_trips(self, rules: Sequence[Rule], u: Array, on: bool) -> TripContext:
        """Latch the rules that tripped; hand over to the reaction now in force (its
        command replaces `u`, `on` this tick)."""
        sup = self.sup
        first_new = not sup.latched
        before = sup.current_reaction
        entries = []
        for rule in rules:
            action = sup.trip(rule.id, rule.reaction)
            entries.append({**rule.describe(), "tick": self._st.tick, "action": action})
        action = sup.current_reaction or "outputs_off"
        if action != before:
            if action == "outputs_off":
                self.handover.outputs_off()
                u, on = np.zeros(self._st.m), False
            else:
                self.handover.start(action)
                u, on, _ = self.handover.step(self._st.x)
        if first_new:
            self.trip_id += 1
            return TripContext(entries[0], entries[1:], action, u, on, True)
        self.capture.post_later.extend(entries)
        return TripContext(None, entries, action, u, on, False)

    # ------------------------------------------------------------- after the send
    def finish(self, ctx: TripContext, t_sent: float) -> None:
        """The trip record of this tick (queued: durable, then announced) and its post
        capture; rules tripping while latched are added to the current trip."""
        st, capture = self._st, self.capture
        d2a = (t_sent - ctx.t_detect) * 1e6
        if not ctx.new:
            for e in ctx.later:
                self.trips[-1].later.append(e["rule"])
            if capture.post_trip is not None:
                capture.add_post()
            return
        if capture.post_trip is not None:
            capture.flush_post()
        k = st.tick
        pre = capture.pre_rows(k)
        first = ctx.first
        assert first is not None
        first_out = {key: first[key] for key in ("rule", "signal", "value", "threshold")}
        if first["rule"] == "link_loss":
            first_out["detail"] = st.link_detail or "device silent"
        snapshot = trip_snapshot(st, self.sup.mode,
                                 self.law.W if self.law.out is not None else None,
                                 self.timing, link_snapshot(self.link, self.est.age))
        rec = trip_record(
            trip_id=self.trip_id, t_detect=ctx.t_detect, tick=k, t=st.t,
            first_out={**first_out, **self._rule_settings(first["rule"])},
            later=[{**{key: e[key] for key in ("rule", "signal", "value", "threshold",
                                               "tick")}, **self._rule_settings(e["rule"])}
                   for e in ctx.later],
            action=ctx.action, detect_to_action_us=d2a, snapshot=snapshot, rig=self.rig,
            config_hash=self.config_hash, events=list(self.events.recent), pre=pre)
        summary = trip_summary(trip_id=self.trip_id, first_out=first_out, tick=k, t=st.t,
                               action=ctx.action, detect_to_action_us=d2a,
                               later=[e["rule"] for e in ctx.later])
        self.trips.append(summary)
        self.current_trip = summary
        # The writer thread announces it (socket, MQTT, stderr) once it is on disk.
        self.writer.put_trip(rec, summary)
        capture.start_post(self.trip_id)

    def _rule_settings(self, rule_id: str) -> Record:
        """A rule's on-delay, deadband and reaction (for its trip entry)."""
        r = self.watchdog.by_id.get(rule_id)
        if r is None:
            return {}
        return {"on_delay_s": r.on_delay, "deadband": r.deadband, "reaction": r.reaction,
                "capture_field": f"sig_{r.id}"}

    # ------------------------------------------------------------- the internal trip
    def record_internal(self, exc: BaseException) -> None:
        """The `internal` trip's record, written and fsynced HERE, in the calling thread
        (not queued: the run is about to end), and only then announced."""
        st, writer = self._st, self.writer
        self.trip_id += 1
        text = f"{type(exc).__name__}: {exc}"
        first = {"rule": "internal", "signal": "exception inside the tick", "value": text,
                 "threshold": 0.5}
        t_detect = time.monotonic()
        pre: list[list[float]] = []
        events: list[Event] = []
        snapshot: Record = {}
        with contextlib.suppress(Exception):  # best effort: the state may be what broke
            pre = self.capture.pre_rows_before(st.tick)
            events = list(self.events.recent)
            snapshot = internal_snapshot(st, self.sup.mode)
        rec = trip_record(
            trip_id=self.trip_id, t_detect=t_detect, tick=st.tick, t=st.t, first_out=first,
            later=[], action="outputs_off", detect_to_action_us=0.0, snapshot=snapshot,
            rig=self.rig, config_hash=self.config_hash, events=events, pre=pre,
            exception="".join(traceback.format_exception(exc))[-4000:])
        summary = trip_summary(trip_id=self.trip_id, first_out=first, tick=st.tick, t=st.t,
                               action="outputs_off", detect_to_action_us=0.0, later=[])
        self.trips.append(summary)
        self.current_trip = summary
        try:
            writer.write_now(rec)
        except Exception as log_exc:  # noqa: BLE001 - still turn the outputs off and say so
            print(f"corral: INTERNAL trip ({text}); outputs off; the trip log could not be "
                  f"written: {log_exc}", file=writer.console(), flush=True)
            return
        writer.mark_durable(self.trip_id, summary)
        print(f"corral: INTERNAL trip {self.trip_id} ({text}); outputs off; logged to "
              f"{writer.trip_path}; the run ends", file=writer.console(), flush=True)
