"""Serve simulated rigs' telemetry on a broker through the runtime's own MQTT bridge.

``python tests/fleet_rigs.py HOST PORT RIG=STATE [RIG=STATE ...]``
(``--tls CA [--cert PEM --key PEM] --user U --password-env VAR`` for a locked broker)

Each rig is a `runtime.realtime.telemetry.MqttBridge` (what `corral run --telemetry-mqtt`
runs: decimated
telemetry, the retained hello and mode, the mode topic's last will, trip summaries) fed with
telemetry maps of the documented shape (docs/telemetry.md) at 50 Hz, a rig's state one of:

- ``running``: engaged, margin ratio 0.30;
- ``warning``: engaged, margin ratio 0.85 (above the 0.8 warning level);
- ``tripped``: a margin trip latched, the fallback in charge;
- ``link``: engaged, ratio 0.2, the link counting gaps and CRC errors;
- ``idle``: not engaged.

Prints ``ready RIG`` once each bridge is connected, then runs until killed (SIGKILL leaves the
broker to publish the will; SIGTERM ends cleanly).
"""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from drivers.mqtt_link import MqttSettings  # noqa: E402
from runtime.realtime.telemetry import MqttBridge  # noqa: E402

TRIP = {"id": 1, "rule": "margin", "tick": 4321, "t": 4.321, "action": "fallback",
        "value": 0.93, "threshold": 0.9}


def record(state: str, tick: int) -> dict:
    link = {"frames_in": tick, "frames_out": tick, "crc_errors": 0, "gaps": 0,
            "connected": True, "sample_age_ms": 1.5}
    rec = {"type": "telemetry", "t": tick * 0.02, "tick": tick, "mode": "engaged",
           "latched": False, "fallback": None, "ratio": 0.3, "s": 0.03, "eps": 0.1,
           "link": link, "trip": None, "trips": []}
    if state == "warning":
        rec["ratio"] = 0.85
    elif state == "tripped":
        rec.update(mode="fallback", latched=True, fallback="baseline", ratio=0.0,
                   trip=TRIP, trips=[TRIP])
    elif state == "link":
        rec["ratio"] = 0.2
        link.update(gaps=7, crc_errors=2)
    elif state == "idle":
        rec.update(mode="idle", ratio=0.0)
    return rec


async def serve(args: argparse.Namespace) -> None:
    bridges = []
    for item in args.rigs:
        rig, _, state = item.partition("=")
        settings = MqttSettings(host=args.host, port=args.port, rig=rig, tls=bool(args.tls),
                                ca_file=args.tls, cert_file=args.cert, key_file=args.key,
                                username=args.user,
                                password=os.environ.get(args.password_env or "", None))
        hello = {"rig": rig, "levels": {"warning": 0.8, "trip": 0.9}, "eps": 0.1,
                 "period": 0.001, "simulated": True}
        bridge = MqttBridge(settings, hello, lambda op, reply: reply(False, "not here"),
                            rate_hz=10.0, hello_refresh_s=1.0)
        bridges.append((rig, state, bridge))
    tasks = [asyncio.ensure_future(b.run()) for _r, _s, b in bridges]
    for rig, _s, bridge in bridges:
        while bridge.publisher is None:
            await asyncio.sleep(0.01)
        if not await bridge.publisher.wait_connected(60.0):
            raise SystemExit(f"{rig}: broker not reachable")
        print(f"ready {rig}", flush=True)
    tick = 0
    t0 = time.monotonic()
    while True:
        tick += 1
        for _rig, state, bridge in bridges:
            rec = record(state, tick)
            bridge.on_record(rec)
            if state == "tripped" and tick == 1:
                bridge.on_record({"type": "trip", **TRIP})
        await asyncio.sleep(max(0.0, t0 + tick * 0.02 - time.monotonic()))
    await asyncio.gather(*tasks)  # pragma: no cover


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("host")
    p.add_argument("port", type=int)
    p.add_argument("rigs", nargs="+")
    p.add_argument("--tls", default=None, metavar="CA")
    p.add_argument("--cert", default=None)
    p.add_argument("--key", default=None)
    p.add_argument("--user", default=None)
    p.add_argument("--password-env", default=None)
    args = p.parse_args()
    try:
        asyncio.run(serve(args))
    except KeyboardInterrupt:
        pass


if __name__ == "__main__":
    main()
