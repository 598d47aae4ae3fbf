"""The MQTT link: the corral wire messages through an MQTT 5 broker.

Payloads are the same positional msgpack message bodies as on the serial
line (`drivers.wire.encode_body` / `decode_body`) without COBS framing and
without the CRC (MQTT runs over TCP, which already checks its bytes).
docs/mqtt.md lists the topics and their rules.

What lives here: `MqttSettings` (the ``[link.mqtt]`` table, password taken
from an environment variable), `parse_mqtt_url`, `Topics`, `MqttLink` (the
host side of one rig, a `drivers.base.Link`), helpers the device side shares
(`make_client`, `status_payload`, `decode_status`, `expiry`), and
`MqttPublisher` (the runtime's telemetry, mode and trip publisher and its
filtered inbox of remote operator requests). What does not: the simulated
device (`sim_rigs.device`), any control logic.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import inspect
import math
import os
import socket
import ssl
import time
import uuid
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from types import TracebackType
from typing import Any
from urllib.parse import urlsplit

import aiomqtt
import msgpack
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from drivers.base import (
    Command,
    Hello,
    LatencyRing,
    Link,
    LinkClosed,
    LinkStats,
    Sample,
    SampleInbox,
    SessionRefused,
    new_session,
)
from drivers.wire import (
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
)

DEFAULT_PORT = 1883
DEFAULT_TLS_PORT = 8883
HOST_HELLO_RIG_ID = "host"
REQUEST_OPS = ("arm", "disarm", "reset", "stop")


# --------------------------------------------------------------------------- settings


TABLE_KEYS = ("host", "port", "prefix", "tls", "ca_file", "username", "password_env",
              "password", "keepalive_s", "sample_expiry_s", "max_sample_age_s",
              "remote_requests", "connect_timeout_s", "rig", "cert_file", "key_file")
"""Keys of the ``[link.mqtt]`` table (runtime/schema.py declares each; a test holds the two
together, since drivers/ does not import runtime/)."""


class MqttConfigError(ValueError):
    """A ``[link.mqtt]`` value is unusable; names the field and the fix."""

    def __init__(self, field: str, problem: str, fix: str = "") -> None:
        self.field = field
        self.problem = problem
        self.fix = fix
        super().__init__(f"config error in '{field}': {problem}" + (f" Fix: {fix}" if fix else ""))


class MqttAuthError(LinkClosed):
    """The broker refused the login (bad user name or password, or not authorised)."""


@dataclass(frozen=True)
class MqttSettings:
    """Where the broker is and how to log in (the ``[link.mqtt]`` config table)."""

    host: str = "127.0.0.1"
    port: int = DEFAULT_PORT
    rig: str = ""
    """Rig name: the second level of every topic."""
    prefix: str = "corral"
    """First level of every topic."""
    tls: bool = False
    ca_file: str | None = None
    """CA bundle for the broker's certificate (None: the system store)."""
    cert_file: str | None = None
    """Client certificate (PEM) for brokers that require one (with ``key_file``)."""
    key_file: str | None = None
    """The client certificate's private key (PEM)."""
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    """Read from the environment variable named by ``password_env``; never stored in a config."""
    keepalive_s: int = 5
    """MQTT keep-alive (s); a silent broker is declared lost after about 1.5 times this."""
    connect_timeout_s: float = 5.0
    sample_expiry_s: int = 1
    """MQTT 5 message expiry on samples, commands and telemetry (whole seconds, >= 1)."""
    max_sample_age_s: float = 0.5
    """A sample older than this on receipt (device-clock age estimate) is dropped as late."""
    remote_requests: tuple[str, ...] = ()
    """Operator requests accepted from the broker (``stop`` is always accepted)."""

    @classmethod
    def from_table(
        cls,
        table: Mapping[str, Any] | None,
        *,
        host: str | None = None,
        port: int | None = None,
        rig: str | None = None,
        env: Mapping[str, str] | None = None,
        key: str = "link.mqtt",
    ) -> MqttSettings:
        """Read a ``[link.mqtt]`` table; `host`/`port`/`rig` (from a URL) override it.

        Keys: host, port, prefix, tls (bool), ca_file, username, password_env
        (name of an environment variable holding the password), keepalive_s,
        sample_expiry_s, max_sample_age_s, remote_requests (list of
        arm|disarm|reset|stop). Raises `MqttConfigError` naming the field.
        """
        t = dict(table or {})
        env = os.environ if env is None else env
        known = set(TABLE_KEYS)
        for k in t:
            if k not in known:
                raise MqttConfigError(f"{key}.{k}", "is not a known MQTT setting.",
                                      f"use one of: {', '.join(sorted(known - {'password'}))}.")
        if "password" in t:
            raise MqttConfigError(f"{key}.password", "passwords must not be stored in a config.",
                                  f"put it in an environment variable and set {key}.password_env "
                                  "to that variable's name.")

        def typed(name: str, kind: type | tuple[type, ...], default: Any) -> Any:
            v = t.get(name, default)
            if v is default:
                return v
            if isinstance(v, bool) and kind is not bool:
                raise MqttConfigError(f"{key}.{name}", f"must not be a boolean, got {v!r}.")
            if not isinstance(v, kind):
                raise MqttConfigError(f"{key}.{name}", f"has the wrong type ({v!r}).",
                                      f"see docs/mqtt.md for the type of {key}.{name}.")
            return v

        tls = typed("tls", bool, False)
        p = port if port is not None else typed("port", int, None)
        if p is None:
            p = DEFAULT_TLS_PORT if tls else DEFAULT_PORT
        if not 0 < int(p) < 65536:
            raise MqttConfigError(f"{key}.port", f"must be 1..65535, got {p}.")
        ca_file = typed("ca_file", str, None)
        if ca_file is not None and not os.path.isfile(ca_file):
            raise MqttConfigError(f"{key}.ca_file", f"file {ca_file!r} does not exist.",
                                  "give the path of the CA certificate (PEM) of the broker.")
        cert_file = typed("cert_file", str, None)
        key_file = typed("key_file", str, None)
        for name, path in (("cert_file", cert_file), ("key_file", key_file)):
            if path is not None and not os.path.isfile(path):
                raise MqttConfigError(f"{key}.{name}", f"file {path!r} does not exist.",
                                      "give the path of the client certificate / key (PEM).")
        if (cert_file is None) != (key_file is None):
            raise MqttConfigError(f"{key}.cert_file", "a client certificate needs its key.",
                                  f"set both {key}.cert_file and {key}.key_file.")
        username = typed("username", str, None)
        password = None
        pw_env = typed("password_env", str, None)
        if pw_env is not None:
            if pw_env not in env:
                raise MqttConfigError(
                    f"{key}.password_env",
                    f"names the environment variable {pw_env!r}, which is not set.",
                    f"export {pw_env}=... before starting corral.",
                )
            password = env[pw_env]
            if username is None:
                raise MqttConfigError(f"{key}.username", "is missing (a password is set).",
                                      f"set {key}.username.")
        reqs = typed("remote_requests", list, [])
        for r in reqs:
            if r not in REQUEST_OPS:
                raise MqttConfigError(f"{key}.remote_requests", f"unknown request {r!r}.",
                                      f"use some of: {', '.join(REQUEST_OPS)}.")
        expiry = typed("sample_expiry_s", int, 1)
        if expiry < 1:
            raise MqttConfigError(f"{key}.sample_expiry_s", "must be at least 1 (whole seconds).")
        keepalive = typed("keepalive_s", int, 5)
        if keepalive < 1:
            raise MqttConfigError(f"{key}.keepalive_s", "must be at least 1 s.")
        age = float(typed("max_sample_age_s", (int, float), 0.5))
        if not age > 0:
            raise MqttConfigError(f"{key}.max_sample_age_s", "must be positive (s).")
        ct = float(typed("connect_timeout_s", (int, float), 5.0))
        if not ct > 0:
            raise MqttConfigError(f"{key}.connect_timeout_s", "must be positive (s).")
        rig_name = rig if rig is not None else typed("rig", str, "")
        return cls(
            host=host if host is not None else typed("host", str, "127.0.0.1"),
            port=int(p),
            rig=rig_name,
            prefix=typed("prefix", str, "corral"),
            tls=tls,
            ca_file=ca_file,
            cert_file=cert_file,
            key_file=key_file,
            username=username,
            password=password,
            keepalive_s=keepalive,
            connect_timeout_s=ct,
            sample_expiry_s=expiry,
            max_sample_age_s=age,
            remote_requests=tuple(reqs),
        )

    def with_rig(self, rig: str) -> MqttSettings:
        """The same broker settings for another rig."""
        return replace(self, rig=rig)

    @property
    def url(self) -> str:
        """``mqtt://host:port/rig`` (``mqtts://`` with TLS)."""
        return f"{'mqtts' if self.tls else 'mqtt'}://{self.host}:{self.port}/{self.rig}"


