"""The device's own command fail-safe, for simulated devices written in Python.

What lives here: `CommandGuard` (command timeout, latched stop, clamping, the
session lease). What does not: any transport (`drivers.serial_link`,
`sim_rigs.device`), the codec (`drivers.wire`).
"""

from __future__ import annotations

import math

from drivers.base import (
    FLAG_OUTPUTS_ON,
    FLAG_STOP,
    STATUS_COMMAND_TIMEOUT,
    STATUS_OK,
    STATUS_OUTPUTS_OFF,
    STATUS_SATURATED,
    Command,
)
from drivers.sequence import seq_newer

# --------------------------------------------------------------------------- device side


class CommandGuard:
    """The device's own fail-safe, for simulated devices written in Python.

    Mirrors the C reference (drivers/device_c/corral_device.c): outputs are
    zero until a valid command arrives; a command older than the last applied
    one is ignored; if no valid command arrived for `timeout_s`, outputs go to
    zero and `STATUS_COMMAND_TIMEOUT | STATUS_OUTPUTS_OFF` is reported; a stop
    (message or `FLAG_STOP`) latches outputs off until `rearm()` (a new host
    hello). Commands are clamped to `limits` (`STATUS_SATURATED` when clamped).
    """

    def __init__(self, limits: tuple[float, ...], timeout_s: float,
                 lease_s: float | None = None) -> None:
        self.limits = tuple(float(v) for v in limits)
        self.timeout_s = float(timeout_s)
        self.lease_s = float(lease_s) if lease_s is not None else max(1.0, 20 * self.timeout_s)
        """An owner silent (no accepted command) this long may be replaced by a new host."""
        self.owner: int | None = None
        """The session whose commands are obeyed (None until a host hello)."""
        self._owner_t = 0.0
        self.sessions_refused = 0
        """Host hellos refused because another live session owns the rig."""
        self.foreign_commands = 0
        """Commands refused because they carry another session's token."""
        self.stopped = False
        self._u = tuple(0.0 for _ in self.limits)
        self._flags = 0
        self._last_cmd_t: float | None = None
        self._last_seq: int | None = None
        self.commands = 0

    def on_host_hello(self, session: int, now: float) -> int:
        """A host asks for the rig with `session`; returns the session the device grants.

        Granted (and the guard re-armed) when nobody owns the rig, when it is the
        owner asking again, or when the owner has been silent for `lease_s`;
        otherwise refused (counted) and the owner's session is returned, so the
        asking host learns the rig is taken.
        """
        owner = self.owner
        if owner is None or session == owner or now - self._owner_t > self.lease_s:
            self.owner = session
            self._owner_t = now
            self.rearm()
            return session
        self.sessions_refused += 1
        return owner

    def rearm(self) -> None:
        """Clear a latched stop (the host said hello again)."""
        self.stopped = False
        self._last_cmd_t = None
        self._last_seq = None

    def on_stop(self) -> None:
        """A stop message arrived: outputs off, latched."""
        self.stopped = True

    def on_command(self, cmd: Command, now: float) -> bool:
        """Apply a command received at device time `now`; False if it was rejected."""
        if self.owner is None or cmd.session != self.owner:
            self.foreign_commands += 1
            return False
        if len(cmd.u) != len(self.limits) or not all(math.isfinite(v) for v in cmd.u):
            return False
        if self._last_seq is not None and not seq_newer(cmd.seq, self._last_seq):
            return False
        self._last_seq = cmd.seq
        self._last_cmd_t = now
        self._owner_t = now
        self._u = tuple(cmd.u)
        self._flags = cmd.flags
        self.commands += 1
        if cmd.flags & FLAG_STOP:
            self.stopped = True
        return True

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """The outputs to apply at device time `now` and the status bits to report."""
        zero = tuple(0.0 for _ in self.limits)
        if self.stopped:
            return zero, STATUS_OUTPUTS_OFF
        if self._last_cmd_t is None:
            return zero, STATUS_OUTPUTS_OFF
        if now - self._last_cmd_t > self.timeout_s:
            return zero, STATUS_COMMAND_TIMEOUT | STATUS_OUTPUTS_OFF
        if not self._flags & FLAG_OUTPUTS_ON:
            return zero, STATUS_OUTPUTS_OFF
        status = STATUS_OK
        u = []
        for v, lim in zip(self._u, self.limits, strict=True):
            if v > lim:
                v, status = lim, status | STATUS_SATURATED
            elif v < -lim:
                v, status = -lim, status | STATUS_SATURATED
            u.append(v)
        return tuple(u), status
