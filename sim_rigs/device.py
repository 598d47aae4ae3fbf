"""A simulated rig served as a device: over a pseudo-terminal or through MQTT.

`RigDevice` runs one plant (a `sim_rigs.plant.RigPlant` of batch 1, any rig,
passed in: this package never imports the runtime) on its own real-time clock:
a thread that sleeps to absolute deadlines ``t0 + k * period``. Each period
it applies the held command (zero-order hold, through the device-side
`drivers.wire.CommandGuard`, so with no valid command for the hello's
``command_timeout_s`` the outputs go to zero and the sample carries
``STATUS_COMMAND_TIMEOUT``), steps the physics, reads the sensors and sends
one sample (angles and rates as ``y``). The fault schedule of
`sim_rigs.faults` acts on the plant and the readings; the link kinds act on
the frames through the same `sim_rigs.faults.FaultInjector.on_link` as the
in-process link (``corrupt`` flips bytes of the frame: over MQTT the message
header, since TCP never delivers flipped bits; ``drop``, ``duplicate``,
``burst``, ``insertion``, ``link_delay``; ``overrun`` stalls the device's
clock); ``disconnect`` closes the pseudo-terminal, or drops the MQTT
connection with the offline status published, until the fault ends.

Transports: `PtyTransport` (the device owns the master of a fresh
pseudo-terminal, behind a stable symlink so a host can reopen it after a
disconnect) and `MqttDeviceTransport` (device side of the rig topics, with a
last will marking it offline). What does not live here: the wire codec
(`drivers.wire`), the host links (`drivers.serial_link`, `drivers.mqtt_link`),
the command line (`runtime.cli.cmd_rig`).
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import ctypes
import dataclasses
import gc
import math
import os
import random
import sys
import threading
import time
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import aiomqtt
import numpy as np
from numpy.typing import NDArray
from paho.mqtt.subscribeoptions import SubscribeOptions

from drivers.base import STATUS_COMMAND_TIMEOUT, STATUS_OUTPUTS_OFF, Command, Hello, Sample
from drivers.mqtt_link import (
    HOST_HELLO_RIG_ID,
    LinkClosed,
    MqttSettings,
    Topics,
    connect_client,
    decode_body,
    disconnect_client,
    expiry,
    make_client,
    publish_now,
    quick_ack,
    status_payload,
)
from drivers.serial_link import DeviceEndpoint
from drivers.wire import (
    PROTOCOL_VERSION,
    STATUS_DEVICE_BASE_BIT,
    CommandGuard,
    Stop,
    WireError,
    encode_body,
    encode_message,
)
from sim_rigs.faults import LINK_KINDS, FaultInjector, FaultSchedule
from sim_rigs.kernel import CompiledPlant

_RING = 4096
ESTOP_FLAG = "estop"
"""The served rig's declared status flag: its (simulated) emergency-stop input."""
ESTOP_BIT = 1 << STATUS_DEVICE_BASE_BIT
REALTIME_PRIORITY = 40
"""SCHED_FIFO priority of the device's threads when permitted (a real rig has its own CPU)."""
SWITCH_INTERVAL_S = 100e-6
"""GIL switch interval while serving (the runtime's loop uses the same 100 us)."""


# --------------------------------------------------------------------------- transports


class Transport:
    """What the device clock needs from a transport (all called from the clock thread)."""

    guard: CommandGuard
    connected: bool = True

    def poll_until(self, deadline: float) -> None:
        """Handle input until monotonic time `deadline` (commands go into the guard)."""
        while (left := deadline - time.monotonic()) > 0:
            time.sleep(left)

    def send_sample(self, sample: Sample, corrupt: int) -> None:
        """Send one sample; `corrupt` > 0 flips that many bytes of its frame."""
        raise NotImplementedError

    def disconnect(self) -> None:
        """Drop the connection (a link fault)."""

    def reconnect(self) -> None:
        """Come back after `disconnect`."""

    def close(self) -> None:
        """Shut down for good."""

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """Outputs to apply at monotonic time `now` and the status bits (the guard's)."""
        raise NotImplementedError


def _flip(data: bytes, n: int, rng: random.Random, keep_last: bool) -> bytes:
    b = bytearray(data)
    top = len(b) - (1 if keep_last else 0)
    for _ in range(n):
        i = rng.randrange(top)
        b[i] ^= 1 << rng.randrange(8)
    return bytes(b)


