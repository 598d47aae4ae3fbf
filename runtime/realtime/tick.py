"""One tick (`TickCore`): operator requests -> estimate -> supervisor -> law -> watchdog
(a trip hands over to its fallback in the same tick) -> command -> record."""

from __future__ import annotations

import contextlib
import math
import queue
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from drivers.base import FLAG_FALLBACK, FLAG_OUTPUTS_ON, Command, Link, Sample
from runtime import __version__
from runtime.config import Config
from runtime.guard.fallback import make_fallback, settings_from_config
from runtime.guard.supervisor import MODE_CODE, Supervisor
from runtime.guard.watchdog import Signals, Watchdog, over
from runtime.method.bound import schedule_from_config as schedule_from_bound
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.method.design import Design
from runtime.realtime.capture import _capture_layout, _finite
from runtime.realtime.clock import (
    LatencyStats,
)
from runtime.realtime.estimator import Estimator, rate_pairs
from runtime.realtime.hostcheck import explain_from_header
from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.links import link_stats_now
from runtime.realtime.settings import RunSettings, TickSettings
from runtime.realtime.telemetry import TelemetryServer
from runtime.records.logs import RunLogWriter, TripLog, log_paths
from runtime.records.runinfo import end_record, link_identity, run_name

Array = NDArray[np.float64]


