"""Serial link timing over a pseudo-terminal: sample-to-command latency and misses.

Runs a Python device (drivers.serial_link.DeviceEndpoint) in its own process at
1 kHz, answers every sample with a command through SerialLink, and reports:

- host latency: from receipt of a sample to the send of its command (SerialLink stats);
- device round trip: from the device writing a sample to it reading the answer;
- misses: samples whose command had not arrived when the next sample was due;
- beside it, a bare echo round trip of a 32-byte frame over another pty, same run.

    python bench/bench_serial.py              # 10 s
    python bench/bench_serial.py --seconds 60 # the figure quoted in the README

Numbers depend on the machine and its load; nothing here is a test.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import select
import subprocess
import sys
import time

import numpy as np

from drivers.base import FLAG_OUTPUTS_ON, Command, Hello
from drivers.serial_link import DeviceEndpoint, SerialLink, open_pty
from drivers.wire import PROTOCOL_VERSION

HELLO = Hello(
    protocol=PROTOCOL_VERSION, rig_id="bench", channels=("x", "v"), units=("m", "m/s"),
    sample_rate_hz=1000.0, output_names=("force",), output_limits=(5.0,), output_units=("N",),
    command_timeout_s=0.05,
)


def serve_device(rate: float, seconds: float) -> None:
    """Child process: a device streaming at `rate`, timing answers on its side."""
    dev = DeviceEndpoint.create_pty(HELLO)
    print(dev.path, flush=True)
    period = 1.0 / rate
    rtt_us: list[float] = []
    misses = samples = 0
    sent_seq, sent_at = -1, 0.0
    answered = True
    # wait for the host hello before streaming
    while dev.host_hellos == 0:
        dev.poll(0.1)
    t_end = time.monotonic() + seconds + 1.0
    deadline = time.monotonic()
    while deadline < t_end:
        deadline += period
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                break
            msgs = dev.poll(left)
            for m in msgs:
                if type(m) is Command and m.seq == sent_seq and not answered:
                    answered = True
                    rtt_us.append((time.monotonic() - sent_at) * 1e6)
        if sent_seq >= 0 and not answered and samples > 10:
            misses += 1
        if dev.guard.stopped:
            break
        u, status = dev.outputs()
        sent_at = time.monotonic()
        sent_seq = dev.send_sample((u[0], 0.0), status)
        answered = False
        samples += 1
    r = np.asarray(rtt_us)
    print(json.dumps({
        "samples": samples, "misses": misses,
        "rtt_p50": float(np.percentile(r, 50)) if r.size else None,
        "rtt_p99": float(np.percentile(r, 99)) if r.size else None,
        "rtt_max": float(r.max()) if r.size else None,
    }), flush=True)
    dev.close()


def serve_echo() -> None:
    """Child process: echo every byte back on a fresh pty until stdin closes."""
    master, slave, path = open_pty()
    print(path, flush=True)
    while True:
        r, _, _ = select.select([master, sys.stdin], [], [])
        if sys.stdin in r:
            break
        try:
            os.write(master, os.read(master, 4096))
        except OSError:
            pass


def _child(*args: str) -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen(
        [sys.executable, __file__, *args], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True
    )
    path = proc.stdout.readline().strip()
    return proc, path


async def run_loop(path: str, seconds: float) -> SerialLink:
    link = SerialLink(path, hello_timeout_s=5.0)
    await link.open()
    t_end = time.monotonic() + seconds
    while time.monotonic() < t_end:
        s = await link.receive()
        await link.send(Command(s.seq, (0.0,), FLAG_OUTPUTS_ON))
    await link.close()
    return link


async def run_echo(path: str, n: int) -> np.ndarray:
    import serial_asyncio_fast

    loop = asyncio.get_running_loop()
    got = bytearray()
    want = 32
    waiter: list[asyncio.Future] = []

    class P(asyncio.Protocol):
        def data_received(self, data: bytes) -> None:
            got.extend(data)
            if len(got) >= want and waiter and not waiter[0].done():
                waiter[0].set_result(None)

    tr, _ = await serial_asyncio_fast.create_serial_connection(loop, P, path, baudrate=115200)
    frame = bytes(range(1, 32)) + b"\x00"
    out = np.empty(n)
    for i in range(n):
        got.clear()
        waiter[:] = [loop.create_future()]
        t0 = time.perf_counter()
        tr.write(frame)
        await waiter[0]
        out[i] = (time.perf_counter() - t0) * 1e6
    tr.close()
    await asyncio.sleep(0.1)
    return out


def _fmt(p50: float | None, p99: float | None, mx: float | None) -> str:
    if p50 is None:
        return "n/a"
    return f"p50 {p50:8.1f}  p99 {p99:8.1f}  max {mx:9.1f}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--rate", type=float, default=1000.0)
    ap.add_argument("--echo-count", type=int, default=5000)
    ap.add_argument("--serve-device", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--serve-echo", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.serve_device:
        serve_device(a.rate, a.seconds)
        return
    if a.serve_echo:
        serve_echo()
        return

    dev, path = _child("--serve-device", "--rate", str(a.rate), "--seconds", str(a.seconds))
    link = asyncio.run(run_loop(path, a.seconds))
    dev_stats = json.loads(dev.stdout.readline())
    dev.wait(10)
    echo, epath = _child("--serve-echo")
    rtt = asyncio.run(run_echo(epath, a.echo_count))
    echo.stdin.close()
    echo.wait(10)

    lat = np.asarray(link.stats.latencies_us)
    st = link.stats
    print(f"serial link over a pty, {a.rate:g} Hz, {a.seconds:g} s, Python device process")
    print(f"  samples sent by device     {dev_stats['samples']}")
    print(f"  host: sample -> command us {_fmt(*np.percentile(lat, [50, 99]), lat.max())}")
    print("  device: sample -> command  "
          f"{_fmt(dev_stats['rtt_p50'], dev_stats['rtt_p99'], dev_stats['rtt_max'])} us")
    print(f"  misses (no command before next sample) {dev_stats['misses']}"
          f"  ({100.0 * dev_stats['misses'] / max(1, dev_stats['samples']):.2f} %)")
    print(f"  host gaps {st.gaps}  duplicates {st.duplicates}  dropped-late {st.late_frames}"
          f"  crc {st.crc_errors}  cobs {st.cobs_errors}")
    print(f"bare echo round trip, 32-byte frame, {a.echo_count} times")
    print(f"  {_fmt(*np.percentile(rtt, [50, 99]), rtt.max())} us")


if __name__ == "__main__":
    main()
