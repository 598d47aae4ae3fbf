"""The real-time loop: one tick, the tasks around it, and link construction.

One tick (`TickCore.step`): operator requests -> estimate x from the sample
-> supervisor (settling hold, engaged adaptive law, fallback law) ->
watchdog (every rule; a trip hands over to its fallback in the SAME tick)
-> command -> record (tick row to the run log through the non-blocking
writer, a preallocated ring of recent rows for the pre-trip capture,
decimated telemetry). Nothing here waits on disk, the screen or the network:
trip records, post captures and operator events go to a writer thread that
appends them to the trip log (each fsynced).

Clocking (`Runner`): a `sim_rigs.link.SimLink` is host-clocked (the
`runtime.realtime.clock.DeadlineClock` thread runs the tick at absolute deadlines and
steps the simulated physics one period after each command); any other link
is rig-clocked (an asyncio task awaits each sample, ticks, sends). The
runner's tasks (tick, telemetry socket, duration timer) live in one asyncio
TaskGroup; stopping is one event, and a crash in the tick turns the outputs
off before the error propagates.

`make_link(cfg, spec)` builds the link a config and ``--link`` name; extend it
there for new transports. What does not live here: the law
(`runtime.method.law`), rules (`runtime.guard.watchdog`), modes (`runtime.guard.supervisor`),
fallbacks (`runtime.guard.fallback`), files (`runtime.records.logs`).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import gc
import math
import os
import queue
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from drivers.base import FLAG_FALLBACK, FLAG_OUTPUTS_ON, Command, Link, LinkClosed, Sample
from runtime import __version__
from runtime.config import Config, ConfigError
from runtime.guard.fallback import make_fallback, settings_from_config
from runtime.guard.supervisor import MODE_CODE, Supervisor
from runtime.guard.watchdog import Signals, Watchdog, over
from runtime.method.bound import schedule_from_config as schedule_from_bound
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.method.design import Design, design_from_config
from runtime.realtime.clock import (
    ArrivalTracker,
    DeadlineClock,
    LatencyStats,
    raise_helper_threads,
    restore_threads,
    set_thread_policy,
    thread_policy,
    try_realtime,
)
from runtime.realtime.estimator import Estimator, rate_pairs
from runtime.realtime.hostcheck import explain_from_header, pre_arm_check
from runtime.realtime.telemetry import MqttBridge, TelemetryServer
from runtime.records.logs import RunLogWriter, TripLog, log_paths
from runtime.records.runinfo import RULE_SIGNAL_UNITS, end_record, link_identity, run_name

Array = NDArray[np.float64]

if TYPE_CHECKING:  # the simulated rig is imported where it is built
    from sim_rigs.link import SimLink


# ------------------------------------------------------------------ the law adapter
class LawAdapter:
    """The adaptive law behind four calls, so the implementation can be swapped.

    ``impl = "fast"`` (the default, ``loop.law``) uses the compiled
    `runtime.kernels.fast.FastLaw` with the config's weight modifiers
    (`runtime.kernels.fast.ModifierSettings.from_config`), compiled (or loaded from
    the cache) here, before the clock starts; ``"reference"`` uses the numpy
    `runtime.method.law.AdaptiveLaw` with the same modifiers (`runtime.method.law.law_from_config`).
    Both see the saturated applied input only through their own clipping (u is
    clipped to the input limits before it is applied and fed back through u_n).
    `step` takes the bound eps_k of this tick (the time-varying bound).

    The fast law's results are views of a buffer it reuses every tick: callers
    copy what they keep.
    """

    def __init__(self, design: Design, impl: str = "fast", cfg: Config | None = None) -> None:
        self.impl = impl
        self.n, self.m = design.rig.n, design.rig.m
        if impl == "fast":
            from runtime.kernels.fast import FastLaw, ModifierSettings

            try:
                mods = (ModifierSettings.from_config(cfg, design) if cfg is not None
                        else None)
                self._fast: Any = FastLaw(design, mods)
            except ValueError as exc:
                raise ConfigError("loop.law", f"the compiled law cannot run this config: {exc}",
                                  'set loop.law = "reference" (the numpy law).') from None
            self._law: Any = None
            # Compile (or load) the kernels now, not on the first engaged tick.
            self._fast.init_state(np.zeros(self.n))
            self._fast.step(np.zeros(self.n), np.zeros(design.K2.shape[1]))
            self._fast.init_state(np.zeros(self.n))
        else:
            from runtime.method.law import AdaptiveLaw, law_from_config

            self._law = law_from_config(cfg, design) if cfg is not None else AdaptiveLaw(design)
            self._fast = None
        self._state: Any = None
        self.out: Any = None

    def engage(self, x: Array) -> None:
        """x_r = x, weights zero, adaptation on."""
        if self._fast is not None:
            self._fast.init_state(x)
        else:
            self._state = self._law.init_state(x)
        self.frozen = False

    @property
    def frozen(self) -> bool:
        """Adaptation held (a fallback is active)."""
        return bool((self._fast or self._law).frozen)

    @frozen.setter
    def frozen(self, value: bool) -> None:
        (self._fast or self._law).frozen = bool(value)

    @property
    def xr(self) -> Array:
        """Reference state (live)."""
        return self._fast.xr if self._fast is not None else self._state.xr

    @property
    def W(self) -> Array:
        """Weights (live)."""
        return self._fast.W if self._fast is not None else self._state.W

    def step(self, x: Array, c: Array, eps: float | None = None) -> Any:
        """One adaptive tick under bound eps (None: the design's constant eps).

        The result has u, u_raw, e, s, ratio, phi_d, eff_rate, step_gain, clamped.
        """
        if self._fast is not None:
            self.out = self._fast.step(x, c, eps)
        else:
            self.out = self._law.step(self._state, x, c, eps)
        return self.out


# ------------------------------------------------------------------ links
def command_timeout(cfg: Config) -> float:
    """The device's command timeout (s): ``link.command_timeout``, default 0.05.

    ``rig.command_timeout_s`` (the older name) is still accepted; giving both
    with different values is refused.
    """
    if cfg.has("link.command_timeout") and cfg.has("rig.command_timeout_s"):
        a = cfg.number("link.command_timeout")
        b = cfg.number("rig.command_timeout_s")
        if a != b:
            raise ConfigError("link.command_timeout",
                              f"is {a:g} s but its old name rig.command_timeout_s says {b:g} s.",
                              "keep link.command_timeout only.")
        return a
    if cfg.has("rig.command_timeout_s"):
        return cfg.number("rig.command_timeout_s")
    return cfg.number("link.command_timeout")


def make_link(cfg: Config, spec: str | None, design: Design | None = None,
              faults: Any = None) -> Link:
    """The link a config (``rig.link``) or ``--link SPEC`` names.

    ``sim``: the simulated rig in-process (`sim_rigs.link.SimLink`), stepped
    by the loop. Other transports are added here.
    """
    kind = (spec or str(cfg.get("rig.link"))).split(":", 1)[0]
    if kind == "sim":
        from runtime.offline.dryrun import plant_from_config
        from sim_rigs.link import SimLink

        design = design or design_from_config(cfg)
        plant = plant_from_config(cfg, design)
        return SimLink(plant, design.Ts, faults, rig_id=design.rig.name,
                       states=design.rig.states, units=design.rig.state_units,
                       inputs=design.rig.inputs,
                       seed=int(cfg.number("plant.seed")),
                       command_timeout_s=command_timeout(cfg))
    full = spec or str(cfg.get("rig.link"))
    if kind == "serial":  # serial:PATH[@BAUD] (drivers.serial_link)
        from drivers.serial_link import SerialLink

        try:
            return SerialLink.from_url(full)
        except ValueError as exc:
            raise ConfigError("rig.link", str(exc), "write serial:PATH[@BAUD].") from None
    if kind in ("mqtt", "mqtts"):  # mqtt://HOST:PORT/RIG, TLS and login from [link.mqtt]
        from drivers.mqtt_link import MqttConfigError, MqttLink

        try:
            return MqttLink.from_url(full, cfg.get("link.mqtt") or {})
        except MqttConfigError as exc:
            raise ConfigError(exc.field, exc.problem, exc.fix) from None
        except ValueError as exc:
            raise ConfigError("rig.link", str(exc), "write mqtt://HOST:PORT/RIG.") from None
    raise ConfigError("rig.link", f"link {kind!r} is not available in this build.",
                      "use sim, serial:PATH[@BAUD] or mqtt://HOST:PORT/RIG.")


def is_simulated(link: Link) -> bool:
    """True for the in-process simulated rig."""
    from sim_rigs.link import SimLink

    return isinstance(link, SimLink)


# ------------------------------------------------------------------ run settings
@dataclass
class RunSettings:
    """Everything a run needs besides the config (command-line choices)."""

    duration: float | None = None
    auto_arm: bool = False
    faults: list[str] = field(default_factory=list)
    link: str | None = None
    echo_trips: bool = True
    """Print one line on stderr when a trip is on disk."""
    telemetry_mqtt: str | None = None
    """``HOST:PORT`` of a broker for telemetry (``--telemetry-mqtt``; else ``telemetry.mqtt``)."""
    preflight: bool = True
    """Run `runtime.offline.preflight.run_preflight` before accepting an arm on a non-simulated
    link (``--no-preflight`` turns it off)."""
    hostcheck: dict[str, Any] | None = None
    """The host check's result (`runtime.realtime.hostcheck.pre_arm_check`) when one ran before the
    run: it goes into the log headers, the telemetry hello and the summary."""
    console: Any = None
    """Where progress and trip lines go (a text file while a dashboard owns the terminal);
    None = stderr."""


def mqtt_telemetry_settings(cfg: Config, link_spec: str | None, telemetry_mqtt: str | None,
                            rig: str) -> Any:
    """The broker settings telemetry is published with, or None (no MQTT telemetry).

    An MQTT link (``mqtt://HOST:PORT/RIG``) publishes on its own broker under its
    rig name; otherwise ``--telemetry-mqtt HOST:PORT`` or ``telemetry.mqtt``
    names a broker, and the config's rig name is used. Login, TLS, prefix and
    ``remote_requests`` come from ``[link.mqtt]``.
    """
    from dataclasses import replace

    from drivers.mqtt_link import MqttConfigError, MqttSettings, parse_host_port, parse_mqtt_url

    table = cfg.get("link.mqtt") or {}
    spec = link_spec or str(cfg.get("rig.link"))
    try:
        if spec.startswith(("mqtt://", "mqtts://")):
            try:
                host, port, url_rig = parse_mqtt_url(spec)
            except ValueError as exc:
                raise ConfigError("rig.link", str(exc), "write mqtt://HOST:PORT/RIG.") from None
            out = MqttSettings.from_table(table, host=host, port=port, rig=url_rig)
            return replace(out, tls=True) if spec.startswith("mqtts://") else out
        where = "--telemetry-mqtt" if telemetry_mqtt else "telemetry.mqtt"
        text = telemetry_mqtt or cfg.get("telemetry.mqtt")
        if not text:
            return None
        try:
            host, port = parse_host_port(str(text))
        except ValueError as exc:
            raise ConfigError(where, str(exc), "write HOST:PORT, e.g. 127.0.0.1:1883.") \
                from None
        return MqttSettings.from_table(table, host=host, port=port, rig=rig)
    except MqttConfigError as exc:
        raise ConfigError(exc.field, exc.problem, exc.fix) from None


def _capture_layout(design: Design, p: int,
                    rules: Any = ()) -> tuple[list[str], list[int], list[str]]:
    rig = design.rig
    su = ",".join(rig.state_units)
    iu = ",".join(rig.input_units)
    out_units = ",".join(rig.state_units[i] for i in np.argmax(rig.C != 0, axis=1))
    fields = [("t", 1, "s"), ("tick", 1, "1"), ("mode", 1, "code"), ("latched", 1, "1"),
              ("c", p, out_units), ("x", rig.n, su), ("xr", rig.n, su), ("e", rig.n, su),
              ("s", 1, "1"), ("eps", 1, "1"), ("ratio", 1, "1"), ("phi_d", 1, "1"),
              ("eff_rate", 1, "1"),
              ("step_gain", 1, "1"), ("u_cmd", rig.m, iu), ("u", rig.m, iu),
              ("w_norm", 1, "1"), ("sample_age_ms", 1, "ms"), ("lateness_us", 1, "us"),
              ("outputs_on", 1, "1")]
    # What each watchdog rule judged this tick (`Rule.last_value`), one field per rule.
    fields += [(f"sig_{r.id}", 1, RULE_SIGNAL_UNITS.get(r.id, "1")) for r in rules]
    return [f[0] for f in fields], [f[1] for f in fields], [f[2] for f in fields]


# ------------------------------------------------------------------ the tick
class TickCore:
    """The per-tick logic and its records (runs in the clock thread or an asyncio task)."""

    def __init__(self, cfg: Config, design: Design, link: Link, settings: RunSettings,
                 log_dir: Path, simulated: bool, faults: Any = None) -> None:
        self.cfg = cfg
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
        self.law = LawAdapter(d, str(cfg.choice("loop.law")),
                              cfg)
        # The bound eps(t), t = seconds since the law engaged (constant design.eps when
        # [adaptation.bound] is absent). The law, the margin rules (the ratio is
        # ||e||_P / eps_k), telemetry, trip snapshots and the run log all use eps_k.
        self.bound = schedule_from_bound(cfg, d)
        self.bound_varies = self.bound.kind != "constant"
        self.eps0 = float(self.bound.eps(0.0))
        self.eps_now = self.eps0
        channels = len(link.hello.channels) if link.hello is not None else rig.n
        jump = cfg.vector("watchdog.jump_limit", rig.n, (0.5 * d.limits).tolist(),
                          positive=True)
        self.est = Estimator(rig.A, Ts, jump, channels=channels,
                             cutoff_hz=cfg.number("estimator.cutoff_hz"))
        self.watchdog = Watchdog.from_config(cfg, Ts, d.clamp_margin)
        self.sup = Supervisor(
            settle_time=cfg.number("supervisor.settle_time"),
            settle_rate_tol=cfg.number("supervisor.settle_rate_tol"),
            rate_states=tuple(j for _, j in rate_pairs(rig.A)),
            disarm_action=cfg.choice("supervisor.disarm_action"),
            stop_action=cfg.choice("supervisor.stop_action"),
        )
        self.fb_settings = settings_from_config(cfg, self.p)
        self.engage_slew = cfg.number("supervisor.engage_slew")
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
        pre_s = cfg.number("log.pre_capture_s")
        post_s = cfg.number("log.post_capture_s")
        self.pre_n = max(1, int(round(pre_s / Ts)))
        self.post_n = int(round(post_s / Ts))
        self.ring = np.zeros((self.pre_n, self.row_len))
        self.post_buf = np.zeros((max(1, self.post_n), self.row_len))
        self.post_count = 0
        self.post_trip: int | None = None
        self.post_later: list[dict[str, Any]] = []
        self.row = np.zeros(self.row_len)
        self.config_hash = cfg.hash()
        self.link_info = link_identity(settings.link or str(cfg.get("rig.link")))
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
        self.events_per_s = cfg.number("log.events_per_s")
        """Most operator events written to the trip log per second (the rest counted)."""
        self._ev_window_t = -math.inf
        self._ev_count = 0
        self._ev_suppressed = 0
        self.events_suppressed = 0
        self.durable_trip_id = 0
        """Highest trip id whose record is on disk (fsynced): nothing announces a later one."""
        self.internal: BaseException | None = None
        """The exception that ended the run through the `internal` trip (None: none)."""

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
                "link": self.link_info, "run_name": self.run_name}

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
            "link": link, "trip": self.current_trip if self.sup.latched else None,
            "trips": list(self.trips[-20:]),
        }


def link_stats_now(stats: Any, recent: int = 1000) -> dict[str, Any]:
    """A link's `LinkStats.as_dict()` made cheap enough for the tick.

    The counters as they are, and ``latency_p50_us``/``latency_p99_us`` over the last
    `recent` measured latencies. ``as_dict`` itself converts up to 100 000 latencies and
    partitions them: 0.7 ms at 20 000, 4 ms at 100 000 on the development VM, which at
    25 Hz of telemetry inside a 1 kHz rig-clocked tick stalled it past the stale rule.
    """
    if not dataclasses.is_dataclass(stats):
        return dict(stats.as_dict())
    out: dict[str, Any] = {}
    for f in dataclasses.fields(stats):
        if f.name == "latencies_us":
            continue
        v = getattr(stats, f.name)
        if isinstance(v, (int, float, bool, str)) or v is None:
            out[f.name] = v
    out.pop("last_sample_host_s", None)
    lat = getattr(stats, "latencies_us", None) or []
    tail = np.asarray(lat[-recent:], dtype=float)
    if tail.size:
        p50, p99 = np.percentile(tail, [50, 99])
        out["latency_p50_us"], out["latency_p99_us"] = float(p50), float(p99)
    else:
        out["latency_p50_us"] = out["latency_p99_us"] = None
    return out


def _guarded_tick(core: TickCore, link: Any, t_nom: float) -> Command:
    """The simulated rig's sample for rig time t_nom and the tick on it; an exception
    reading the rig is the `internal` trip too (the same last line of defence)."""
    try:
        sample = link.sample_now(t_nom)
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        return core.internal_trip(exc, None)
    return core.step(sample, t_nom)


EXIT_INTERNAL_TRIP = 71
"""``corral run`` exit status when the run ended through the `internal` trip (an exception
inside the tick: outputs off, the record in the trip log). 70 stays an uncaught crash."""


def loss_detail(reason: str) -> str:
    """A short first-out detail for a link loss, from the link's `LinkClosed` reason.

    >>> loss_detail("rig 'x' went offline (connection lost)")
    'device offline'
    """
    r = reason.lower()
    if "offline" in r:
        return "device offline"
    if "session" in r:
        return "session taken"
    if "mqtt" in r or "broker" in r:
        return "broker gone"
    if "serial" in r or "pty" in r or "/dev/" in r:
        return "pty closed"
    return "link closed"


def _link_sessions(link: Link) -> int:
    """Reconnects plus stream resynchronisations so far (each starts a new device clock)."""
    st = link.stats
    return int(getattr(st, "reconnects", 0)) + int(getattr(st, "resyncs", 0))


def _finite(v: float) -> float | None:
    return v if math.isfinite(v) else None


def _preflight_job(cfg: Config, plants: int) -> dict[str, Any]:
    """`run_preflight` in a child process (picklable entry point)."""
    from runtime.offline.preflight import run_preflight

    return run_preflight(cfg, plants=plants, write=True)


# ------------------------------------------------------------------ start-up checks
_UNIX_PATH_MAX = 107
"""Longest Unix socket path in bytes (Linux ``sun_path`` is 108 with the NUL)."""


def log_dir_from_config(cfg: Config) -> Path:
    """``log.dir`` as a folder path, or a one-line error (a NUL byte, not text)."""
    raw = cfg.get("log.dir")
    if not isinstance(raw, str) or not raw:
        raise ConfigError("log.dir", f"must be a folder path, not {raw!r}.",
                          "write e.g. log.dir = \"runs\".")
    if "\0" in raw:
        raise ConfigError("log.dir", "contains a NUL byte, which no file name can hold.",
                          "write a plain folder path, e.g. log.dir = \"runs\".")
    return Path(raw)


def operator_settings(cfg: Config) -> dict[str, Any]:
    """Who may use the operator socket and how fast, from ``[operator]``.

    ``socket_group`` (a group name or gid; mode 0660 for it, else 0600),
    ``allowed_uids`` (peer uids accepted; default this process's uid and root),
    ``request_rate_hz`` (default 20) and ``request_burst`` (default 20).
    """
    import grp

    gid = None
    group = cfg.get("operator.socket_group")
    if group is not None:
        try:
            gid = (int(group) if isinstance(group, int) and not isinstance(group, bool)
                   else grp.getgrnam(str(group)).gr_gid)
        except KeyError:
            raise ConfigError("operator.socket_group", f"no group called {group!r}.",
                              "name a group of this machine (see /etc/group) or leave it "
                              "out for a socket only you can use.") from None
    uids = cfg.get("operator.allowed_uids")
    if uids is not None:
        if not (isinstance(uids, list) and all(isinstance(u, int) and not isinstance(u, bool)
                                               and u >= 0 for u in uids)):
            raise ConfigError("operator.allowed_uids", f"must be a list of uids, not {uids!r}.",
                              "write e.g. operator.allowed_uids = [1000, 0].")
    return {"socket_gid": gid, "allowed_uids": uids,
            "request_rate_hz": cfg.number("operator.request_rate_hz"),
            "request_burst": cfg.number("operator.request_burst")}


class RigBusy(ConfigError):
    """Another runtime already owns this rig (its lock file is held)."""


class RigLock:
    """One owner per rig: an exclusive ``flock`` on ``<log.dir>/<rig>.lock`` holding the pid.

    Taken when the runner is built, before any file or socket of the run exists;
    released by `release` (the end of the run) or by the kernel when the process dies,
    so a killed runtime never leaves a stale lock. A second runtime with the same rig
    name and log folder gets `RigBusy` naming the owner's pid and the lock file.
    """

    def __init__(self, path: Path) -> None:
        import fcntl

        self.path = Path(path)
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        except OSError as exc:
            raise ConfigError("log.dir", f"cannot create the rig lock {self.path} "
                              f"({exc.strerror}).", "name a folder you can write.") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            try:
                owner = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "?"
            finally:
                os.close(fd)
            raise RigBusy("rig.name", f"rig {self.path.stem!r} is already run by pid {owner} "
                          f"(lock {self.path}); this runtime did not start.",
                          "stop that runtime first, or give this one another rig.name or "
                          "log.dir.") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        self.fd: int | None = fd

    def release(self) -> None:
        """Give the rig up (idempotent). The lock file stays; only the lock goes."""
        fd, self.fd = self.fd, None
        if fd is not None:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
            os.close(fd)

    def __del__(self) -> None:
        with contextlib.suppress(Exception):
            self.release()


# ------------------------------------------------------------------ the runner
class Runner:
    """Builds a run from a config and drives it: tasks, clock, shutdown."""

    def __init__(self, cfg: Config, settings: RunSettings) -> None:
        from sim_rigs.faults import FaultError, FaultSchedule

        self.cfg = cfg
        self.settings = settings
        self.design = design_from_config(cfg)
        if not self.design.feasible:
            raise ConfigError("design", "the design is refused: " + "; ".join(
                self.design.reasons), "run `corral design CONFIG` and fix what it names.")
        try:
            self.faults = FaultSchedule.from_config(cfg, settings.faults)
            # The link resolves each fault's axis against its channels: a bad axis fails here.
            self.link = make_link(cfg, settings.link, self.design, self.faults)
        except FaultError as exc:
            raise ConfigError("faults", str(exc), "see docs/operating.md for fault syntax.") \
                from None
        self.simulated = is_simulated(self.link)
        if self.faults.faults and not self.simulated:
            raise ConfigError("faults", "fault injection needs the simulated rig.",
                              "drop --fault and [[faults]] for a real rig.")
        if settings.preflight and not self.simulated and settings.hostcheck is None:
            # Before the logs open, so the result goes into their headers.
            settings.hostcheck = pre_arm_check(cfg, settings.console or sys.stderr,
                                               settings.link)
        self.log_dir = log_dir_from_config(cfg)
        try:
            self.log_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ConfigError("log.dir", f"cannot create the log folder {self.log_dir} "
                              f"({exc.strerror})", "name a folder you can write, e.g. "
                              "--set log.dir=runs") from None
        # One owner per rig: before any file of this run exists, so a refused second
        # runtime leaves nothing behind and never touches the first one's socket.
        self.lock = RigLock(self.log_dir / f"{self.design.rig.name}.lock")
        try:
            self.core = TickCore(cfg, self.design, self.link, settings, self.log_dir,
                                 self.simulated, self.faults)
            # The socket is named after the run: rig and link kind
            # (runtime.records.runinfo.run_name).
            self.socket_path = self.log_dir / f"{self.core.run_name}.sock"
            if len(os.fsencode(self.socket_path)) > _UNIX_PATH_MAX:
                raise ConfigError("log.dir", f"the operator socket path {self.socket_path} is "
                                  f"longer than the {_UNIX_PATH_MAX} bytes a Unix socket "
                                  "allows", "name a shorter folder (or a shorter rig.name).")
        except BaseException:
            self.lock.release()
            raise
        rate = cfg.number("telemetry.rate_hz")
        self.telemetry = TelemetryServer(self.socket_path, self.core.hello(), self.core.submit,
                                         rate_hz=rate,
                                         client_buffer=int(cfg.number(
                                             "telemetry.client_buffer")),
                                         **operator_settings(cfg))
        self.core.telemetry = self.telemetry
        self.mqtt_settings = mqtt_telemetry_settings(cfg, settings.link, settings.telemetry_mqtt,
                                                     self.design.rig.name)
        self.mqtt: MqttBridge | None = None
        if self.mqtt_settings is not None:
            self.mqtt = MqttBridge(self.mqtt_settings, self.core.hello(), self.core.submit,
                                   rate_hz=cfg.number("telemetry.mqtt_rate_hz"),
                                   notify=lambda line: print(line, file=self.core.console(),
                                                             flush=True))
            self.telemetry.listeners.append(self.mqtt.on_record)
        self.core.tel_every = max(1, int(round(1.0 / (self.telemetry.rate_hz * self.design.Ts))))
        self.clock = DeadlineClock(self.design.Ts,
                                   spin_us=cfg.number("loop.spin_us"),
                                   realtime=cfg.flag("loop.realtime"))
        self.core.loop_stats = self.clock.stats
        self.miss_after = cfg.number("loop.miss_after_periods")
        """Rig-clocked: a sample handled later than this many periods after its expected
        arrival is a deadline miss (`runtime.realtime.clock.ArrivalTracker`)."""
        # The tick thread must get the GIL back quickly from the writer and socket
        # threads; the default 5 ms switch interval would make every wake-up wait.
        self.switch_interval = cfg.number("loop.switch_interval_us") * 1e-6
        self.stop_event: asyncio.Event | None = None
        self.preflight: dict[str, Any] | None = None
        """The preflight verdict (go, predicted_trip_rate, reasons, record), when one ran."""
        self.error: BaseException | None = None
        self.ready = threading.Event()
        self.link_losses: list[dict[str, Any]] = []
        """Each loss of the link: t, tick, detail (``pty closed``, ``broker gone``, ...)."""
        self.last_reconnect_error = ""
        self._sessions = 0
        self.stop_how = "stopped_by_operator"

    def request_stop(self, how: str = "stopped_by_operator") -> None:
        """End the run (thread-safe); `how` goes into the end record
        (``interrupted`` for a signal)."""
        self.stop_how = how
        ev = self.stop_event
        if ev is not None and self._loop is not None:
            with contextlib.suppress(RuntimeError):
                self._loop.call_soon_threadsafe(ev.set)

    async def run(self) -> dict[str, Any]:
        """Run until the duration ends or `request_stop`; returns the summary."""
        self._loop = asyncio.get_running_loop()
        self.stop_event = asyncio.Event()
        if self.settings.preflight and not self.simulated:
            # Before the link opens: the sweep gets both cores, and no arm can arrive
            # before the verdict (the socket does not exist yet).
            await asyncio.to_thread(self.run_preflight)
        old_switch = sys.getswitchinterval()
        sys.setswitchinterval(self.switch_interval)
        # Everything built so far (numpy, numba, scipy, the design) moves to the permanent
        # generation: a full collection then scans only what the run allocates. Measured
        # rig-clocked over a pty: without this a full collection stalled the loop ~15 ms.
        gc.collect()
        gc.freeze()
        failure: BaseException | None = None
        try:
            async with self.link:
                async with asyncio.TaskGroup() as tg:
                    tel = tg.create_task(self.telemetry.serve(), name="telemetry")
                    mqtt = (tg.create_task(self.mqtt.run(), name="mqtt-telemetry")
                            if self.mqtt is not None else None)
                    if self.settings.auto_arm:
                        self.core.submit("arm", lambda ok, msg: None)
                    await asyncio.sleep(0)
                    self.ready.set()
                    try:
                        if self.simulated:
                            await self._host_clocked()
                        else:
                            await self._rig_clocked()
                    finally:
                        tel.cancel()
                        if mqtt is not None:
                            mqtt.cancel()
        except BaseException as exc:
            failure = exc
            raise
        finally:
            sys.setswitchinterval(old_switch)
            gc.unfreeze()
            self.core.close(*self._how_ended(failure))
            self.lock.release()
        if self.error is not None:
            raise self.error
        return self.summary()

    def _how_ended(self, failure: BaseException | None) -> tuple[str, str]:
        """How the run ended (`runtime.records.runinfo.END_HOW`) and a detail line."""
        from drivers.base import LinkClosed

        err = failure or self.error
        if self.core.internal is not None:
            exc = self.core.internal
            return "internal_error", f"{type(exc).__name__}: {exc}"
        down = bool(self.link_losses) and not self.core.link_up
        if isinstance(err, LinkClosed) or (err is None and down):
            detail = self.link_losses[-1]["detail"] if self.link_losses else ""
            return "link_lost", str(err or detail or "the rig closed the link")
        if isinstance(err, (KeyboardInterrupt, asyncio.CancelledError)):
            return "interrupted", type(err).__name__
        if err is not None:
            return "internal_error", f"{type(err).__name__}: {err}"
        if self.stop_event is not None and self.stop_event.is_set():
            return self.stop_how, ""
        return "completed", ""

    def run_preflight(self) -> dict[str, Any]:
        """Preflight (`runtime.offline.preflight.run_preflight`, ``preflight.run_plants`` plants);
        a NO-GO makes every arm request refused with its reasons. The verdict goes into
        the trip log as a ``preflight`` event (with the whole verdict under ``preflight``)
        and into the run summary."""
        core = self.core
        plants = int(self.cfg.number("preflight.run_plants"))
        out = core.console()
        print(f"corral: preflight: sweeping {plants} simulated plants before arming "
              "(--no-preflight skips this)", file=out, flush=True)
        # In a child process: the sweep's compiled kernels, worker threads and large arrays
        # stay out of the loop's process (run in-process, the rig-clocked loop that followed
        # stalled for milliseconds and tripped stale in about a third of the runs tried).
        import concurrent.futures
        import multiprocessing

        try:
            ctx = multiprocessing.get_context("spawn")
            with concurrent.futures.ProcessPoolExecutor(1, mp_context=ctx) as pool:
                res = pool.submit(_preflight_job, self.cfg, plants).result()
        except Exception as exc:  # noqa: BLE001 - no verdict means no arming
            res = {"go": False, "predicted_trip_rate": None, "record": None,
                   "reasons": [f"preflight could not run: {exc}"]}
        verdict = {key: res.get(key) for key in ("go", "predicted_trip_rate", "max_trip_rate",
                                                 "reasons", "record", "plants")}
        self.preflight = verdict
        reasons = " ".join(str(r) for r in verdict["reasons"] or [])
        if verdict["go"]:
            core.arm_refusal = None
            detail = f"GO: {reasons}"
        else:
            core.arm_refusal = (f"preflight NO-GO: {reasons} (record {verdict['record']}; "
                                "fix the config, or run with --no-preflight at your own risk)")
            detail = f"NO-GO: {reasons}"
        core._event("preflight", detail, preflight=verdict)
        # Clients connecting later see the verdict in the hello.
        self.telemetry.hello["preflight"] = verdict
        if self.mqtt is not None:
            self.mqtt.hello["preflight"] = verdict
        print(f"corral: preflight {detail}", file=out, flush=True)
        return verdict

    async def run_ticks(self, ticks: int) -> dict[str, Any]:
        """The same ticks as fast as the machine allows (no clock; simulated rig only).

        For tests and rehearsal: every decision, record and trip is the real one;
        only the pacing is missing (lateness is recorded as zero).
        """
        if not self.simulated:
            raise ConfigError("rig.link", "unpaced runs need the simulated rig.",
                              "use --link sim.")
        core, link = self.core, self._sim_link()
        await link.open()
        if self.settings.auto_arm:
            core.submit("arm", lambda ok, msg: None)
        try:
            for _ in range(ticks):
                t_nom = core.tick * core.Ts
                cmd = _guarded_tick(core, link, t_nom)
                t_sent = time.monotonic()
                link.apply(cmd)
                core.after_send(t_sent)
                if core.internal is not None:
                    break
        finally:
            await link.close()
            core.close()
            self.lock.release()
        return self.summary()

    def _sim_link(self) -> SimLink:
        """The link as the in-process simulated rig (the host-clocked paths step it)."""
        from sim_rigs.link import SimLink

        link = self.link
        if not isinstance(link, SimLink):
            raise ConfigError("rig.link", "host-clocked runs need the simulated rig.",
                              "use --link sim.")
        return link

    async def _host_clocked(self) -> None:
        core, link, clock = self.core, self._sim_link(), self.clock
        assert self.stop_event is not None
        end_tick = (int(round(self.settings.duration / core.Ts))
                    if self.settings.duration is not None else None)
        loop = asyncio.get_running_loop()
        finished = asyncio.Event()
        mono = time.monotonic

        base: list[float] = []

        def tick(k: int, deadline: float) -> None:
            core.lateness = mono() - deadline
            if not base:
                base.append(deadline)
            # Rig time of this tick on the host clock: skipped deadlines are counted by
            # the overrun rule, they do not age the simulated rig's samples.
            t_nom = base[0] + core.tick * core.Ts
            cmd = _guarded_tick(core, link, t_nom)
            t_sent = mono()
            link.apply(cmd)
            core.after_send(t_sent)
            if (end_tick is not None and core.tick >= end_tick) or core.internal is not None:
                clock.stop()

        def on_exit() -> None:
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(finished.set)

        clock.start(tick, on_exit)
        # The event-loop thread (operator socket, telemetry) and the writer threads share
        # the GIL with the tick thread: at normal priority another process can preempt
        # one of them while it holds the GIL and the tick waits (measured: a flood of
        # operator requests cost hundreds of deadline misses). At the lowest real-time
        # priority, below the tick, they finish their burst and hand the GIL back.
        helpers: list[int] = []
        policy = thread_policy()
        for _ in range(500 if clock.realtime else 0):  # the clock thread asks for it first
            if clock.granted:
                break
            await asyncio.sleep(0.001)
        if "SCHED_FIFO" in clock.granted:
            helpers = raise_helper_threads(1)
            try_realtime(1)
        stop_wait = asyncio.ensure_future(self.stop_event.wait())
        done_wait = asyncio.ensure_future(finished.wait())
        try:
            await asyncio.wait({stop_wait, done_wait}, return_when=asyncio.FIRST_COMPLETED)
        finally:
            stop_wait.cancel()
            done_wait.cancel()
            clock.stop()
            restore_threads(helpers)
            set_thread_policy(policy)
            await asyncio.to_thread(clock.join, 5.0)
            # Outputs off before anything else happens.
            with contextlib.suppress(Exception):
                link.apply(Command(core.seq + 1, (0.0,) * core.m, 0))
        if clock.error is not None:
            self.error = clock.error

    async def _rig_clocked(self) -> None:
        core, link = self.core, self.link
        assert self.stop_event is not None
        stats = self.clock.stats
        arrivals = ArrivalTracker(core.Ts, self.miss_after)
        # No sample for two periods: tick anyway (with none) so the stale and link rules
        # see the silence.
        timeout = core.Ts * 2
        mono = time.monotonic
        end = (mono() + self.settings.duration
               if self.settings.duration is not None else math.inf)
        # The tick runs in this (event-loop) thread here: it gets the clock thread's
        # real-time priority for the run (measured: at normal priority, other processes
        # on the 2-core VM held it off the CPU for 4-20 ms about once a second).
        helpers: list[int] = []
        policy = thread_policy()
        if self.clock.realtime:
            self.clock.granted = "event-loop thread: " + try_realtime(self.clock.priority)
            if "SCHED_FIFO" in self.clock.granted:
                # Lowest real-time priority: above every normal process, below the tick
                # and below a served device (40) sharing the machine.
                helpers = raise_helper_threads(1)
        reconnecting: asyncio.Task[None] | None = None
        try:
            while not self.stop_event.is_set() and mono() < end:
                sample: Sample | None = None
                if core.link_up:
                    # asyncio.timeout, not wait_for: no task per sample (wait_for wraps
                    # the receive in a new task, one more loop turn each).
                    try:
                        async with asyncio.timeout(timeout):
                            sample = await link.receive()
                    except TimeoutError:
                        sample = None
                    except LinkClosed as exc:
                        # Every way a link can end is a trip: this tick sees it gone.
                        self._link_lost(str(exc))
                else:
                    # Link down: tick on the host's time (the latch, the operator's
                    # requests and telemetry go on) while the link comes back by itself.
                    if reconnecting is None or reconnecting.done():
                        reconnecting = asyncio.ensure_future(self._reconnect())
                    await asyncio.wait({reconnecting}, timeout=core.Ts)
                    if reconnecting.done() and core.link_up:
                        reconnecting = None
                now = mono()
                if sample is not None:
                    core.lateness, missed = arrivals.handle(
                        sample.seq, sample.t_device, sample.t_host or now, now)
                    stats.add(core.lateness)
                    stats.misses += missed
                self._drain_link_events()
                sessions = _link_sessions(link)
                if sessions != self._sessions:
                    # The link resynchronised its stream (a device restart without a
                    # hello): the device clock and numbering start over.
                    self._sessions = sessions
                    core.est.restart_link()
                cmd = core.step(sample, now)
                t_sent = mono()
                if core.link_up:
                    try:
                        await link.send(cmd)
                    except LinkClosed as exc:
                        self._link_lost(str(exc))
                core.after_send(t_sent)
                if core.internal is not None:
                    break
        finally:
            if reconnecting is not None and not reconnecting.done():
                reconnecting.cancel()
                with contextlib.suppress(BaseException):
                    await asyncio.wait({reconnecting}, timeout=5.0)
            with contextlib.suppress(Exception):
                await link.send(Command(core.seq + 1, (0.0,) * core.m, 0))
            restore_threads(helpers)
            set_thread_policy(policy)

    def _link_lost(self, reason: str) -> None:
        """The link is gone: the next tick trips `link_loss` (first-out detail: why)."""
        core = self.core
        if not core.link_up:
            return
        detail = loss_detail(reason)
        core.link_up = False
        core.link_detail = detail
        self.link_losses.append({"t": core.t, "tick": core.tick, "detail": detail,
                                 "reason": reason})
        core._event("link", f"link lost: {detail} ({reason})")

    async def _reconnect(self) -> None:
        """Bring the link back with backoff (the runtime stays latched: re-arm is the
        operator's). Returns when it is up again; cancelled at the end of the run."""
        link, core = self.link, self.core
        again = getattr(link, "reconnect", None)
        if again is None:
            await asyncio.sleep(3600.0)
            return
        while True:
            try:
                await again(timeout_s=5.0)
            except LinkClosed as exc:
                self.last_reconnect_error = str(exc)
                await asyncio.sleep(1.0)
                continue
            break
        core.est.restart_link()
        self._sessions = _link_sessions(link)
        core.link_up = True
        core.link_detail = ""
        core._event("link", f"link back after {len(self.link_losses)} loss(es); the trip "
                    "stays latched: clear, reset, then arm")

    def _drain_link_events(self) -> None:
        """Turn what the link noticed (a hello mid-run, a refused session) into events."""
        events = getattr(self.link, "events", None)
        while events:
            kind, detail = events.popleft()
            self.core._event(kind, detail)

    def summary(self) -> dict[str, Any]:
        """The run's figures (the `--json` object)."""
        core = self.core
        p50, p99, mx = self.clock.stats.percentiles_us()
        return {
            "ticks": core.tick, "deadline_misses": self.clock.stats.misses,
            "lateness_p50_us": _finite(p50), "lateness_p99_us": _finite(p99),
            "lateness_max_us": _finite(mx), "max_margin_ratio": core.max_ratio,
            "trips": list(core.trips), "trip_log": str(core.trip_path),
            "run_log": str(core.run_path), "socket": str(self.socket_path),
            "mode": core.sup.mode, "latched": core.sup.latched,
            "engagements": len(core.engagements), "clock": self.clock.granted,
            "run_log_dropped": core.run_log.dropped,
            "operator": {**self.telemetry.counters,
                         "events_suppressed": core.events_suppressed},
            "telemetry_clients_dropped": self.telemetry.dropped_clients,
            "simulated": self.simulated, "rig": self.design.rig.name,
            "config_hash": core.config_hash,
            "mqtt": self.mqtt.summary if self.mqtt is not None else None,
            "preflight": self.preflight, "hostcheck": self.settings.hostcheck,
            "internal_error": (f"{type(core.internal).__name__}: {core.internal}"
                               if core.internal is not None else None),
            "link_losses": list(self.link_losses),
            "link_up": core.link_up,
            "link_kind": core.link_info["kind"], "link_info": core.link_info,
            "run_name": core.run_name,
            "ended": getattr(core, "end", {}).get("how"),
        }
