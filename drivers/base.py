"""The one small interface every rig link speaks, and the messages that cross it.

A link is an async context manager: open it, read `Sample`s from it, send
`Command`s to it, read its `LinkStats`. What lives here: the message records
and the abstract `Link`. What does not: framing and codecs (`drivers.wire`),
concrete transports (`drivers.serial_link`, `drivers.mqtt_link`) and the
simulated rig (`sim_rigs`), which implements this interface in-process.

`drivers/` imports neither `runtime/` nor `sim_rigs/`.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from types import TracebackType

# Status bits a device may set on a sample (bit positions are part of the wire
# protocol, see docs/wire-protocol.md).
STATUS_OK = 0
STATUS_SATURATED = 1 << 0
STATUS_COMMAND_TIMEOUT = 1 << 1
STATUS_FAULT = 1 << 2
STATUS_OUTPUTS_OFF = 1 << 3

# Command flag bits.
FLAG_OUTPUTS_ON = 1 << 0
FLAG_FALLBACK = 1 << 1
FLAG_STOP = 1 << 2


@dataclass(frozen=True, slots=True)
class Hello:
    """What a rig says about itself when a link opens."""

    protocol: int
    rig_id: str
    channels: tuple[str, ...]
    units: tuple[str, ...]
    sample_rate_hz: float
    output_names: tuple[str, ...]
    output_limits: tuple[float, ...]
    output_units: tuple[str, ...] = ()
    command_timeout_s: float = 0.05


@dataclass(slots=True)
class Sample:
    """One measurement from the rig: sequence number, device time (s), readings, status bits."""

    seq: int
    t_device: float
    y: tuple[float, ...]
    status: int = STATUS_OK
    t_host: float = 0.0
    """Host monotonic time (s) at which the sample was received; set by the link."""


@dataclass(slots=True)
class Command:
    """One command to the rig: echoes the sample sequence it answers, inputs, flag bits."""

    seq: int
    u: tuple[float, ...]
    flags: int = FLAG_OUTPUTS_ON


@dataclass(slots=True)
class LinkStats:
    """Counters a link keeps; the watchdog and telemetry read them."""

    frames_in: int = 0
    frames_out: int = 0
    crc_errors: int = 0
    cobs_errors: int = 0
    decode_errors: int = 0
    unknown_kinds: int = 0
    gaps: int = 0
    """Missed samples: a sequence jump of k adds k - 1."""
    duplicates: int = 0
    """Samples repeated or older than the last one (dropped)."""
    late_frames: int = 0
    """Samples dropped because the loop fell behind (receive queue full)."""
    send_drops: int = 0
    """Commands dropped because the device is not reading."""
    reconnects: int = 0
    connected: bool = False
    last_sample_host_s: float = 0.0
    latencies_us: list[float] = field(default_factory=list, repr=False)

    def as_dict(self) -> dict[str, float | int | bool | None]:
        """Counters as a plain dict (latency as p50/p99 in microseconds)."""
        import numpy as np

        out: dict[str, float | int | bool | None] = {
            k: getattr(self, k)
            for k in (
                "frames_in", "frames_out", "crc_errors", "cobs_errors", "decode_errors",
                "unknown_kinds", "gaps", "duplicates", "late_frames", "send_drops", "reconnects",
                "connected",
            )
        }
        lat = np.asarray(self.latencies_us[-100_000:], dtype=float)
        # None (JSON null) rather than NaN when nothing was measured: NaN is not JSON.
        out["latency_p50_us"] = float(np.percentile(lat, 50)) if lat.size else None
        out["latency_p99_us"] = float(np.percentile(lat, 99)) if lat.size else None
        return out


class LinkClosed(Exception):
    """The link is gone (unplugged, broker lost, device offline)."""


class Link(abc.ABC):
    """A connection to one rig.

    Usage::

        async with link:
            hello = link.hello
            sample = await link.receive()
            await link.send(Command(sample.seq, (0.0, 0.0)))
    """

    hello: Hello | None = None
    stats: LinkStats

    async def __aenter__(self) -> Link:
        await self.open()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.close()

    @abc.abstractmethod
    async def open(self) -> None:
        """Connect and complete the hello handshake (sets `self.hello`)."""

    @abc.abstractmethod
    async def close(self) -> None:
        """Send a stop if possible, then disconnect. Never raises."""

    @abc.abstractmethod
    async def receive(self) -> Sample:
        """Wait for the next sample. Raises `LinkClosed` when the rig is gone."""

    @abc.abstractmethod
    async def send(self, command: Command) -> None:
        """Send one command (never blocks on a slow peer for long)."""
