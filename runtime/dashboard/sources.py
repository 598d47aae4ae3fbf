"""Where the dashboard's telemetry comes from, and where its requests go.

Three sources with one small interface (an async context manager with
`records()` yielding telemetry maps and `request(op)`):

- `SocketSource`: the runtime's local Unix socket (docs/telemetry.md);
- `MqttSource`: a remote rig through a broker (docs/mqtt.md topics);
- `RecordedSource`: a recorded telemetry file (msgpack stream of maps), for
  review and tests; requests are answered "not live".

What does not live here: the widgets (`runtime.dashboard.app`) and the server
side (`runtime.realtime.telemetry`).
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from pathlib import Path
from types import TracebackType
from typing import Any

import msgpack

Record = dict[str, Any]


class TelemetrySource:
    """Base: yields records (hello, telemetry, trip, reply maps); sends requests."""

    description = "telemetry"
    live = True

    async def __aenter__(self) -> TelemetrySource:
        await self.open()
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None:
        await self.close()

    async def open(self) -> None:
        """Connect."""

    async def close(self) -> None:
        """Disconnect; never raises."""

    def records(self) -> AsyncIterator[Record]:
        """Every record as it arrives."""
        raise NotImplementedError

    async def request(self, op: str) -> None:
        """Ask the runtime to arm, disarm, reset or stop."""
        raise NotImplementedError


class SocketSource(TelemetrySource):
    """The runtime's local Unix socket."""

    def __init__(self, path: str | Path) -> None:
        self.path = str(path)
        self.description = f"socket {self.path}"
        self._reader: asyncio.StreamReader | None = None
        self._writer: asyncio.StreamWriter | None = None

    async def open(self) -> None:
        self._reader, self._writer = await asyncio.open_unix_connection(self.path)

    async def close(self) -> None:
        if self._writer is not None:
            self._writer.close()
            try:
                await self._writer.wait_closed()
            except (ConnectionError, OSError):
                pass
            self._writer = None

    async def records(self) -> AsyncIterator[Record]:
        assert self._reader is not None, "open() first"
        unpacker = msgpack.Unpacker(raw=False, strict_map_key=False)
        while True:
            chunk = await self._reader.read(65536)
            if not chunk:
                return
            unpacker.feed(chunk)
            for item in unpacker:
                if isinstance(item, dict):
                    yield item

    async def request(self, op: str) -> None:
        if self._writer is None:
            raise ConnectionError("not connected to the runtime")
        self._writer.write(msgpack.packb({"type": "request", "op": op}))
        await self._writer.drain()


class RecordedSource(TelemetrySource):
    """A recorded telemetry file, replayed at `speed` times its recorded pace (0 = at once)."""

    live = False

    def __init__(self, path: str | Path | None = None, records: list[Record] | None = None,
                 speed: float = 1.0) -> None:
        self.path = path
        self._records = records
        self.speed = speed
        self.description = f"recording {path}" if path else "recording"
        self.replies: list[Record] = []

    async def records(self) -> AsyncIterator[Record]:
        items = self._records
        if items is None:
            assert self.path is not None
            with open(self.path, "rb") as fh:
                items = [r for r in msgpack.Unpacker(fh, raw=False, strict_map_key=False)
                         if isinstance(r, dict)]
        last_t: float | None = None
        for rec in items:
            t = rec.get("t") if rec.get("type") == "telemetry" else None
            if self.speed > 0 and t is not None and last_t is not None:
                await asyncio.sleep(max(0.0, (float(t) - last_t) / self.speed))
            if t is not None:
                last_t = float(t)
            yield rec
            await asyncio.sleep(0)
        for reply in self.replies:
            yield reply

    async def request(self, op: str) -> None:
        self.replies.append({"type": "reply", "op": op, "ok": False,
                             "message": "this is a recording, not a live rig"})


