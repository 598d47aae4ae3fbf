"""One owner per rig on MQTT, and a broker that is locked: against a real mosquitto.

- On an open broker, the session handshake (protocol v2, docs/wire-protocol.md section 7):
  a second host is refused with a clear error while the first drives the rig; commands
  from another client with sequence numbers far ahead never drive the outputs (the
  owner's commands keep doing so); a retained command is ignored; a device status
  ``online: false`` ends the host link (the runtime turns that into a trip,
  tests/test_link_loss.py).
- On a locked broker (password file, the shipped per-rig ACL configs/mosquitto/*.acl, TLS
  on certificates made here with the openssl CLI; the recipe of docs/mqtt.md): an
  anonymous client is refused; a client with a valid login but no ACL grant for the
  rig's device topics publishes commands, samples and an offline status that reach
  neither the device nor the host (mosquitto drops a denied publish silently: the check
  is that nothing arrives); the authenticated device and host close the loop over TLS.
Every wait is for an event, with a generous bound; no timing is asserted.
"""

from __future__ import annotations

import asyncio
import tempfile
import threading
import time
from pathlib import Path

import aiomqtt
import msgpack
import pytest
from mqtt_broker import Broker, mosquitto  # noqa: F401  (the fixture)

from drivers.base import FLAG_OUTPUTS_ON, Command, LinkClosed, Sample, SessionRefused
from drivers.mqtt_link import (
    MqttAuthError,
    MqttLink,
    MqttSettings,
    Topics,
    admits_anonymous,
    status_payload,
)
from drivers.wire import encode_body
from sim_rigs import RIGS
from sim_rigs.device import RigDevice
from sim_rigs.plant import RigPlant

pytestmark = pytest.mark.timeout(180)

RIG = "sec-rig"


class Device:
    """The simulated pedestal served on the broker, its clock in a thread."""

    def __init__(self, settings: MqttSettings) -> None:
        self.device = RigDevice(RigPlant.create(RIGS["pedestal"]), period=0.004)
        self.device.serve_mqtt(settings)
        self.thread = threading.Thread(target=self.device.run, daemon=True)
        self.thread.start()

    @property
    def guard(self):  # noqa: ANN201
        return self.device.transport.guard

    def close(self) -> None:
        self.device.stop()
        self.thread.join(10)
        self.device.transport.close()


async def drive(link: MqttLink, n: int, u: float = 2.0,
                until: asyncio.Event | None = None) -> int:
    """Answer `n` samples with commands (or until `until` is set); returns the last seq."""
    seq = 0
    for _ in range(n):
        if until is not None and until.is_set():
            break
        s = await asyncio.wait_for(link.receive(), 10)
        seq = s.seq
        await link.send(Command(s.seq, (u, -u), FLAG_OUTPUTS_ON))
    return seq


async def publish_as(settings: MqttSettings, topic: str, payloads: list[bytes], *,
                     retain: bool = False) -> None:
    """Publish as a separate client (a forger, a second tool)."""
    from drivers.mqtt_link import connect_client, disconnect_client, make_client

    client = make_client(settings, identifier=f"forger-{time.monotonic_ns()}")
    await connect_client(client, settings)
    try:
        for p in payloads:
            await client.publish(topic, p, qos=1, retain=retain)
    finally:
        await disconnect_client(client)


def open_settings(broker: Broker) -> MqttSettings:
    return MqttSettings(host=broker.host, port=broker.port, rig=RIG)


def test_a_second_host_is_refused_and_forged_commands_never_drive_outputs(mosquitto):  # noqa: F811
    settings = open_settings(mosquitto)
    dev = Device(settings)
    topics = Topics(settings.prefix, RIG)

    async def main() -> None:
        async with MqttLink(settings) as link:
            await drive(link, 50)
            before = dev.guard.commands
            assert before > 0
            # A second runtime for the same rig, while the first drives it: refused by
            # the device, with a clear line.
            # (Stopped by an event, not a cancel: on Python 3.11 a cancel that meets a
            # finishing asyncio.wait_for can be swallowed.)
            enough = asyncio.Event()
            driving = asyncio.ensure_future(drive(link, 100_000, until=enough))
            try:
                with pytest.raises(SessionRefused, match="another host session"):
                    async with MqttLink(settings, hello_timeout_s=10.0):  # loaded-machine room
                        pass
            finally:
                enough.set()
                await asyncio.wait_for(driving, 30)
            assert dev.guard.sessions_refused >= 1
            # A forger: commands far ahead in sequence, full output, wrong session (and
            # one with the owner's token guessed as 0), and a retained command.
            forged = [encode_body(Command(10**6 + k, (12.0, 12.0), FLAG_OUTPUTS_ON,
                                          session=k % 2 * 12345)) for k in range(20)]
            await publish_as(settings, topics.command, forged)
            await publish_as(settings, topics.command, [encode_body(
                Command(10**7, (12.0, 12.0), FLAG_OUTPUTS_ON, session=link.session))],
                retain=True)
            deadline = time.monotonic() + 30
            while dev.guard.foreign_commands < 20 and time.monotonic() < deadline:
                await drive(link, 5)
            assert dev.guard.foreign_commands >= 20
            # The owner's commands still drive the outputs (not refused as "old").
            n0 = dev.guard.commands
            await drive(link, 50, u=1.5)
            assert dev.guard.commands > n0 + 25
            u, _ = dev.device.transport.outputs(time.monotonic())
            assert u == (1.5, -1.5)
            # A status "offline" (here forged; normally the device's last will) ends the
            # host link: the runtime makes that a trip, never a silent end.
            await publish_as(settings, topics.status, [status_payload(False, RIG, "forged")])
            with pytest.raises(LinkClosed, match="offline"):
                for _ in range(5000):
                    await asyncio.wait_for(link.receive(), 10)
        # The retained command was never applied (retain-as-published, ignored).
        await publish_as(settings, topics.command, [b""], retain=True)  # clear it

    try:
        asyncio.run(main())
    finally:
        dev.close()


