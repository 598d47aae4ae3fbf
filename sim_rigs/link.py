"""The simulated pedestal as an in-process `drivers.base.Link`.

`SimLink` owns one plant (a `sim_rigs.pedestal.Pedestal` of batch 1) and a
`FaultInjector`, and behaves like a device: it reports `Sample`s with its own
sequence numbers and device time, applies `Command`s (outputs off unless the
command says on), and turns its outputs off by itself when commands stop
arriving for ``hello.command_timeout_s`` (the device-side fail-safe).

Two ways to run it:

- stepped (host-clocked): the loop calls `sample_now(t_host)` at each tick
  and `apply(command)` after deciding, which advances the physics by one
  period. No extra thread; the rig's time is exactly ``tick * period``.
- free-running (rig-clocked): after `open()` with ``free_running=True`` a
  thread steps the physics at its own real-time clock and `receive()` waits
  for the next sample, like a served device.

For speed the one-plant physics are stepped with plain floats (the numpy
`Pedestal.step` costs ~0.7 ms per call for one plant because of call overhead);
`tests/test_faults.py` checks the two agree. What does not live here: the
batched physics and their documentation (`sim_rigs.pedestal`), fault parsing
(`sim_rigs.faults`), the wire protocol (`drivers.wire`).
"""

from __future__ import annotations

import asyncio
import math
import random
import threading
import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from drivers.base import (
    FLAG_OUTPUTS_ON,
    STATUS_COMMAND_TIMEOUT,
    STATUS_OK,
    STATUS_OUTPUTS_OFF,
    STATUS_SATURATED,
    Command,
    Hello,
    Link,
    LinkClosed,
    LinkStats,
    Sample,
    SampleInbox,
)
from sim_rigs.faults import FaultInjector, FaultSchedule

PROTOCOL = 1


class PedestalStepper:
    """One pedestal's physics in plain floats: the equations of `Pedestal.accel`, RK4."""

    def __init__(self, plant: Any) -> None:
        self.plant = plant
        p = {k: float(np.ravel(v)[0]) for k, v in plant.params.items()}
        self.p = p
        self.limits = [float(v) for v in np.ravel(plant.limits)]

    def _acc(self, x0: float, x1: float, wa: float, we: float, va: float, ve: float,
             la: float, le: float, da: float, de: float) -> tuple[float, float]:
        p = self.p
        vs = p["coulomb_speed"]
        acc_az = (-(p["a_az"] + p["visc_az"]) * wa + p["b_az"] * la * va
                  - p["coulomb_az"] * math.tanh(wa / vs) - p["spring_az"] * x0
                  - p["coupling"] * wa * we + p["bias_az"])
        acc_el = (-(p["a_el"] + p["visc_el"]) * we + p["b_el"] * le * ve
                  - p["coulomb_el"] * math.tanh(we / vs) - p["gravity_el"] * math.cos(x1)
                  + 0.5 * p["coupling"] * wa * wa * math.sin(2 * x1) + p["bias_el"])
        return acc_az + da, acc_el + de

    def step(self, u: Sequence[float], dt: float) -> tuple[float, float]:
        """Advance the plant by dt holding u (saturated here); returns the volts applied."""
        plant = self.plant
        va = min(max(float(u[0]), -self.limits[0]), self.limits[0])
        ve = min(max(float(u[1]), -self.limits[1]), self.limits[1])
        la, le = self.p["lam_az"], self.p["lam_el"]
        if plant.lam_scale is not None:
            la *= float(plant.lam_scale[0, 0])
            le *= float(plant.lam_scale[0, 1])
        da = de = 0.0
        if plant.disturbance is not None:
            da, de = float(plant.disturbance[0, 0]), float(plant.disturbance[0, 1])
        a, e, wa, we = (float(v) for v in plant.x[0])
        n = plant.substeps
        h = dt / n
        acc = self._acc
        for _ in range(n):
            k1a, k1e = acc(a, e, wa, we, va, ve, la, le, da, de)
            k2a, k2e = acc(a + 0.5 * h * wa, e + 0.5 * h * we, wa + 0.5 * h * k1a,
                           we + 0.5 * h * k1e, va, ve, la, le, da, de)
            w2a, w2e = wa + 0.5 * h * k1a, we + 0.5 * h * k1e
            k3a, k3e = acc(a + 0.5 * h * w2a, e + 0.5 * h * w2e, wa + 0.5 * h * k2a,
                           we + 0.5 * h * k2e, va, ve, la, le, da, de)
            w3a, w3e = wa + 0.5 * h * k2a, we + 0.5 * h * k2e
            k4a, k4e = acc(a + h * w3a, e + h * w3e, wa + h * k3a, we + h * k3e,
                           va, ve, la, le, da, de)
            w4a, w4e = wa + h * k3a, we + h * k3e
            a += (h / 6.0) * (wa + 2 * w2a + 2 * w3a + w4a)
            e += (h / 6.0) * (we + 2 * w2e + 2 * w3e + w4e)
            wa += (h / 6.0) * (k1a + 2 * k2a + 2 * k3a + k4a)
            we += (h / 6.0) * (k1e + 2 * k2e + 2 * k3e + k4e)
        x = plant.x
        x[0, 0], x[0, 1], x[0, 2], x[0, 3] = a, e, wa, we
        return va, ve


