"""The one small interface every rig link speaks, and the messages that cross it.

A link is an async context manager: open it, read `Sample`s from it, send
`Command`s to it, read its `LinkStats`. What lives here: the message records,
the abstract `Link`, and the host-side pieces every concrete link shares:
`SampleInbox` (the bounded queue `receive()` waits on), `LatencyRing`
(sample receipt times, for sample-to-command latency) and `await_hello` (the
session handshake). What does not:
framing and codecs (`drivers.wire`), concrete transports
(`drivers.serial_link`, `drivers.mqtt_link`) and the simulated rig
(`sim_rigs`), which implements this interface in-process.

`drivers/` imports neither `runtime/` nor `sim_rigs/`.
"""

from __future__ import annotations

import abc
import asyncio
import collections
from collections.abc import Awaitable, Callable, Iterator
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
    session: int = 0
    """Protocol v2 session token: from a host, the session it asks for; from a device,
    the session it granted (the one whose commands it obeys; 0 = none)."""
    status_flags: tuple[str, ...] = ()
    """The device's own status inputs (an e-stop, an interlock), by name: the one at
    index k is status bit ``8 + k`` of every sample and heartbeat (at most 24)."""


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
    session: int = 0
    """The host session it belongs to (set by the link; protocol v2)."""


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
    rejected: int = 0
    """Samples refused as implausible against the device's hello (channel count, time,
    sequence jump; `drivers.sequence.SampleGate`)."""
    resyncs: int = 0
    """Times the sample stream was resynchronised after a plausible restart of numbering."""
    hellos_midrun: int = 0
    """Device hellos that arrived mid-session (reported as link events, never adopted)."""
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
                "rejected", "resyncs", "hellos_midrun", "connected",
            )
        }
        lat = np.asarray(self.latencies_us[-100_000:], dtype=float)
        # None (JSON null) rather than NaN when nothing was measured: NaN is not JSON.
        out["latency_p50_us"] = float(np.percentile(lat, 50)) if lat.size else None
        out["latency_p99_us"] = float(np.percentile(lat, 99)) if lat.size else None
        return out


class LinkClosed(Exception):
    """The link is gone (unplugged, broker lost, device offline)."""


class SessionRefused(LinkClosed):
    """The device obeys another host session (another runtime drives the rig)."""


def new_session() -> int:
    """A fresh random session token (1 .. 2**32 - 1), new at every link open."""
    import secrets

    return secrets.randbelow(0xFFFFFFFF) + 1


async def await_hello(
    waiter: asyncio.Future[Hello],
    send_hello: Callable[[], Awaitable[None]],
    timeout_s: float,
    *,
    taken: Callable[[], bool],
    refused: str,
    silent: Callable[[], LinkClosed],
) -> Hello:
    """The host's side of the session handshake (docs/wire-protocol.md section 7).

    Sends the host hello (`send_hello`) every 0.25 s until the device's answer
    resolves `waiter`, and returns that hello. When `timeout_s` is up, raises
    `SessionRefused` (message `refused`) if the device answered naming another
    session (`taken()`), else `silent()`.
    """
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout_s
    while True:
        await send_hello()
        left = deadline - loop.time()
        if left <= 0 and taken():
            raise SessionRefused(refused)
        if left <= 0:
            raise silent()
        done, _ = await asyncio.wait({waiter}, timeout=min(0.25, left))
        if done:
            return waiter.result()


