"""`corral run` as a user runs it: JSON summary, a kill after a trip, a slow socket client."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import socket
import subprocess
import sys
import time

from runtime.records.logs import load_trips
from tests.runtime_helpers import BASE, DEMO, runner

SETS = [a for kv in BASE for a in ("--set", kv)]


def corral(*args):
    return [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), *args, *SETS]


def test_headless_json_summary_with_a_fault(tmp_path):
    out = subprocess.run(corral("--headless", "--duration", "2", "--json", "--arm",
                                "--fault", "spike@1.5:size=0.3", "--set", f"log.dir={tmp_path}"),
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    summary = json.loads(out.stdout)
    for key in ("ticks", "deadline_misses", "lateness_p50_us", "lateness_p99_us",
                "max_margin_ratio", "trips", "trip_log"):
        assert key in summary
    assert summary["ticks"] == 2000
    assert [t["rule"] for t in summary["trips"]] == ["jump"]
    trip = summary["trips"][0]
    assert trip["action"] == "baseline" and trip["tick"] == 1500
    assert trip["detect_to_action_us"] >= 0
    assert os.path.dirname(summary["trip_log"]) == str(tmp_path)


def test_bad_fault_is_one_line_not_a_traceback(tmp_path):
    out = subprocess.run(corral("--headless", "--duration", "1", "--fault", "wobble@1",
                                "--set", f"log.dir={tmp_path}"),
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2
    assert "Traceback" not in out.stderr and "wobble" in out.stderr


def test_trip_log_reads_back_after_sigkill(tmp_path):
    proc = subprocess.Popen(corral("--headless", "--arm", "--fault", "spike@1.0:size=0.3",
                                   "--set", f"log.dir={tmp_path}"),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        logged = None
        while time.monotonic() < deadline:
            line = proc.stderr.readline()
            if "trip 1" in line and "logged" in line:
                logged = line
                break
            assert line or proc.poll() is None, "corral run ended early"
        assert logged, "no trip was logged"
        assert proc.poll() is None  # still running after the trip
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    trips = load_trips([tmp_path])
    assert len(trips) == 1
    t = trips[0]
    assert t.rule == "jump" and t.action == "baseline"
    assert len(t.rec.pre) == 200  # log.pre_capture_s = 0.2 s at 1 kHz
    assert t.rec.snapshot["mode"] == "fallback" and len(t.rec.snapshot["W"]) > 0


def test_slow_client_never_stalls_the_loop(tmp_path):
    r = runner(tmp_path, overrides=["telemetry.client_buffer=4096", "telemetry.rate_hz=50"],
               duration=1.5)

    async def scenario():
        task = asyncio.create_task(r.run())
        for _ in range(6000):  # up to 2 min: a bound on the event, not a deadline
            if r.socket_path.exists():
                break
            await asyncio.sleep(0.02)
        lazy = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        lazy.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1024)
        lazy.connect(str(r.socket_path))  # ... and never reads
        ticks_at_connect = r.core.tick
        summary = await task
        lazy.close()
        return ticks_at_connect, summary

    at_connect, summary = asyncio.run(scenario())
    # Every tick of the run happened while the client sat unread, and the server
    # dropped it instead of buffering without bound.
    assert summary["ticks"] == 1500 and at_connect < 1500
    assert summary["telemetry_clients_dropped"] == 1
