"""The telemetry and operator socket: a Unix stream socket speaking msgpack maps.

Server -> client: one ``hello`` map on connect, then ``telemetry`` maps at
``telemetry.rate_hz`` (default 25 Hz, clamped to 1..50), ``trip`` maps when a
trip happens and ``reply`` maps answering requests. Client -> server:
``{"type": "request", "op": "arm" | "disarm" | "reset" | "stop"}``. The map
fields are listed in docs/telemetry.md.

Who may use it (the socket arms a rig): the socket file is created mode 0600
(0660 with ``operator.socket_group``) under a temporary name and renamed into
place once its mode is set, so no one connects through a wider mode even for an
instant; each connecting peer's uid (``SO_PEERCRED``) must be in
``operator.allowed_uids`` (default: the runtime's own uid and root), or it gets
one refusing reply and is disconnected (counted). Requests pass a token bucket
(``operator.request_rate_hz``, default 20, burst ``operator.request_burst``,
default 20): the excess is answered ``busy`` (counted) and never reaches the
tick; a client still sending after 100 busy answers in a row is disconnected
(counted as a flood): answering a flood costs the tick's process the GIL.

A slow client is dropped, never waited for: messages go out through the
transport without awaiting a drain, and a client whose unsent bytes exceed
``telemetry.client_buffer`` (default 256 KiB) is disconnected and counted.
The tick thread hands records over with `publish` (latest wins) and `post`
(queued, thread-safe); packing and socket writes happen on the event loop.

Records are the typed classes of `runtime.records.kinds` (`Hello`, `Telemetry`,
`TripSummary`, `Event`, `Reply`), as the tick builds them. A plain map (a tool or test
posting by hand) is parsed into its class on the event loop, a malformed one dropped
and counted (`schema_errors`, with the first error kept in `schema_error`).
Listeners (the MQTT bridge) get the typed record.

What does not live here: the record schemas (`runtime.records.kinds`), the tick that
fills them (`runtime.realtime.tick`), the dashboard that reads them (`runtime.dashboard`).
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import os
import socket
import struct
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import msgpack

from runtime.records.kinds import (
    Hello,
    RecordError,
    Reply,
    Telemetry,
    WireRecord,
    as_record,
    parse_live_record,
)

RequestHandler = Callable[[str, Callable[[bool, str], None]], None]


class _Client:
    def __init__(self, writer: asyncio.StreamWriter) -> None:
        self.writer = writer
        self.closed = False
        self.busy_run = 0
        """Requests answered busy since the last one that got through."""


class TokenBucket:
    """`rate` tokens per second, at most `burst` saved; `take()` spends one or says no."""

    def __init__(self, rate: float, burst: float) -> None:
        self.rate = float(rate)
        self.burst = float(burst)
        self.tokens = float(burst)
        self.t = time.monotonic()

    def take(self) -> bool:
        """Spend one token if there is one."""
        now = time.monotonic()
        self.tokens = min(self.burst, self.tokens + (now - self.t) * self.rate)
        self.t = now
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False


def peer_uid(sock: socket.socket) -> int | None:
    """The connecting process's uid (Linux ``SO_PEERCRED``), None where unsupported."""
    opt = getattr(socket, "SO_PEERCRED", None)
    if opt is None:
        return None
    try:
        _pid, uid, _gid = struct.unpack("3i", sock.getsockopt(socket.SOL_SOCKET, opt,
                                                              struct.calcsize("3i")))
    except OSError:
        return None
    return int(uid)


