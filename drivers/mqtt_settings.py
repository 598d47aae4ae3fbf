"""The ``[link.mqtt]`` options: where the broker is, TLS, the login.

What lives here: `MqttSettings` (the ``[link.mqtt]`` table, password taken from
an environment variable), `TABLE_KEYS`, `MqttConfigError`, `MqttAuthError`,
`parse_mqtt_url`, `parse_host_port`. What does not: any connection (see
`drivers.mqtt_client`).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any
from urllib.parse import urlsplit

from drivers.base import LinkClosed

DEFAULT_PORT = 1883
DEFAULT_TLS_PORT = 8883
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