class SampleInbox:
    """Received samples waiting for `Link.receive()`: a bounded queue with one async waiter.

    The link's reader (a protocol callback, a paho callback, a call scheduled
    from a device thread: always on the event loop) calls `put`; the control
    loop awaits `get` or `get_latest`. At most `maxlen` samples are kept: `put`
    drops the oldest past that and counts it in `stats.late_frames`, as does
    `get_latest` for every older sample it skips. When the link is lost the
    link calls `fail(reason)`: queued samples are still handed out, then `get`
    raises `LinkClosed(reason)`. `reset()` starts a fresh session.

    One receiver at a time: a second concurrent `get` replaces the first one's
    wake-up (as a link's `receive()` always has).

    >>> import asyncio
    >>> inbox = SampleInbox(LinkStats(), maxlen=2)
    >>> for k in (1, 2, 3):
    ...     inbox.put(Sample(k, 0.0, ()))
    >>> [s.seq for s in inbox], inbox.stats.late_frames
    ([2, 3], 1)
    >>> asyncio.run(inbox.get_latest()).seq, inbox.stats.late_frames
    (3, 2)
    """

    __slots__ = ("stats", "maxlen", "_items", "_waiter", "_reason")

    def __init__(self, stats: LinkStats, maxlen: int = 64, *, reason: str | None = None) -> None:
        """`reason` not None makes the inbox start failed (e.g. ``"not open"``)."""
        if maxlen < 1:
            raise ValueError(f"SampleInbox maxlen must be at least 1, got {maxlen}")
        self.stats = stats
        """Counters: `late_frames` counts every sample dropped unread."""
        self.maxlen = maxlen
        """How many samples are kept at most."""
        self._items: collections.deque[Sample] = collections.deque()
        self._waiter: asyncio.Future[None] | None = None
        self._reason = reason

    def __len__(self) -> int:
        return len(self._items)

    def __iter__(self) -> Iterator[Sample]:
        """The queued samples, oldest first (a snapshot; nothing is taken)."""
        return iter(tuple(self._items))

    @property
    def closed_reason(self) -> str | None:
        """Why the link is gone (what `get` raises once empty), or None while it is up."""
        return self._reason

    def put(self, sample: Sample) -> None:
        """Queue one sample (dropping and counting the oldest when full); wake the receiver."""
        items = self._items
        if len(items) >= self.maxlen:
            items.popleft()
            self.stats.late_frames += 1
        items.append(sample)
        self._wake()

    async def get(self) -> Sample:
        """The oldest queued sample, waiting for one; `LinkClosed` once failed and empty."""
        items = self._items
        while True:
            if items:
                return items.popleft()
            if self._reason is not None:
                raise LinkClosed(self._reason)
            self._waiter = asyncio.get_running_loop().create_future()
            try:
                await self._waiter
            finally:
                self._waiter = None

    async def get_latest(self) -> Sample:
        """The newest sample; older queued ones are dropped (counted in `stats.late_frames`)."""
        sample = await self.get()
        items = self._items
        while items:
            self.stats.late_frames += 1
            sample = items.popleft()
        return sample

    def fail(self, reason: str, *, replace: bool = True) -> None:
        """Mark the link lost and wake the receiver.

        With ``replace=False`` an earlier reason is kept (the first cause wins).
        """
        if replace or self._reason is None:
            self._reason = reason
        self._wake()

    def clear(self) -> None:
        """Drop the queued samples without counting them (they belong to an old session)."""
        self._items.clear()

    def reset(self) -> None:
        """A fresh session: queued samples dropped uncounted, the failure cleared."""
        self._items.clear()
        self._reason = None

    def _wake(self) -> None:
        w = self._waiter
        if w is not None and not w.done():
            w.set_result(None)


class LatencyRing:
    """Receipt times of recent samples by sequence number, for sample-to-command latency.

    A link notes every accepted sample (`note_received`); when it sends the
    command that echoes a sample's seq, `device_time` gives the device time to
    echo in the command and `note_sent` appends the host time from receipt to
    send (microseconds) to `stats.latencies_us`, trimmed to the newest half
    once it passes `keep` entries. Only the last `size` sequence numbers are
    remembered (a slot per ``seq % size``); a command for an older or unknown
    seq records nothing.

    >>> ring = LatencyRing(LinkStats())
    >>> ring.note_received(7, t_device=0.5, t_host=10.0)
    >>> ring.device_time(7), ring.note_sent(7, now=10.001) is not None, ring.note_sent(8, 10.0)
    (0.5, True, None)
    """

    __slots__ = ("stats", "size", "keep", "_seq", "_t")

    def __init__(self, stats: LinkStats, size: int = 256, keep: int = 200_000) -> None:
        if size < 1 or keep < 2:
            raise ValueError(f"LatencyRing needs size >= 1 and keep >= 2, got {size}, {keep}")
        self.stats = stats
        """`latencies_us` gets the measured latencies."""
        self.size = size
        """How many recent sequence numbers are remembered."""
        self.keep = keep
        """Past this many latencies the older half is dropped."""
        self._seq = [-1] * size
        self._t = [(0.0, 0.0)] * size

    def forget(self) -> None:
        """Drop every remembered sample (a new session: sequence numbers start again)."""
        self._seq = [-1] * self.size
        self._t = [(0.0, 0.0)] * self.size

    def note_received(self, seq: int, t_device: float, t_host: float) -> None:
        """Remember when sample `seq` (device time `t_device`) arrived (host time `t_host`)."""
        i = seq % self.size
        self._seq[i] = seq
        self._t[i] = (t_device, t_host)

    def device_time(self, seq: int) -> float:
        """Device time of the recent sample `seq` (0.0 when not remembered)."""
        i = seq % self.size
        return self._t[i][0] if self._seq[i] == seq else 0.0

    def note_sent(self, seq: int, now: float) -> float | None:
        """Record the latency of a command answering sample `seq`, sent at host time `now`.

        Returns it in microseconds, or None (nothing recorded) when `seq` is not
        a remembered sample or its receipt time was never set (0.0).
        """
        i = seq % self.size
        if self._seq[i] != seq:
            return None
        t_rx = self._t[i][1]
        if not t_rx:
            return None
        lat_us = (now - t_rx) * 1e6
        lat = self.stats.latencies_us
        lat.append(lat_us)
        if len(lat) > self.keep:
            del lat[: self.keep // 2]
        return lat_us


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