class TelemetryServer:
    """The socket server (see the module docstring). Run `serve()` as a task.

    ``socket_gid``: a group whose members may connect (mode 0660; None: 0600).
    ``allowed_uids``: peer uids accepted (None: this process's uid and root).
    ``request_rate_hz``/``request_burst``: the token bucket every request passes.
    """

    def __init__(self, path: str | Path, hello: Hello | dict[str, Any],
                 on_request: RequestHandler,
                 rate_hz: float = 25.0, client_buffer: int = 256 * 1024,
                 socket_gid: int | None = None, allowed_uids: Iterable[int] | None = None,
                 request_rate_hz: float = 20.0, request_burst: float = 20.0) -> None:
        self.path = str(path)
        self.socket_gid = socket_gid
        self.allowed_uids = (set(int(u) for u in allowed_uids) if allowed_uids is not None
                             else {os.getuid(), 0})
        self.bucket = TokenBucket(request_rate_hz, request_burst)
        self.requests = 0
        """Requests passed on to the loop."""
        self.busy = 0
        """Requests answered ``busy`` (over the rate limit)."""
        self.refused_peers = 0
        """Connections refused because the peer's uid is not allowed."""
        self.flood_limit = 100
        """Busy answers in a row after which a client is disconnected as a flood."""
        self.flood_drops = 0
        """Clients disconnected for flooding."""
        self._busy_replies: dict[str, bytes] = {}
        self.hello: dict[str, Any] = as_record(hello, Hello).to_wire()
        """The hello as a map; set fields with `update_hello` (``status_flags``,
        ``preflight``). Checked on every connect."""
        self.on_request = on_request
        self.rate_hz = min(50.0, max(1.0, float(rate_hz)))
        self.client_buffer = int(client_buffer)
        self.clients: list[_Client] = []
        self.dropped_clients = 0
        self.sent = 0
        self._latest: Telemetry | dict[str, Any] | None = None
        self.schema_errors = 0
        """Records dropped because they did not match their schema (a bug: say so)."""
        self.schema_error = ""
        """The first such record's error."""
        self.listeners: list[Callable[[WireRecord], None]] = []
        """Called on the event loop with every record sent (telemetry at the socket rate,
        trips, events), whether or not a client is connected: the MQTT publisher."""
        self._loop: asyncio.AbstractEventLoop | None = None
        self._server: asyncio.AbstractServer | None = None

    @property
    def hello_record(self) -> Hello:
        """The hello as sent (checked against its schema)."""
        return Hello.from_wire(self.hello)

    def update_hello(self, **fields: Any) -> None:
        """Set hello fields (``status_flags=[...]``, ``preflight={...}``), checked now:
        clients connecting later get them."""
        self.hello = Hello.from_wire({**self.hello, **fields}).to_wire()

    # ------------------------------------------------------------ from the tick thread
    def publish(self, record: Telemetry | dict[str, Any]) -> None:
        """Offer the newest telemetry record (thread-safe; only the latest is sent)."""
        self._latest = record

    def post(self, record: WireRecord | dict[str, Any]) -> None:
        """Send a record to every client soon (thread-safe): trips and events."""
        loop = self._loop
        if loop is not None and not loop.is_closed():
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(self._deliver, record)

    # ------------------------------------------------------------ event-loop side
    async def serve(self) -> None:
        """Listen and stream telemetry until cancelled; removes the socket file at the end."""
        self._loop = asyncio.get_running_loop()
        Path(self.path).parent.mkdir(parents=True, exist_ok=True)
        self._server = await asyncio.start_unix_server(self._handle, sock=self._bind())
        try:
            period = 1.0 / self.rate_hz
            while True:
                await asyncio.sleep(period)
                rec, self._latest = self._latest, None
                if rec is not None:
                    self._deliver(rec)
        finally:
            self._server.close()
            for c in list(self.clients):
                self._drop(c, count=False)
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self.path)

    def _bind(self) -> socket.socket:
        """A listening socket at `path` whose mode was set before it got its name.

        Bound under a temporary name, chmod 0600 (0660 and chgrp with a group), listening,
        then renamed over `path`: a client can never find the socket with the umask's mode,
        nor find it before it listens. (The rig lock makes this runtime the only owner
        of `path`; a socket left there by a killed run is replaced.)
        """
        tmp = f"{self.path}.{os.getpid()}.tmp"
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            sock.bind(tmp)
            if self.socket_gid is not None:
                os.chown(tmp, -1, self.socket_gid)
                os.chmod(tmp, 0o660)
            else:
                os.chmod(tmp, 0o600)
            sock.listen(16)
            os.rename(tmp, self.path)
        except BaseException:
            sock.close()
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise
        sock.setblocking(False)
        return sock

    @property
    def counters(self) -> dict[str, int]:
        """Operator-socket figures for the run summary."""
        return {"requests": self.requests, "busy": self.busy,
                "refused_peers": self.refused_peers, "flood_drops": self.flood_drops,
                "dropped_clients": self.dropped_clients}

    def _typed(self, record: WireRecord | dict[str, Any]) -> WireRecord | None:
        """The record as its class (a dict from the tick parsed here); None and counted
        when it does not match its schema."""
        if isinstance(record, WireRecord):
            return record
        try:
            return parse_live_record(record)
        except RecordError as exc:
            self.schema_errors += 1
            self.schema_error = self.schema_error or str(exc)
            return None

    def _deliver(self, record: WireRecord | dict[str, Any]) -> None:
        typed = self._typed(record)
        if typed is None:
            return
        for listener in self.listeners:
            try:
                listener(typed)
            except Exception:  # noqa: BLE001 - a listener must never stop the telemetry
                pass
        # A map that parsed is sent as it came: `to_wire` of its record gives the same
        # bytes (tests/test_record_kinds.py), and packing it costs less on this thread.
        self._broadcast(record if isinstance(record, dict) else typed.to_wire())

    def _broadcast(self, wire: dict[str, Any]) -> None:
        if not self.clients:
            return
        data = msgpack.packb(wire, use_bin_type=True)
        for c in list(self.clients):
            self._send(c, data)

    def _send(self, c: _Client, data: bytes) -> None:
        if c.closed:
            return
        transport = c.writer.transport
        if transport.is_closing():
            self._drop(c, count=False)
            return
        if transport.get_write_buffer_size() + len(data) > self.client_buffer:
            self._drop(c, count=True)
            return
        c.writer.write(data)
        self.sent += 1

    def _drop(self, c: _Client, count: bool) -> None:
        if c.closed:
            return
        c.closed = True
        if count:
            self.dropped_clients += 1
        if c in self.clients:
            self.clients.remove(c)
        with contextlib.suppress(Exception):
            c.writer.transport.abort()

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        c = _Client(writer)
        # Never let the transport pause us: we police the buffer ourselves.
        writer.transport.set_write_buffer_limits(high=self.client_buffer * 4)
        sock = writer.get_extra_info("socket")
        uid = peer_uid(sock) if sock is not None else None
        if uid is not None and uid not in self.allowed_uids:
            self.refused_peers += 1
            with contextlib.suppress(Exception):
                writer.write(msgpack.packb(Reply(
                    op="", ok=False, message=f"uid {uid} may not use this rig's operator "
                    "socket (operator.allowed_uids)").to_wire(), use_bin_type=True))
                writer.close()
            return
        if sock is not None:  # bound what the kernel holds for a client too
            with contextlib.suppress(OSError):
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, self.client_buffer)
        self.clients.append(c)
        try:
            hello = self.hello_record.to_wire()
        except RecordError as exc:  # a bug in what set the hello: send it, and count it
            self.schema_errors += 1
            self.schema_error = self.schema_error or str(exc)
            hello = dict(self.hello)
        self._send(c, msgpack.packb(hello, use_bin_type=True))
        unpacker = msgpack.Unpacker(raw=False, max_buffer_size=1 << 20)
        try:
            while not c.closed:
                chunk = await reader.read(4096)
                if not chunk:
                    break
                unpacker.feed(chunk)
                for msg in unpacker:
                    self._on_message(c, msg)
                    if c.busy_run > self.flood_limit:
                        # Still sending after this many busy answers: a flood, not an
                        # operator. Cut it off (counted): answering costs the tick's
                        # process CPU and the GIL.
                        self.flood_drops += 1
                        self._drop(c, count=False)
                        break
        except (ConnectionError, ValueError, msgpack.UnpackException):
            pass
        finally:
            self._drop(c, count=False)

    def _on_message(self, c: _Client, msg: Any) -> None:
        if not isinstance(msg, dict) or msg.get("type") != "request":
            self._reply(c, str(msg.get("op", "")) if isinstance(msg, dict) else "", False,
                        'expected {"type": "request", "op": ...}')
            return
        op = str(msg.get("op", ""))
        loop = self._loop
        if not self.bucket.take():
            # Over the rate limit: answered here, never queued for the tick.
            self.busy += 1
            c.busy_run += 1
            data = self._busy_replies.get(op)
            if data is None:
                data = msgpack.packb(Reply(op=op, ok=False, message="busy: too many "
                                           "requests, try again shortly").to_wire(),
                                     use_bin_type=True)
                if len(self._busy_replies) < 16:
                    self._busy_replies[op] = data
            self._send(c, data)
            return
        self.requests += 1
        c.busy_run = 0

        def reply(ok: bool, message: str) -> None:
            if loop is not None and not loop.is_closed():
                with contextlib.suppress(RuntimeError):
                    loop.call_soon_threadsafe(self._reply, c, op, ok, message)

        self.on_request(op, reply)

    def _reply(self, c: _Client, op: str, ok: bool, message: str) -> None:
        self._send(c, msgpack.packb(Reply(op=op, ok=ok, message=message).to_wire(),
                                    use_bin_type=True))


