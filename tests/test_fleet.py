"""The fleet view: five rigs on one real mosquitto, read through textual's pilot; the
ordering by urgency as a pure function.

The rigs are real runtimes: `corral run --headless --telemetry-mqtt` processes on the
simulated rig, each with its own rig name and faults (tests/fleet_rigs.py).
A rig killed with SIGKILL leaves its broker to publish its last will (MQTT 5.0, section 3.1.2.5:
the Will Message is published when the network connection is closed without a DISCONNECT);
the fleet shows it as silent. Ordering rule (trips first, then lost contact, then warnings,
link faults, running, idle) is this project's choice, in the spirit of alarm prioritisation
(common practice: the most urgent condition on top).
"""

from __future__ import annotations

import asyncio
import os
import tempfile
from pathlib import Path

import pytest
from aiomqtt import MqttError
from fleet_rigs import PERIOD_S, kill_rig, start_rig, stderr_of, stop_rigs
from mqtt_broker import Broker, mosquitto  # noqa: F401  (the fixture)

from runtime.dashboard.app import Dashboard
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
from runtime.dashboard.sources import FleetSource, MqttSource

# Five runtimes start in parallel (each imports, designs and compiles before it
# publishes): minutes on a heavily loaded 2-core machine. Bounds, not deadlines.
pytestmark = pytest.mark.timeout(1200)
BOUND_S = 600.0

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


async def wait_for(pilot, cond, what: str, bound_s: float = BOUND_S) -> None:
    """Wait for an event, with a bound a loaded 2-core machine never reaches."""
    loop = asyncio.get_running_loop()
    end = loop.time() + bound_s
    while not cond():
        assert loop.time() < end, f"never saw: {what}"
        await pilot.pause(0.2)


def tel_of(app, rig: str) -> dict:
    st = app.fleet.rigs.get(rig)
    return st.telemetry if st is not None else {}


TRIP_AT_S = 1.0
"""The spike on rig-trip, in rig time: a jump trip at tick TRIP_AT_S / PERIOD_S."""


def test_five_rigs_on_one_broker_in_the_fleet_view(mosquitto, tmp_path):  # noqa: F811
    # Five real runtimes (tests/fleet_rigs.py), each in a state the fleet ranks apart:
    # - rig-trip: a 0.3 rad spike on the azimuth reading, thirty times the jump limit
    #   (half of design.limits, 0.01 rad): the jump rule trips, the baseline latches
    #   (the same fault and rule as tests/test_run.py);
    # - rig-gone: running, then SIGKILLed: its broker publishes the will;
    # - rig-warn: running with its warning level at 1e-6, so any margin is a warning;
    # - rig-link: every 100th frame fails its CRC from 1 s on (the receiver discards
    #   it; seq_gap_max raised so the missing sample is counted, not tripped on);
    # - rig-idle: not armed.
    specs = {
        "rig-trip": dict(faults=[f"spike@{TRIP_AT_S}:axis=az,size=0.3"]),
        "rig-gone": dict(),
        "rig-warn": dict(sets=["watchdog.margin_warning=0.000001"]),
        "rig-link": dict(faults=["corrupt@1.0:every=100"], sets=["watchdog.seq_gap_max=1000"]),
        "rig-idle": dict(arm=False),
    }
    procs = {rig: start_rig(mosquitto.url, rig, tmp_path / rig, **kw)
             for rig, kw in specs.items()}

    def ready(app) -> bool:
        for rig, proc in procs.items():
            assert rig == "rig-gone" or proc.poll() is None, \
                f"{rig} ended: {stderr_of(tmp_path / rig)}"
        t = {rig: tel_of(app, rig) for rig in specs}
        return (all(t.values())
                and t["rig-trip"].get("latched") is True and app.fleet.rigs["rig-trip"].last_trip
                and (t["rig-link"].get("link") or {}).get("crc_errors", 0) > 0
                and all(t[r].get("mode") == "engaged" and 0 < t[r].get("ratio", 0) < 0.8
                        for r in ("rig-gone", "rig-warn", "rig-link"))
                and t["rig-idle"].get("mode") == "idle")

    try:
        async def main():
            source = FleetSource(mosquitto.host, mosquitto.port)
            async with source:
                with pytest.raises(PermissionError):
                    await source.request("arm")  # the fleet view sends no requests
                app = make_app(source, FleetState(silent_after_s=30.0))
                async with app.run_test(size=(180, 30)) as pilot:
                    await wait_for(pilot, lambda: ready(app), "five rigs in their states")
                    gone = {r[0]: r for r in app.rows()}["rig-gone"]
                    assert gone[1:3] == ("running", "engaged") and float(gone[3]) > 0
                    kill_rig(procs["rig-gone"])
                    await wait_for(pilot, lambda: app.fleet.rigs["rig-gone"].mode_msg
                                   .get("online") is False, "the killed rig's will")
                    rows = app.rows()
                    assert [r[0] for r in rows] == ["rig-trip", "rig-gone", "rig-warn",
                                                    "rig-link", "rig-idle"]
                    trip, gone, warn, link, idle = rows
                    assert trip[1:3] == ("TRIPPED", "fallback (latched)")
                    assert trip[5].startswith("jump:") and "-> baseline" in trip[5]
                    assert f"(tick {round(TRIP_AT_S / PERIOD_S)})" in trip[5]
                    # the last known state stays, marked silent by the will
                    assert gone[1:3] == ("SILENT (will: disconnected)", "disconnected")
                    assert float(gone[3]) > 0
                    assert warn[1:3] == ("WARNING", "engaged") and 0 < float(warn[3]) < 0.8
                    assert link[1:3] == ("LINK", "engaged") and 0 < float(link[3]) < 0.8
                    assert link[6].startswith("crc ")
                    assert idle[1:4] == ("idle", "idle", "-")
                    # the table on the screen holds the same rigs, in the same order
                    await wait_for(pilot, lambda: app.query_one("#fleet").row_count == 5
                                   and str(app.query_one("#fleet").get_row_at(1)[1])
                                   .startswith("SILENT"), "the table redrawn")
                    table = app.query_one("#fleet")
                    assert [str(table.get_row_at(i)[0]) for i in range(5)] == \
                        [r[0] for r in rows]
                    # from the top, two rows down and Enter: rig-warn's dashboard is to
                    # open (the cursor follows the rig it was on across redraws: put it on
                    # the first row)
                    table.focus()
                    table.move_cursor(row=0)
                    await pilot.pause()
                    await pilot.press("down", "down", "enter")
                    await pilot.pause()
                assert app.return_value == "rig-warn"
            # what `corral watch` then opens (runtime/cli/cmd_watch.py run_fleet): that
            # rig's full dashboard over the same broker
            async with MqttSource(mosquitto.host, mosquitto.port, "rig-warn") as one:
                dash = Dashboard(one)
                async with dash.run_test(size=(140, 48)) as pilot:
                    await wait_for(pilot, lambda: dash.latest.mode == "engaged",
                                   "rig-warn's dashboard")
                    assert dash.hello.rig == "rig-warn"
                    assert "rig-warn" in dash.title

        asyncio.run(main())
    finally:
        stop_rigs(procs.values())