class PtyTransport(Transport):
    """The device end of a pseudo-terminal (via `drivers.serial_link.DeviceEndpoint`)."""

    def __init__(self, hello: Hello, link_path: str, *, seed: int = 0,
                 on_command: Callable[[Command, float], None] | None = None) -> None:
        self.hello = hello
        self.link_path = link_path
        self.rng = random.Random(seed)
        self.on_command = on_command
        self.ep = DeviceEndpoint.create_pty(hello, link_path=link_path)
        self.guard = self.ep.guard
        self.path = self.ep.path
        self.connected = True
        self.write_drops = 0

    def poll_until(self, deadline: float) -> None:
        """Wait in select() for host frames until `deadline`."""
        ep = self.ep
        while (left := deadline - time.monotonic()) > 0:
            if not self.connected:
                time.sleep(left)
                return
            for m in ep.poll(left):
                if type(m) is Command and self.on_command is not None:
                    self.on_command(m, time.monotonic())

    def send_sample(self, sample: Sample, corrupt: int) -> None:
        """Write the frame (bytes flipped when corrupting; the delimiter kept)."""
        if not self.connected:
            return
        frame = encode_message(sample)
        if corrupt:
            frame = _flip(frame, corrupt, self.rng, keep_last=True)
        try:
            n = os.write(self.ep.fd, frame)
        except OSError:
            self.write_drops += 1  # no host has the other end open, or buffer full
            return
        if n != len(frame):
            self.write_drops += 1
        self.ep.stats.frames_out += 1

    def disconnect(self) -> None:
        """Close both ends of the pty: the host sees an unplug."""
        if self.connected:
            self.connected = False
            self.ep.close()

    def reconnect(self) -> None:
        """A fresh pty behind the same symlink; the guard starts over (outputs off)."""
        if not self.connected:
            old = self.ep
            self.ep = DeviceEndpoint.create_pty(self.hello, link_path=self.link_path)
            self.ep.seq = old.seq
            self.guard = self.ep.guard
            self.connected = True

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """Outputs and status from the endpoint's guard."""
        return self.ep.outputs()

    def close(self) -> None:
        """Close the pty and remove the symlink."""
        self.disconnect()
        with contextlib.suppress(OSError):
            if os.path.islink(self.link_path):
                os.unlink(self.link_path)