class TelemetryClient:
    """A small client for tests and tools: read maps, send requests."""

    def __init__(self, path: str | Path) -> None:
        self.path = str(path)
        self.reader: asyncio.StreamReader | None = None
        self.writer: asyncio.StreamWriter | None = None
        self.unpacker = msgpack.Unpacker(raw=False)
        self.pending: list[dict[str, Any]] = []

    async def connect(self) -> dict[str, Any]:
        """Connect; returns the hello map."""
        self.reader, self.writer = await asyncio.open_unix_connection(self.path)
        return await self.next("hello")

    async def next(self, kind: str | None = None, timeout: float = 5.0) -> dict[str, Any]:
        """The next map (of `kind`, skipping others)."""
        assert self.reader is not None
        async with asyncio.timeout(timeout):
            while True:
                while self.pending:
                    msg = self.pending.pop(0)
                    if kind is None or msg.get("type") == kind:
                        return msg
                chunk = await self.reader.read(65536)
                if not chunk:
                    raise ConnectionError("telemetry socket closed")
                self.unpacker.feed(chunk)
                self.pending.extend(self.unpacker)

    async def next_record(self, kind: str | None = None, timeout: float = 5.0) -> WireRecord:
        """The next record (of `kind`) as its typed class (`runtime.records.kinds`)."""
        return parse_live_record(await self.next(kind, timeout))

    async def request(self, op: str, timeout: float = 5.0) -> dict[str, Any]:
        """Send a request and wait for its reply."""
        assert self.writer is not None
        self.writer.write(msgpack.packb({"type": "request", "op": op}, use_bin_type=True))
        await self.writer.drain()
        while True:
            msg = await self.next("reply", timeout)
            if msg.get("op") == op:
                return msg

    async def close(self) -> None:
        """Close the connection."""
        if self.writer is not None:
            self.writer.close()
            with contextlib.suppress(Exception):
                await self.writer.wait_closed()


