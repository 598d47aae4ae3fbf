"""The MQTT client plumbing both ends of a rig share: topics, connecting, publishing.

What lives here: `Topics` (the topics of one rig, docs/mqtt.md), `make_client`,
`connect_client`, `disconnect_client`, `publish_now`, `quick_ack`, `set_nodelay`,
`expiry`, the retained status (`status_payload`, `decode_status`), `client_id`,
`admits_anonymous`, `explain_mqtt_error`, `tls_context_for`.
What does not: the host link (`drivers.mqtt_link`), the runtime's publisher
(`drivers.mqtt_publisher`), the device side (`sim_rigs.device_mqtt`).
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import socket
import ssl
import time
import uuid
from dataclasses import dataclass, field, fields, replace
from typing import Any

import aiomqtt
import msgpack
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from drivers.base import LinkClosed
from drivers.mqtt_settings import MqttAuthError, MqttSettings


@dataclass(frozen=True)
class Topics:
    """The topics of one rig, ``<prefix>/<rig>/<leaf>`` (see docs/mqtt.md).

    hello: device -> all, retained: the device's hello.
    status: device -> all, retained: online/offline (the last will says offline).
    sample: device -> host: samples, heartbeats, fault and stop reports.
    command: host -> device: commands, stops, heartbeats and the host hello.
    telemetry: runtime -> remote tools: decimated telemetry records.
    mode: runtime -> remote tools, retained with expiry: supervisor mode.
    trip: runtime -> remote tools: trip summaries.
    request: remote tools -> runtime: operator requests.
    reply: runtime -> remote tools: replies to requests.
    """

    prefix: str
    rig: str
    hello: str = field(init=False)
    status: str = field(init=False)
    sample: str = field(init=False)
    command: str = field(init=False)
    telemetry: str = field(init=False)
    mode: str = field(init=False)
    trip: str = field(init=False)
    request: str = field(init=False)
    reply: str = field(init=False)

    def __post_init__(self) -> None:
        for f in fields(self)[2:]:
            object.__setattr__(self, f.name, f"{self.prefix}/{self.rig}/{f.name}")


# --------------------------------------------------------------------------- shared helpers


class _PackedProperties(Properties):
    """Properties packed once: paho packs a publish's properties on every send."""

    _packed: bytes | None = None

    def pack(self) -> bytes:
        if self._packed is None:
            object.__setattr__(self, "_packed", super().pack())
        assert self._packed is not None
        return self._packed


def expiry(seconds: int | float, packet: int = PacketTypes.PUBLISH) -> Properties:
    """MQTT 5 properties with a message expiry interval (whole seconds, at least 1).

    Packed on first use and then reused as is: set nothing on it afterwards.
    """
    props = _PackedProperties(packet)
    props.MessageExpiryInterval = max(1, int(math.ceil(seconds)))
    return props


def status_payload(online: bool, rig: str, reason: str = "", status: int = 0) -> bytes:
    """The retained status message: a msgpack map {online, rig, reason, status, t_wall}."""
    return msgpack.packb({"online": bool(online), "rig": rig, "reason": reason,
                          "status": int(status), "t_wall": time.time()})


def decode_status(payload: bytes) -> dict[str, Any] | None:
    """Decode a status payload; None when it is not one."""
    try:
        d = msgpack.unpackb(payload, raw=False)
    except Exception:
        return None
    if not isinstance(d, dict) or not isinstance(d.get("online"), bool):
        return None
    return d


def explain_mqtt_error(exc: BaseException, settings: MqttSettings) -> LinkClosed:
    """Turn an aiomqtt/OS error into a one-line `LinkClosed` (or `MqttAuthError`)."""
    where = f"MQTT broker {settings.host}:{settings.port}"
    rc = getattr(exc, "rc", None)
    code = getattr(rc, "value", rc)
    if code in (4, 5, 134, 135):
        who = f"user {settings.username!r}" if settings.username else "an anonymous client"
        return MqttAuthError(
            f"{where} refused the login of {who} ({exc}): check [link.mqtt] username and the "
            f"password in the environment variable named by [link.mqtt] password_env"
        )
    if isinstance(exc, ssl.SSLError):
        return LinkClosed(f"TLS to {where} failed ({exc}): check [link.mqtt] ca_file and tls")
    return LinkClosed(f"{where}: {exc or type(exc).__name__}")


def tls_context_for(tls: bool, ca_file: str | None = None, cert_file: str | None = None,
                    key_file: str | None = None) -> ssl.SSLContext | None:
    """The TLS context for a broker connection (None without TLS): the broker's CA
    (`ca_file`, else the system store) and, when given, a client certificate."""
    if not tls:
        return None
    ctx = ssl.create_default_context(cafile=ca_file)
    if cert_file is not None:
        ctx.load_cert_chain(cert_file, key_file)
    return ctx


def make_client(
    settings: MqttSettings,
    *,
    identifier: str,
    will: aiomqtt.Will | None = None,
    max_queued: int = 1024,
) -> aiomqtt.Client:
    """An MQTT 5 aiomqtt client for these settings (call inside the running loop)."""
    return aiomqtt.Client(
        settings.host,
        settings.port,
        username=settings.username,
        password=settings.password,
        identifier=identifier,
        protocol=aiomqtt.ProtocolVersion.V5,
        will=will,
        tls_context=tls_context_for(settings.tls, settings.ca_file, settings.cert_file,
                                    settings.key_file),
        keepalive=settings.keepalive_s,
        timeout=settings.connect_timeout_s,
        max_queued_incoming_messages=max_queued,
    )


