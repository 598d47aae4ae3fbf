"""Bench: sample-to-command latency through mosquitto at 250 Hz, and the bare broker round trip.

Starts its own mosquitto on a free loopback port, serves the simulated
pedestal through it (`sim_rigs.device.PedestalDevice`, its clock in a thread)
in its own process (`corral rig serve --mqtt`, as deployed: in one process
the GIL's 5 ms switch interval adds whole milliseconds) and answers every
sample with an `MqttLink` at once. Reports, in microseconds:

- host: receipt of a sample to publish of the command that echoes it;
- device: publish of a sample to receipt of its command (the full trip
  through the broker twice, the figure a firmware sees); misses = samples
  whose command had not arrived when the next period began;
- bare: QoS 0 publish-to-receive of a 32-byte payload through the same
  broker, one client echoing for another, measured in the same run.

Usage: python bench/bench_mqtt.py [SECONDS]   (default 20). Prints figures only.
"""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import aiomqtt
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from mqtt_broker import Broker  # noqa: E402

from drivers.base import Command  # noqa: E402
from drivers.mqtt_link import MqttLink, MqttSettings  # noqa: E402

RATE_HZ = 250.0


def pct(a: np.ndarray) -> str:
    if a.size == 0:
        return "no data"
    return (f"p50 {np.percentile(a, 50):7.0f}  p99 {np.percentile(a, 99):7.0f}  "
            f"max {a.max():7.0f}  (n={a.size})")


async def bare_round_trip(broker: Broker, n: int) -> np.ndarray:
    """Ping on one topic, echo on another by a second client; QoS 0, 32 bytes."""
    v5 = aiomqtt.ProtocolVersion.V5
    out = np.zeros(n)
    async with aiomqtt.Client(broker.host, broker.port, protocol=v5) as echo, \
            aiomqtt.Client(broker.host, broker.port, protocol=v5) as ping:
        await echo.subscribe("bench/ping")
        await ping.subscribe("bench/pong")

        async def echoer() -> None:
            async for m in echo.messages:
                await echo.publish("bench/pong", m.payload)

        task = asyncio.create_task(echoer())
        await asyncio.sleep(0.2)
        payload = bytes(32)
        it = ping.messages.__aiter__()
        for i in range(n):
            t0 = time.perf_counter()
            await ping.publish("bench/ping", payload)
            await it.__anext__()
            out[i] = (time.perf_counter() - t0) * 1e6
            await asyncio.sleep(1.0 / RATE_HZ)
        task.cancel()
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
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 20.0
    root = Path(__file__).resolve().parents[1]
    with tempfile.TemporaryDirectory(prefix="corral-bench-") as folder:
        broker = Broker(Path(folder))
        broker.start()
        try:
            serve = subprocess.Popen(
                [sys.executable, "-c", "import sys; from runtime.cli import main; sys.exit(main())",
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
    print(f"MQTT closed loop at {RATE_HZ:g} Hz for {seconds:g} s through mosquitto (loopback)")
    print(f"  host  sample->command (us):        {pct(host)}")
    print(f"  device sample->command back (us):  p50 {rep['round_trip_p50_us']:7.0f}  "
          f"p99 {rep['round_trip_p99_us']:7.0f}  max {rep['round_trip_max_us']:7.0f}")
    print(f"  misses (command after next period): {rep['missed_commands']} of "
          f"{rep['samples_sent']} samples sent; answered {answered} "
          f"(samples before and after the host loop count as misses)")
    print(f"  device clock lateness (us):        p50 {rep['lateness_p50_us']:.0f}  "
          f"p99 {rep['lateness_p99_us']:.0f}  max {rep['lateness_max_us']:.0f}  "
          f"deadline misses {rep['deadline_misses']}")
    print(f"  link: gaps {st['gaps']}  duplicates {st['duplicates']}  late {st['late_frames']}  "
          f"decode errors {st['decode_errors']}")
    print(f"  bare broker round trip QoS 0, 32 B (us): {pct(bare)}")


if __name__ == "__main__":
    main()