class MqttBridge:
    """The socket's records on the broker too, and the broker's requests into the loop.

    Listens to a `TelemetryServer` (add `on_record` to its `listeners`) and runs a
    `drivers.mqtt_link.MqttPublisher` while `run()` is awaited: decimated
    telemetry on ``<prefix>/<rig>/telemetry`` (at `rate_hz`, default 10), the
    supervisor mode (retained, with expiry) on ``<prefix>/<rig>/mode`` whenever
    mode, latch or fallback change, trip summaries on ``<prefix>/<rig>/trip``,
    and the socket's hello map RETAINED on ``<prefix>/<rig>/telemetry/hello``
    (re-published every `hello_refresh_s`, expiring `hello_expiry_s` after the
    last one, so a dead runtime's hello does not linger). Requests arriving on
    ``<prefix>/<rig>/request`` go to `on_request` (the same path as the
    socket's) when ``[link.mqtt] remote_requests`` lists them; ``stop`` always.
    """

    def __init__(self, settings: Any, hello: Hello | dict[str, Any],
                 on_request: RequestHandler,
                 rate_hz: float = 10.0, hello_refresh_s: float = 5.0,
                 hello_expiry_s: float = 30.0, reply_timeout_s: float = 2.0,
                 notify: Callable[[str], None] | None = None,
                 connect_warn_s: float = 3.0) -> None:
        self.settings = settings
        self.notify = notify
        """Where a one-line warning goes when the broker is not reachable at start."""
        self.connect_warn_s = float(connect_warn_s)
        # A typed hello is checked; a map is published as given (tools such as the fleet
        # test rigs publish partial hellos, as an older corral on the broker may).
        self.hello: dict[str, Any] = (hello.to_wire() if isinstance(hello, Hello)
                                      else {"type": "hello", **hello})
        """The retained hello as a map (fields set with `update_hello`)."""
        self.on_request = on_request
        self.rate_hz = float(rate_hz)
        self.hello_refresh_s = float(hello_refresh_s)
        self.hello_expiry_s = float(hello_expiry_s)
        self.reply_timeout_s = float(reply_timeout_s)
        self.publisher: Any = None
        self._pub: Any = None
        self.stats: dict[str, Any] = {"published": 0, "dropped": 0, "requests": []}
        """Publisher figures, kept after `run` ends (the run summary's ``mqtt``)."""
        self._mode_key: tuple[Any, ...] | None = None

    @property
    def hello_topic(self) -> str:
        """Where the retained hello goes."""
        from drivers.mqtt_link import Topics

        return f"{Topics(self.settings.prefix, self.settings.rig).telemetry}/hello"

    def update_hello(self, **fields: Any) -> None:
        """Set hello fields, checked (published at the next refresh)."""
        self.hello = Hello.from_wire({**self.hello, **fields}).to_wire()

    def on_record(self, rec: WireRecord | dict[str, Any]) -> None:
        """A record the socket sends (event-loop thread): forward what remote tools read.

        The socket hands over typed records; a map (a tool publishing by hand) is parsed
        when it matches its schema and forwarded as given when it does not."""
        pub = self.publisher
        if pub is None:
            return
        if isinstance(rec, dict):
            with contextlib.suppress(RecordError):
                rec = parse_live_record(rec)
        state: tuple[Any, ...] | None = None
        if isinstance(rec, Telemetry):
            kind, wire = rec.KIND, rec.to_wire()
            state = (rec.mode, rec.latched, rec.fallback,
                     rec.trip.rule if rec.trip is not None else None)
        elif isinstance(rec, WireRecord):
            kind, wire = rec.KIND, rec.to_wire()
        else:  # a partial map, forwarded as given
            kind, wire = str(rec.get("type")), rec
            trip = rec.get("trip")
            state = (rec.get("mode"), rec.get("latched"), rec.get("fallback"),
                     trip.get("rule") if isinstance(trip, dict) else None)
        if kind == "telemetry" and state is not None:
            if state[:3] != self._mode_key:
                self._mode_key = state[:3]
                pub.publish_mode(str(state[0]), latched=bool(state[1]), fallback=state[2],
                                 trip=state[3])
            pub.publish_telemetry(wire)
        elif kind == "trip":
            pub.publish_trip(wire)

    async def _remote(self, op: str, request: dict[str, Any]) -> tuple[bool, str]:
        loop = asyncio.get_running_loop()
        fut: asyncio.Future[tuple[bool, str]] = loop.create_future()

        def done(ok: bool, message: str) -> None:
            if not fut.done():
                fut.set_result((ok, message))

        def reply(ok: bool, message: str) -> None:  # called from the tick thread
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(done, ok, message)

        self.on_request(op, reply)
        try:
            return await asyncio.wait_for(fut, self.reply_timeout_s)
        except TimeoutError:
            return False, f"{op}: no answer from the loop within {self.reply_timeout_s:g} s"

    async def run(self) -> None:
        """Publish until cancelled (reconnecting in the background; never raises on an outage)."""
        from drivers.mqtt_link import MqttPublisher

        payload = msgpack.packb(self.hello, use_bin_type=True)
        async with MqttPublisher(self.settings, on_request=self._remote,
                                 telemetry_hz=self.rate_hz) as pub:
            self.publisher = pub
            warn = asyncio.ensure_future(self._warn_if_unreachable(pub))
            try:
                while True:
                    # No public call publishes a retained map on an arbitrary topic yet.
                    pub._enqueue(self.hello_topic, payload, 1, True,
                                 int(math.ceil(self.hello_expiry_s)))
                    await asyncio.sleep(self.hello_refresh_s)
            finally:
                warn.cancel()
                pub.publish_mode("ended", online=False)
                self.publisher = None
                self._pub = pub

    async def _warn_if_unreachable(self, pub: Any) -> None:
        """Tell the operator once when the broker does not answer (the run goes on)."""
        if not await pub.wait_connected(self.connect_warn_s) and self.notify is not None:
            self.notify(f"corral: telemetry broker {self.settings.host}:{self.settings.port} "
                        f"is not reachable; the run goes on and keeps trying to publish")

    @property
    def summary(self) -> dict[str, Any]:
        """Publisher figures (the run summary's ``mqtt``): published, dropped, requests."""
        pub = self.publisher or self._pub
        if pub is None:
            return dict(self.stats)
        return {"published": pub.published, "dropped": pub.dropped,
                "requests": [list(r) for r in pub.requests], "connected": pub.connected,
                "broker": f"{self.settings.host}:{self.settings.port}",
                "rig": self.settings.rig}
