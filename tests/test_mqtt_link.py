"""MqttLink and MqttPublisher against a real mosquitto broker (tests/mqtt_broker.py).

The device side is the simulated pedestal (`sim_rigs.device.RigDevice`)
served through the same broker, in-process (a clock thread plus its own
asyncio loop) or as a `corral rig serve --mqtt` subprocess where a process
must die. Behaviour references: MQTT 5.0 (OASIS Standard, 2019) sections
3.1.2.5 (will message published when the network connection closes without
DISCONNECT), 3.3.2.3.3 (message expiry: the server must not deliver an
expired message; retained messages expire too) and 3.3.1.3 (retain flag).
"""

from __future__ import annotations

import asyncio
import functools
import os
import subprocess
import sys
import time
from pathlib import Path

import aiomqtt
import msgpack
import pytest
from mqtt_broker import mosquitto  # noqa: F401  (the fixture)

from drivers.base import STATUS_COMMAND_TIMEOUT, Command, LinkClosed, Sample
from drivers.mqtt_link import (
    MqttAuthError,
    MqttConfigError,
    MqttLink,
    MqttPublisher,
    MqttSettings,
    Topics,
    decode_status,
    expiry,
    parse_mqtt_url,
)
from drivers.wire import PROTOCOL_VERSION, decode_body, encode_body
from sim_rigs import RIGS
from sim_rigs.device import RigDevice
from sim_rigs.plant import RigPlant

pytestmark = pytest.mark.timeout(180)

ROOT = Path(__file__).resolve().parents[1]
# The `corral` console script, run by this interpreter.
CORRAL = [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())"]


