"""The runtime's side channel on the broker: telemetry, mode and trips out, requests in.

What lives here: `MqttPublisher` (the runtime's telemetry, mode and trip
publisher and its filtered inbox of remote operator requests). What does not:
the host link to a rig (`drivers.mqtt_link`), any control logic.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import inspect
import math
import time
from collections.abc import Callable, Mapping
from types import TracebackType
from typing import Any

import aiomqtt
import msgpack
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.subscribeoptions import SubscribeOptions

from drivers.base import LinkClosed
from drivers.mqtt_client import (
    Topics,
    client_id,
    connect_client,
    disconnect_client,
    expiry,
    make_client,
)
from drivers.mqtt_settings import REQUEST_OPS, MqttAuthError, MqttSettings

RequestCallback = Callable[[str, dict[str, Any]], Any]
"""``callback(op, request) -> None | bool | (bool, str)``, possibly async."""


class MqttPublisher:
    """The runtime's side channel on the broker: telemetry out, operator requests in.

    ``async with MqttPublisher(settings, on_request=cb) as pub:`` then, from
    the loop's thread or any other, `publish_telemetry(record)`,
    `publish_mode(mode, **extra)`, `publish_trip(summary)`. They never block:
    messages go through a bounded queue (`dropped` counts overflow) and a
    sender task; telemetry is decimated to `telemetry_hz`. The connection is
    kept up with backoff in the background; a broker outage costs telemetry,
    never a tick.

    Requests arrive on ``<prefix>/<rig>/request`` as msgpack maps
    ``{"op": "arm"|"disarm"|"reset"|"stop", ...}``. Retained requests are
    ignored (a stored "arm" must never act later). ``stop`` is always passed
    to the callback; others only when listed in `settings.remote_requests`.
    Every request gets a reply map ``{"op", "ok", "message", "id"}`` on
    ``<prefix>/<rig>/reply``.
    """

    def __init__(
        self,
        settings: MqttSettings,
        *,
        on_request: RequestCallback | None = None,
        telemetry_hz: float = 10.0,
        mode_refresh_s: float = 2.0,
        queue_size: int = 256,
        first_delay_s: float = 0.1,
        max_delay_s: float = 2.0,
    ) -> None:
        if not settings.rig:
            raise ValueError("MqttPublisher needs a rig name (settings.rig)")
        self.settings = settings
        self.topics = Topics(settings.prefix, settings.rig)
        self.on_request = on_request
        self.telemetry_period = 1.0 / telemetry_hz if telemetry_hz > 0 else 0.0
        self.mode_refresh_s = mode_refresh_s
        self.connected = False
        self.published = 0
        self.dropped = 0
        self.requests: collections.deque[tuple[str, bool, str]] = collections.deque(maxlen=64)
        self.last_error = ""
        self._queue_size = queue_size
        self._first_delay = first_delay_s
        self._max_delay = max_delay_s
        self._queue: asyncio.Queue[tuple[str, bytes, int, bool, int]] | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._task: asyncio.Task[None] | None = None
        self._last_telemetry = -math.inf
        self._mode: bytes | None = None
        self._connected_event: asyncio.Event | None = None

    async def __aenter__(self) -> MqttPublisher:
        self._loop = asyncio.get_running_loop()
        self._queue = asyncio.Queue(self._queue_size)
        self._connected_event = asyncio.Event()
        self._task = self._loop.create_task(self._supervise(), name="mqtt-publisher")
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        task, self._task = self._task, None
        if task is not None:
            # Let queued messages (a final trip, the last mode) go out briefly.
            if self.connected and self._queue is not None:
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(self._drain(), 1.0)
            task.cancel()
            # Bounded: whatever the broker does, leaving the publisher ends.
            with contextlib.suppress(BaseException):
                await asyncio.wait({task}, timeout=5.0)

    async def _drain(self) -> None:
        assert self._queue is not None
        while not self._queue.empty() and self.connected:
            await asyncio.sleep(0.01)

    async def wait_connected(self, timeout_s: float = 5.0) -> bool:
        """Wait until the publisher is connected and subscribed; False on timeout."""
        assert self._connected_event is not None
        with contextlib.suppress(asyncio.TimeoutError):
            await asyncio.wait_for(self._connected_event.wait(), timeout_s)
        return self.connected

    # ------------------------------------------------------------ producer side (any thread)

    def _enqueue(self, topic: str, payload: bytes, qos: int, retain: bool, exp: int) -> None:
        loop = self._loop
        if loop is None or loop.is_closed():
            return
        item = (topic, payload, qos, retain, exp)
        try:
            running = asyncio.get_running_loop()
        except RuntimeError:
            running = None
        if running is loop:
            self._put(item)
        else:
            loop.call_soon_threadsafe(self._put, item)

    def _put(self, item: tuple[str, bytes, int, bool, int]) -> None:
        assert self._queue is not None
        try:
            self._queue.put_nowait(item)
        except asyncio.QueueFull:
            self.dropped += 1

    def publish_telemetry(self, record: Mapping[str, Any], *, now: float | None = None) -> bool:
        """Queue one telemetry record unless within the decimation period; True if queued."""
        t = time.monotonic() if now is None else now
        if t - self._last_telemetry < self.telemetry_period:
            return False
        self._last_telemetry = t
        payload = msgpack.packb(dict(record), default=_to_builtin)
        self._enqueue(self.topics.telemetry, payload, 0, False, self.settings.sample_expiry_s)
        return True

    def publish_mode(self, mode: str, **extra: Any) -> None:
        """Queue the supervisor mode (retained, with expiry; refreshed while connected)."""
        payload = msgpack.packb({"mode": mode, "online": True, "t_wall": time.time(), **extra},
                                default=_to_builtin)
        self._mode = payload
        self._enqueue(self.topics.mode, payload, 1, True, self._mode_expiry())

    def publish_trip(self, summary: Mapping[str, Any]) -> None:
        """Queue a trip summary (QoS 1, not retained)."""
        payload = msgpack.packb(dict(summary), default=_to_builtin)
        self._enqueue(self.topics.trip, payload, 1, False, 3600)

    def _mode_expiry(self) -> int:
        return max(1, int(math.ceil(3 * self.mode_refresh_s)))

    # ------------------------------------------------------------ connection

    async def _supervise(self) -> None:
        delay = self._first_delay
        while True:
            will = aiomqtt.Will(
                self.topics.mode,
                msgpack.packb({"mode": "disconnected", "online": False, "t_wall": time.time()}),
                qos=1, retain=True, properties=expiry(self._mode_expiry(), PacketTypes.WILLMESSAGE),
            )
            client = make_client(self.settings, identifier=client_id("runtime", self.settings.rig),
                                 will=will)
            try:
                await connect_client(client, self.settings)
            except MqttAuthError as exc:
                self.last_error = str(exc)
                await asyncio.sleep(self._max_delay)
                continue
            except LinkClosed as exc:
                self.last_error = str(exc)
                await asyncio.sleep(delay)
                delay = min(delay * 2, self._max_delay)
                continue
            delay = self._first_delay
            try:
                # Retain-as-published: an operator request published with the retain
                # flag keeps it on delivery, so it is recognised and ignored (a stored
                # "arm" must never act, now or later).
                await client.subscribe(self.topics.request,
                                       options=SubscribeOptions(qos=1, retainAsPublished=True))
                self.connected = True
                assert self._connected_event is not None
                self._connected_event.set()
                if self._mode is not None:
                    await client.publish(self.topics.mode, self._mode, qos=1, retain=True,
                                         properties=expiry(self._mode_expiry()))
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(self._send(client))
                    tg.create_task(self._receive(client))
                    tg.create_task(self._refresh_mode(client))
            except* aiomqtt.MqttError as eg:
                self.last_error = str(eg.exceptions[0])
            finally:
                self.connected = False
                if self._connected_event is not None:
                    self._connected_event.clear()
                await disconnect_client(client)
            await asyncio.sleep(delay)

    async def _send(self, client: aiomqtt.Client) -> None:
        assert self._queue is not None
        while True:
            topic, payload, qos, retain, exp = await self._queue.get()
            await client.publish(topic, payload, qos=qos, retain=retain, properties=expiry(exp))
            self.published += 1

    async def _refresh_mode(self, client: aiomqtt.Client) -> None:
        while True:
            await asyncio.sleep(self.mode_refresh_s)
            if self._mode is not None:
                await client.publish(self.topics.mode, self._mode, qos=1, retain=True,
                                     properties=expiry(self._mode_expiry()))

    async def _receive(self, client: aiomqtt.Client) -> None:
        async for m in client.messages:
            if m.topic.value != self.topics.request:
                continue
            await self._handle_request(client, m)

    async def _handle_request(self, client: aiomqtt.Client, m: aiomqtt.Message) -> None:
        if m.retain:
            return  # a stored request is never acted on
        try:
            req = msgpack.unpackb(m.payload, raw=False) if isinstance(m.payload, bytes) else None
        except Exception:
            req = None
        if not isinstance(req, dict) or not isinstance(req.get("op"), str):
            await self._reply(client, {"op": None, "ok": False,
                                       "message": "request must be a msgpack map with 'op'"})
            return
        op = req["op"]
        rid = req.get("id")
        if op not in REQUEST_OPS:
            ok, message = False, f"unknown request {op!r}"
        elif op != "stop" and op not in self.settings.remote_requests:
            ok, message = False, (f"remote {op!r} is not allowed here "
                                  "([link.mqtt] remote_requests)")
        elif self.on_request is None:
            ok, message = False, "no handler for remote requests"
        else:
            try:
                result = self.on_request(op, req)
                if inspect.isawaitable(result):
                    result = await result
            except Exception as exc:
                ok, message = False, f"request failed: {exc}"
            else:
                if isinstance(result, tuple):
                    ok, message = bool(result[0]), str(result[1])
                elif result is None:
                    ok, message = True, "accepted"
                else:
                    ok, message = bool(result), "accepted" if result else "refused"
        self.requests.append((op, ok, message))
        await self._reply(client, {"op": op, "ok": ok, "message": message, "id": rid})

    async def _reply(self, client: aiomqtt.Client, body: dict[str, Any]) -> None:
        await client.publish(self.topics.reply, msgpack.packb(body, default=_to_builtin), qos=1,
                             properties=expiry(60))


def _to_builtin(obj: Any) -> Any:
    """msgpack fallback for numpy scalars and arrays."""
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if hasattr(obj, "item"):
        return obj.item()
    raise TypeError(f"cannot pack {type(obj).__name__}")