class MqttDeviceTransport(Transport):
    """Device side of the MQTT topics, run on its own asyncio loop in a helper thread.

    Publishes a retained hello and a retained ``online`` status (its last will
    says offline), samples (QoS 0, message expiry), answers a host hello with
    its hello (and re-arms the guard, as the serial device does), feeds
    commands and stops into the guard. Reconnects with backoff when the broker
    goes away.
    """

    def __init__(self, hello: Hello, settings: MqttSettings, *, seed: int = 0,
                 on_command: Callable[[Command, float], None] | None = None,
                 realtime: bool = False) -> None:
        self.hello = hello
        self.settings = settings
        self.realtime = realtime
        """SCHED_FIFO for the network thread when permitted (it carries samples, commands)."""
        self.topics = Topics(settings.prefix, settings.rig)
        self.rng = random.Random(seed)
        self.on_command = on_command
        self.guard = CommandGuard(hello.output_limits, hello.command_timeout_s)
        self.guard_lock = threading.Lock()
        self.connected = False
        self.wanted = True
        self.seq = 0
        self.publish_drops = 0
        self.decode_errors = 0
        self.last_error = ""
        self._inbox: collections.deque[tuple[float, object]] = collections.deque(maxlen=256)
        self._loop = asyncio.new_event_loop()
        self._client: aiomqtt.Client | None = None
        self._expiry = expiry(settings.sample_expiry_s)
        self._stop_evt: asyncio.Event | None = None
        self._kick: asyncio.Event | None = None
        self._up = threading.Event()
        self._thread = threading.Thread(target=self._run, name="mqtt-device", daemon=True)
        self._thread.start()

    def wait_connected(self, timeout_s: float) -> bool:
        """Block until the first connection is up (False on timeout)."""
        return self._up.wait(timeout_s)

    # ---- asyncio side
    def _run(self) -> None:
        if self.realtime:
            _try_fifo()
        asyncio.set_event_loop(self._loop)
        self._loop.run_until_complete(self._main())
        self._loop.close()

    async def _main(self) -> None:
        self._stop_evt = asyncio.Event()
        self._kick = asyncio.Event()
        delay = 0.1
        while not self._stop_evt.is_set():
            if not self.wanted:
                self._kick.clear()
                await self._wait_any(self._kick.wait(), self._stop_evt.wait())
                continue
            will = aiomqtt.Will(self.topics.status,
                                status_payload(False, self.settings.rig, "connection lost"),
                                qos=1, retain=True)
            client = make_client(self.settings, identifier=f"corral-device-{self.settings.rig}-"
                                 f"{uuid.uuid4().hex[:8]}", will=will)
            try:
                await connect_client(client, self.settings)
            except LinkClosed as exc:
                self.last_error = str(exc)
                await self._wait_any(asyncio.sleep(delay), self._stop_evt.wait())
                delay = min(2 * delay, 1.0)
                continue
            delay = 0.1
            reason = "stopped"
            try:
                # Commands skip aiomqtt's queue: paho hands them over inside its socket read.
                def on_command(pc: Any, ud: Any, m: Any, c: aiomqtt.Client = client) -> None:
                    self._on_paho_command(c, pc, m)

                client._client.message_callback_add(self.topics.command, on_command)
                # Retain-as-published: a command published retained keeps its flag, so
                # it is recognised and ignored (a stored command must never act).
                await client.subscribe(self.topics.command,
                                       options=SubscribeOptions(qos=0, retainAsPublished=True))
                await client.publish(self.topics.status,
                                     status_payload(True, self.settings.rig), qos=1, retain=True)
                await self._publish_hello(client)
                self._client = client
                self.connected = True
                self._up.set()
                self._kick.clear()
                tasks = [asyncio.create_task(c) for c in (
                    self._reader(client), self._stop_evt.wait(), self._kick.wait())]
                done, pending = await asyncio.wait(tasks, return_when=asyncio.FIRST_COMPLETED)
                for t in pending:
                    t.cancel()
                for t in pending:
                    with contextlib.suppress(BaseException):
                        await t
                for t in done:
                    if not t.cancelled() and t.exception() is not None:
                        self.last_error = str(t.exception())
                        reason = ""
                if not self.wanted:
                    reason = "link fault: disconnect"
            except aiomqtt.MqttError as exc:
                self.last_error = str(exc)
                reason = ""
            finally:
                self.connected = False
                self._client = None
            if reason:
                # Announce the going-away ourselves (a clean exit does not fire the will).
                with contextlib.suppress(Exception):
                    await asyncio.wait_for(client.publish(
                        self.topics.status, status_payload(False, self.settings.rig, reason),
                        qos=1, retain=True), 1.0)
            await disconnect_client(client)

    @staticmethod
    async def _wait_any(*aws: Any) -> None:
        tasks = [asyncio.ensure_future(a) for a in aws]
        _, pending = await asyncio.wait(tasks, return_when=asyncio.FIRST_COMPLETED)
        for t in pending:
            t.cancel()

    async def _publish_hello(self, client: aiomqtt.Client, session: int | None = None) -> None:
        self.seq = (self.seq + 1) & 0xFFFFFFFF
        if session is None:
            session = self.guard.owner or 0
        hello = dataclasses.replace(self.hello, session=session)
        await client.publish(self.topics.hello, encode_body(hello, seq=self.seq), qos=1,
                             retain=True)

    async def _reader(self, client: aiomqtt.Client) -> None:
        # Commands arrive through `_on_paho_command`; this only notices a lost connection.
        async for _ in client.messages:
            pass

    def _on_paho_command(self, client: aiomqtt.Client, pc: Any, m: Any) -> None:
        """A message on the command topic, inside paho's socket read (loop thread).

        Commands and stops go straight into the inbox the clock thread drains;
        a host hello re-arms the guard and is answered on the next loop turn
        (no publishing from inside a paho callback). Never raises.
        """
        now = time.monotonic()
        quick_ack(pc.socket())
        payload = m.payload
        if m.retain or not isinstance(payload, bytes):
            return
        try:
            msg = decode_body(payload)
        except WireError:
            self.decode_errors += 1
            return
        except Exception:
            self.decode_errors += 1
            return
        if type(msg) is Hello:
            if msg.rig_id == HOST_HELLO_RIG_ID:
                # The session handshake: granted (guard re-armed) or refused; the
                # answer names the session the device obeys.
                with self.guard_lock:
                    granted = self.guard.on_host_hello(msg.session, now)
                self._loop.create_task(self._answer_hello(client, granted))
            return
        self._inbox.append((now, msg))

    async def _answer_hello(self, client: aiomqtt.Client, session: int) -> None:
        with contextlib.suppress(aiomqtt.MqttError):
            await self._publish_hello(client, session)

    def _publish_sample(self, body: bytes) -> None:
        """Write one sample to the broker now (loop thread; called from the clock thread)."""
        client = self._client
        if client is None:
            self.publish_drops += 1
            return
        try:
            publish_now(client, self.topics.sample, body, self._expiry)
        except aiomqtt.MqttError:
            self.publish_drops += 1  # the reader sees the lost connection

    # ---- clock-thread side
    def poll_until(self, deadline: float) -> None:
        """Sleep to `deadline`, then apply what arrived (zero-order hold at the period)."""
        while (left := deadline - time.monotonic()) > 0:
            time.sleep(left)
        inbox = self._inbox
        while inbox:
            t_arr, msg = inbox.popleft()
            with self.guard_lock:
                if type(msg) is Command:
                    if self.guard.on_command(msg, t_arr) and self.on_command is not None:
                        self.on_command(msg, t_arr)
                elif type(msg) is Stop:
                    self.guard.on_stop()

    def send_sample(self, sample: Sample, corrupt: int) -> None:
        """Queue the sample for publishing (header bits flipped when corrupting)."""
        if not self.connected:
            return
        body = encode_body(sample)
        if corrupt:
            # Flip one bit of the array header: the receiver always sees a bad message.
            body = bytes([body[0] ^ (1 << self.rng.randrange(8))]) + body[1:]
        self._loop.call_soon_threadsafe(self._publish_sample, body)

    def disconnect(self) -> None:
        """Drop the broker connection (status goes offline) until `reconnect`."""
        if self.wanted:
            self.wanted = False
            self._loop.call_soon_threadsafe(self._set_kick)

    def reconnect(self) -> None:
        """Connect again after `disconnect`."""
        if not self.wanted:
            self.wanted = True
            self._loop.call_soon_threadsafe(self._set_kick)

    def _set_kick(self) -> None:
        if self._kick is not None:
            self._kick.set()

    def close(self) -> None:
        """Publish the offline status and disconnect."""
        if self._thread.is_alive() and self._stop_evt is not None:
            self._loop.call_soon_threadsafe(self._stop_evt.set)
        self._thread.join(5)

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """Outputs and status from the guard (thread-safe)."""
        with self.guard_lock:
            return self.guard.outputs(now)