# ------------------------------------------------------------------ the tick
class TickCore:
    """The per-tick logic and its records (runs in the clock thread or an asyncio task)."""

    def __init__(self, cfg: Config, design: Design, link: Link, settings: RunSettings,
                 log_dir: Path, simulated: bool, faults: Any = None) -> None:
        self.cfg = cfg
        ts = TickSettings.from_config(cfg, design)
        self.tick_settings = ts
        self.design = d = design
        self.link = link
        self.settings = settings
        self.simulated = simulated
        rig = d.rig
        self.Ts = Ts = d.Ts
        self.n, self.m = rig.n, rig.m
        self.tracked = tracked_names(rig.C, rig.states)
        self.p = len(self.tracked)
        schedule = schedule_from_config(cfg, self.tracked)
        n_cmd = int(round(schedule.duration / Ts)) + 1
        self.cmd_table = np.ascontiguousarray(schedule.evaluate(np.arange(n_cmd) * Ts))
        self.law = LawAdapter(d, ts.law, cfg)
        # The bound eps(t), t = seconds since the law engaged (constant design.eps when
        # [adaptation.bound] is absent). The law, the margin rules (the ratio is
        # ||e||_P / eps_k), telemetry, trip snapshots and the run log all use eps_k.
        self.bound = schedule_from_bound(cfg, d)
        self.bound_varies = self.bound.kind != "constant"
        self.eps0 = float(self.bound.eps(0.0))
        self.eps_now = self.eps0
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
        self.fb_settings = settings_from_config(cfg, self.p)
        self.engage_slew = ts.engage_slew
        self.c_offset: Array | None = None
        self.fb: Any = None
        self.sig = Signals()
        self.u_max = np.asarray(rig.input_limits, dtype=float)

        # records
        self.fields, self.widths, self.units = _capture_layout(d, self.p,
                                                               self.watchdog.rules)
        self.row_len = sum(self.widths)
        offs = np.cumsum([0] + self.widths)
        self.slot = {f: slice(int(offs[i]), int(offs[i + 1])) for i, f in enumerate(self.fields)}
        # Where each rule's judged signal goes in the row (one assignment per tick).
        self._sig_rules = list(self.watchdog.rules)
        self._sig_at = np.array([self.slot[f"sig_{r.id}"].start for r in self._sig_rules],
                                dtype=np.intp)
        pre_s = ts.pre_capture_s
        post_s = ts.post_capture_s
        self.pre_n = max(1, int(round(pre_s / Ts)))
        self.post_n = int(round(post_s / Ts))
        self.ring = np.zeros((self.pre_n, self.row_len))
        self.post_buf = np.zeros((max(1, self.post_n), self.row_len))
        self.post_count = 0
        self.post_trip: int | None = None
        self.post_later: list[dict[str, Any]] = []
        self.row = np.zeros(self.row_len)
        self.config_hash = cfg.hash()
        self.link_info = link_identity(settings.link or ts.rig_link)
        self.run_name = run_name(rig.name, self.link_info["kind"])
        run_path, trip_path = log_paths(log_dir, self.run_name)
        self.run_path, self.trip_path = run_path, trip_path
        common = {"rig": rig.name, "config_hash": self.config_hash,
                  "software_version": __version__, "config": cfg.raw, "period": Ts,
                  "states": list(rig.states), "state_units": list(rig.state_units),
                  "inputs": list(rig.inputs), "input_units": list(rig.input_units),
                  "input_limits": self.u_max.tolist(), "tracked": list(self.tracked),
                  "eps": self.eps0, "bound": self.bound.to_json(),
                  "levels": self.levels(), "simulated": simulated,
                  "link": self.link_info, "run_name": self.run_name,
                  "watchdog": self.watchdog.settings(),
                  "hostcheck": settings.hostcheck,
                  # Injected faults as `KIND@SECONDS:...` labels, by where they were set.
                  "faults": (faults.describe() if faults is not None
                             else {"config": [], "command_line": []})}
        self.trip_log = TripLog(trip_path, {**common, "capture_fields": self.fields,
                                            "capture_units": self.units,
                                            "capture_widths": self.widths})
        self.run_log = RunLogWriter(run_path, {**common, "fields": self.fields,
                                               "widths": self.widths, "units": self.units})
        self._writes: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._writer = threading.Thread(target=self._write_records, name="corral-triplog",
                                        daemon=True)
        self._writer.start()
        self.trips_written = 0
        self.events_per_s = ts.events_per_s
        """Most operator events written to the trip log per second (the rest counted)."""
        self._ev_window_t = -math.inf
        self._ev_count = 0
        self._ev_suppressed = 0
        self.events_suppressed = 0
        self.durable_trip_id = 0
        """Highest trip id whose record is on disk (fsynced): nothing announces a later one."""
        self.internal: BaseException | None = None
        """The exception that ended the run through the `internal` trip (None: none)."""
        self.device_status = 0
        """The status bits of the last sample (telemetry ``status``; docs/wire-protocol.md)."""

        # live state
        self.tick = 0
        self.t = 0.0
        self.requests: list[tuple[str, Callable[[bool, str], None]]] = []
        self._req_lock = threading.Lock()
        self.x: Array = np.zeros(self.n)
        self.c: Array = np.zeros(self.p)
        self.u: Array = np.zeros(self.m)
        """Input applied (sent with outputs on) this tick."""
        self.u_prev: Array = np.zeros(self.m)
        self.u_cmd: Array = np.zeros(self.m)
        self.outputs_on = False
        self.engage_tick = 0
        self.engagements: list[dict[str, Any]] = []
        """Each engage: tick, x and x_r at that moment (tests and review)."""
        self.e = np.zeros(self.n)
        self.s = self.ratio = self.phi_d = self.eff_rate = self.step_gain = 0.0
        self.clamped = False
        self.ratio_rate = 0.0
        self.max_ratio = 0.0
        self.W_prev = np.zeros((d.n_regressors, self.m))
        self.w_norm = self.w_rate = 0.0
        self.sat_time = np.zeros(self.m)
        self.last_sample_t = -math.inf
        self.trips: list[dict[str, Any]] = []
        self.trip_id = 0
        self.current_trip: dict[str, Any] | None = None
        self.recent_events: list[dict[str, Any]] = []
        self.lateness = 0.0
        self.loop_stats: LatencyStats | None = None
        self.telemetry: TelemetryServer | None = None
        self.tel_every = 40
        self.misses_seen = 0
        self._alpha_rr = math.exp(-2 * math.pi * 20.0 * Ts)
        self.seq = 0
        self._pending_trip: dict[str, Any] | None = None
        self.arm_refusal: str | None = None
        """When set, every arm request is refused with this reason (preflight NO-GO)."""
        self.law_ran = False
        """The adaptive law ran this tick (its ratio, s, e are recorded even on a trip)."""
        self.link_up = True
        """False from a link loss until the link is back (the `link_loss` rule sees it)."""
        self.link_detail = ""
        """Why the link is down (the `link_loss` first-out's ``detail``)."""

    # ------------------------------------------------------------- helpers
    def levels(self) -> dict[str, float]:
        """Margin warning and trip levels (fractions of eps)."""
        r = self.watchdog.by_id if hasattr(self, "watchdog") else None
        if r is None:
            return {"warning": 0.8, "trip": 0.9}
        return {"warning": r["margin_warning"].threshold, "trip": r["margin"].threshold}

    def submit(self, op: str, reply: Callable[[bool, str], None]) -> None:
        """Queue an operator request (thread-safe); it is handled at the next tick."""
        with self._req_lock:
            self.requests.append((op, reply))

    def hello(self) -> dict[str, Any]:
        """The telemetry hello map."""
        d, rig = self.design, self.design.rig
        return {"rig": rig.name, "states": list(rig.states),
                "state_units": list(rig.state_units), "inputs": list(rig.inputs),
                "input_units": list(rig.input_units), "input_limits": self.u_max.tolist(),
                "limits": np.asarray(d.limits).tolist(),
                "envelope": np.asarray(d.envelope).tolist(), "eps": self.eps0,
                "bound": self.bound.to_json(),
                "levels": self.levels(), "period": self.Ts, "simulated": self.simulated,
                "tracked": list(self.tracked), "hostcheck": self.settings.hostcheck,
                "link": self.link_info, "run_name": self.run_name,
                "status_flags": list(getattr(self.link.hello, "status_flags", ()) or ())}

    def _start_fallback(self, kind: str) -> None:
        self.law.frozen = True
        self.fb = make_fallback(kind, self.design, self.fb_settings, self.u_prev, self.x)

    def _event(self, kind: str, detail: str, **extra: Any) -> None:
        # Bounded: at most `events_per_s` event records per second reach the trip log
        # (each is fsynced); the rest are counted and summed up in one
        # ``events_suppressed`` record when the next second's first event comes (or at
        # the end of the run). A request flood cannot fill the disk.
        now = time.monotonic()
        if now - self._ev_window_t >= 1.0:
            self._flush_suppressed()
            self._ev_window_t = now
            self._ev_count = 0
        if self._ev_count >= self.events_per_s:
            self._ev_suppressed += 1
            self.events_suppressed += 1
            return
        self._ev_count += 1
        self._put_event(kind, detail, **extra)

    def _flush_suppressed(self) -> None:
        if self._ev_suppressed:
            n, self._ev_suppressed = self._ev_suppressed, 0
            self._put_event("events_suppressed", f"{n} events in one second over the limit "
                            f"of {self.events_per_s:g} per second (log.events_per_s)",
                            count=n)

    def _put_event(self, kind: str, detail: str, **extra: Any) -> None:
        rec = {"type": "event", "t_mono": time.monotonic(), "t_wall": time.time(),
               "tick": self.tick, "kind": kind, "detail": detail, **extra}
        self.recent_events.append(rec)
        del self.recent_events[:-20]
        # Sent to the socket (and MQTT) by the writer thread once it is on disk.
        self._writes.put(("event", rec))

    def _drain_supervisor_events(self) -> None:
        ev = self.sup.events
        while ev:
            kind, detail = ev.pop(0)
            self._event(kind, detail)

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

    def _outputs_off(self, sample: Sample | None) -> Command:
        self.seq += 1
        self.u = self.u_prev = np.zeros(self.m)
        self.outputs_on = False
        return Command(sample.seq if sample is not None else self.seq, (0.0,) * self.m, 0)

    def _step(self, sample: Sample | None, now: float) -> Command:
        Ts = self.Ts
        k = self.tick
        self.t = k * Ts
        sup = self.sup

        if self.requests:
            with self._req_lock:
                reqs, self.requests = self.requests, []
            for op, reply in reqs:
                self._handle_request(op, reply)

        if sample is not None:
            self.device_status = int(sample.status)
        x = self.est.update(sample, now)
        self.x = x
        if sample is not None:
            self.last_sample_t = now

        law_ran = False
        mode = sup.mode
        if mode == "settling":
            if self.fb is None:
                self._start_fallback("baseline")
            u, on, _ = self.fb.step(x)
            self.u_cmd = u
            if sup.settle_step(x, Ts):
                self._engage(x)
                mode = "engaged"
        if mode == "engaged":
            i = k - self.engage_tick
            c = self.cmd_table[i if i < len(self.cmd_table) else -1]
            off = self.c_offset
            if off is not None:
                c = c + off
                off -= np.clip(off, -self.engage_slew * Ts, self.engage_slew * Ts)
                if not np.any(off):
                    self.c_offset = None
            self.c = c
            if self.bound_varies:
                self.eps_now = float(self.bound.eps(i * Ts))
            out = self.law.step(x, c, self.eps_now)
            # The fast law's results are views it overwrites next tick: copy.
            u, on = out.u.copy(), True
            law_ran = True
            self.e[:] = out.e
            self.s = float(out.s)
            ratio = float(out.ratio)
            self.ratio_rate = (self._alpha_rr * self.ratio_rate
                               + (1 - self._alpha_rr) * (ratio - self.ratio) / Ts)
            self.ratio = ratio
            self.phi_d = float(out.phi_d)
            self.eff_rate = float(out.eff_rate)
            self.step_gain = float(out.step_gain)
            self.clamped = bool(out.clamped)
            self.u_cmd = np.array(out.u_raw, dtype=float)
            if ratio > self.max_ratio:
                self.max_ratio = ratio
            W = self.law.W
            self.w_norm = float(np.sqrt(np.sum(W * W)))
            dW = W - self.W_prev
            self.w_rate = float(np.sqrt(np.sum(dW * dW))) / Ts
            self.W_prev[:] = W
        elif mode == "fallback":
            u, on, done = self.fb.step(x)
            self.u_cmd = u
            if done:
                sup.fallback_done()
        elif mode != "settling":
            u, on = np.zeros(self.m), False
            self.u_cmd = u

        # watchdog: every rule, same tick
        sig = self.sig
        sig.t = self.t
        sig.tick = k
        sig.engaged = law_ran
        sig.ratio = self.ratio if law_ran else 0.0
        sig.ratio_rate = self.ratio_rate if law_ran else 0.0
        sig.clamped = self.clamped and law_ran
        sig.sample_age = self.est.age
        sig.frozen_age = self.est.frozen_age
        sig.seq_gap = self.est.seq_gap
        sig.connected = self.link_up and bool(getattr(self.link.stats, "connected", True))
        sig.since_sample = now - self.last_sample_t
        finite = bool(np.all(np.isfinite(u))) and (not law_ran or bool(np.isfinite(self.w_norm)))
        sig.nonfinite = self.est.nonfinite or not finite
        sig.jump = self.est.jump
        if on:
            sat = np.array([over(abs(float(v)), float(lim))  # the saturation rule's signal
                            for v, lim in zip(self.u_cmd, self.u_max, strict=True)])
            self.sat_time = np.where(sat, self.sat_time + Ts, 0.0)
        else:
            self.sat_time[:] = 0.0
        sig.sat_time = float(np.max(self.sat_time))
        stats = self.loop_stats
        if stats is not None:
            missed = stats.misses - self.misses_seen
            self.misses_seen = stats.misses
            sig.misses_window = self.watchdog.note_miss(k, missed)
        sig.w_norm = self.w_norm if law_ran else 0.0
        sig.w_rate = self.w_rate if law_ran else 0.0
        tripped = self.watchdog.check(sig)
        t_detect = time.monotonic() if tripped else 0.0
        trip_ctx = None
        if tripped and (sup.mode in ("settling", "engaged", "fallback")
                        or (sup.mode == "stopped" and sup.latched)):
            trip_ctx = self._on_trips(tripped, u, on)
            if trip_ctx is not None:
                u, on = trip_ctx["u"], trip_ctx["on"]
        if not np.all(np.isfinite(u)):
            u, on = np.zeros(self.m), False

        # command
        self.seq += 1
        flags = FLAG_OUTPUTS_ON if on else 0
        if sup.mode == "fallback":
            flags |= FLAG_FALLBACK
        u_out = np.clip(u, -self.u_max, self.u_max) if on else np.zeros(self.m)
        # A tick without a sample echoes the last sample's seq (never a host counter:
        # a number ahead of the device's would make it refuse every later command as old,
        # e.g. after the device restarted its numbering on a reconnect).
        last = self.est.last_seq
        cmd = Command(sample.seq if sample is not None else (last if last is not None
                                                            else self.seq),
                      (float(u_out[0]), float(u_out[1])) if self.m == 2
                      else tuple(float(v) for v in u_out), flags)
        self.u_prev = u_out
        self.u = u_out
        self.outputs_on = on
        if trip_ctx is not None:
            trip_ctx["t_detect"] = t_detect
        self._pending_trip = trip_ctx
        self.law_ran = law_ran
        return cmd

    def after_send(self, t_sent: float) -> None:
        """Record the tick (after the command is out): row, ring, trip record, telemetry.

        An exception here is the `internal` trip too (the next command is outputs off)."""
        k = self.tick
        if self.internal is not None:
            # Best effort: the row of the tick that tripped (outputs off) goes to the log.
            with contextlib.suppress(Exception):
                self._after_send(t_sent)
            self.tick = k + 1
            return
        try:
            self._after_send(t_sent)
        except Exception as exc:  # noqa: BLE001 - the last line of defence
            self.internal_trip(exc, None)
            self.tick = k + 1

    def _after_send(self, t_sent: float) -> None:
        k = self.tick
        row = self.row
        sl = self.slot
        row[0] = self.t
        row[1] = k
        row[2] = MODE_CODE[self.sup.mode]
        row[3] = float(self.sup.latched)
        row[sl["c"]] = self.c
        row[sl["x"]] = self.x
        # The law's figures whenever it ran this tick, also when the tick ended in a
        # fallback (the tick that tripped the margin rule is in the log with its ratio).
        engaged = self.law_ran
        row[sl["xr"]] = self.x - self.e if engaged else self.x
        row[sl["e"]] = self.e if engaged else 0.0
        row[sl["s"]] = self.s if engaged else 0.0
        row[sl["eps"]] = self.eps_now
        row[sl["ratio"]] = self.ratio if engaged else 0.0
        row[sl["phi_d"]] = self.phi_d
        row[sl["eff_rate"]] = self.eff_rate
        row[sl["step_gain"]] = self.step_gain
        row[sl["u_cmd"]] = self.u_cmd
        row[sl["u"]] = self.u
        row[sl["w_norm"]] = self.w_norm
        row[sl["sample_age_ms"]] = min(self.est.age, 1e6) * 1e3
        row[sl["lateness_us"]] = self.lateness * 1e6
        row[sl["outputs_on"]] = float(self.outputs_on)
        row[self._sig_at] = [r.last_value for r in self._sig_rules]
        self.ring[k % self.pre_n] = row
        self.run_log.append(row.tolist())
        trip = self._pending_trip
        if trip is not None:
            self._finish_trip(trip, t_sent)
        elif self.post_trip is not None:
            self.post_buf[self.post_count] = row
            self.post_count += 1
            if self.post_count >= self.post_n:
                self._flush_post()
        if self.sup.events:
            self._drain_supervisor_events()
        # Durable before announced: while a trip's record is not yet on disk, no telemetry
        # (its mode, latch and trip list would announce it).
        if (self.telemetry is not None and k % self.tel_every == 0
                and self.durable_trip_id >= self.trip_id):
            self.telemetry.publish(self.telemetry_record())
        self.tick = k + 1

    # ------------------------------------------------------------- engage / requests
    def _engage(self, x: Array) -> None:
        self.fb = None
        self.law.engage(x)
        self.engage_tick = self.tick
        self.W_prev[:] = 0.0
        # The command starts at the measured pose and slews onto the schedule, so the
        # reference model does not start with a step the untrained law cannot follow.
        off = self.design.rig.C @ x - self.cmd_table[0]
        self.c_offset = off if np.any(off) else None
        self.ratio = self.ratio_rate = 0.0
        self.e[:] = 0.0
        self.eps_now = self.eps0
        self.engagements.append({"tick": self.tick, "x": x.tolist(),
                                 "xr": np.array(self.law.xr).tolist()})

    def _handle_request(self, op: str, reply: Callable[[bool, str], None]) -> None:
        if op == "arm" and self.arm_refusal is not None:
            decision = self.sup.refuse(op, self.arm_refusal)
            self._drain_supervisor_events()
            reply(decision.ok, decision.message)
            return
        decision = self.sup.request(op, self.watchdog.conditions_present())
        if decision.action is not None:
            if decision.action == "outputs_off" or self.sup.mode == "stopped":
                self.fb = None
                self.law.frozen = True
            else:
                self._start_fallback(decision.action)
        if decision.enter_settling:
            self.fb = None  # a fresh bumpless hold starts this tick
        self._drain_supervisor_events()
        reply(decision.ok, decision.message)

    # ------------------------------------------------------------- trips
    def _on_trips(self, rules: list[Any], u: Array, on: bool) -> dict[str, Any] | None:
        sup = self.sup
        first_new = not sup.latched
        before = sup.current_reaction
        entries = []
        for rule in rules:
            action = sup.trip(rule.id, rule.reaction)
            entries.append({**rule.describe(), "tick": self.tick, "action": action})
        action = sup.current_reaction or "outputs_off"
        if action != before:
            if action == "outputs_off":
                self.fb = None
                self.law.frozen = True
                u, on = np.zeros(self.m), False
            else:
                self._start_fallback(action)
                u, on, _ = self.fb.step(self.x)
        if first_new:
            self.trip_id += 1
            ctx = {"first": entries[0], "later": entries[1:], "action": action,
                   "u": u, "on": on, "new": True}
        else:
            self.post_later.extend(entries)
            ctx = {"first": None, "later": entries, "action": action, "u": u, "on": on,
                   "new": False}
        return ctx

    def _finish_trip(self, ctx: dict[str, Any], t_sent: float) -> None:
        d2a = (t_sent - ctx["t_detect"]) * 1e6
        if not ctx["new"]:
            for e in ctx["later"]:
                self.trips[-1]["later"].append(e["rule"])
            if self.post_trip is not None:
                self.post_buf[self.post_count] = self.row
                self.post_count += 1
                if self.post_count >= self.post_n:
                    self._flush_post()
            return
        if self.post_trip is not None:
            self._flush_post()
        k = self.tick
        n_pre = min(k + 1, self.pre_n)
        idx = (np.arange(k + 1 - n_pre, k + 1)) % self.pre_n
        pre = self.ring[idx].copy()
        first = ctx["first"]
        first_out = {key: first[key] for key in ("rule", "signal", "value", "threshold")}
        if first["rule"] == "link_loss":
            first_out["detail"] = self.link_detail or "device silent"
        link_stats: dict[str, Any] = {}
        with contextlib.suppress(Exception):
            link_stats = link_stats_now(self.link.stats)
        link_stats["sample_age_ms"] = float(min(self.est.age, 1e6) * 1e3)
        stats = self.loop_stats
        p50, p99, mx = stats.percentiles_us() if stats is not None else (math.nan,) * 3
        rec = {
            "type": "trip", "id": self.trip_id, "t_mono": ctx["t_detect"], "t_wall": time.time(),
            "tick": k, "t": self.t,
            "first_out": {**first_out, **self._rule_settings(first["rule"])},
            "later": [{**{key: e[key] for key in ("rule", "signal", "value", "threshold",
                                                  "tick")}, **self._rule_settings(e["rule"])}
                      for e in ctx["later"]],
            "action": ctx["action"], "detect_to_action_us": d2a,
            "snapshot": {
                "mode": self.sup.mode, "W": np.array(self.law.W).tolist()
                if self.law.out is not None else [],
                "x": self.x.tolist(), "xr": (self.x - self.e).tolist(), "e": self.e.tolist(),
                "u_cmd": np.asarray(self.u_cmd).tolist(), "u_applied": self.u.tolist(),
                "eps": self.eps_now, "phi_d": self.phi_d, "ratio": self.ratio,
                "loop": {"ticks": k + 1, "lateness_p50_us": p50, "lateness_p99_us": p99,
                         "lateness_max_us": mx,
                         "deadline_misses": stats.misses if stats is not None else 0,
                         "lateness_us": self.lateness * 1e6},
                "link": link_stats,
            },
            "config_hash": self.config_hash, "software_version": __version__,
            "rig": self.design.rig.name, "events": list(self.recent_events),
            "pre": pre,
        }
        summary = {"id": self.trip_id, "rule": first["rule"], "tick": k, "t": self.t,
                   "action": ctx["action"], "detect_to_action_us": d2a,
                   "value": first["value"], "threshold": first["threshold"],
                   "later": [e["rule"] for e in ctx["later"]]}
        if "detail" in first_out:
            summary["detail"] = first_out["detail"]
        self.trips.append(summary)
        self.current_trip = summary
        # The writer thread announces it (socket, MQTT, stderr) once it is on disk.
        self._writes.put(("trip", rec, summary))
        self.post_trip = self.trip_id
        self.post_count = 0
        self.post_later = []
        if self.post_n == 0:
            self._flush_post()

    def _rule_settings(self, rule_id: str) -> dict[str, Any]:
        """A rule's on-delay, deadband and reaction (for its trip entry)."""
        r = self.watchdog.by_id.get(rule_id)
        if r is None:
            return {}
        return {"on_delay_s": r.on_delay, "deadband": r.deadband, "reaction": r.reaction,
                "capture_field": f"sig_{r.id}"}

    def _flush_post(self) -> None:
        if self.post_trip is None:
            return
        rec = {"type": "post", "trip_id": self.post_trip,
               "rows": self.post_buf[:self.post_count].copy(), "later": list(self.post_later)}
        self._writes.put(("post", rec))
        self.post_trip = None
        self.post_count = 0

    def _write_records(self) -> None:
        while True:
            item = self._writes.get()
            if item is None:
                return
            kind, rec = item[0], item[1]
            try:
                if kind in ("trip", "post"):
                    rec = dict(rec)
                    key = "pre" if kind == "trip" else "rows"
                    rec[key] = np.asarray(rec[key]).tolist()
                self.trip_log.append(rec)
            except Exception as exc:  # noqa: BLE001 - a full disk must not stop the loop
                print(f"corral: could not write the trip log: {exc}", file=self.console(),
                      flush=True)
                if kind == "trip":  # not durable, but the operator must still hear of it
                    self._announce_trip(rec, item[2])
                continue
            # On disk (fsynced) now: only from here on may anyone hear of it.
            if kind == "trip":
                self._announce_trip(rec, item[2])
            elif kind == "event" and self.telemetry is not None:
                self.telemetry.post(rec)

    def _announce_trip(self, rec: dict[str, Any], summary: dict[str, Any]) -> None:
        """Tell the operator of a trip whose record is on disk: socket, MQTT, stderr."""
        self.trips_written += 1
        self.durable_trip_id = max(self.durable_trip_id, int(rec["id"]))
        if self.telemetry is not None:
            self.telemetry.post({"type": "trip", **summary})
        if self.settings.echo_trips:
            print(f"corral: trip {rec['id']} ({rec['first_out']['rule']}, action "
                  f"{rec['action']}) logged to {self.trip_path}", file=self.console(),
                  flush=True)
            fo = rec["first_out"]
            why = explain_from_header(fo["rule"], fo["value"], fo["threshold"],
                                      self.trip_log.header, rec["snapshot"].get("loop"))
            if why:
                print(f"corral:   {why}", file=self.console(), flush=True)

    def internal_trip(self, exc: BaseException, sample: Sample | None = None) -> Command:
        """The `internal` trip: an exception escaped the tick.

        Outputs off at once (the returned command), the trip record written and fsynced
        HERE, in the calling thread (not queued: the run is about to end), and only then
        announced. The runner sees `internal` set and ends the run; ``corral run`` then
        exits with `EXIT_INTERNAL_TRIP`.
        """
        import traceback

        self.internal = exc
        self._pending_trip = None
        self.t = self.tick * self.Ts  # the tick that raised (it may not have set t)
        cmd = self._outputs_off(sample)
        with contextlib.suppress(Exception):
            self.fb = None
            self.law.frozen = True
        with contextlib.suppress(Exception):
            self.sup.trip("internal", "outputs_off")
            self.watchdog.by_id["internal"].active = True
        self.trip_id += 1
        text = f"{type(exc).__name__}: {exc}"
        first = {"rule": "internal", "signal": "exception inside the tick", "value": text,
                 "threshold": 0.5}
        t_detect = time.monotonic()
        rec: dict[str, Any] = {
            "type": "trip", "id": self.trip_id, "t_mono": t_detect, "t_wall": time.time(),
            "tick": self.tick, "t": self.t, "first_out": first, "later": [],
            "action": "outputs_off", "detect_to_action_us": 0.0,
            "exception": "".join(traceback.format_exception(exc))[-4000:],
            "config_hash": self.config_hash, "software_version": __version__,
            "rig": self.design.rig.name, "events": [], "pre": [], "snapshot": {},
        }
        with contextlib.suppress(Exception):  # best effort: the state may be what broke
            n_pre = min(self.tick, self.pre_n)
            idx = np.arange(self.tick - n_pre, self.tick) % self.pre_n
            rec["pre"] = self.ring[idx].tolist()
            rec["events"] = list(self.recent_events)
            rec["snapshot"] = {"mode": self.sup.mode, "x": np.asarray(self.x).tolist(),
                               "u_applied": [0.0] * self.m,
                               "u_cmd": np.asarray(self.u_cmd).tolist(),
                               "eps": self.eps_now, "ratio": self.ratio}
        summary = {"id": self.trip_id, "rule": "internal", "tick": self.tick, "t": self.t,
                   "action": "outputs_off", "detect_to_action_us": 0.0, "value": text,
                   "threshold": 0.5, "later": []}
        self.trips.append(summary)
        self.current_trip = summary
        try:
            self.trip_log.append(rec)
        except Exception as log_exc:  # noqa: BLE001 - still turn the outputs off and say so
            print(f"corral: INTERNAL trip ({text}); outputs off; the trip log could not be "
                  f"written: {log_exc}", file=self.console(), flush=True)
            return cmd
        self.trips_written += 1
        self.durable_trip_id = max(self.durable_trip_id, self.trip_id)
        if self.telemetry is not None:
            self.telemetry.post({"type": "trip", **summary})
        print(f"corral: INTERNAL trip {self.trip_id} ({text}); outputs off; logged to "
              f"{self.trip_path}; the run ends", file=self.console(), flush=True)
        return cmd

    def console(self) -> Any:
        """Where progress lines go: `RunSettings.console` (a file beside the logs while a
        dashboard owns the terminal) or stderr."""
        return self.settings.console if self.settings.console is not None else sys.stderr

    def close(self, how: str = "completed", detail: str = "") -> None:
        """Flush the post capture, write the end record (how the run ended,
        `runtime.records.runinfo.END_HOW`), then close the trip log and run log writers."""
        if self.post_trip is not None:
            self._flush_post()
        self._drain_supervisor_events()
        self._flush_suppressed()
        if how == "completed" and self.trips:
            how = "tripped_and_stopped"
        device = getattr(getattr(self.link, "hello", None), "rig_id", None)
        link_stats: dict[str, Any] = {}
        with contextlib.suppress(Exception):
            link_stats = link_stats_now(self.link.stats)
        stats = self.loop_stats
        p50, p99, mx = stats.percentiles_us() if stats is not None else (math.nan,) * 3
        loop = {"ticks": self.tick, "period_s": self.Ts, "lateness_p50_us": _finite(p50),
                "lateness_p99_us": _finite(p99), "lateness_max_us": _finite(mx),
                "deadline_misses": stats.misses if stats is not None else 0,
                "run_log_dropped": self.run_log.dropped, "max_margin_ratio": self.max_ratio}
        end = end_record(how, tick=self.tick, trips=len(self.trips), mode=self.sup.mode,
                         latched=self.sup.latched, detail=detail, rig=self.design.rig.name,
                         device_rig=device, link=self.link_info, link_stats=link_stats,
                         loop=loop)
        self.end = end
        self._writes.put(("end", end))
        self.run_log.append(end)  # type: ignore[arg-type]  # a map after the rows
        self._writes.put(None)
        self._writer.join(10.0)
        self.trip_log.close()
        self.run_log.close(10.0)

    # ------------------------------------------------------------- telemetry
    def telemetry_record(self) -> dict[str, Any]:
        """The decimated telemetry map (docs/telemetry.md)."""
        stats = self.loop_stats
        # Over the last second: the whole-run percentiles cost milliseconds in the tick.
        p50, p99 = (stats.recent_percentiles_us(int(round(1.0 / self.Ts)))
                    if stats is not None else (math.nan, math.nan))
        engaged = self.law_ran
        ttb = None
        if engaged and self.ratio_rate > 1e-9 and self.ratio < 1.0:
            ttb = (1.0 - self.ratio) / self.ratio_rate
        link: dict[str, Any] = {}
        with contextlib.suppress(Exception):
            link = link_stats_now(self.link.stats)
        link["sample_age_ms"] = float(min(self.est.age, 1e6) * 1e3)
        for key, v in list(link.items()):
            if isinstance(v, float) and not math.isfinite(v):
                link[key] = None
        xr = (self.x - self.e) if engaged else self.x
        return {
            "type": "telemetry", "t": self.t, "tick": self.tick, "mode": self.sup.mode,
            "latched": self.sup.latched, "fallback": self.sup.fallback,
            "ratio": self.ratio if engaged else 0.0, "s": self.s if engaged else 0.0,
            "eps": self.eps_now, "phi_d": self.phi_d, "eff_rate": self.eff_rate,
            "step_gain": self.step_gain, "step_gain_cap": self.design.step_gain_cap,
            "c": self.c.tolist(), "x": self.x.tolist(), "xr": xr.tolist(),
            "e": (self.e if engaged else np.zeros(self.n)).tolist(),
            "u": self.u.tolist(), "u_raw": np.asarray(self.u_cmd).tolist(),
            "w_norm": self.w_norm, "w_rate": self.w_rate, "sat_time": self.sat_time.tolist(),
            "time_to_bound": ttb,
            "loop": {"rate_hz": 1.0 / self.Ts, "lateness_p50_us": _finite(p50),
                     "lateness_p99_us": _finite(p99),
                     "deadline_misses": stats.misses if stats is not None else 0,
                     "ticks": self.tick},
            "link": link, "status": self.device_status,
            "trip": self.current_trip if self.sup.latched else None,
            "trips": list(self.trips[-20:]),
        }


def _guarded_tick(core: TickCore, link: Any, t_nom: float) -> Command:
    """The simulated rig's sample for rig time t_nom and the tick on it; an exception
    reading the rig is the `internal` trip too (the same last line of defence)."""
    try:
        sample = link.sample_now(t_nom)
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        return core.internal_trip(exc, None)
    return core.step(sample, t_nom)