ROOT = Path(__file__).resolve().parents[1]
# The shipped recipe (configs/mosquitto/pedestal-sim.acl), for this test's rig name.
ACL = (ROOT / "configs" / "mosquitto" / "pedestal-sim.acl").read_text().replace(
    "pedestal-sim", RIG)


USERS = {f"{RIG}-device": "dev-pw", f"{RIG}-host": "host-pw", f"{RIG}-watch": "watch-pw",
         "someone": "their-pw"}


@pytest.fixture
def locked_broker():
    with tempfile.TemporaryDirectory(prefix="corral-mqtt-locked-") as folder:
        broker = Broker(Path(folder), users=USERS, acl=ACL, tls=True)
        broker.start()
        try:
            yield broker
        finally:
            broker.stop()


def as_user(broker: Broker, user: str | None) -> MqttSettings:
    return MqttSettings(host=broker.host, port=broker.port, rig=RIG, tls=True,
                        ca_file=str(broker.ca_file), username=user,
                        password=USERS.get(user or ""))


def test_a_locked_broker_lets_only_the_owners_publish(locked_broker):
    broker = locked_broker
    dev = Device(as_user(broker, f"{RIG}-device"))
    topics = Topics("corral", RIG)

    async def main() -> None:
        # Anonymous: refused at the door (and `corral run` would not warn here).
        assert not await admits_anonymous(as_user(broker, None))
        with pytest.raises((MqttAuthError, LinkClosed)):
            await publish_as(as_user(broker, None), topics.command, [b"x"])
        # No TLS to a TLS listener: no connection at all.
        plain = MqttSettings(host=broker.host, port=broker.port, rig=RIG,
                             username=f"{RIG}-host", password="host-pw",
                             connect_timeout_s=2.0)
        with pytest.raises(LinkClosed):
            await publish_as(plain, topics.command, [b"x"])
        async with MqttLink(as_user(broker, f"{RIG}-host")) as link:
            await drive(link, 50)
            assert dev.guard.commands > 25  # the authenticated loop works over TLS
            stats0 = (link.stats.frames_in, link.stats.rejected, link.stats.decode_errors)
            received0 = dev.device.transport.decode_errors
            # Logged-in clients without an ACL grant for the device's topics: their
            # commands, samples and offline status are dropped by the broker.
            for user in ("someone", f"{RIG}-watch"):
                s = as_user(broker, user)
                await publish_as(s, topics.command, [encode_body(Command(
                    10**6, (12.0, 12.0), FLAG_OUTPUTS_ON, session=link.session))] * 10)
                await publish_as(s, topics.command, [b"not a message"] * 5)
                await publish_as(s, topics.sample, [encode_body(Sample(
                    10**6, 1e9, (0.0, 0.0, 0.0)))] * 10 + [b"junk"] * 5)
                await publish_as(s, topics.status, [status_payload(False, RIG, "forged")])
            # The loop goes on: no offline, no forged sample, no forged command arrived.
            await drive(link, 100, u=1.0)
            assert link.device_online is True
            assert link.stats.rejected == stats0[1] and link.stats.decode_errors == stats0[2]
            assert dev.device.transport.decode_errors == received0
            assert dev.guard.foreign_commands == 0
            u, _ = dev.device.transport.outputs(time.monotonic())
            assert u == (1.0, -1.0)
            # A watch client may read the telemetry topics and publish requests only.
            watch = as_user(broker, f"{RIG}-watch")
            await publish_as(watch, topics.request, [msgpack.packb({"op": "stop"})])

    try:
        asyncio.run(main())
    finally:
        dev.close()


def test_corral_run_warns_about_an_anonymous_broker(mosquitto):  # noqa: F811
    assert asyncio.run(admits_anonymous(open_settings(mosquitto)))
    from runtime.cli.cmd_run import ANONYMOUS_BROKER_WARNING

    assert "ANONYMOUS" in ANONYMOUS_BROKER_WARNING
    _ = aiomqtt  # (the client library the probe uses)