class MqttSource(TelemetrySource):
    """A remote rig's telemetry through an MQTT broker.

    Topics (``drivers.mqtt_link.Topics``, prefix ``corral`` unless the rig's
    config says otherwise): ``<prefix>/<rig>/telemetry`` (msgpack telemetry maps),
    ``<prefix>/<rig>/telemetry/hello`` (retained hello map), ``.../trip``,
    ``.../reply``; requests go to ``<prefix>/<rig>/request``.
    """

    def __init__(self, host: str, port: int, rig: str, username: str | None = None,
                 password: str | None = None, tls: bool = False,
                 prefix: str = "corral", ca_file: str | None = None,
                 cert_file: str | None = None, key_file: str | None = None) -> None:
        self.host, self.port, self.rig = host, port, rig
        self.username, self.password, self.tls = username, password, tls
        self.ca_file, self.cert_file, self.key_file = ca_file, cert_file, key_file
        self.prefix = prefix
        self.description = f"mqtt://{host}:{port}/{rig}"
        self._client: Any = None
        self._stack: Any = None

    async def open(self) -> None:
        import contextlib

        import aiomqtt

        from drivers.mqtt_link import tls_context_for

        self._stack = contextlib.AsyncExitStack()
        tls_context = tls_context_for(self.tls, self.ca_file, self.cert_file, self.key_file)
        self._client = await self._stack.enter_async_context(aiomqtt.Client(
            self.host, self.port, username=self.username, password=self.password,
            tls_context=tls_context, max_queued_incoming_messages=1000))
        base = f"{self.prefix}/{self.rig}"
        for topic in ("telemetry", "telemetry/hello", "trip", "reply"):
            await self._client.subscribe(f"{base}/{topic}")

    async def close(self) -> None:
        if self._stack is not None:
            try:
                await self._stack.aclose()
            except Exception:  # noqa: BLE001 - closing must never raise
                pass
            self._stack = None

    async def records(self) -> AsyncIterator[Record]:
        async for message in self._client.messages:
            try:
                item = msgpack.unpackb(bytes(message.payload), raw=False, strict_map_key=False)
            except (ValueError, msgpack.UnpackException, TypeError):
                continue
            if not isinstance(item, dict):
                continue
            topic = str(message.topic)
            if topic.endswith("/telemetry/hello"):
                item.setdefault("type", "hello")
            elif topic.endswith("/telemetry"):
                item.setdefault("type", "telemetry")
            elif topic.endswith("/trip"):
                item.setdefault("type", "trip")
            elif topic.endswith("/reply"):
                item.setdefault("type", "reply")
            else:
                continue
            yield item

    async def request(self, op: str) -> None:
        await self._client.publish(f"{self.prefix}/{self.rig}/request",
                                   msgpack.packb({"type": "request", "op": op}), qos=1)


class FleetSource(MqttSource):
    """Every rig on a broker: ``<prefix>/+/telemetry``, its retained hello, the retained
    mode (and the runtimes' wills on it) and trip summaries. `fleet_records()` yields
    (rig, record) pairs, ``type`` set from the topic (hello, telemetry, mode, trip).
    Read only: a fleet view sends no requests."""

    def __init__(self, host: str, port: int, username: str | None = None,
                 password: str | None = None, tls: bool = False, prefix: str = "corral",
                 ca_file: str | None = None, cert_file: str | None = None,
                 key_file: str | None = None) -> None:
        super().__init__(host, port, "+", username, password, tls, prefix=prefix,
                         ca_file=ca_file, cert_file=cert_file, key_file=key_file)
        self.description = f"mqtt://{host}:{port}"

    async def open(self) -> None:
        import contextlib

        import aiomqtt

        from drivers.mqtt_link import tls_context_for

        self._stack = contextlib.AsyncExitStack()
        tls_context = tls_context_for(self.tls, self.ca_file, self.cert_file, self.key_file)
        self._client = await self._stack.enter_async_context(aiomqtt.Client(
            self.host, self.port, username=self.username, password=self.password,
            tls_context=tls_context, max_queued_incoming_messages=5000))
        for topic in ("telemetry", "telemetry/hello", "mode", "trip"):
            await self._client.subscribe(f"{self.prefix}/+/{topic}")

    async def fleet_records(self) -> AsyncIterator[tuple[str, Record]]:
        """(rig, record) as they arrive."""
        kinds = {("telemetry",): "telemetry", ("telemetry", "hello"): "hello",
                 ("mode",): "mode", ("trip",): "trip"}
        async for message in self._client.messages:
            topic = str(message.topic)
            if not topic.startswith(self.prefix + "/"):
                continue
            parts = topic[len(self.prefix) + 1:].split("/")  # rig, leaf...
            kind = kinds.get(tuple(parts[1:]))
            if kind is None:
                continue
            try:
                item = msgpack.unpackb(bytes(message.payload), raw=False, strict_map_key=False)
            except (ValueError, msgpack.UnpackException, TypeError):
                continue
            if isinstance(item, dict):
                item["type"] = kind
                yield parts[0], item

    def records(self) -> AsyncIterator[Record]:
        raise NotImplementedError("a fleet has no single record stream; use fleet_records()")

    async def request(self, op: str) -> None:
        raise PermissionError("the fleet view sends no requests; open one rig's dashboard")
