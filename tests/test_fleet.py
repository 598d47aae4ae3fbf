"""The fleet view: five rigs on one real mosquitto, read through textual's pilot; the
ordering by urgency as a pure function.

The rigs are the runtime's own MQTT bridge (`runtime.realtime.telemetry.MqttBridge`, what
`corral run --telemetry-mqtt` runs) fed with telemetry maps of the documented shape
(tests/fleet_rigs.py).
A rig killed with SIGKILL leaves its broker to publish its last will (MQTT 5.0, section 3.1.2.5:
the Will Message is published when the network connection is closed without a DISCONNECT);
the fleet shows it as silent. Ordering rule (trips first, then lost contact, then warnings,
link faults, running, idle) is this project's choice, in the spirit of alarm prioritisation
(common practice: the most urgent condition on top).
"""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from mqtt_broker import Broker, make_certificates, mosquitto  # noqa: F401  (the fixture)

from runtime.dashboard.fleet import (
    RANK_LINK,
    RANK_QUIET,
    RANK_RUNNING,
    RANK_SILENT,
    RANK_TRIPPED,
    RANK_WARNING,
    FleetState,
    fleet_rows,
    make_app,
    urgency,
)
from runtime.dashboard.sources import FleetSource

HELLO = {"type": "hello", "levels": {"warning": 0.8, "trip": 0.9}}


def tel(**kw):
    rec = {"type": "telemetry", "mode": "engaged", "latched": False, "ratio": 0.3,
           "link": {"connected": True, "gaps": 0}}
    rec.update(kw)
    return rec


def test_rigs_are_ordered_by_urgency_without_a_screen():
    fleet = FleetState(silent_after_s=3.0)
    feeds = {
        "idle": tel(mode="idle", ratio=0.0),
        "ok-low": tel(ratio=0.2),
        "ok-high": tel(ratio=0.5),
        "warn": tel(ratio=0.82),
        "near-trip": tel(ratio=0.95),  # above the trip level: as urgent as a latched trip
        "latched": tel(mode="fallback", latched=True, fallback="baseline", ratio=0.0),
        "lossy": tel(ratio=0.1, link={"connected": True, "gaps": 4, "crc_errors": 1}),
        "fallback": tel(mode="fallback", fallback="baseline", ratio=0.0),
    }
    for rig, rec in feeds.items():
        fleet.ingest(rig, HELLO, now=0.0)
        fleet.ingest(rig, rec, now=10.0)
    fleet.ingest("quiet", HELLO, now=0.0)
    fleet.ingest("quiet", tel(ratio=0.4), now=5.0)  # last telemetry 5 s before `now`
    fleet.ingest("willed", tel(ratio=0.1), now=10.0)
    fleet.ingest("willed", {"type": "mode", "mode": "disconnected", "online": False}, now=10.0)
    fleet.ingest("done", tel(mode="stopped", ratio=0.0), now=9.0)
    fleet.ingest("done", {"type": "mode", "mode": "ended", "online": False}, now=9.5)
    order = [st.rig for st in fleet.ordered(now=10.0)]
    assert order == ["near-trip", "latched", "quiet", "willed", "warn", "fallback", "lossy",
                     "ok-high", "ok-low", "done", "idle"]
    ranks = {st.rig: urgency(st, 10.0, 3.0) for st in fleet.rigs.values()}
    assert ranks["latched"] == RANK_TRIPPED and ranks["quiet"] == RANK_SILENT
    assert ranks["warn"] == RANK_WARNING and ranks["lossy"] == RANK_LINK
    assert ranks["ok-low"] == RANK_RUNNING and ranks["done"] == RANK_QUIET
    rows = {r[0]: r for r in fleet_rows(fleet, now=10.0)}
    assert rows["willed"][1] == "SILENT (will: disconnected)"
    assert rows["quiet"][1] == "SILENT (no telemetry)" and rows["quiet"][7] == "5.0 s"
    assert rows["lossy"][6].startswith("crc 1, gaps 4")
    # telemetry again after a will: the rig is back
    fleet.ingest("willed", tel(ratio=0.1), now=10.5)
    assert urgency(fleet.rigs["willed"], 10.6, 3.0) == RANK_RUNNING


def test_worst_margin_is_the_highest_seen():
    fleet = FleetState()
    for r in (0.2, 0.7, 0.4):
        fleet.ingest("a", tel(ratio=r), now=1.0)
    assert fleet.rigs["a"].worst_ratio == 0.7
    assert fleet_rows(fleet, now=1.0)[0][3:5] == ("0.400", "0.700")


