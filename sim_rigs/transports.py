"""How a served rig reaches its host: the transport interface and the serial one.

What lives here: `Transport` (what the device clock needs from a transport),
`PtyTransport` (the device owns the master of a fresh pseudo-terminal, behind a
stable symlink so a host can reopen it after a disconnect), `try_fifo` (SCHED_FIFO for
a device thread, not inherited) and `end_fifo` (back to normal priority). What does
not: the MQTT transport (`sim_rigs.device_mqtt`), the device clock (`sim_rigs.device`).
"""

from __future__ import annotations

import contextlib
import os
import random
import time
from collections.abc import Callable

from drivers.base import Command, Hello, Sample
from drivers.command_guard import CommandGuard
from drivers.serial_link import DeviceEndpoint
from drivers.wire import encode_message

REALTIME_PRIORITY = 40
"""SCHED_FIFO priority of the device's threads when permitted (a real rig has its own CPU)."""
FIFO_NOT_INHERITED = os.SCHED_FIFO | getattr(os, "SCHED_RESET_ON_FORK", 0)
"""SCHED_FIFO that threads and processes the device thread starts do not inherit (as
`runtime.realtime.clock.FIFO_NOT_INHERITED`, which says why; sim_rigs may not import it)."""


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


def try_fifo(priority: int = REALTIME_PRIORITY) -> bool:
    """SCHED_FIFO for the calling thread when the process may (root or CAP_SYS_NICE);
    threads and processes it starts run at normal priority (SCHED_RESET_ON_FORK)."""
    try:
        prio = min(priority, os.sched_get_priority_max(os.SCHED_FIFO))
        os.sched_setscheduler(0, FIFO_NOT_INHERITED, os.sched_param(prio))
    except (PermissionError, OSError, AttributeError):
        return False
    return True


def end_fifo() -> None:
    """The calling thread back to normal priority (SCHED_OTHER), whatever it had before
    `try_fifo`: a thread that served must not keep a real-time priority it inherited."""
    with contextlib.suppress(PermissionError, OSError, AttributeError):
        os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))