USERS = {"fleet": "fleet-secret"}


def test_bridge_and_watchers_on_a_broker_with_a_password_tls_and_client_certificates(tmp_path):
    # A lab's broker (tests/mqtt_broker.py): password file, TLS listener, client
    # certificates required. Two runtimes publish (their [link.mqtt] login, TLS and
    # certificate), the fleet view and the one-rig watcher read, each logging in with a
    # password and presenting a certificate.
    with tempfile.TemporaryDirectory(prefix="corral-fleet-") as folder:
        broker = Broker(Path(folder), users=USERS, tls=True, client_certs=True)
        broker.start()
        try:
            ca, cert, key = (str(Path(folder) / n) for n in ("ca.crt", "client.crt",
                                                              "client.key"))
            login = dict(username="fleet", password=USERS["fleet"], tls=True, ca_file=ca)
            env = {**os.environ, "FLEET_PW": USERS["fleet"]}
            locked = ["link.mqtt.tls=true", f"link.mqtt.ca_file={ca}",
                      f"link.mqtt.cert_file={cert}", f"link.mqtt.key_file={key}",
                      "link.mqtt.username=fleet", "link.mqtt.password_env=FLEET_PW"]
            procs = [start_rig(broker.url, "rig-a", tmp_path / "a", sets=locked, env=env),
                     start_rig(broker.url, "rig-b", tmp_path / "b", env=env,
                               sets=[*locked, "watchdog.margin_warning=0.000001"])]
            try:
                async def fleet_view():
                    source = FleetSource(broker.host, broker.port, cert_file=cert,
                                         key_file=key, **login)
                    fleet = FleetState()
                    async with source:
                        async for rig, rec in source.fleet_records():
                            fleet.ingest(rig, rec)
                            tel = {r: fleet.rigs[r].telemetry if r in fleet.rigs else {}
                                   for r in ("rig-a", "rig-b")}
                            if all(t.get("mode") == "engaged" and 0 < t.get("ratio", 0) < 0.8
                                   for t in tel.values()):
                                break
                    return [r[:2] for r in fleet_rows(fleet)]

                async def one_rig():
                    source = MqttSource(broker.host, broker.port, "rig-b", cert_file=cert,
                                        key_file=key, **login)
                    hello = {}
                    async with source:
                        async for rec in source.records():
                            if rec.get("type") == "hello":
                                hello = rec
                            if rec.get("type") == "telemetry" and hello:
                                return hello

                async def without_certificate():
                    source = FleetSource(broker.host, broker.port, **login)
                    async with source:
                        pass

                assert asyncio.run(asyncio.wait_for(fleet_view(), BOUND_S)) == \
                    [("rig-b", "WARNING"), ("rig-a", "running")]
                hello = asyncio.run(asyncio.wait_for(one_rig(), BOUND_S))
                assert hello["rig"] == "rig-b" and hello["levels"]["warning"] == 1e-6
                with pytest.raises((MqttError, OSError)):
                    asyncio.run(asyncio.wait_for(without_certificate(), 120))
            finally:
                stop_rigs(procs)
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