def aio(fn):
    """Run an async test function on a fresh event loop (no asyncio pytest plugin here)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        return asyncio.run(fn(*args, **kwargs))

    return wrapper


def settings_for(broker, rig: str = "bench-1", **kw) -> MqttSettings:
    return MqttSettings(host=broker.host, port=broker.port, rig=rig, **kw)


class ServedDevice:
    """A RigDevice served through the broker, its clock in a thread."""

    def __init__(self, settings: MqttSettings, period: float = 0.004) -> None:
        import threading

        self.device = RigDevice(RigPlant.create(RIGS["pedestal"]), period=period,
                                rig_id=settings.rig)
        self.url = self.device.serve_mqtt(settings)
        self.thread = threading.Thread(target=self.device.run, daemon=True)

    def __enter__(self) -> ServedDevice:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.device.stop()
        self.thread.join(10)


async def next_message(client: aiomqtt.Client, timeout: float = 30.0) -> aiomqtt.Message:
    async def first():
        async for m in client.messages:
            return m

    return await asyncio.wait_for(first(), timeout)


def test_parse_mqtt_url():
    assert parse_mqtt_url("mqtt://127.0.0.1:1884/pedestal-sim") == (
        "127.0.0.1", 1884, "pedestal-sim")
    assert parse_mqtt_url("mqtt://broker.lab/rig-a") == ("broker.lab", 1883, "rig-a")
    assert parse_mqtt_url("mqtts://broker.lab/rig-a") == ("broker.lab", 8883, "rig-a")
    for bad in ("serial:/dev/ttyS0", "mqtt://host:1883/", "mqtt://host:1883/a/b", "mqtt:///r"):
        with pytest.raises(ValueError):
            parse_mqtt_url(bad)


def test_settings_password_from_env_only():
    s = MqttSettings.from_table({"username": "lab", "password_env": "RIG_PW"},
                                rig="r", env={"RIG_PW": "s3cret"})
    assert s.password == "s3cret" and "s3cret" not in repr(s)
    with pytest.raises(MqttConfigError) as e:
        MqttSettings.from_table({"username": "lab", "password_env": "RIG_PW"}, rig="r", env={})
    assert e.value.field == "link.mqtt.password_env"
    with pytest.raises(MqttConfigError) as e:
        MqttSettings.from_table({"password": "x"}, rig="r", env={})
    assert e.value.field == "link.mqtt.password"
    with pytest.raises(MqttConfigError) as e:
        MqttSettings.from_table({"remote_requests": ["arm", "launch"]}, rig="r")
    assert e.value.field == "link.mqtt.remote_requests"


@aio
async def test_retained_hello_samples_and_command_echo(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto)
    topics = Topics(settings.prefix, settings.rig)
    with ServedDevice(settings) as served:
        # A bystander that subscribes later still reads the retained hello (MQTT 5.0, 3.3.1.3).
        async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                                  protocol=aiomqtt.ProtocolVersion.V5) as c:
            await c.subscribe(topics.hello, qos=1)
            m = await next_message(c)
            assert m.retain
            hello = decode_body(m.payload)
            assert hello.rig_id == "bench-1" and hello.protocol == PROTOCOL_VERSION
            assert hello.channels == ("az", "el", "az_rate", "el_rate")
        async with MqttLink(settings) as link:
            assert link.hello is not None and link.hello.sample_rate_hz == pytest.approx(250.0)
            assert link.retained_hello is not None
            seqs = []
            for _ in range(60):
                s = await link.receive()
                assert isinstance(s, Sample) and len(s.y) == 4
                seqs.append(s.seq)
                await link.send(Command(s.seq, (0.5, -0.5)))
            assert seqs == sorted(seqs)
            await asyncio.sleep(0.1)
            st = link.stats.as_dict()
            assert st["frames_in"] >= 60 and st["frames_out"] >= 60
            assert st["decode_errors"] == 0
            assert st["latency_p50_us"] > 0
        # The device saw commands that echo the seq of samples it sent.
        assert served.device.report().round_trip_p50_us > 0
        assert served.device.transport.guard.commands >= 50


@aio
async def test_expired_retained_sample_is_not_live(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto, rig="ghost")
    topics = Topics(settings.prefix, settings.rig)
    body = encode_body(Sample(7, 1.0, (0.1, 0.2, 0.0, 0.0), 0))
    async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                              protocol=aiomqtt.ProtocolVersion.V5) as c:
        # A (mis)retained sample with a 1 s expiry, and one with no expiry at all.
        await c.publish(topics.sample, body, qos=1, retain=True, properties=expiry(1))
    await asyncio.sleep(2.2)
    async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                              protocol=aiomqtt.ProtocolVersion.V5) as c:
        await c.subscribe(topics.sample, qos=1)
        # MQTT 5.0 3.3.2.3.3: the broker no longer delivers the expired retained sample.
        with pytest.raises(asyncio.TimeoutError):
            await next_message(c, timeout=0.5)
        await c.publish(topics.sample, body, qos=1, retain=True)  # this one never expires
    with ServedDevice(settings):
        link = MqttLink(settings)
        async with link:
            s = await link.receive()
            # The retained seq-7 sample reached the link (retain flag set) and was dropped.
            assert link.retained_dropped == 1
            assert s.seq != 7 or s.t_device != 1.0


@aio
async def test_last_will_marks_device_offline_when_killed(mosquitto, tmp_path):  # noqa: F811
    cfg = tmp_path / "rig.toml"
    text = (ROOT / "configs" / "pedestal-sim.toml").read_text()
    cfg.write_text(text)
    rig = "pedestal-sim"
    proc = subprocess.Popen(
        [*CORRAL, "rig", "serve", str(cfg), "--mqtt", mosquitto.url,
         "--set", "loop.period=0.004"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT,
    )
    try:
        first = proc.stdout.readline().strip()
        assert first == f"mqtt://{mosquitto.host}:{mosquitto.port}/{rig}"
        settings = settings_for(mosquitto, rig=rig)
        link = MqttLink(settings)
        await link.open()
        await link.receive()
        assert link.device_online is True
        proc.kill()  # no DISCONNECT: the broker must publish the will (MQTT 5.0, 3.1.2.5)
        with pytest.raises(LinkClosed, match="offline"):
            while True:
                await asyncio.wait_for(link.receive(), 10)
        assert link.device_online is False
        await link.close()
        # A new link now refuses: only a retained hello and an offline status remain.
        with pytest.raises(LinkClosed, match="offline"):
            await MqttLink(settings, hello_timeout_s=5.0).open()  # retained status in time
    finally:
        proc.kill()
        proc.wait(5)
        proc.stdout.close()
        proc.stderr.close()


@pytest.mark.parametrize("mosquitto", [{"users": {"lab": "right-one"}}], indirect=True)
@aio
async def test_username_password(mosquitto):  # noqa: F811
    env = {"RIG_PW": "right-one"}
    table = {"username": "lab", "password_env": "RIG_PW"}
    good = MqttSettings.from_table(table, host=mosquitto.host, port=mosquitto.port,
                                   rig="secure", env=env)
    with ServedDevice(good):
        async with MqttLink(good) as link:
            s = await link.receive()
            assert s.seq > 0
    bad = MqttSettings.from_table(table, host=mosquitto.host, port=mosquitto.port, rig="secure",
                                  env={"RIG_PW": "wrong"})
    with pytest.raises(MqttAuthError, match="refused the login of user 'lab'.*password_env"):
        await MqttLink(bad).open()
    anonymous = settings_for(mosquitto, rig="secure")
    with pytest.raises(MqttAuthError):
        await MqttLink(anonymous).open()


@aio
async def test_broker_restart_link_recovers(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto, rig="phoenix", keepalive_s=2)
    with ServedDevice(settings):
        link = MqttLink(settings)
        await link.open()
        s1 = await link.receive()
        await asyncio.get_running_loop().run_in_executor(None, mosquitto.stop)
        with pytest.raises(LinkClosed):
            while True:
                await asyncio.wait_for(link.receive(), 10)
        await asyncio.get_running_loop().run_in_executor(None, mosquitto.start)
        # Same process, same link object: back with backoff (the device reconnects too).
        await link.reconnect(timeout_s=20)
        s2 = await link.receive()
        await link.send(Command(s2.seq, (0.0, 0.0)))
        assert link.stats.reconnects == 1
        assert s2.t_device > s1.t_device
        await link.close()


@aio
async def test_command_timeout_over_mqtt(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto, rig="guarded")
    with ServedDevice(settings):
        async with MqttLink(settings) as link:
            for _ in range(40):
                s = await link.receive()
                await link.send(Command(s.seq, (3.0, 3.0)))
            assert not s.status & STATUS_COMMAND_TIMEOUT
            await asyncio.sleep(0.2)  # > command_timeout_s (0.05 s) without commands
            while True:
                s = await link.receive_latest()
                if s.status & STATUS_COMMAND_TIMEOUT:
                    break
            assert link.hello.command_timeout_s == pytest.approx(0.05)


@aio
async def test_remote_requests_filtered_and_stop_always(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto, rig="remote", remote_requests=("reset",))
    topics = Topics(settings.prefix, settings.rig)
    seen: list[str] = []

    def on_request(op, req):
        seen.append(op)
        return True, f"{op} done"

    async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                              protocol=aiomqtt.ProtocolVersion.V5) as c:
        # A retained request left on the broker must never act when the runtime
        # (re)subscribes: it arrives with the retain flag set (MQTT 5.0, 3.3.1.3).
        await c.publish(topics.request, msgpack.packb({"op": "stop", "id": 99}), qos=1,
                        retain=True)
    async with MqttPublisher(settings, on_request=on_request, telemetry_hz=50) as pub:
        assert await pub.wait_connected(5)
        async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                                  protocol=aiomqtt.ProtocolVersion.V5) as c:
            await c.subscribe(topics.reply, qos=1)
            await c.subscribe(topics.mode, qos=1)
            await c.subscribe(topics.telemetry, qos=0)
            await c.subscribe(topics.trip, qos=1)
            replies = {}
            for i, op in enumerate(("arm", "reset", "stop", "launch")):
                await c.publish(topics.request, msgpack.packb({"op": op, "id": i}), qos=1)
            pub.publish_mode("engaged", latched=False)
            pub.publish_telemetry({"t": 1.0, "ratio": 0.2})
            pub.publish_trip({"id": 1, "rule": "margin"})
            got = {"mode": None, "telemetry": None, "trip": None}
            deadline = time.monotonic() + 60  # a bound on the event, not a deadline
            while (len(replies) < 4 or None in got.values()) and time.monotonic() < deadline:
                m = await next_message(c)
                leaf = m.topic.value.rsplit("/", 1)[1]
                d = msgpack.unpackb(m.payload)
                if leaf == "reply":
                    replies[d["id"]] = d
                else:
                    got[leaf] = d
            assert replies[0]["ok"] is False and "not allowed" in replies[0]["message"]
            assert replies[1]["ok"] is True and replies[1]["message"] == "reset done"
            assert replies[2]["ok"] is True  # stop is not in the allow list, still accepted
            assert replies[3]["ok"] is False and "unknown" in replies[3]["message"]
            assert got["mode"]["mode"] == "engaged"
            assert got["telemetry"]["ratio"] == 0.2
            assert got["trip"]["rule"] == "margin"
            await c.publish(topics.request, b"", qos=1, retain=True)  # clear the retained one
    assert seen == ["reset", "stop"]


@aio
async def test_publisher_will_marks_runtime_disconnected(mosquitto):  # noqa: F811
    settings = settings_for(mosquitto, rig="will")
    topics = Topics(settings.prefix, settings.rig)
    code = (
        "import asyncio,sys\n"
        "from drivers.mqtt_link import MqttPublisher, MqttSettings\n"
        "async def main():\n"
        f"    s = MqttSettings(host={mosquitto.host!r}, port={mosquitto.port}, rig='will')\n"
        "    async with MqttPublisher(s) as p:\n"
        "        await p.wait_connected(5); p.publish_mode('engaged')\n"
        "        print('up', flush=True); await asyncio.sleep(60)\n"
        "asyncio.run(main())\n"
    )
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, cwd=ROOT,
                            env={**os.environ, "PYTHONPATH": str(ROOT)})
    try:
        assert proc.stdout.readline().strip() == b"up"
        await asyncio.sleep(0.2)
        proc.kill()
        proc.wait(5)
        async with aiomqtt.Client(mosquitto.host, mosquitto.port,
                                  protocol=aiomqtt.ProtocolVersion.V5) as c:
            await c.subscribe(topics.mode, qos=1)
            deadline = time.monotonic() + 60  # a bound on the event, not a deadline
            while time.monotonic() < deadline:
                d = msgpack.unpackb((await next_message(c)).payload)
                if d["mode"] == "disconnected":
                    break
            assert d == {**d, "mode": "disconnected", "online": False}
    finally:
        proc.kill()
        proc.stdout.close()


def test_status_payload_roundtrip():
    from drivers.mqtt_link import status_payload

    d = decode_status(status_payload(False, "r", "connection lost"))
    assert d["online"] is False and d["reason"] == "connection lost"
    assert decode_status(b"\x01garbage") is None