def serve(broker: Broker, *rigs: str, extra: tuple[str, ...] = (), env=None):
    proc = subprocess.Popen(
        [sys.executable, str(Path(__file__).with_name("fleet_rigs.py")), broker.host,
         str(broker.port), *rigs, *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    for _ in rigs:
        line = proc.stdout.readline()  # blocks until the bridge is connected (or exits)
        assert line.startswith("ready"), proc.stderr.read()
    return proc


async def wait_for(pilot, cond, what: str, bound_s: float = 120.0) -> None:
    loop = asyncio.get_running_loop()
    end = loop.time() + bound_s
    while not cond():
        assert loop.time() < end, f"never saw: {what}"
        await pilot.pause(0.2)


def test_five_rigs_on_one_broker_in_the_fleet_view(mosquitto):  # noqa: F811
    rigs = ["rig-ok=running", "rig-warn=warning", "rig-trip=tripped", "rig-link=link"]
    many = serve(mosquitto, *rigs)
    lone = serve(mosquitto, "rig-gone=running")
    try:
        async def main():
            source = FleetSource(mosquitto.host, mosquitto.port)
            async with source:
                with pytest.raises(PermissionError):
                    await source.request("arm")  # the fleet view sends no requests
                app = make_app(source, FleetState(silent_after_s=30.0))
                async with app.run_test(size=(160, 30)) as pilot:
                    await wait_for(pilot, lambda: len(app.fleet.rigs) == 5
                                   and all(st.telemetry for st in app.fleet.rigs.values()),
                                   "five rigs with telemetry")
                    os.kill(lone.pid, signal.SIGKILL)
                    lone.wait(timeout=60)
                    await wait_for(pilot, lambda: app.rows()[1][1].startswith("SILENT"),
                                   "the killed rig shown silent")
                    rows = app.rows()
                    assert [r[0] for r in rows] == ["rig-trip", "rig-gone", "rig-warn",
                                                    "rig-link", "rig-ok"]
                    trip = rows[0]
                    assert trip[1] == "TRIPPED" and "latched" in trip[2]
                    assert trip[5].startswith("margin: 0.93 vs 0.9 -> fallback")
                    assert rows[1][1] == "SILENT (will: disconnected)"
                    assert rows[2][3] == "0.850" and rows[2][1] == "WARNING"
                    assert rows[3][6].startswith("crc 2, gaps 7")
                    assert rows[4][1] == "running" and rows[4][6].startswith("ok")
                    # the table on the screen holds the same rows, in the same order
                    await wait_for(pilot, lambda: app.query_one("#fleet").row_count == 5
                                   and str(app.query_one("#fleet").get_row_at(1)[1])
                                   .startswith("SILENT"), "the table redrawn")
                    table = app.query_one("#fleet")
                    assert [str(table.get_row_at(i)[0]) for i in range(5)] == \
                        [r[0] for r in rows]
                    # Enter on the second row opens that rig's dashboard
                    table.focus()
                    await pilot.press("down")
                    await pilot.press("enter")
                    await pilot.pause()
                assert app.return_value == "rig-gone"

        asyncio.run(main())
    finally:
        for p in (many, lone):
            if p.poll() is None:
                p.terminate()
                p.wait(timeout=30)


USERS = {"fleet": "fleet-secret"}


def test_bridge_and_watchers_on_a_broker_with_a_password_tls_and_client_certificates():
    # A lab's broker (tests/mqtt_broker.py): password file, TLS listener, client
    # certificates required. The runtime's bridge publishes, the fleet view and the
    # one-rig watcher read, each logging in with a password and presenting a certificate.
    from runtime.dashboard.sources import MqttSource

    with tempfile.TemporaryDirectory(prefix="corral-fleet-") as folder:
        broker = Broker(Path(folder), users=USERS, tls=True, client_certs=True)
        broker.start()
        try:
            ca, cert, key = (str(Path(folder) / n) for n in ("ca.crt", "client.crt",
                                                              "client.key"))
            login = dict(username="fleet", password=USERS["fleet"], tls=True, ca_file=ca)
            env = {**os.environ, "FLEET_PW": USERS["fleet"]}
            proc = serve(broker, "rig-a=running", "rig-b=warning",
                         extra=("--tls", ca, "--cert", cert, "--key", key, "--user", "fleet",
                                "--password-env", "FLEET_PW"), env=env)
            try:
                async def fleet_view():
                    source = FleetSource(broker.host, broker.port, cert_file=cert,
                                         key_file=key, **login)
                    fleet = FleetState()
                    async with source:
                        async for rig, rec in source.fleet_records():
                            fleet.ingest(rig, rec)
                            if all(fleet.rigs.get(r) and fleet.rigs[r].telemetry
                                   for r in ("rig-a", "rig-b")):
                                break
                    return [r[0] for r in fleet_rows(fleet)]

                async def one_rig():
                    source = MqttSource(broker.host, broker.port, "rig-b", cert_file=cert,
                                        key_file=key, **login)
                    async with source:
                        async for rec in source.records():
                            if rec.get("type") == "telemetry":
                                return rec["ratio"]

                async def without_certificate():
                    source = FleetSource(broker.host, broker.port, **login)
                    async with source:
                        pass

                assert asyncio.run(asyncio.wait_for(fleet_view(), 120)) == ["rig-b", "rig-a"]
                assert asyncio.run(asyncio.wait_for(one_rig(), 120)) == 0.85
                from aiomqtt import MqttError

                with pytest.raises((MqttError, OSError)):
                    asyncio.run(asyncio.wait_for(without_certificate(), 120))
            finally:
                proc.terminate()
                proc.wait(timeout=30)
        finally:
            broker.stop()


def test_watch_with_mqtt_and_no_rig_is_the_fleet():
    import argparse

    from runtime.cli.cmd_watch import add_arguments, make_source
    from runtime.dashboard.sources import MqttSource

    p = argparse.ArgumentParser()
    add_arguments(p)
    fleet = make_source(p.parse_args(["--mqtt", "127.0.0.1:1883", "--prefix", "lab/corral"]))
    assert isinstance(fleet, FleetSource) and fleet.prefix == "lab/corral"
    one = make_source(p.parse_args(["--mqtt", "127.0.0.1:1883", "--rig", "r1"]))
    assert isinstance(one, MqttSource) and not isinstance(one, FleetSource)
