"""A real mosquitto broker for tests, on a free loopback port.

Import the fixture with ``from mqtt_broker import mosquitto`` (pytest puts
tests/ on sys.path). `Broker` starts /usr/sbin/mosquitto (or `mosquitto` on
PATH) with a generated config in a temp folder: listener on 127.0.0.1 only,
anonymous access allowed unless a password file is asked for, ``user root``
when running as root (mosquitto started as root otherwise drops to its own
user and cannot read a 0700 temp folder). It waits until the broker accepts
TCP connections and stops it at teardown. `restart()` stops and starts it on
the same port (for reconnect tests).

What does not live here: any MQTT client code (see drivers/mqtt_link.py).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest


def mosquitto_binary() -> str | None:
    """Path of the mosquitto broker, or None when it is not installed."""
    if os.access("/usr/sbin/mosquitto", os.X_OK):
        return "/usr/sbin/mosquitto"
    return shutil.which("mosquitto")


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Broker:
    """One mosquitto process with its own config, log and (optional) password file."""

    def __init__(self, folder: Path, *, users: dict[str, str] | None = None,
                 tcp_nodelay: bool = False, acl: str | None = None, tls: bool = False,
                 client_certs: bool = False) -> None:
        binary = mosquitto_binary()
        if binary is None:
            raise RuntimeError("mosquitto is not installed (apt-get install mosquitto)")
        self.binary = binary
        self.folder = folder
        self.host = "127.0.0.1"
        self.port = free_port()
        self.users = dict(users or {})
        self.tcp_nodelay = tcp_nodelay
        """``set_tcp_nodelay true``: the broker sends small messages without Nagle's wait."""
        self.acl = acl
        """Text of an ACL file (mosquitto's ``acl_file`` format), or None for none."""
        self.tls = tls
        """The listener speaks TLS on a certificate made here (`ca_file` is its CA)."""
        self.client_certs = client_certs
        """With `tls`: the listener requires a client certificate signed by the same CA
        (``client.crt``/``client.key`` in the folder)."""
        self.ca_file: Path | None = None
        if tls:
            self.ca_file = make_certificates(folder)
        self.log_path = folder / "mosquitto.log"
        self.conf_path = folder / "mosquitto.conf"
        self.proc: subprocess.Popen[bytes] | None = None
        self._write_config()

    @property
    def url(self) -> str:
        """``HOST:PORT`` as `corral rig serve --mqtt` takes it."""
        return f"{self.host}:{self.port}"

    def _write_config(self) -> None:
        lines = [
            f"listener {self.port} 127.0.0.1",
            *([f"cafile {self.folder / 'ca.crt'}", f"certfile {self.folder / 'server.crt'}",
               f"keyfile {self.folder / 'server.key'}"] if self.tls else []),
            *(["require_certificate true"] if self.tls and self.client_certs else []),
            "persistence false",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "max_keepalive 60",
        ]
        if self.tcp_nodelay:
            lines.append("set_tcp_nodelay true")
        if os.geteuid() == 0:
            lines.append("user root")
        if self.users:
            pw = self.folder / "passwords"
            pw.write_text("")
            for user, password in self.users.items():
                subprocess.run(
                    ["mosquitto_passwd", "-b", str(pw), user, password],
                    check=True, capture_output=True,
                )
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        if self.acl is not None:
            acl = self.folder / "acl"
            acl.write_text(self.acl)
            lines.append(f"acl_file {acl}")
        self.conf_path.write_text("\n".join(lines) + "\n")

    def start(self, timeout_s: float = 10.0) -> None:
        """Start the broker and wait until it accepts connections."""
        self.proc = subprocess.Popen(
            [self.binary, "-c", str(self.conf_path)],
            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
        )
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode(errors="replace") if self.proc.stderr else ""
                log = self.log_path.read_text() if self.log_path.exists() else ""
                raise RuntimeError(f"mosquitto exited at start: {err}{log}")
            try:
                with socket.create_connection((self.host, self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.02)
        self.stop()
        raise RuntimeError(f"mosquitto did not accept connections on {self.url}")

    def stop(self) -> None:
        """Stop the broker (SIGTERM, then SIGKILL after 5 s)."""
        proc, self.proc = self.proc, None
        if proc is None:
            return
        proc.terminate()
        try:
            proc.wait(5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        if proc.stderr:
            proc.stderr.close()

    def restart(self, pause_s: float = 0.0) -> None:
        """Stop, wait `pause_s`, start again on the same port."""
        self.stop()
        time.sleep(pause_s)
        self.start()


def make_certificates(folder: Path) -> Path:
    """A throw-away CA and a server certificate for 127.0.0.1 (openssl CLI, made at test
    time); returns the CA certificate's path (``ca.crt``; ``server.crt``/``server.key``,
    ``client.crt``/``client.key``)."""
    def ssl(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=folder, check=True, capture_output=True)

    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    ssl("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.crt", "-days", "2",
        "-subj", "/CN=corral test CA")
    ssl("req", *ec, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=127.0.0.1")
    (folder / "san.ext").write_text("subjectAltName=IP:127.0.0.1\n")
    ssl("x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", "san.ext")
    # a client certificate from the same CA, for listeners that require one
    ssl("req", *ec, "-keyout", "client.key", "-out", "client.csr", "-subj", "/CN=corral client")
    ssl("x509", "-req", "-in", "client.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "client.crt", "-days", "2")
    return folder / "ca.crt"


@pytest.fixture
def mosquitto(request: pytest.FixtureRequest) -> Iterator[Broker]:
    """A running broker; parametrize indirectly with ``{"users": {...}}`` for a password file."""
    params = getattr(request, "param", None) or {}
    with tempfile.TemporaryDirectory(prefix="corral-mqtt-") as folder:
        broker = Broker(Path(folder), users=params.get("users"))
        broker.start()
        try:
            yield broker
        finally:
            broker.stop()