class SimLink(Link):
    """The simulated pedestal behind the `Link` interface (see the module docstring)."""

    def __init__(self, plant: Any, period: float, faults: FaultSchedule | None = None, *,
                 rig_id: str = "pedestal-sim", states: Sequence[str] = (),
                 units: Sequence[str] = (), inputs: Sequence[str] = ("V_az", "V_el"),
                 seed: int = 0, command_timeout_s: float = 0.05,
                 free_running: bool = False) -> None:
        from sim_rigs.pedestal import INPUT_UNITS, STATE_UNITS, STATES

        self.plant = plant
        self.period = float(period)
        self.schedule = faults or FaultSchedule()
        self.injector = FaultInjector(self.schedule, plant)
        self.stepper = PedestalStepper(plant)
        self.free_running = free_running
        self.stats = LinkStats()
        self.hello = Hello(
            protocol=PROTOCOL, rig_id=rig_id,
            channels=tuple(states or STATES), units=tuple(units or STATE_UNITS),
            sample_rate_hz=1.0 / self.period, output_names=tuple(inputs),
            output_limits=tuple(float(v) for v in np.ravel(plant.limits)),
            output_units=INPUT_UNITS, command_timeout_s=command_timeout_s,
        )
        s = plant.sensors
        self._res = float(s.angle_resolution)
        self._an = float(s.angle_noise)
        self._rn = float(s.rate_noise)
        self._sensor_delay = int(s.delay_ticks)
        self._rng = random.Random(seed)
        self._delay_line: list[tuple[float, ...]] = []
        self.tick = 0
        """Periods stepped so far (rig time = tick * period)."""
        self.seq = 0
        self.u = (0.0, 0.0)
        """Volts applied now."""
        self.outputs_on = False
        self._last_command_rig_t = -math.inf
        self._status = STATUS_OK
        self._open = False
        self._inbox: SampleInbox | None = None  # free-running mode only
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._pending: Command | None = None
        self._last_cmd_host = 0.0

    # ---------------------------------------------------------------- rig time
    @property
    def t(self) -> float:
        """Rig time (s)."""
        return self.tick * self.period

    def _read_sensors(self) -> tuple[float, ...]:
        x = self.plant.x[0]
        g = self._rng.gauss
        res = self._res
        out = []
        for i in range(2):
            a = float(x[i]) + (g(0.0, self._an) if self._an > 0 else 0.0)
            if res > 0:
                a = round(a / res) * res
            out.append(a)
        for i in range(2, 4):
            out.append(float(x[i]) + (g(0.0, self._rn) if self._rn > 0 else 0.0))
        y = tuple(out)
        if self._sensor_delay > 0:
            self._delay_line.append(y)
            if len(self._delay_line) > self._sensor_delay:
                y = self._delay_line.pop(0)
            else:
                y = self._delay_line[0]
        return y

    def sample_now(self, t_host: float) -> Sample | None:
        """Stepped mode: the reading the rig reports at this period (None: nothing arrives)."""
        t = self.t
        self.seq += 1
        if not self._open or any(f.kind == "disconnect" for f in self.schedule.link_faults(t)):
            self.stats.connected = False
            return None
        self.stats.connected = True
        y = self.injector.measure(t, np.asarray(self._read_sensors()))
        if y is None:
            return None
        for f in self.schedule.link_faults(t):
            if f.kind == "drop":
                return None
        d = self.injector.delay_ticks(t)
        status = self._status
        sample = Sample(self.seq, t - d * self.period, tuple(float(v) for v in y), status, t_host)
        self.stats.frames_in += 1
        self.stats.last_sample_host_s = t_host
        return sample

    def apply(self, command: Command | None) -> None:
        """Stepped mode: take the command (None: none arrived) and step the physics one period."""
        t = self.t
        if command is not None:
            self.stats.frames_out += 1
            self._last_command_rig_t = t
            self.outputs_on = bool(command.flags & FLAG_OUTPUTS_ON)
            u = command.u if self.outputs_on else (0.0, 0.0)
        else:
            u = self.u
        status = STATUS_OK
        hello = self.hello
        assert hello is not None, "the simulated rig says hello when it opens"
        if t - self._last_command_rig_t > hello.command_timeout_s:
            self.outputs_on = False
            status |= STATUS_COMMAND_TIMEOUT
        if not self.outputs_on:
            u = (0.0, 0.0)
            status |= STATUS_OUTPUTS_OFF
        self.injector.apply(t)
        self.u = self.stepper.step(u, self.period)
        if any(abs(v) >= lim for v, lim in zip(u, hello.output_limits, strict=True)):
            status |= STATUS_SATURATED
        self._status = status
        self.tick += 1

    # ---------------------------------------------------------------- Link API
    async def open(self) -> None:
        """Mark the rig connected; in free-running mode start its clock thread."""
        self._open = True
        self.stats.connected = True
        if self.free_running:
            loop = asyncio.get_running_loop()
            self._inbox = SampleInbox(self.stats, 64)
            self._stop.clear()
            self._thread = threading.Thread(target=self._run_free, args=(loop,),
                                            name="corral-simrig", daemon=True)
            self._thread.start()

    async def close(self) -> None:
        """Outputs off, stop the clock thread. Never raises."""
        self._open = False
        self.outputs_on = False
        self.stats.connected = False
        self._stop.set()
        if self._inbox is not None:
            self._inbox.fail("simulated rig closed")
        if self._thread is not None:
            await asyncio.to_thread(self._thread.join, 1.0)
            self._thread = None

    async def receive(self) -> Sample:
        """Free-running mode: the next sample (stepped mode: measure now)."""
        if not self._open:
            raise LinkClosed("simulated rig closed")
        if self._inbox is None:
            sample = self.sample_now(time.monotonic())
            while sample is None:
                await asyncio.sleep(self.period)
                sample = self.sample_now(time.monotonic())
            return sample
        return await self._inbox.get()

    async def send(self, command: Command) -> None:
        """Hand a command to the rig (free-running: applied at its next period)."""
        if self._inbox is None:
            self.apply(command)
            return
        with self._lock:
            self._pending = command

    def _push(self, sample: Sample) -> None:
        assert self._inbox is not None
        sample.t_host = time.monotonic()
        self._inbox.put(sample)

    def _run_free(self, loop: asyncio.AbstractEventLoop) -> None:
        t0 = time.monotonic()
        k = 0
        while not self._stop.is_set():
            k += 1
            deadline = t0 + k * self.period
            delay = deadline - time.monotonic()
            if delay > 0:
                time.sleep(delay)
            with self._lock:
                cmd, self._pending = self._pending, None
            if cmd is None and self.outputs_on:
                self.apply(None)
            else:
                self.apply(cmd)
            sample = self.sample_now(time.monotonic())
            if sample is not None:
                try:
                    loop.call_soon_threadsafe(self._push, sample)
                except RuntimeError:
                    return
