"""The dashboard against a live `corral run` (real runtime, real Unix socket),
driven by textual's own test pilot: keys reach the supervisor, arm is refused
while a trip is latched, a reset never restarts, stop is always accepted, and
the values on screen are the ones the runtime sent."""

import asyncio
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from mqtt_broker import mosquitto  # noqa: F401  (fixture: a real mosquitto broker)
from textual.widgets import DataTable

from runtime.dashboard.app import ConfirmArm, Dashboard, SupervisorPanel
from runtime.dashboard.sources import SocketSource

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"


def stop_run(proc: subprocess.Popen) -> None:
    """End a `corral run` subprocess as an operator would (Ctrl-C), killing it if it hangs."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()


@pytest.fixture
def live_run(tmp_path):
    """A simulated real-time run, armed at start, with a spike at 2 s (a `jump` trip)."""
    # --duration is a guard against a leaked process (stop_run ends the run), long
    # enough that a loaded machine never reaches it mid-test.
    cmd = [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--headless", "--arm",
           "--duration", "600", "--fault", "spike@2", "--set", f"log.dir={tmp_path}",
           # a loaded CI machine must not trip the overrun rule on its own
           "--set", "watchdog.overrun_misses=100000", "--set", "watchdog.stale_periods=50"]
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    sock = tmp_path / "pedestal-sim.sock"
    deadline = time.monotonic() + 180
    while not sock.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"corral run did not start: {proc.stderr.read()}")
        time.sleep(0.05)
    yield sock
    stop_run(proc)


async def wait_for(pilot, predicate, timeout=90.0):
    """Wait for an event, with a bound generous enough for a loaded 2-core machine."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        await pilot.pause(0.05)
        if predicate():
            return True
    return False


def last_reply(app, op):
    for r in reversed(app.replies):
        if r.op == op:
            return r
    return None


def test_keys_reach_the_supervisor_through_a_live_runtime(live_run):
    async def run():
        source = SocketSource(live_run)
        async with source:
            app = Dashboard(source)
            async with app.run_test(size=(140, 48)) as pilot:
                # The runtime arms itself; wait for the spike trip to latch.
                assert await wait_for(pilot, lambda: app.latest.latched), app.latest
                tel = app.latest
                assert tel.trip is not None and tel.trip.rule == "jump"
                assert tel.mode in ("fallback", "stopped")
                assert await wait_for(pilot, lambda: not app._dirty)
                sup = str(app.query_one(SupervisorPanel).render())
                assert "first out: jump" in sup and "LATCHED" in sup

                # Values on screen are the values the runtime sent.
                app._dirty = True
                app.redraw()
                shown = app.latest
                table = app.query_one("#tracking", DataTable)
                az_row = [getattr(c, "plain", str(c)) for c in table.get_row_at(0)]
                assert az_row[0] == "az [rad]" and az_row[3] == f"{shown.x[0]:.4g}"

                # Arm while latched: the confirmation, then a refusal from the supervisor.
                await pilot.press("a")
                assert await wait_for(pilot, lambda: isinstance(app.screen, ConfirmArm))
                await pilot.press("y")
                assert await wait_for(pilot, lambda: last_reply(app, "arm") is not None)
                assert last_reply(app, "arm").ok is False
                assert "REFUSED" in app.status

                # Reset clears the latch but never restarts: the adaptive law stays off.
                await pilot.press("r")
                assert await wait_for(pilot, lambda: last_reply(app, "reset") is not None)
                assert last_reply(app, "reset").ok is True
                assert await wait_for(pilot, lambda: not app.latest.latched)
                t_reset = app.latest.t
                assert await wait_for(pilot, lambda: app.latest.t > t_reset + 1.0)
                assert app.latest.mode != "engaged"

                # Stop is one key and always accepted.
                await pilot.press("s")
                assert await wait_for(pilot, lambda: last_reply(app, "stop") is not None)
                assert last_reply(app, "stop").ok is True
                assert await wait_for(pilot, lambda: app.latest.mode == "stopped")
    asyncio.run(run())


def test_watch_refuses_a_missing_socket_in_one_line(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "runtime.cli.main", "watch", "--socket", str(tmp_path / "x.sock")],
        cwd=ROOT, capture_output=True, text=True, timeout=60,
        env={**os.environ, "TERM": "dumb"})
    assert proc.returncode == 2
    assert "no runtime socket" in proc.stderr and "Traceback" not in proc.stderr


def test_dashboard_follows_a_rig_over_mqtt(tmp_path, mosquitto):  # noqa: F811
    """`corral watch --mqtt` in the pilot: a run publishing telemetry through a real
    mosquitto broker shows up, and the stop key reaches it through the broker."""
    from runtime.dashboard.sources import MqttSource

    cmd = [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--headless", "--arm",
           "--duration", "600", "--telemetry-mqtt", mosquitto.url, "--set", f"log.dir={tmp_path}",
           "--set", "watchdog.overrun_misses=100000", "--set", "watchdog.stale_periods=50"]
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    try:
        async def run():
            async with MqttSource(mosquitto.host, mosquitto.port, "pedestal-sim") as source:
                app = Dashboard(source)
                async with app.run_test(size=(140, 48)) as pilot:
                    assert await wait_for(pilot, lambda: app.latest.mode == "engaged",
                                          timeout=180), app.latest
                    assert app.hello.rig == "pedestal-sim"
                    assert "pedestal-sim" in app.title
                    await pilot.press("s")
                    assert await wait_for(pilot, lambda: last_reply(app, "stop") is not None)
                    assert last_reply(app, "stop").ok is True
                    assert await wait_for(pilot, lambda: app.latest.mode == "stopped")
        asyncio.run(run())
    finally:
        stop_run(proc)