def parse_mqtt_url(url: str) -> tuple[str, int, str]:
    """Split ``mqtt://HOST:PORT/RIG`` into ``(host, port, rig)``.

    The port defaults to 1883 (8883 for ``mqtts://``).

    >>> parse_mqtt_url("mqtt://127.0.0.1:1884/pedestal-sim")
    ('127.0.0.1', 1884, 'pedestal-sim')
    """
    parts = urlsplit(url)
    if parts.scheme not in ("mqtt", "mqtts"):
        raise ValueError(f"not an MQTT URL (want mqtt://HOST:PORT/RIG): {url!r}")
    host = parts.hostname
    if not host:
        raise ValueError(f"MQTT URL has no host: {url!r}")
    try:
        port = parts.port
    except ValueError:
        raise ValueError(f"MQTT URL has a bad port: {url!r}") from None
    if port is None:
        port = DEFAULT_TLS_PORT if parts.scheme == "mqtts" else DEFAULT_PORT
    rig = parts.path.strip("/")
    if not rig or "/" in rig or "+" in rig or "#" in rig:
        raise ValueError(f"MQTT URL needs one rig name after the port, e.g. "
                         f"mqtt://{host}:{port}/my-rig: {url!r}")
    return host, port, rig


def parse_host_port(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (or ``HOST``, port 1883) as given to ``corral rig serve --mqtt``."""
    host, sep, port_s = text.rpartition(":")
    if not sep:
        return text, DEFAULT_PORT
    if not host or not port_s.isdigit() or not 0 < int(port_s) < 65536:
        raise ValueError(f"want HOST:PORT, e.g. 127.0.0.1:1883, got {text!r}")
    return host, int(port_s)


@dataclass(frozen=True)
class Topics:
    """The topics of one rig (see docs/mqtt.md)."""

    prefix: str
    rig: str

    def _t(self, leaf: str) -> str:
        return f"{self.prefix}/{self.rig}/{leaf}"

    @property
    def hello(self) -> str:
        """Device -> all, retained: the device's hello."""
        return self._t("hello")

    @property
    def status(self) -> str:
        """Device -> all, retained: online/offline (the last will says offline)."""
        return self._t("status")

    @property
    def sample(self) -> str:
        """Device -> host: samples, heartbeats, fault and stop reports."""
        return self._t("sample")

    @property
    def command(self) -> str:
        """Host -> device: commands, stops, heartbeats and the host hello."""
        return self._t("command")

    @property
    def telemetry(self) -> str:
        """Runtime -> remote tools: decimated telemetry records."""
        return self._t("telemetry")

    @property
    def mode(self) -> str:
        """Runtime -> remote tools, retained with expiry: supervisor mode."""
        return self._t("mode")

    @property
    def trip(self) -> str:
        """Runtime -> remote tools: trip summaries."""
        return self._t("trip")

    @property
    def request(self) -> str:
        """Remote tools -> runtime: operator requests."""
        return self._t("request")

    @property
    def reply(self) -> str:
        """Runtime -> remote tools: replies to requests."""
        return self._t("reply")


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
    client = make_client(probe, identifier=_client_id("probe", settings.rig or "none"))
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


def host_hello(session: int = 0) -> Hello:
    """The hello a host publishes on the command topic: announce yourself, grant `session`."""
    return Hello(PROTOCOL_VERSION, HOST_HELLO_RIG_ID, (), (), 0.0, (), (), (), 0.0, session)


def _client_id(role: str, rig: str) -> str:
    return f"corral-{role}-{rig}-{uuid.uuid4().hex[:8]}"


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
        client = make_client(self.settings, identifier=_client_id("host", self.settings.rig))
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
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self.hello_timeout_s
        assert self._hello_waiter is not None
        if not self.session:
            # One token per link object: a reconnect asks again as the same owner, so a
            # device that still remembers it grants it at once.
            self.session = new_session()
        self._taken_by = 0
        while True:
            await self._publish_msg(host_hello(self.session))
            left = deadline - loop.time()
            if left <= 0 and self._taken_by:
                raise SessionRefused(
                    f"rig {self.settings.rig!r} via {self.url} is driven by another host "
                    "session: another runtime owns this rig; stop it first (the device frees "
                    "the rig once its commands have stopped for its lease)")
            if left <= 0:
                note = ""
                if self.device_online is False:
                    info = self.device_status_info or {}
                    note = f"; its retained status says offline ({info.get('reason', '')})"
                elif self.retained_hello is None:
                    note = "; the broker holds no hello for it (never served here?)"
                raise LinkClosed(
                    f"no live hello from rig {self.settings.rig!r} via {self.url} within "
                    f"{self.hello_timeout_s:g} s{note}"
                )
            done, _ = await asyncio.wait({self._hello_waiter}, timeout=min(0.25, left))
            if done:
                hello = self._hello_waiter.result()
                break
        self._samples.clear()
        if hello.protocol != PROTOCOL_VERSION:
            raise LinkClosed(f"rig {hello.rig_id!r} speaks wire protocol v{hello.protocol}, "
                             f"this host speaks v{PROTOCOL_VERSION}")

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


# --------------------------------------------------------------------------- runtime publisher

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
            client = make_client(self.settings, identifier=_client_id("runtime", self.settings.rig),
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

