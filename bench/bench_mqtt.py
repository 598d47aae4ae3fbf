"""Bench: sample-to-command latency through mosquitto at 250 Hz, and the bare broker round trip.

Starts its own mosquitto on a free loopback port, serves the simulated
pedestal through it (`sim_rigs.device.RigDevice`, its clock in a thread)
in its own process (`corral rig serve --mqtt`, as deployed: in one process
the GIL's 5 ms switch interval adds whole milliseconds) and answers every
sample with an `MqttLink` at once. Reports, in microseconds:

- host: receipt of a sample to publish of the command that echoes it;
- device: publish of a sample to receipt of its command (the full trip
  through the broker twice, the figure a firmware sees); misses = samples
  whose command had not arrived when the next period began;
- bare: QoS 0 round trip of a 32-byte payload through the same broker, one
  client echoing for another, measured in the same run with the same client
  machinery as the link (`publish_now`, paho's direct message callbacks,
  TCP_NODELAY): the floor the closed loop can reach.

Usage: python bench/bench_mqtt.py [SECONDS] [--broker-nodelay] [--realtime]   (default 20 s).
``--broker-nodelay`` starts mosquitto with ``set_tcp_nodelay true``; by
default it runs with the Debian package's defaults (Nagle on). ``--realtime``
runs this process, the broker and the served device at SCHED_FIFO (root or
CAP_SYS_NICE), as `chrt -f 30` would: what a lab gets by giving the host loop
and the broker real-time priority. The device's own threads ask for SCHED_FIFO
in every case. Prints figures only.
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from mqtt_broker import Broker  # noqa: E402

from drivers.base import Command  # noqa: E402
from drivers.mqtt_link import (  # noqa: E402
    MqttLink,
    MqttSettings,
    connect_client,
    disconnect_client,
    make_client,
    publish_now,
    quick_ack,
)

RATE_HZ = 250.0


def pct(a: np.ndarray) -> str:
    if a.size == 0:
        return "no data"
    return (f"p50 {np.percentile(a, 50):7.0f}  p99 {np.percentile(a, 99):7.0f}  "
            f"max {a.max():7.0f}  (n={a.size})")


async def bare_round_trip(broker: Broker, n: int) -> np.ndarray:
    """Ping on one topic, echo on another by a second client; QoS 0, 32 bytes."""
    settings = MqttSettings(host=broker.host, port=broker.port, rig="bench")
    loop = asyncio.get_running_loop()
    out = np.zeros(n)
    echo = make_client(settings, identifier="bench-echo")
    ping = make_client(settings, identifier="bench-ping")
    await connect_client(echo, settings)
    await connect_client(ping, settings)
    got: list[asyncio.Future[float]] = []

    def on_ping(pc: Any, ud: Any, m: Any) -> None:
        quick_ack(pc.socket())
        loop.call_soon(publish_now, echo, "bench/pong", m.payload)

    def on_pong(pc: Any, ud: Any, m: Any) -> None:
        t = time.perf_counter()
        quick_ack(pc.socket())
        if got and not got[-1].done():
            got[-1].set_result(t)

    try:
        echo._client.message_callback_add("bench/ping", on_ping)
        ping._client.message_callback_add("bench/pong", on_pong)
        await echo.subscribe("bench/ping")
        await ping.subscribe("bench/pong")
        await asyncio.sleep(0.2)
        payload = bytes(32)
        for i in range(n):
            got.append(loop.create_future())
            t0 = time.perf_counter()
            publish_now(ping, "bench/ping", payload)
            out[i] = (await got[-1] - t0) * 1e6
            got.clear()
            await asyncio.sleep(1.0 / RATE_HZ)
    finally:
        await disconnect_client(ping)
        await disconnect_client(echo)
    return out


async def closed_loop(settings: MqttSettings, seconds: float) -> tuple[MqttLink, int]:
    link = MqttLink(settings)
    answered = 0
    async with link:
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            s = await link.receive()
            await link.send(Command(s.seq, (0.0, 0.0)))
            answered += 1
    return link, answered


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    nodelay = "--broker-nodelay" in sys.argv[1:]
    realtime = "--realtime" in sys.argv[1:]
    if realtime:
        try:  # inherited by the broker and the device started below
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(30))
        except (PermissionError, OSError) as exc:
            print(f"--realtime: SCHED_FIFO not permitted ({exc}); running at normal priority")
            realtime = False
    seconds = float(args[0]) if args else 20.0
    sys.setswitchinterval(100e-6)  # as the runtime's loop does
    root = Path(__file__).resolve().parents[1]
    with tempfile.TemporaryDirectory(prefix="corral-bench-") as folder:
        broker = Broker(Path(folder), tcp_nodelay=nodelay)
        broker.start()
        try:
            serve = subprocess.Popen(
                [sys.executable, "-m", "runtime.cli",
                 "rig", "serve", str(root / "configs" / "pedestal-sim.toml"), "--mqtt",
                 broker.url, "--set", f"loop.period={1.0 / RATE_HZ}", "--set",
                 "adaptation.gamma=0.5", "--duration", str(seconds + 3), "--json"],
                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=root)
            url = serve.stdout.readline().strip()
            rig = url.rsplit("/", 1)[1]
            settings = MqttSettings(host=broker.host, port=broker.port, rig=rig)
            link, answered = asyncio.run(closed_loop(settings, seconds))
            out, _ = serve.communicate(timeout=30)
            rep = json.loads(out.strip().splitlines()[-1])
            bare = asyncio.run(bare_round_trip(broker, int(min(seconds, 10) * RATE_HZ)))
        finally:
            broker.stop()
    host = np.asarray(link.stats.latencies_us)
    st = link.stats.as_dict()
    print(f"MQTT closed loop at {RATE_HZ:g} Hz for {seconds:g} s through mosquitto (loopback, "
          f"set_tcp_nodelay {'true' if nodelay else 'false'}"
          f"{', all at SCHED_FIFO' if realtime else ''})")
    print(f"  host  sample->command (us):        {pct(host)}")
    print(f"  device sample->command back (us):  p50 {rep['round_trip_p50_us']:7.0f}  "
          f"p99 {rep['round_trip_p99_us']:7.0f}  max {rep['round_trip_max_us']:7.0f}")
    print(f"  misses (command after next period): {rep['missed_commands']} of "
          f"{rep['samples_sent']} samples sent; answered {answered} "
          f"(samples before and after the host loop count as misses: "
          f"{rep['missed_commands'] - (rep['samples_sent'] - answered)} while it answered)")
    print(f"  device clock lateness (us):        p50 {rep['lateness_p50_us']:.0f}  "
          f"p99 {rep['lateness_p99_us']:.0f}  max {rep['lateness_max_us']:.0f}  "
          f"deadline misses {rep['deadline_misses']}")
    print(f"  link: gaps {st['gaps']}  duplicates {st['duplicates']}  late {st['late_frames']}  "
          f"decode errors {st['decode_errors']}")
    print(f"  bare broker round trip QoS 0, 32 B (us): {pct(bare)}")


if __name__ == "__main__":
    main()