# --------------------------------------------------------------------------- device


@dataclass
class DeviceReport:
    """Figures of one serving run."""

    ticks: int
    samples_sent: int
    commands_applied: int
    timeouts: int
    deadline_misses: int
    lateness_p50_us: float
    lateness_p99_us: float
    lateness_max_us: float
    round_trip_p50_us: float
    round_trip_p99_us: float
    round_trip_max_us: float
    missed_commands: int

    def as_dict(self) -> dict[str, float | int]:
        """Plain dict for printing."""
        return dict(self.__dict__)


def _set_timer_slack() -> None:
    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL(None).prctl(29, 1, 0, 0, 0)  # PR_SET_TIMERSLACK = 1 ns


def _try_fifo(priority: int = REALTIME_PRIORITY) -> bool:
    """SCHED_FIFO for the calling thread when the process may (root or CAP_SYS_NICE)."""
    try:
        prio = min(priority, os.sched_get_priority_max(os.SCHED_FIFO))
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(prio))
    except (PermissionError, OSError, AttributeError):
        return False
    return True


@dataclass
class LinkFaultCounts:
    """Counters `FaultInjector.on_link` keeps on the device side."""

    crc_errors: int = 0
    duplicates: int = 0


class RigDevice:
    """A simulated rig as a device on its own real-time clock (see the module docstring)."""

    def __init__(
        self,
        plant: Any,
        *,
        period: float,
        rig_id: str = "pedestal-sim",
        command_timeout_s: float = 0.05,
        faults: FaultSchedule | None = None,
        output_limits: Sequence[float] | NDArray[np.float64] | None = None,
        seed: int = 0,
        realtime: bool = True,
    ) -> None:
        if not period > 0:
            raise ValueError("period must be positive")
        self.realtime = realtime
        """Run the clock (and the MQTT network thread) at SCHED_FIFO when permitted."""
        self.granted_realtime = False
        self.plant = plant
        self.period = float(period)
        self.schedule = faults or FaultSchedule()
        spec = plant.spec
        self.injector = FaultInjector(self.schedule, plant, states=spec.states, axes=spec.inputs)
        self.stepper = CompiledPlant(plant)
        self.rng = random.Random(seed)
        limits = tuple(float(v) for v in np.ravel(
            plant.limits if output_limits is None else output_limits))
        self.hello = Hello(
            protocol=PROTOCOL_VERSION, rig_id=rig_id, channels=spec.states,
            units=spec.state_units, sample_rate_hz=1.0 / self.period, output_names=spec.inputs,
            output_limits=limits, output_units=spec.input_units,
            command_timeout_s=float(command_timeout_s),
            status_flags=(ESTOP_FLAG,),
        )
        self.estop_pressed = False
        """The simulated emergency-stop input: while True the outputs are off and every
        sample carries the ``estop`` status flag (bit `ESTOP_BIT`)."""
        self.transport: Transport | None = None
        self.seq = 0
        self.ticks = 0
        self.samples_sent = 0
        self.timeouts = 0
        self.deadline_misses = 0
        self.applied: tuple[float, ...] = (0.0,) * spec.m
        self.status = 0
        self._stop = threading.Event()
        self._lateness = np.zeros(1 << 16)
        self._rt = np.zeros(1 << 16)
        self._n_rt = 0
        self._sent_t = [0.0] * _RING
        self._sent_seq = [-1] * _RING
        self._answered: set[int] = set()
        self.missed_commands = 0
        self.injector.wire = True
        self.link_faults = LinkFaultCounts()
        """What the link faults did on the way out (duplicates sent)."""

    # ---- transports
    def serve_pty(self, link_path: str) -> str:
        """Create the pseudo-terminal (behind `link_path`); returns the path a host opens."""
        tr = PtyTransport(self.hello, link_path, seed=self.rng.randrange(1 << 30),
                          on_command=self._on_command)
        self.transport = tr
        return tr.path

    def serve_mqtt(self, settings: MqttSettings, connect_timeout_s: float = 10.0) -> str:
        """Connect to the broker as this rig; returns ``mqtt://host:port/rig``."""
        tr = MqttDeviceTransport(self.hello, settings, seed=self.rng.randrange(1 << 30),
                                 on_command=self._on_command, realtime=self.realtime)
        self.transport = tr
        if not tr.wait_connected(connect_timeout_s):
            tr.close()
            raise LinkClosed(f"device could not reach the MQTT broker: {tr.last_error}")
        return settings.url

    def _on_command(self, cmd: Command, t_arrival: float) -> None:
        i = cmd.seq % _RING
        if self._sent_seq[i] == cmd.seq and cmd.seq not in self._answered:
            self._answered.add(cmd.seq)
            if self._n_rt < self._rt.size:
                self._rt[self._n_rt] = (t_arrival - self._sent_t[i]) * 1e6
                self._n_rt += 1

    # ---- the clock
    def stop(self) -> None:
        """Ask `run` to return after the current period."""
        self._stop.set()

    def run(self, duration_s: float = math.inf) -> DeviceReport:
        """Serve until `stop()` or `duration_s` elapses (call in the thread that should tick)."""
        tr = self.transport
        if tr is None:
            raise RuntimeError("call serve_pty() or serve_mqtt() first")
        _set_timer_slack()
        old_policy = (os.sched_getscheduler(0), os.sched_getparam(0))
        if self.realtime:
            self.granted_realtime = _try_fifo()
        # The clock thread must get the GIL back at once from the transport's
        # network thread: the default 5 ms switch interval made wake-ups (and
        # the hand-over of every sample) wait whole periods.
        old_switch = sys.getswitchinterval()
        sys.setswitchinterval(SWITCH_INTERVAL_S)
        # The start-up heap (numpy, scipy, the design) to the permanent generation: a
        # full collection then scans only what serving allocates (measured: one full
        # collection of the unfrozen heap took 25 ms, 25 periods at 1 kHz).
        gc.collect()
        gc.freeze()
        period = self.period
        t0 = time.monotonic()
        k = 0
        end = t0 + duration_s
        try:
            while not self._stop.is_set():
                k += 1
                deadline = t0 + k * period
                if deadline > end:
                    break
                tr.poll_until(deadline)
                now = time.monotonic()
                late = now - deadline
                if late > period:
                    skipped = int(late // period)
                    self.deadline_misses += skipped
                    k += skipped
                if self.ticks < self._lateness.size:
                    self._lateness[self.ticks] = late * 1e6
                self._tick(tr, k * period, now)
        finally:
            gc.unfreeze()
            sys.setswitchinterval(old_switch)
            if self.granted_realtime:
                with contextlib.suppress(OSError):
                    os.sched_setscheduler(0, *old_policy)
            tr.close()
        return self.report()

    def _tick(self, tr: Transport, t: float, now: float) -> None:
        self.ticks += 1
        # Was the previous sample answered before this period began?
        prev = self.seq
        if prev and self._sent_seq[prev % _RING] == prev and prev not in self._answered:
            self.missed_commands += 1
        self._answered.discard(prev - 64)
        link = [f for f in self.schedule.faults if f.kind in LINK_KINDS and f.active(t)]
        down = any(f.kind == "disconnect" for f in link)
        if down and tr.connected:
            tr.disconnect()
        elif not down and not tr.connected:
            tr.reconnect()
        u, status = tr.outputs(now)
        if self.estop_pressed:
            # A pressed e-stop removes power whatever the host commands.
            u, status = (0.0,) * len(u), status | STATUS_OUTPUTS_OFF | ESTOP_BIT
        if status & STATUS_COMMAND_TIMEOUT:
            self.timeouts += 1
        self.applied, self.status = u, status
        self.injector.apply(t)
        self.stepper.step(u, self.period)
        y = self.injector.measure(t, self.plant.measure()[0])
        self.seq = (self.seq + 1) & 0xFFFFFFFF
        sample: Sample | None = None
        if y is not None:
            # A delayed reading is timestamped when it was measured (as on the in-process
            # rig): stamped "now" the delay fault was invisible to the stale rule.
            t_measured = t - self.injector.delay_ticks(t) * self.period
            sample = Sample(self.seq, t_measured, tuple(float(v) for v in y), status)
        # The link and host kinds: the same injector as the in-process link (one
        # definition of each fault); a corrupt frame goes out with flipped bytes.
        out = self.injector.on_link(t, sample, self.link_faults, self.period)
        if out is not None:
            self._emit(tr, out, 1 if self.injector.corrupt_last else 0, now)

    def _emit(self, tr: Transport, sample: Sample, corrupt: int, now: float) -> None:
        if isinstance(tr, PtyTransport):
            tr.ep.seq = sample.seq
        i = sample.seq % _RING
        self._sent_seq[i] = sample.seq
        self._sent_t[i] = time.monotonic()
        tr.send_sample(sample, corrupt)
        self.samples_sent += 1

    def report(self) -> DeviceReport:
        """Lateness of the device clock and round trips seen so far."""
        lat = self._lateness[: min(self.ticks, self._lateness.size)]
        rt = self._rt[: self._n_rt]

        def pct(a: np.ndarray, q: float) -> float:
            return float(np.percentile(a, q)) if a.size else float("nan")

        tr = self.transport
        applied = tr.guard.commands if tr is not None else 0
        return DeviceReport(
            ticks=self.ticks, samples_sent=self.samples_sent, commands_applied=applied,
            timeouts=self.timeouts, deadline_misses=self.deadline_misses,
            lateness_p50_us=pct(lat, 50), lateness_p99_us=pct(lat, 99),
            lateness_max_us=float(lat.max()) if lat.size else float("nan"),
            round_trip_p50_us=pct(rt, 50), round_trip_p99_us=pct(rt, 99),
            round_trip_max_us=float(rt.max()) if rt.size else float("nan"),
            missed_commands=self.missed_commands,
        )


PedestalDevice = RigDevice
"""The older name (it served only the pedestal)."""
