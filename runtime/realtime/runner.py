"""The runner (`Runner`): builds a run from a config and drives it (tasks, clock, reconnect,
preflight and host check before arming, the rig lock, the summary)."""

from __future__ import annotations

import asyncio
import contextlib
import gc
import math
import os
import sys
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from drivers.base import Command, LinkClosed, Sample
from runtime.config import Config, ConfigError
from runtime.method.design import design_from_config
from runtime.realtime.clock import (
    ArrivalTracker,
    DeadlineClock,
    raise_helper_threads,
    restore_threads,
    set_thread_policy,
    thread_policy,
    try_realtime,
)
from runtime.realtime.hostcheck import pre_arm_check
from runtime.realtime.links import _link_sessions, is_simulated, loss_detail, make_link
from runtime.realtime.placement import Placement
from runtime.realtime.settings import (
    _UNIX_PATH_MAX,
    RunSettings,
    log_dir_from_config,
    mqtt_telemetry_settings,
    operator_settings,
)
from runtime.realtime.telemetry import MqttBridge, TelemetryServer
from runtime.realtime.tick import TickCore, _guarded_tick
from runtime.realtime.tick_records import _finite

if TYPE_CHECKING:  # the simulated rig is imported where it is built
    from sim_rigs.link import SimLink


EXIT_INTERNAL_TRIP = 71
"""``corral run`` exit status when the run ended through the `internal` trip (an exception
inside the tick: outputs off, the record in the trip log). 70 stays an uncaught crash."""
DRAIN_S = 10.0
"""At the end of a run, how long the socket waits for the writer thread to write and
announce what is still queued (a bound for a stuck disk, not a deadline)."""


def _preflight_job(cfg: Config, plants: int) -> dict[str, Any]:
    """`run_preflight` in a child process (picklable entry point)."""
    from runtime.offline.preflight import run_preflight

    return run_preflight(cfg, plants=plants, write=True)


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
        self.placement = Placement(cfg)  # loop.cpu checked before anything starts
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
        self.core.writer.telemetry = self.telemetry
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
        self.core.timing.stats = self.clock.stats
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
        self.core.event("host", self.placement.apply())  # CPU mask and memory lock
        failure: BaseException | None = None
        try:
            async with self.link:
                # The device's own status flags are known once its hello has come.
                flags = list(getattr(self.link.hello, "status_flags", ()) or ())
                self.telemetry.update_hello(status_flags=flags)
                if self.mqtt is not None:
                    self.mqtt.update_hello(status_flags=flags)
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
                        # A trip in the last moments of the run: its record is written and
                        # announced by the writer thread; let that finish while the socket
                        # still serves (seen under load: the socket closed first and a
                        # client waiting for the trip never heard of it).
                        await asyncio.to_thread(self.core.writer.drain, DRAIN_S)
                        await asyncio.sleep(0)  # deliver what the writer thread posted
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
            self.placement.undo()
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
        core.event("preflight", detail, preflight=verdict)
        # Clients connecting later see the verdict in the hello.
        self.telemetry.update_hello(preflight=verdict)
        if self.mqtt is not None:
            self.mqtt.update_hello(preflight=verdict)
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
            core.timing.lateness = mono() - deadline
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
                link.apply(Command(core.state.seq + 1, (0.0,) * core.m, 0))
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
                    core.timing.lateness, missed = arrivals.handle(
                        sample.seq, sample.t_device, sample.t_host or now, now)
                    stats.add(core.timing.lateness)
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
                await link.send(Command(core.state.seq + 1, (0.0,) * core.m, 0))
            restore_threads(helpers)
            set_thread_policy(policy)

    def _link_lost(self, reason: str) -> None:
        """The link is gone: the next tick trips `link_loss` (first-out detail: why)."""
        core = self.core
        if not core.link_up:
            return
        detail = loss_detail(reason)
        core.link_up = False
        core.state.link_detail = detail
        self.link_losses.append({"t": core.state.t, "tick": core.tick, "detail": detail,
                                 "reason": reason})
        core.event("link", f"link lost: {detail} ({reason})")

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
        core.state.link_detail = ""
        core.event("link", f"link back after {len(self.link_losses)} loss(es); the trip "
                    "stays latched: clear, reset, then arm")

    def _drain_link_events(self) -> None:
        """Turn what the link noticed (a hello mid-run, a refused session) into events."""
        events = getattr(self.link, "events", None)
        while events:
            kind, detail = events.popleft()
            self.core.event(kind, detail)

    def summary(self) -> dict[str, Any]:
        """The run's figures (the `--json` object)."""
        core = self.core
        p50, p99, mx = self.clock.stats.percentiles_us()
        return {
            "ticks": core.tick, "deadline_misses": self.clock.stats.misses,
            "lateness_p50_us": _finite(p50), "lateness_p99_us": _finite(p99),
            "lateness_max_us": _finite(mx), "max_margin_ratio": core.max_ratio,
            "trips": [s.to_wire(tag=False) for s in core.trips],
            "trip_log": str(core.trip_path),
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
            "host_setup": self.placement.record(),
            "internal_error": (f"{type(core.internal).__name__}: {core.internal}"
                               if core.internal is not None else None),
            "link_losses": list(self.link_losses),
            "link_up": core.link_up,
            "link_kind": core.link_info["kind"], "link_info": core.link_info,
            "run_name": core.run_name,
            "ended": core.end.how if core.end is not None else None,
        }
