"""One tick (`TickCore`): operator requests -> estimate -> supervisor -> law -> watchdog
(a trip hands over to its fallback in the same tick) -> command -> record.

`TickCore` runs that order and owns nothing else; the work is done by its parts, each
built once from `TickSettings` (and the sections their owners read):

- `OperatorRequests` (`requests`): the request queue and the mode changes it makes;
- `AdaptiveControl` (`control`): the command schedule, the bound, the law's step;
- `Handover` (`handover`): the fallback law in force and the handovers to and from it;
- `TripHandler` (`trips`): first-out, the reaction, the trip record, the internal trip;
- `Capture` (`capture`): the tick row, the pre-trip ring, the post-trip capture;
- `RecordWriter` (`record_writer`): the two logs and the writer thread (durable before
  announced); `EventLog` (`events`): events at a bounded rate;
- `TickTiming` (`timing`): lateness and deadline misses; `TickState` (`tick_state`): the
  live values the parts share; the records themselves are built in `tick_records`.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np
from numpy.typing import NDArray

from drivers.base import FLAG_FALLBACK, FLAG_OUTPUTS_ON, Command, Link, Sample
from runtime.config import Config
from runtime.guard.fallback import settings_from_config
from runtime.guard.supervisor import Supervisor
from runtime.guard.watchdog import FRESH_PERIODS, Rule, Signals, Watchdog, over
from runtime.method.bound import schedule_from_config as schedule_from_bound
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.method.design import Design
from runtime.realtime.capture import Capture
from runtime.realtime.control import AdaptiveControl
from runtime.realtime.estimator import Estimator, rate_pairs
from runtime.realtime.events import EventLog
from runtime.realtime.handover import Handover
from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.record_writer import RecordWriter
from runtime.realtime.requests import OperatorRequests
from runtime.realtime.settings import RunSettings, TickSettings
from runtime.realtime.tick_records import (
    hello_record,
    link_counters,
    link_snapshot,
    log_headers,
    run_end_record,
    telemetry_record,
)
from runtime.realtime.tick_state import TickState
from runtime.realtime.timing import TickTiming
from runtime.realtime.trips import TripContext, TripHandler
from runtime.records.kinds import Event, Hello, PostRecord, RunEnd, Telemetry, TripSummary
from runtime.records.logs import RunLogWriter, log_paths
from runtime.records.runinfo import link_identity, run_name

if TYPE_CHECKING:  # the simulated rig and its faults are built by the runner
    from sim_rigs.faults import FaultSchedule
    from sim_rigs.link import SimLink

Array = NDArray[np.float64]


class TickCore:
    """The per-tick logic and its records (runs in the clock thread or an asyncio task)."""

    def __init__(self, cfg: Config, design: Design, link: Link, settings: RunSettings,
                 log_dir: Path, simulated: bool, faults: FaultSchedule | None = None) -> None:
        self.cfg = cfg
        ts = self.tick_settings = TickSettings.from_config(cfg, design)
        self.design = d = design
        self.link = link
        self.settings = settings
        self.simulated = simulated
        rig = d.rig
        self.Ts = Ts = d.Ts
        self._fresh_within = FRESH_PERIODS * Ts
        self.n, self.m = rig.n, rig.m
        self.tracked = tracked_names(rig.C, rig.states)
        self.p = len(self.tracked)
        schedule = schedule_from_config(cfg, self.tracked)
        self.law = LawAdapter(d, ts.law, cfg)
        self.bound = schedule_from_bound(cfg, d)
        self.state = st = TickState(self.n, self.m, self.p, float(self.bound.eps(0.0)))
        channels = len(link.hello.channels) if link.hello is not None else rig.n
        self.est = Estimator(rig.A, Ts, ts.jump_limit, channels=channels,
                             cutoff_hz=ts.estimator_cutoff_hz)
        self.watchdog = Watchdog.from_config(cfg, Ts, d.clamp_margin)
        self.sup = Supervisor(
            settle_time=ts.settle_time,
            settle_rate_tol=ts.settle_rate_tol,
            rate_states=tuple(j for _, j in rate_pairs(rig.A)),
            disarm_action=ts.disarm_action,
            stop_action=ts.stop_action,
        )
        self.handover = Handover(d, settings_from_config(cfg, self.p), self.law, st)
        self.control = AdaptiveControl(d, self.law, self.bound, schedule, ts.engage_slew, st)
        self.sig = Signals()
        self.u_max = np.asarray(rig.input_limits, dtype=float)
        self._u_lo = -self.u_max
        self._u_lim = self.u_max.tolist()
        self.timing = TickTiming(Ts)

        # records
        self.capture = Capture(d, self.p, self.watchdog.rules, ts.pre_capture_s,
                               ts.post_capture_s, self._post_ready)
        self.config_hash = cfg.hash()
        self.link_info = link_identity(settings.link or ts.rig_link)
        self.run_name = run_name(rig.name, self.link_info["kind"])
        self.run_path, self.trip_path = log_paths(log_dir, self.run_name)
        cap = self.capture
        trip_header, run_header = log_headers(
            design=d, config_hash=self.config_hash, config=cfg.raw, tracked=self.tracked,
            bound=self.bound, levels=self.levels(), simulated=simulated,
            link_info=self.link_info, run_name=self.run_name,
            watchdog=self.watchdog.settings(), hostcheck=settings.hostcheck,
            faults=(faults.describe() if faults is not None
                    else {"config": [], "command_line": []}),
            fields=cap.fields, widths=cap.widths, units=cap.units)
        self.writer = RecordWriter(self.trip_path, self.run_path, trip_header, run_header,
                                   settings)
        self.events = EventLog(st, ts.events_per_s, self.writer.put_event)
        self.requests = OperatorRequests(self.sup, self.watchdog, self.handover, self.events)
        self.trip_handler = TripHandler(
            st=st, sup=self.sup, watchdog=self.watchdog, handover=self.handover,
            capture=cap, writer=self.writer, events=self.events, timing=self.timing,
            law=self.law, est=self.est, link=link, rig=rig.name,
            config_hash=self.config_hash)
        self.internal: BaseException | None = None
        """The exception that ended the run through the `internal` trip (None: none)."""
        self.tel_every = 40
        """Telemetry every this many ticks (set by the runner from ``telemetry.rate_hz``)."""
        self.end: RunEnd | None = None
        """The end record, once `close` wrote it."""

    # ------------------------------------------------------------- the tick
    def step(self, sample: Sample | None, now: float) -> Command:
        """One tick for this period's sample (None: none arrived); returns the command.

        The last line of defence: any exception raised inside the tick becomes the
        `internal` trip (`internal_trip`): outputs off, the record on disk, then the
        runner ends the run. After that every tick commands outputs off.
        """
        if self.internal is not None:
            return self._outputs_off(sample)
        try:
            return self._step(sample, now)
        except Exception as exc:  # noqa: BLE001 - the last line of defence
            return self.internal_trip(exc, sample)

    def _step(self, sample: Sample | None, now: float) -> Command:
        st, sup = self.state, self.sup
        k = st.tick
        st.t = k * self.Ts
        self.requests.handle_pending()

        if sample is not None:
            st.device_status = int(sample.status)
        x = self.est.update(sample, now)
        st.x = x
        if sample is not None:
            st.last_sample_t = now

        u, on, law_ran = self._control(x)

        # watchdog: every rule, same tick
        finite_u = _finite(u)
        tripped = self._judge(now, u, on, law_ran, finite_u)
        t_detect = time.monotonic() if tripped else 0.0
        trip: TripContext | None = None
        if tripped and (sup.mode in ("settling", "engaged", "fallback")
                        or (sup.mode == "stopped" and sup.latched)):
            trip = self.trip_handler.on_trips(tripped, u, on)
            u, on = trip.u, trip.on
        if not (finite_u if trip is None else _finite(u)):
            u, on = np.zeros(self.m), False

        # command
        st.seq += 1
        flags = FLAG_OUTPUTS_ON if on else 0
        if sup.mode == "fallback":
            flags |= FLAG_FALLBACK
        # np.clip's values (u is finite here) without its Python wrapper's cost.
        u_out = (np.minimum(np.maximum(u, self._u_lo), self.u_max) if on
                 else np.zeros(self.m))
        # A tick without a sample echoes the last sample's seq (never a host counter:
        # a number ahead of the device's would make it refuse every later command as old,
        # e.g. after the device restarted its numbering on a reconnect).
        last = self.est.last_seq
        cmd = Command(sample.seq if sample is not None else (last if last is not None
                                                            else st.seq),
                      tuple(u_out.tolist()), flags)
        st.u_prev = u_out
        st.u = u_out
        st.outputs_on = on
        if trip is not None:
            trip.t_detect = t_detect
        self.trip_handler.pending = trip
        st.law_ran = law_ran
        return cmd

    def _control(self, x: Array) -> tuple[Array, bool, bool]:
        """The law the mode calls for: (u, outputs_on, the adaptive law ran)."""
        st, sup = self.state, self.sup
        law_ran = False
        mode = sup.mode
        if mode == "settling":
            if self.handover.fb is None:
                self.handover.start("baseline")
            u, on, _ = self.handover.step(x)
            st.u_cmd = u
            if sup.settle_step(x, self.Ts):
                self._engage(x)
                mode = "engaged"
        if mode == "engaged":
            # Learn only from fresh data: on a held or frozen estimate the weights are held
            # (the law still controls), the same freshness that gates the error rules
            # (runtime.guard.watchdog.FRESH_PERIODS; docs/faults.md). Adapting on a stale
            # state would fit the weights to an error the rig no longer has.
            self.law.frozen = max(self.est.age, self.est.frozen_age) > self._fresh_within
            u, on = self.control.step(x), True
            law_ran = True
        elif mode == "fallback":
            u, on, done = self.handover.step(x)
            st.u_cmd = u
            if done:
                sup.fallback_done()
        elif mode != "settling":
            u, on = np.zeros(self.m), False
            st.u_cmd = u
        return u, on, law_ran

    def _engage(self, x: Array) -> None:
        self.handover.clear()
        self.control.engage(x)

    def _judge(self, now: float, u: Array, on: bool, law_ran: bool,
               finite_u: bool) -> list[Rule]:
        """Every watchdog rule on this tick's signals; the rules that tripped."""
        st, est, sig = self.state, self.est, self.sig
        sig.t = st.t
        sig.tick = st.tick
        sig.engaged = law_ran
        sig.ratio = st.ratio if law_ran else 0.0
        sig.ratio_rate = st.ratio_rate if law_ran else 0.0
        sig.clamped = st.clamped and law_ran
        sig.sample_age = est.age
        sig.frozen_age = est.frozen_age
        sig.seq_gap = est.seq_gap
        sig.connected = st.link_up and bool(getattr(self.link.stats, "connected", True))
        sig.since_sample = now - st.last_sample_t
        finite = finite_u and (not law_ran or math.isfinite(st.w_norm))
        sig.nonfinite = est.nonfinite or not finite
        sig.jump = est.jump
        # The saturation rule's signal: seconds each input has been at its limit (plain
        # floats: m is small and numpy's per-call cost is the tick's cost).
        if on:
            Ts = self.Ts
            sat = [t + Ts if over(abs(v), lim) else 0.0
                   for v, lim, t in zip(np.asarray(st.u_cmd, dtype=float).tolist(),
                                        self._u_lim, st.sat_time.tolist(), strict=True)]
            st.sat_time = np.array(sat)
            sig.sat_time = max(sat)
        else:
            st.sat_time[:] = 0.0
            sig.sat_time = 0.0
        missed = self.timing.new_misses()
        if missed is not None:
            sig.misses_window = self.watchdog.note_miss(st.tick, missed)
        sig.w_norm = st.w_norm if law_ran else 0.0
        sig.w_rate = st.w_rate if law_ran else 0.0
        return self.watchdog.check(sig)

    def _outputs_off(self, sample: Sample | None) -> Command:
        st = self.state
        st.seq += 1
        st.u = st.u_prev = np.zeros(self.m)
        st.outputs_on = False
        return Command(sample.seq if sample is not None else st.seq, (0.0,) * self.m, 0)

    def after_send(self, t_sent: float) -> None:
        """Record the tick (after the command is out): row, ring, trip record, telemetry.

        An exception here is the `internal` trip too (the next command is outputs off)."""
        st = self.state
        k = st.tick
        if self.internal is not None:
            # Best effort: the row of the tick that tripped (outputs off) goes to the log.
            with contextlib.suppress(Exception):
                self._after_send(t_sent)
            st.tick = k + 1
            return
        try:
            self._after_send(t_sent)
        except Exception as exc:  # noqa: BLE001 - the last line of defence
            self.internal_trip(exc, None)
            st.tick = k + 1

    def _after_send(self, t_sent: float) -> None:
        st, capture, trips = self.state, self.capture, self.trip_handler
        k = st.tick
        row = capture.fill(st, self.sup.mode, self.sup.latched, self.est.age,
                           self.timing.lateness)
        self.writer.append_row(row.tolist())
        trip = trips.pending
        if trip is not None:
            trips.finish(trip, t_sent)
        elif capture.post_trip is not None:
            capture.add_post()
        if self.sup.events:
            self.events.drain(self.sup)
        # Durable before announced: while a trip's record is not yet on disk, no telemetry
        # (its mode, latch and trip list would announce it).
        telemetry = self.writer.telemetry
        if (telemetry is not None and k % self.tel_every == 0
                and self.writer.durable_trip_id >= trips.trip_id):
            telemetry.publish(self.telemetry_record())
        st.tick = k + 1

    def internal_trip(self, exc: BaseException, sample: Sample | None = None) -> Command:
        """The `internal` trip: an exception escaped the tick.

        Outputs off at once (the returned command), the trip record written and fsynced
        in the calling thread (`TripHandler.record_internal`), and only then announced.
        The runner sees `internal` set and ends the run; ``corral run`` then exits with
        `EXIT_INTERNAL_TRIP`.
        """
        self.internal = exc
        self.trip_handler.pending = None
        st = self.state
        st.t = st.tick * self.Ts  # the tick that raised (it may not have set t)
        cmd = self._outputs_off(sample)
        with contextlib.suppress(Exception):
            self.handover.outputs_off()
        with contextlib.suppress(Exception):
            self.sup.trip("internal", "outputs_off")
            self.watchdog.by_id["internal"].active = True
        self.trip_handler.record_internal(exc)
        return cmd

    # ------------------------------------------------------------- requests, records
    def submit(self, op: str, reply: Callable[[bool, str], None]) -> None:
        """Queue an operator request (thread-safe); it is handled at the next tick."""
        self.requests.submit(op, reply)

    def event(self, kind: str, detail: str, **extra: Any) -> None:
        """Record an event in the trip log (rate-bounded, `EventLog`)."""
        self.events.event(kind, detail, **extra)

    def levels(self) -> dict[str, float]:
        """Margin warning and trip levels (fractions of eps)."""
        r = self.watchdog.by_id
        return {"warning": r["margin_warning"].threshold, "trip": r["margin"].threshold}

    def hello(self) -> Hello:
        """The telemetry hello (`runtime.realtime.tick_records.hello_record`)."""
        return hello_record(
            design=self.design, bound=self.bound, levels=self.levels(),
            simulated=self.simulated, tracked=self.tracked, hostcheck=self.settings.hostcheck,
            link_info=self.link_info, run_name=self.run_name,
            status_flags=getattr(self.link.hello, "status_flags", ()) or ())

    def telemetry_record(self) -> Telemetry:
        """The decimated telemetry record (`runtime.realtime.tick_records.telemetry_record`)."""
        return telemetry_record(self.state, self.sup, self.timing,
                                link_snapshot(self.link, self.est.age),
                                self.design.step_gain_cap, self.trip_handler.current_trip,
                                self.trips)

    def console(self) -> TextIO:
        """Where progress lines go (`RecordWriter.console`)."""
        return self.writer.console()

    def _post_ready(self, rec: PostRecord) -> None:
        self.writer.put_post(rec)

    def close(self, how: str = "completed", detail: str = "") -> None:
        """Flush the post capture, write the end record (how the run ended,
        `runtime.records.runinfo.END_HOW`), then close the trip log and run log writers."""
        if self.capture.post_trip is not None:
            self.capture.flush_post()
        self.events.drain(self.sup)
        self.events.flush_suppressed()
        if how == "completed" and self.trips:
            how = "tripped_and_stopped"
        device = getattr(getattr(self.link, "hello", None), "rig_id", None)
        self.end = run_end_record(
            how, detail, st=self.state, sup=self.sup, timing=self.timing,
            trips=len(self.trips), rig=self.design.rig.name, device_rig=device,
            link_info=self.link_info, link_stats=link_counters(self.link),
            run_log_dropped=self.writer.run_log.dropped)
        self.writer.close(self.end)

    # ------------------------------------------------------------- the parts' figures
    # Read by the runner, tests and benches; each lives in the part that owns it.
    @property
    def tick(self) -> int:
        return self.state.tick

    @property
    def outputs_on(self) -> bool:
        return self.state.outputs_on

    @property
    def max_ratio(self) -> float:
        return self.state.max_ratio

    @property
    def link_up(self) -> bool:
        return self.state.link_up

    @link_up.setter
    def link_up(self, value: bool) -> None:
        self.state.link_up = value

    @property
    def arm_refusal(self) -> str | None:
        return self.requests.arm_refusal

    @arm_refusal.setter
    def arm_refusal(self, value: str | None) -> None:
        self.requests.arm_refusal = value

    @property
    def trips(self) -> list[TripSummary]:
        return self.trip_handler.trips

    @property
    def engagements(self) -> list[dict[str, object]]:
        return self.control.engagements

    @property
    def recent_events(self) -> list[Event]:
        return self.events.recent

    @property
    def events_suppressed(self) -> int:
        return self.events.suppressed

    @property
    def run_log(self) -> RunLogWriter:
        return self.writer.run_log


def _finite(u: Array) -> bool:
    """Every value of u finite (`np.isfinite` for the tick's few inputs, without numpy's
    per-call cost)."""
    return all(map(math.isfinite, np.asarray(u, dtype=float).tolist()))


def _guarded_tick(core: TickCore, link: SimLink, t_nom: float) -> Command:
    """The simulated rig's sample for rig time t_nom and the tick on it; an exception
    reading the rig is the `internal` trip too (the same last line of defence)."""
    try:
        sample = link.sample_now(t_nom)
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        return core.internal_trip(exc, None)
    return core.step(sample, t_nom)
