"""A simulated rig as an in-process `drivers.base.Link`.

`SimLink` owns one plant (a `sim_rigs.plant.RigPlant` of batch 1, any rig) and a
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

For speed the one-plant physics are stepped by the compiled plant kernel
(`sim_rigs.kernel.CompiledPlant`, the same kernel the dry run and the sweep use;
the numpy `RigPlant.step` costs ~0.7 ms per call for one plant because of call
overhead); the readings come from the plant's own sensor model (`RigPlant.measure`).
`tests/test_rig_plant.py` compares this link with the dry run tick by tick. What
does not live here: the plant (`sim_rigs.plant`, `sim_rigs.kernel`), fault parsing
(`sim_rigs.faults`), the wire protocol (`drivers.wire`).
"""

from __future__ import annotations

import asyncio
import math
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


class SimLink(Link):
    """A simulated rig behind the `Link` interface (see the module docstring)."""

    def __init__(self, plant: Any, period: float, faults: FaultSchedule | None = None, *,
                 rig_id: str = "pedestal-sim", states: Sequence[str] = (),
                 units: Sequence[str] = (), inputs: Sequence[str] = ("V_az", "V_el"),
                 seed: int = 0, command_timeout_s: float = 0.05,
                 free_running: bool = False) -> None:
        from sim_rigs.kernel import CompiledPlant

        spec = plant.spec
        self.plant = plant
        self.period = float(period)
        self.schedule = faults or FaultSchedule()
        self.injector = FaultInjector(self.schedule, plant, states=spec.states,
                                      axes=spec.inputs)
        self.stepper = CompiledPlant(plant)
        self.free_running = free_running
        self.stats = LinkStats()
        self.hello = Hello(
            protocol=PROTOCOL, rig_id=rig_id,
            channels=tuple(states or spec.states), units=tuple(units or spec.state_units),
            sample_rate_hz=1.0 / self.period, output_names=tuple(inputs),
            output_limits=tuple(float(v) for v in np.ravel(plant.limits)),
            output_units=spec.input_units, command_timeout_s=command_timeout_s,
        )
        self.tick = 0
        """Periods stepped so far (rig time = tick * period)."""
        self.seq = 0
        self._off = (0.0,) * spec.m
        self.u = self._off
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
        """The plant's own sensor model (`RigPlant.measure`: noise, quantum, delay)."""
        return tuple(float(v) for v in self.plant.measure()[0])

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
        d = self.injector.delay_ticks(t)
        status = self._status
        sample = Sample(self.seq, t - d * self.period, tuple(float(v) for v in y), status, t_host)
        # Link and host faults: what arrives (sim_rigs.faults.FaultInjector.on_link).
        sample = self.injector.on_link(t, sample, self.stats, self.period)
        if sample is None:
            return None
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
            u = command.u if self.outputs_on else self._off
        else:
            u = self.u
        status = STATUS_OK
        hello = self.hello
        assert hello is not None, "the simulated rig says hello when it opens"
        if t - self._last_command_rig_t > hello.command_timeout_s:
            self.outputs_on = False
            status |= STATUS_COMMAND_TIMEOUT
        if not self.outputs_on:
            u = self._off
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
