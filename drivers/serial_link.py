"""The serial link: the corral wire protocol over a serial port, and its device side.

What lives here: `SerialLink`, the host side (pyserial opened off the event loop
through pyserial-asyncio-fast, hello handshake, rig-clocked `receive`, `send`,
latency statistics, `reconnect` after an unplug); `parse_serial_url`;
`DeviceEndpoint`, a small synchronous device side over a file descriptor (a
pseudo-terminal master) that simulated devices and tests build on; `open_pty`.
What does not: the codec (`drivers.wire`), any control or rig model.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import errno
import os
import select
import time
import tty
from collections.abc import Callable
from typing import Any

import serial
import serial_asyncio_fast

from drivers.base import (
    Command,
    Hello,
    LatencyRing,
    Link,
    LinkClosed,
    LinkStats,
    Sample,
    SampleInbox,
    await_hello,
    new_session,
)
from drivers.command_guard import CommandGuard
from drivers.sequence import SampleGate
from drivers.wire import (
    HOST_HELLO_RIG_ID,
    PROTOCOL_VERSION,
    Fault,
    FrameDecoder,
    Heartbeat,
    Message,
    Stop,
    encode_message,
    host_hello,
)

DEFAULT_BAUD = 115200


class HandshakeError(LinkClosed):
    """The device did not complete the hello handshake (silent, or wrong protocol)."""


def parse_serial_url(url: str) -> tuple[str, int]:
    """Split ``serial:/dev/ttyUSB0@115200`` into ``("/dev/ttyUSB0", 115200)``.

    The ``@baud`` part is optional (default 115200); ``serial://`` is accepted too.

    >>> parse_serial_url("serial:/dev/pts/5@230400")
    ('/dev/pts/5', 230400)
    """
    if not url.startswith("serial:"):
        raise ValueError(f"not a serial URL (want serial:/path[@baud]): {url!r}")
    rest = url[len("serial:") :]
    if rest.startswith("//"):
        rest = rest[2:]
    path, sep, baud_s = rest.rpartition("@")
    if not sep:
        path, baud_s = rest, ""
    if not path:
        raise ValueError(f"serial URL has no device path: {url!r}")
    if not baud_s:
        return path, DEFAULT_BAUD
    try:
        baud = int(baud_s)
    except ValueError:
        raise ValueError(f"baud rate in {url!r} is not an integer: {baud_s!r}") from None
    if baud <= 0:
        raise ValueError(f"baud rate must be positive in {url!r}")
    return path, baud



class _Protocol(asyncio.Protocol):
    __slots__ = ("link", "lost")

    def __init__(self, link: SerialLink) -> None:
        self.link = link
        self.lost: asyncio.Future[None] = asyncio.get_running_loop().create_future()

    def data_received(self, data: bytes) -> None:
        self.link._on_data(data)

    def connection_lost(self, exc: Exception | None) -> None:
        if not self.lost.done():
            self.lost.set_result(None)
        self.link._on_lost(self, exc)


class SerialLink(Link):
    """Host side of the corral wire protocol over a serial port.

    ``async with SerialLink("/dev/ttyACM0") as link:`` opens the port (in a worker
    thread, never on the event loop), asks for and waits for the device hello,
    then `receive()` yields samples as the rig clocks them out and `send()`
    writes commands. `receive()` raises `LinkClosed` when the port goes away;
    `reconnect()` opens it again (same path, e.g. a /dev/serial/by-id link)
    without restarting the process.

    Statistics: `stats` (a `LinkStats`); `stats.latencies_us` gets the host time
    from receipt of a sample to the send of the command that echoes its seq.
    Extra read-only state: `device_status` (last heartbeat or sample status),
    `faults` (recent `Fault` reports), `device_stopped`, `send_drops`.
    """

    def __init__(
        self,
        path: str,
        baud: int = DEFAULT_BAUD,
        *,
        hello_timeout_s: float = 2.0,
        queue_size: int = 64,
        max_write_buffer: int = 4096,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.path = path
        self.baud = baud
        self.hello_timeout_s = hello_timeout_s
        self.max_write_buffer = max_write_buffer
        self.stats = LinkStats()
        self.hello = None
        self.device_status = 0
        self.device_stopped = False
        self.faults: collections.deque[Fault] = collections.deque(maxlen=32)
        self.send_drops = 0
        self._clock = clock
        self._decoder = FrameDecoder(self.stats, synced=False)
        self._tracker = SampleGate(self.stats)
        self.events: collections.deque[tuple[str, str]] = collections.deque(maxlen=64)
        """Link events for the operator (a device hello mid-run): (kind, detail)."""
        self._samples = SampleInbox(self.stats, queue_size, reason="not open")
        self._hello_waiter: asyncio.Future[Hello] | None = None
        self._transport: asyncio.Transport | None = None
        self._protocol: _Protocol | None = None
        self._host_seq = 0
        self.session = 0
        """This host's session token (protocol v2), drawn at the first open."""
        self._taken_by = 0
        # Recent samples' (t_device, t_host), for latency and the command's t echo.
        self._ring = LatencyRing(self.stats)

    @classmethod
    def from_url(cls, url: str, **kwargs: Any) -> SerialLink:
        """Build from ``serial:/path@baud`` (keyword arguments pass through)."""
        path, baud = parse_serial_url(url)
        return cls(path, baud, **kwargs)

    @property
    def url(self) -> str:
        """This link as a ``serial:`` URL."""
        return f"serial:{self.path}@{self.baud}"

    # ------------------------------------------------------------ callbacks (event loop)

    def _on_data(self, data: bytes) -> None:
        now = self._clock()
        for msg in self._decoder.feed(data):
            if type(msg) is Sample:
                if self.hello is None:
                    continue  # before the handshake: belongs to no session
                if not self._tracker.accept(msg):
                    continue
                msg.t_host = now
                self.stats.last_sample_host_s = now
                self.device_status = msg.status
                self._ring.note_received(msg.seq, msg.t_device, now)
                self._samples.put(msg)
            elif type(msg) is Hello:
                self._on_hello(msg)
            elif type(msg) is Heartbeat:
                self.device_status = msg.status
            elif type(msg) is Fault:
                self.faults.append(msg)
            elif type(msg) is Stop:
                self.device_stopped = True
            # Commands from the device side are meaningless here and ignored.

    def _on_hello(self, hello: Hello) -> None:
        if hello.rig_id == HOST_HELLO_RIG_ID and not hello.channels:
            return  # our own hello echoed by a loopback; not a device
        if self._hello_waiter is None:
            if self.hello is None:
                return  # unsolicited, outside a handshake: belongs to no session
            # Mid-session: never adopted silently (a forged hello must not reset the
            # numbering or change the channels); the operator sees it. A device that
            # really restarted is picked up by the gate's resynchronisation.
            self.stats.hellos_midrun += 1
            self.events.append(("link", f"device hello mid-run from {hello.rig_id!r} "
                                f"({len(hello.channels)} channels, {hello.sample_rate_hz:g} Hz, "
                                f"session {'ours' if hello.session == self.session else 'other'}"
                                "): not adopted"))
            return
        if hello.session != self.session:
            self._taken_by = hello.session  # the device obeys another host
            return
        self.hello = hello
        self._tracker.start(hello)
        self.device_stopped = False
        if self._hello_waiter is not None and not self._hello_waiter.done():
            self._hello_waiter.set_result(hello)

    def _on_lost(self, protocol: _Protocol, exc: Exception | None) -> None:
        if protocol is not self._protocol:
            return
        reason = f"serial port {self.path} lost: {exc}" if exc else "link closed"
        self.stats.connected = False
        self._transport = None
        self._samples.fail(reason)
        if self._hello_waiter is not None and not self._hello_waiter.done():
            self._hello_waiter.set_exception(LinkClosed(reason))

    # ------------------------------------------------------------ Link API

    async def open(self) -> None:
        """Open the port and complete the hello handshake.

        Raises `LinkClosed` if the port cannot be opened and `HandshakeError`
        if no compatible hello arrives within `hello_timeout_s`.
        """
        if self._transport is not None:
            return
        loop = asyncio.get_running_loop()
        self._decoder.reset(synced=False)
        self._tracker.reset()
        self._samples.clear()
        self.hello = None
        try:
            transport, protocol = await serial_asyncio_fast.create_serial_connection(
                loop, lambda: _Protocol(self), self.path, baudrate=self.baud
            )
        except (serial.SerialException, OSError, ValueError) as exc:
            raise LinkClosed(f"cannot open serial port {self.path}: {exc}") from exc
        assert isinstance(protocol, _Protocol)
        self._transport = transport
        self._protocol = protocol
        self._samples.reset()
        self.stats.connected = True
        transport.write(b"\x00")  # a leading delimiter: the device starts on a clean frame
        try:
            await self._handshake()
        except BaseException:
            await self._disconnect()
            raise

    async def _handshake(self) -> None:
        loop = asyncio.get_running_loop()
        self._hello_waiter = loop.create_future()
        if not self.session:
            # One token per link object: a reconnect asks again as the same owner, so a
            # device that still remembers it grants it at once.
            self.session = new_session()
        self._taken_by = 0

        async def send_hello() -> None:
            self._write(encode_message(host_hello(self.session), seq=self._next_seq(), t=0.0))

        try:
            hello = await await_hello(
                self._hello_waiter, send_hello, self.hello_timeout_s,
                taken=lambda: bool(self._taken_by),
                refused=(f"device on {self.url} is driven by another host session: another "
                         "runtime owns this rig; stop it first (the device frees the rig once "
                         "its commands have stopped for its lease)"),
                silent=lambda: HandshakeError(
                    f"no hello from {self.url} within {self.hello_timeout_s:g} s: is the "
                    f"device powered, on this port, and speaking corral wire protocol "
                    f"v{PROTOCOL_VERSION}?"),
            )
        finally:
            self._hello_waiter = None
        # Anything before the hello belongs to an earlier session, receipt times included
        # (a command answering a reused sequence number must not count an old receipt).
        self._samples.clear()
        self._ring.forget()
        if hello.protocol != PROTOCOL_VERSION:
            raise HandshakeError(
                f"device {hello.rig_id!r} on {self.url} speaks wire protocol v{hello.protocol}, "
                f"this host speaks v{PROTOCOL_VERSION}"
            )

    async def receive(self) -> Sample:
        """Next sample (oldest first; at most `queue_size` are kept, older ones dropped)."""
        return await self._samples.get()

    async def receive_latest(self) -> Sample:
        """Newest sample; older queued ones are dropped (counted in `stats.late_frames`)."""
        return await self._samples.get_latest()

    async def send(self, command: Command) -> None:
        """Write one command; records latency when it answers a recent sample."""
        if self._transport is None:
            raise LinkClosed(self._samples.closed_reason or "link closed")
        command.session = self.session
        frame = encode_message(command, t=self._ring.device_time(command.seq))
        if self._transport.get_write_buffer_size() > self.max_write_buffer:
            self.send_drops += 1  # the device is not reading; do not pile up stale commands
            return
        self._transport.write(frame)
        self.stats.frames_out += 1
        self._ring.note_sent(command.seq, self._clock())

    async def send_message(self, msg: Message) -> None:
        """Send a heartbeat, stop or other message with the host's own sequence number."""
        if self._transport is None:
            raise LinkClosed(self._samples.closed_reason or "link closed")
        self._write(encode_message(msg, seq=self._next_seq()))

    async def close(self) -> None:
        """Send a stop (outputs off), then close the port. Never raises."""
        with contextlib.suppress(Exception):
            if self._transport is not None:
                self._write(encode_message(Stop(self._next_seq(), 0.0, 0)))
        with contextlib.suppress(Exception):
            await self._disconnect()
        self._samples.fail("link closed")

    async def reconnect(
        self, timeout_s: float = 10.0, *, first_delay_s: float = 0.05, max_delay_s: float = 1.0
    ) -> None:
        """Re-open the port after it went away, retrying with exponential backoff.

        Raises `LinkClosed` (the last error) if it is still gone after `timeout_s`.
        """
        await self._disconnect()
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        delay = first_delay_s
        while True:
            try:
                await self.open()
            except LinkClosed as exc:
                if loop.time() + delay > deadline:
                    raise LinkClosed(
                        f"{self.url} still unavailable after {timeout_s:g} s: {exc}"
                    ) from exc
                await asyncio.sleep(delay)
                delay = min(delay * 2, max_delay_s)
            else:
                self.stats.reconnects += 1
                return

    # ------------------------------------------------------------ helpers

    def _next_seq(self) -> int:
        self._host_seq = (self._host_seq + 1) & 0xFFFFFFFF
        return self._host_seq

    def _write(self, frame: bytes) -> None:
        if self._transport is not None:
            self._transport.write(frame)
            self.stats.frames_out += 1

    async def _disconnect(self) -> None:
        transport, protocol = self._transport, self._protocol
        self._transport = None
        self.stats.connected = False
        self._samples.fail("link closed", replace=False)
        if transport is not None:
            transport.close()
        if protocol is not None:
            # Closing happens in a worker thread inside the transport; wait for it.
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(asyncio.shield(protocol.lost), 2.0)


