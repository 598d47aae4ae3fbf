"""A simulated rig served as a device: over a pseudo-terminal or through MQTT.

`RigDevice` runs one plant (a `sim_rigs.plant.RigPlant` of batch 1, any rig,
passed in: this package never imports the runtime) on its own real-time clock:
a thread that sleeps to absolute deadlines ``t0 + k * period``. Each period
it applies the held command (zero-order hold, through the device-side
`drivers.command_guard.CommandGuard`, so with no valid command for the hello's
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

What lives here: `RigDevice` (the clock and the stepping) and its report.
The transports live beside it: `sim_rigs.transports.PtyTransport` (the
device owns the master of a fresh pseudo-terminal, behind a stable symlink so
a host can reopen it after a disconnect) and `sim_rigs.device_mqtt.MqttDeviceTransport`
(device side of the rig topics, with a last will marking it offline). What
does not live here: the wire codec (`drivers.wire`), the host links
(`drivers.serial_link`, `drivers.mqtt_link`), the command line
(`runtime.cli.cmd_rig`).
"""


from __future__ import annotations

import contextlib
import ctypes
import gc
import math
import random
import sys
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from drivers.base import (
    STATUS_COMMAND_TIMEOUT,
    STATUS_OUTPUTS_OFF,
    Command,
    Hello,
    LinkClosed,
    Sample,
)
from drivers.mqtt_settings import MqttSettings
from drivers.wire import PROTOCOL_VERSION, STATUS_DEVICE_BASE_BIT
from sim_rigs.device_mqtt import MqttDeviceTransport
from sim_rigs.faults import LINK_KINDS, FaultInjector, FaultSchedule
from sim_rigs.kernel import CompiledPlant
from sim_rigs.transports import (
    REALTIME_PRIORITY,
    PtyTransport,
    Transport,
    end_fifo,
    try_fifo,
)

__all__ = ["ESTOP_BIT", "ESTOP_FLAG", "REALTIME_PRIORITY", "SWITCH_INTERVAL_S", "DeviceReport",
           "LinkFaultCounts", "PedestalDevice", "RigDevice"]

_RING = 4096
ESTOP_FLAG = "estop"
"""The served rig's declared status flag: its (simulated) emergency-stop input."""
ESTOP_BIT = 1 << STATUS_DEVICE_BASE_BIT
SWITCH_INTERVAL_S = 100e-6
"""GIL switch interval while serving (the runtime's loop uses the same 100 us)."""


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
        if self.realtime:
            self.granted_realtime = try_fifo()
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
                end_fifo()
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