async def connect_client(client: aiomqtt.Client, settings: MqttSettings) -> None:
    """Enter `client`, translating failures into `LinkClosed` / `MqttAuthError`."""
    try:
        await client.__aenter__()
    except (aiomqtt.MqttError, OSError, ssl.SSLError) as exc:
        raise explain_mqtt_error(exc, settings) from None
    set_nodelay(client)


async def admits_anonymous(settings: MqttSettings, timeout_s: float = 3.0) -> bool:
    """True when the broker accepts a client with no user name and no password (same TLS).

    On such a broker anyone who can reach it may publish commands, forged samples and
    a status that says the device is offline (docs/mqtt.md, threat model).
    """
    probe = replace(settings, username=None, password=None, cert_file=None, key_file=None,
                    connect_timeout_s=timeout_s)
    client = make_client(probe, identifier=client_id("probe", settings.rig or "none"))
    try:
        await asyncio.wait_for(connect_client(client, probe), timeout_s + 1.0)
    except (TimeoutError, LinkClosed, OSError):
        return False
    await disconnect_client(client)
    return True


def set_nodelay(client: aiomqtt.Client) -> bool:
    """Turn Nagle's algorithm off on the client's socket (paho leaves it on); True if set.

    With Nagle on, a small publish waits while an earlier one is unacknowledged.
    """
    sock = client._client.socket()  # aiomqtt keeps its paho client here
    if not isinstance(sock, socket.socket):  # none yet, or a websocket wrapper
        return False
    with contextlib.suppress(OSError, AttributeError):
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return True
    return False


_TCP_QUICKACK = getattr(socket, "TCP_QUICKACK", None)


def quick_ack(sock: Any) -> None:
    """Acknowledge what was just read at once (Linux TCP_QUICKACK; a no-op elsewhere).

    A broker without ``set_tcp_nodelay`` holds its next small message to us
    until our kernel acknowledges the last one; the delayed acknowledgement
    otherwise rides on our next message, a whole period later. The kernel
    clears the flag by itself, so it is set again after every read.
    """
    if _TCP_QUICKACK is not None and sock is not None:
        with contextlib.suppress(OSError, AttributeError):
            sock.setsockopt(socket.IPPROTO_TCP, _TCP_QUICKACK, 1)


def publish_now(
    client: aiomqtt.Client,
    topic: str,
    payload: bytes,
    properties: Properties | None = None,
    *,
    qos: int = 0,
    retain: bool = False,
) -> None:
    """Publish and write the packet to the socket before returning.

    `aiomqtt.Client.publish` leaves the write to the event loop (a writer
    callback registered for the next turn, then a wait for paho's publish
    callback): two or three loop turns per message. This writes at once.
    Call it in the client's own loop thread, never from inside a paho callback
    (paho holds a non-reentrant lock there). Raises `aiomqtt.MqttCodeError`.
    """
    pc = client._client
    # Paho would ask aiomqtt to watch the socket for writability (a callback
    # scheduled for the loop's next turn, which may find the socket closed);
    # the write follows here at once, so the loop is asked only when bytes are
    # left over (a full socket buffer).
    was_registered = getattr(pc, "_registered_write", True)
    pc._registered_write = True
    try:
        info = pc.publish(topic, payload, qos, retain, properties)
        rc = pc.loop_write() if info.rc == 0 else 0
    finally:
        if not was_registered and pc.want_write() and pc._registered_write:
            pc._registered_write = False
            pc._call_socket_register_write()
        elif not was_registered and not pc.want_write():
            pc._registered_write = False
    if info.rc != 0:
        raise aiomqtt.MqttCodeError(info.rc, "Could not publish message")
    if rc != 0:
        raise aiomqtt.MqttCodeError(rc, "Could not write to the broker")


async def disconnect_client(client: aiomqtt.Client | None) -> None:
    """Leave `client`; never raises."""
    if client is None:
        return
    try:
        await asyncio.wait_for(client.__aexit__(None, None, None), 2.0)
    except asyncio.CancelledError:
        # aiomqtt may raise CancelledError of its own while it tears down; that one is
        # swallowed. A cancellation of the task calling us is passed on: swallowing it
        # made a cancelled publisher reconnect forever (a run that SIGTERM did not end).
        task = asyncio.current_task()
        if task is not None and task.cancelling():
            raise
    except Exception:  # noqa: BLE001 - leaving a dead connection must never raise
        pass
    # A connection the broker dropped leaves aiomqtt's disconnect future holding its
    # exception, which its __aexit__ (aiomqtt 2.5) returns early past without reading:
    # asyncio then logs "Future exception was never retrieved" when the client is
    # collected. We know the connection is gone (the link said so): read it here.
    fut = getattr(client, "_disconnected", None)
    if isinstance(fut, asyncio.Future) and fut.done() and not fut.cancelled():
        fut.exception()


def client_id(role: str, rig: str) -> str:
    """A unique MQTT client identifier, ``corral-<role>-<rig>-<8 hex digits>``."""
    return f"corral-{role}-{rig}-{uuid.uuid4().hex[:8]}"
