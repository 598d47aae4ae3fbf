"""The MQTT link: the corral wire messages through an MQTT 5 broker.

Payloads are the same positional msgpack message bodies as on the serial
line (`drivers.wire.encode_body` / `decode_body`) without COBS framing and
without the CRC (MQTT runs over TCP, which already checks its bytes).
docs/mqtt.md lists the topics and their rules.

What lives here: `MqttLink`, the host side of one rig (a `drivers.base.Link`).
It re-exports, where callers have always found them, the ``[link.mqtt]``
options (`drivers.mqtt_settings`), the client plumbing both ends share
(`drivers.mqtt_client`: `Topics`, `make_client`, `status_payload`, ...) and the
runtime's publisher (`drivers.mqtt_publisher.MqttPublisher`). What does not:
the simulated device (`sim_rigs.device_mqtt`), any control logic.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import time
from collections.abc import Callable, Mapping
from typing import Any

import aiomqtt

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
from drivers.mqtt_client import (
    Topics,
    admits_anonymous,
    client_id,
    connect_client,
    decode_status,
    disconnect_client,
    expiry,
    explain_mqtt_error,
    make_client,
    publish_now,
    quick_ack,
    set_nodelay,
    status_payload,
    tls_context_for,
)
from drivers.mqtt_publisher import MqttPublisher, RequestCallback
from drivers.mqtt_settings import (
    DEFAULT_PORT,
    DEFAULT_TLS_PORT,
    REQUEST_OPS,
    TABLE_KEYS,
    MqttAuthError,
    MqttConfigError,
    MqttSettings,
    parse_host_port,
    parse_mqtt_url,
)
from drivers.wire import (
    HOST_HELLO_RIG_ID,
    PROTOCOL_VERSION,
    DecodeError,
    Fault,
    Heartbeat,
    Message,
    SampleGate,
    Stop,
    UnknownKind,
    WireError,
    decode_body,
    encode_body,
    host_hello,
)

__all__ = [
    # re-exported from their modules, where callers found them before the split
    "DEFAULT_PORT", "DEFAULT_TLS_PORT", "HOST_HELLO_RIG_ID", "REQUEST_OPS", "TABLE_KEYS",
    "MqttAuthError", "MqttConfigError", "MqttLink", "MqttPublisher", "MqttSettings",
    "RequestCallback", "Topics", "admits_anonymous", "connect_client", "decode_status",
    "disconnect_client", "expiry", "explain_mqtt_error", "host_hello", "make_client",
    "parse_host_port", "parse_mqtt_url", "publish_now", "quick_ack", "set_nodelay",
    "status_payload", "tls_context_for",
]


# --------------------------------------------------------------------------- host link


class MqttLink(Link):
    """Host side of one rig through an MQTT broker.

    ``async with MqttLink(settings) as link:`` connects (MQTT 5, TLS and login
    from `settings`), subscribes to the rig's hello, status and sample topics,
    publishes a host hello and waits for the device's *live* answer (a
    retained hello alone proves nothing). `receive()` then yields samples,
    `send()` publishes commands echoing the sample seq. `receive()` raises
    `LinkClosed` when the broker goes away or the device's status turns
    offline (its last will); `reconnect()` re-opens with backoff without
    restarting the process.

    Retained samples and samples older than `max_sample_age_s` are never
    delivered (counted in `stats.late_frames` and `retained_dropped`).
    """

    def __init__(
        self,
        settings: MqttSettings,
        *,
        hello_timeout_s: float = 3.0,
        queue_size: int = 64,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if not settings.rig:
            raise ValueError("MqttLink needs a rig name (settings.rig)")
        self.settings = settings
        self.topics = Topics(settings.prefix, settings.rig)
        self.hello_timeout_s = hello_timeout_s
        self.stats = LinkStats()
        self.hello = None
        self.retained_hello: Hello | None = None
        self.device_online: bool | None = None
        self.device_status_info: dict[str, Any] | None = None
        self.device_status = 0
        self.device_stopped = False
        self.faults: collections.deque[Fault] = collections.deque(maxlen=32)
        self.retained_dropped = 0
        self._clock = clock
        self._tracker = SampleGate(self.stats)
        self.events: collections.deque[tuple[str, str]] = collections.deque(maxlen=64)
        """Link events for the operator (a device hello mid-run): (kind, detail)."""
        self._samples = SampleInbox(self.stats, queue_size, reason="not open")
        self._hello_waiter: asyncio.Future[Hello] | None = None
        self._client: aiomqtt.Client | None = None
        self._reader: asyncio.Task[None] | None = None
        self._host_seq = 0
        self.session = 0
        """This host's session token (protocol v2), drawn at the first open."""
        self._taken_by = 0
        self._offset: float | None = None  # min(t_host - t_device) this session
        # Recent samples' (t_device, t_host), for latency and the command's t echo.
        self._ring = LatencyRing(self.stats)
        self._expiry = expiry(settings.sample_expiry_s)

    @classmethod
    def from_url(
        cls,
        url: str,
        table: Mapping[str, Any] | None = None,
        *,
        env: Mapping[str, str] | None = None,
        **kwargs: Any,
    ) -> MqttLink:
        """Build from ``mqtt://HOST:PORT/RIG`` plus a ``[link.mqtt]`` table (TLS, login)."""
        host, port, rig = parse_mqtt_url(url)
        table = dict(table or {})
        if url.startswith("mqtts:"):
            table["tls"] = True
        settings = MqttSettings.from_table(table, host=host, port=port, rig=rig, env=env)
        return cls(settings, **kwargs)

    @property
    def url(self) -> str:
        """This link as a URL."""
        return self.settings.url

    # ------------------------------------------------------------ incoming

    async def _read(self, client: aiomqtt.Client) -> None:
        try:
            async for m in client.messages:
                self._on_message(m, self._clock())
        except aiomqtt.MqttError as exc:
            self._set_lost(f"MQTT broker {self.settings.host}:{self.settings.port} lost: {exc}")
        except Exception as exc:  # never let the reader die silently
            self._set_lost(f"MQTT reader failed: {exc!r}")

    def _set_lost(self, reason: str) -> None:
        self._samples.fail(reason, replace=False)
        self.stats.connected = False
        w = self._hello_waiter
        if w is not None and not w.done():
            w.set_exception(LinkClosed(reason))

    def _decode(self, payload: bytes) -> Message | None:
        try:
            return decode_body(payload)
        except UnknownKind:
            self.stats.unknown_kinds += 1
        except (DecodeError, WireError):
            self.stats.decode_errors += 1
        return None

    def _on_paho_sample(self, pc: Any, userdata: Any, m: Any) -> None:
        """Paho's callback for the sample topic, run inside its socket read (loop thread).

        Samples skip aiomqtt's message queue and the reader task: the waiting
        `receive()` is woken straight from the socket read. Never raises (an
        exception here would tear down the connection).
        """
        now = self._clock()
        quick_ack(pc.socket())
        try:
            self._on_topic(m.topic, m.payload, m.retain, now)
        except Exception as exc:
            self._set_lost(f"MQTT sample handler failed: {exc!r}")

    def _on_message(self, m: aiomqtt.Message, now: float) -> None:
        self._on_topic(m.topic.value, m.payload, m.retain, now)

    def _on_topic(self, topic: str, payload: Any, retain: bool, now: float) -> None:
        if not isinstance(payload, bytes | bytearray):
            payload = b""
        if topic == self.topics.sample:
            if retain:
                # A retained value is history, never live data.
                self.retained_dropped += 1
                self.stats.late_frames += 1
                return
            msg = self._decode(bytes(payload))
            if msg is None:
                return
            self.stats.frames_in += 1
            if type(msg) is Sample:
                self._on_sample(msg, now)
            elif type(msg) is Heartbeat:
                self.device_status = msg.status
            elif type(msg) is Fault:
                self.faults.append(msg)
            elif type(msg) is Stop:
                self.device_stopped = True
        elif topic == self.topics.hello:
            msg = self._decode(bytes(payload))
            if type(msg) is not Hello or msg.rig_id == HOST_HELLO_RIG_ID:
                return
            self.stats.frames_in += 1
            if retain:
                self.retained_hello = msg
                return
            if self._hello_waiter is None:
                if self.hello is None:
                    return
                # Mid-session (the device answering another host's hello, a restart, a
                # forgery): never adopted silently; the operator sees it.
                self.stats.hellos_midrun += 1
                ours = msg.session == self.session
                self.events.append(("link", f"device hello mid-run from {msg.rig_id!r} "
                                    f"({len(msg.channels)} channels, session "
                                    f"{'ours' if ours else 'other'}): not adopted"))
                return
            if msg.session != self.session:
                self._taken_by = msg.session  # the device obeys another host
                return
            self.hello = msg
            self._tracker.start(msg)
            self._offset = None
            self.device_stopped = False
            w = self._hello_waiter
            if w is not None and not w.done():
                w.set_result(msg)
        elif topic == self.topics.status:
            info = decode_status(bytes(payload))
            if info is None:
                self.stats.decode_errors += 1
                return
            self.device_status_info = info
            self.device_online = info["online"]
            if not info["online"] and self.hello is not None and self._hello_waiter is None:
                why = info.get("reason") or "last will"
                self._set_lost(f"rig {self.settings.rig!r} went offline ({why})")

    def _on_sample(self, s: Sample, now: float) -> None:
        verdict = self._tracker.accept(s)
        if not verdict:
            return
        if verdict == 2:
            self._offset = None  # new numbering: the device clock started over
        # Age check on receipt: the broker removes expired messages, but a
        # sample can still sit in queues. With no shared clock, the smallest
        # (host time - device time) seen this session is the transit floor;
        # anything later than that floor by more than max_sample_age_s is late.
        d = now - s.t_device
        if self._offset is None or d < self._offset:
            self._offset = d
        if d - self._offset > self.settings.max_sample_age_s:
            self.stats.late_frames += 1
            return
        s.t_host = now
        self.stats.last_sample_host_s = now
        self.device_status = s.status
        self._ring.note_received(s.seq, s.t_device, now)
        self._samples.put(s)

    # ------------------------------------------------------------ Link API

    async def open(self) -> None:
        """Connect, subscribe, and complete the hello handshake.

        Raises `MqttAuthError` when the broker refuses the login, `LinkClosed`
        when it cannot be reached or no live hello arrives in time.
        """
        if self._client is not None:
            return
        self._samples.clear()
        self._tracker.reset()
        self._offset = None
        self.hello = None
        client = make_client(self.settings, identifier=client_id("host", self.settings.rig))
        await connect_client(client, self.settings)
        self._client = client
        self._samples.reset()
        self.stats.connected = True
        loop = asyncio.get_running_loop()
        self._hello_waiter = loop.create_future()
        try:
            t = self.topics
            client._client.message_callback_add(t.sample, self._on_paho_sample)
            await client.subscribe([(t.hello, 1), (t.status, 1), (t.sample, 0)])
            self._reader = loop.create_task(self._read(client), name="mqtt-link-reader")
            await self._handshake()
        except BaseException as exc:
            await self._disconnect()
            if isinstance(exc, aiomqtt.MqttError):
                raise explain_mqtt_error(exc, self.settings) from None
            raise
        finally:
            self._hello_waiter = None

    async def _handshake(self) -> None:
        assert self._hello_waiter is not None
        if not self.session:
            # One token per link object: a reconnect asks again as the same owner, so a
            # device that still remembers it grants it at once.
            self.session = new_session()
        self._taken_by = 0
        hello = await await_hello(
            self._hello_waiter, lambda: self._publish_msg(host_hello(self.session)),
            self.hello_timeout_s, taken=lambda: bool(self._taken_by),
            refused=(f"rig {self.settings.rig!r} via {self.url} is driven by another host "
                     "session: another runtime owns this rig; stop it first (the device frees "
                     "the rig once its commands have stopped for its lease)"),
            silent=self._no_hello)
        self._samples.clear()
        if hello.protocol != PROTOCOL_VERSION:
            raise LinkClosed(f"rig {hello.rig_id!r} speaks wire protocol v{hello.protocol}, "
                             f"this host speaks v{PROTOCOL_VERSION}")

    def _no_hello(self) -> LinkClosed:
        note = ""
        if self.device_online is False:
            info = self.device_status_info or {}
            note = f"; its retained status says offline ({info.get('reason', '')})"
        elif self.retained_hello is None:
            note = "; the broker holds no hello for it (never served here?)"
        return LinkClosed(
            f"no live hello from rig {self.settings.rig!r} via {self.url} within "
            f"{self.hello_timeout_s:g} s{note}"
        )

    async def receive(self) -> Sample:
        """Next sample (oldest first; at most `queue_size` kept, older ones dropped)."""
        return await self._samples.get()

    async def receive_latest(self) -> Sample:
        """Newest sample; older queued ones are dropped (counted in `stats.late_frames`)."""
        return await self._samples.get_latest()

    async def send(self, command: Command) -> None:
        """Publish one command (QoS 0, with expiry); records sample-to-command latency."""
        lost = self._samples.closed_reason
        if self._client is None or lost is not None:
            raise LinkClosed(lost or "link closed")
        command.session = self.session
        await self._publish(encode_body(command, t=self._ring.device_time(command.seq)))
        self._ring.note_sent(command.seq, self._clock())

    async def send_message(self, msg: Message) -> None:
        """Publish a heartbeat, stop or other message with the host's own sequence number."""
        if self._client is None:
            raise LinkClosed(self._samples.closed_reason or "link closed")
        await self._publish_msg(msg)

    async def _publish_msg(self, msg: Message) -> None:
        self._host_seq = (self._host_seq + 1) & 0xFFFFFFFF
        await self._publish(encode_body(msg, seq=self._host_seq))

    async def _publish(self, body: bytes) -> None:
        client = self._client
        if client is None:
            raise LinkClosed(self._samples.closed_reason or "link closed")
        try:
            publish_now(client, self.topics.command, body, self._expiry)
        except aiomqtt.MqttError as exc:
            self._set_lost(f"MQTT publish failed: {exc}")
            raise LinkClosed(self._samples.closed_reason or str(exc)) from None
        self.stats.frames_out += 1

    async def close(self) -> None:
        """Publish a stop (outputs off), then disconnect. Never raises."""
        if self._client is not None and self._samples.closed_reason is None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(self._publish_msg(Stop(0, 0.0, 0)), 1.0)
        with contextlib.suppress(Exception):
            await self._disconnect()
        self._samples.fail("link closed")

    async def reconnect(
        self, timeout_s: float = 10.0, *, first_delay_s: float = 0.1, max_delay_s: float = 2.0
    ) -> None:
        """Re-open after a loss, retrying with exponential backoff for up to `timeout_s`.

        A refused login is not retried (it will not fix itself).
        """
        await self._disconnect()
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        delay = first_delay_s
        while True:
            try:
                await self.open()
            except MqttAuthError:
                raise
            except LinkClosed as exc:
                if loop.time() + delay > deadline:
                    raise LinkClosed(f"{self.url} still unavailable after {timeout_s:g} s: "
                                     f"{exc}") from exc
                await asyncio.sleep(delay)
                delay = min(delay * 2, max_delay_s)
            else:
                self.stats.reconnects += 1
                return

    async def _disconnect(self) -> None:
        client, reader = self._client, self._reader
        self._client = None
        self._reader = None
        self._samples.fail("link closed", replace=False)
        self.stats.connected = False
        if reader is not None:
            reader.cancel()
            with contextlib.suppress(BaseException):
                await reader
        await disconnect_client(client)