# ============================================================================ device side


def open_pty(link_path: str | None = None) -> tuple[int, int, str]:
    """Create a raw pseudo-terminal: returns ``(master_fd, slave_fd, path)``.

    `path` is the slave's name, or `link_path` made to point at it (replaced
    atomically), as a stable name a host can re-open after a re-plug.
    """
    master, slave = os.openpty()
    tty.setraw(slave)
    os.set_blocking(master, False)
    path = os.ttyname(slave)
    if link_path:
        tmp = f"{link_path}.tmp{os.getpid()}"
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        os.symlink(path, tmp)
        os.replace(tmp, link_path)
        path = link_path
    return master, slave, path


class DeviceEndpoint:
    """Device side of the wire protocol over a file descriptor (synchronous).

    Meant for simulated devices and tests, usually run in a thread that sleeps
    to absolute deadlines::

        dev = DeviceEndpoint.create_pty(hello)       # dev.path is what the host opens
        while running:
            dev.poll(timeout)                        # applies commands, answers hellos
            u, status = dev.outputs()                # command-timeout fail-safe applied
            y = plant.step(u)
            dev.send_sample(y, status)

    It answers every host hello with its own, feeds commands and stops into a
    `CommandGuard` (built from the hello's limits and command timeout) and
    never raises on a missing host: writes that cannot go out are counted in
    `write_drops`.
    """

    def __init__(
        self,
        fd: int,
        hello: Hello,
        *,
        clock: Callable[[], float] = time.monotonic,
        extra_fds: tuple[int, ...] = (),
    ) -> None:
        self.fd = fd
        self.hello = hello
        self.path = ""
        self.stats = LinkStats(connected=True)
        self.guard = CommandGuard(hello.output_limits, hello.command_timeout_s)
        self.decoder = FrameDecoder(self.stats, synced=False)
        self.seq = 0
        self.write_drops = 0
        self.host_hellos = 0
        self.last_command: Command | None = None
        self._clock = clock
        self._t0 = clock()
        self._extra_fds = extra_fds
        self._closed = False
        os.set_blocking(fd, False)
        self._write(b"\x00")  # a leading delimiter marks a clean frame start

    @classmethod
    def create_pty(
        cls, hello: Hello, *, link_path: str | None = None, **kwargs: Any
    ) -> DeviceEndpoint:
        """A device on a fresh pseudo-terminal; the host opens `.path`."""
        master, slave, path = open_pty(link_path)
        dev = cls(master, hello, extra_fds=(slave,), **kwargs)
        dev.path = path
        return dev

    def now(self) -> float:
        """Device time (s since this endpoint started)."""
        return self._clock() - self._t0

    def fileno(self) -> int:
        """The file descriptor (for select or an event loop's add_reader)."""
        return self.fd

    def _write(self, data: bytes) -> bool:
        try:
            n = os.write(self.fd, data)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EIO, errno.EWOULDBLOCK):
                self.write_drops += 1
                return False
            raise
        if n != len(data):  # partial write: the rest would tear a frame; the
            self.write_drops += 1  # receiver resynchronises at the next delimiter
            return False
        return True

    def send(self, msg: Message, *, seq: int | None = None, t: float | None = None) -> bool:
        """Send any message; Hello/Heartbeat/Fault/Stop get the device seq and time."""
        if seq is None:
            self.seq = (self.seq + 1) & 0xFFFFFFFF
            seq = self.seq
        ok = self._write(encode_message(msg, seq=seq, t=self.now() if t is None else t))
        self.stats.frames_out += ok
        return ok

    def send_hello(self, session: int | None = None) -> bool:
        """Announce the device (also done automatically on every host hello), with the
        session it granted (default: the current owner's, 0 when none).

        A delimiter goes first, so a host that just opened the port (and drops
        everything before its first delimiter) sees this hello whole.
        """
        if session is None:
            session = self.guard.owner or 0
        self._write(b"\x00")
        return self.send(dataclasses.replace(self.hello, session=session))

    def send_sample(self, y: tuple[float, ...], status: int = 0, t: float | None = None) -> int:
        """Send one sample with the next sequence number; returns that number."""
        self.seq = (self.seq + 1) & 0xFFFFFFFF
        s = Sample(self.seq, self.now() if t is None else t, tuple(y), status)
        self.stats.frames_out += self._write(encode_message(s))
        return self.seq

    def poll(self, timeout: float = 0.0) -> list[Message]:
        """Wait up to `timeout` s for input, handle it, return what arrived."""
        if self._closed:
            return []
        try:
            r, _, _ = select.select([self.fd], [], [], max(0.0, timeout))
        except (OSError, ValueError):
            return []
        if not r:
            return []
        try:
            data = os.read(self.fd, 65536)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EIO, errno.EWOULDBLOCK):
                return []  # EIO: no host has the other end open
            raise
        msgs = self.decoder.feed(data)
        now = self.now()
        for m in msgs:
            if type(m) is Command:
                if self.guard.on_command(m, now):
                    self.last_command = m
            elif type(m) is Stop:
                self.guard.on_stop()
            elif type(m) is Hello:
                # The session handshake: granted (and re-armed) or refused (the
                # answer names the owner's session, so the asker learns it).
                self.host_hellos += 1
                self.send_hello(self.guard.on_host_hello(m.session, now))
        return msgs

    def outputs(self) -> tuple[tuple[float, ...], int]:
        """Outputs to apply now and status bits (see `CommandGuard.outputs`)."""
        return self.guard.outputs(self.now())

    def close(self) -> None:
        """Close the descriptor(s): to the host this looks like an unplug."""
        if self._closed:
            return
        self._closed = True
        for fd in (self.fd, *self._extra_fds):
            with contextlib.suppress(OSError):
                os.close(fd)
