"""Every way a link can end is a trip: a served device killed over a real pseudo-terminal,
and a real mosquitto broker restarted under a run.

The runtime (`runtime.realtime.loop.Runner`, rig-clocked) runs in a thread of this process; the
device is `corral rig serve` in a subprocess (SIGKILLed, then served again on the same
pty link) or on the broker. Each loss must end in a `link_loss` trip (first-out, with a
detail naming what went), the runtime must stay latched while the link comes back on
its own, an operator reset and arm must work again afterwards, and the run must end on
request within a generous bound (no hang). That a lost link is a trip and a trip latches
until a manual reset is common practice (ISO 13849-1 manual reset; ISA-18.2 first-out);
nothing here asserts a timing: every wait is for an event, with a generous bound.
"""

from __future__ import annotations

import signal
import subprocess
import time
from typing import Any

import pytest
from mqtt_broker import mosquitto  # noqa: F401  (the fixture)

from bench.served_rig import CORRAL, ROOT, SERVED, Background, end, wait_for
from bench.served_rig import serve as serve_rig
from runtime.config import load_config
from runtime.realtime.loop import Runner, RunSettings
from runtime.records.logs import read_trip_records

pytestmark = pytest.mark.timeout(600)

# The timing rules widened: the test is about the link ending (a closed pty, a lost broker
# session: `link_loss` at once, whatever its timeout), not about whether this loaded VM
# holds a 500 Hz deadline (bench/bench_loop.py measures that). Under two CPU hogs a
# served device stalled past 100 ms now and then and tripped "device silent" while the
# test re-armed.
TOLERANT = ["watchdog.stale_periods=500", "watchdog.link_timeout_s=2",
            "watchdog.rules.overrun.enabled=false"]


def serve(*args: str) -> subprocess.Popen[str]:
    """The served recipe in a subprocess (bench/served_rig.py, shared with the fault matrix)."""
    return serve_rig(*args)[0]


def rearm(bg: Background, attempts: int = 10) -> None:
    """What an operator does once the link is back: reset the latch, then arm (again, if
    something else trips while it settles: on this shared VM a stalled tick now and then
    trips the saturation or stale rule, which is not what these tests are about)."""
    core = bg.runner.core
    wait_for("the link back", lambda: core.link_up, 60)
    for _ in range(attempts):
        wait_for("the reset to be granted",
                 lambda: core.sup.latched is False or bg.request("reset")[0], 60)
        ok, msg = bg.request("arm")
        if not ok and core.sup.latched:
            continue  # tripped again between the reset and the arm: reset again
        assert ok, msg
        wait_for("settled or tripped",
                 lambda: core.sup.mode == "engaged" or core.sup.latched, 60)
        if core.sup.mode == "engaged":
            return
    raise AssertionError(f"not engaged: mode {core.sup.mode}, trips {core.trips[-2:]}")


def assert_loss_tripped(core: Any, before: int) -> None:
    """The loss is a trip: a new trip with `link_loss` first-out, or (when a rule on this
    loaded VM tripped a moment before the loss, so the runtime was already latched)
    `link_loss` among that trip's later rules, as first-out practice records it."""
    wait_for("the trip record", lambda: len(core.trips) > before
             or "link_loss" in (core.trips[-1].later if core.trips else []))
    new = core.trips[before:]
    if new and new[0].rule == "link_loss":
        assert new[0].detail != "device silent", new[0]
        assert new[0].action == "outputs_off", new[0]
    else:
        trip = new[0] if new else core.trips[-1]
        wait_for("link_loss among the later rules", lambda: "link_loss" in trip.later)


def check_trips(summary: dict[str, Any], n: int, details: tuple[str, ...]) -> None:
    losses = summary["link_losses"]
    assert len(losses) == n, losses
    assert all(loss["detail"] in details for loss in losses), losses
    firsts = [t for t in summary["trips"] if t["rule"] == "link_loss"
              and t["detail"] != "device silent"]
    assert firsts, summary["trips"]
    for t in firsts:
        assert t["detail"] in details, t
        assert t["action"] == "outputs_off", t


def test_killing_the_served_device_ten_times_trips_each_time(tmp_path):
    link_path = tmp_path / "rig.tty"
    dev = serve("--serial", "--pty-link", str(link_path))
    cfg = load_config(SERVED, [f"log.dir={tmp_path}", *TOLERANT])
    runner = Runner(cfg, RunSettings(duration=None, auto_arm=False, link=f"serial:{link_path}",
                                     preflight=False, echo_trips=False))
    bg = Background(runner)
    try:
        assert runner.ready.wait(60)
        core = runner.core
        for i in range(10):
            rearm(bg)
            before = len(core.trips)
            end(dev, signal.SIGKILL)
            wait_for(f"link loss {i + 1}", lambda i=i: len(runner.link_losses) == i + 1)
            wait_for(f"trip {i + 1}", lambda: core.sup.latched)
            assert_loss_tripped(core, before)
            # Latched while the link is away: a reset is refused, nothing re-arms.
            assert not bg.request("reset")[0] or core.link_up
            assert core.sup.latched or core.link_up
            dev = serve("--serial", "--pty-link", str(link_path))
        rearm(bg)
        summary = bg.stop()
    finally:
        end(dev)
        if bg.thread.is_alive():
            runner.request_stop()
            bg.thread.join(30)
    check_trips(summary, 10, ("pty closed",))
    assert runner.link.stats.reconnects == 10
    assert summary["mode"] == "engaged" and summary["link_up"]
    # The trip records are on disk, first-out with the detail.
    from runtime.records.logs import read_stream

    recs = [r for r in read_stream(core.trip_path)[1]
            if r.get("type") == "trip" and r["first_out"]["rule"] == "link_loss"
            and r["first_out"]["detail"] != "device silent"]
    assert recs and all(r["first_out"]["detail"] == "pty closed" for r in recs)


def test_restarting_the_broker_ten_times_trips_each_time(mosquitto, tmp_path):  # noqa: F811
    dev = serve("--mqtt", mosquitto.url)
    cfg = load_config(SERVED, [f"log.dir={tmp_path}", *TOLERANT])
    runner = Runner(cfg, RunSettings(duration=None, auto_arm=False,
                                     link=f"mqtt://{mosquitto.url}/pedestal-sim",
                                     preflight=False, echo_trips=False))
    bg = Background(runner)
    try:
        assert runner.ready.wait(60)
        core = runner.core
        for i in range(10):
            rearm(bg)
            before = len(core.trips)
            mosquitto.restart()
            wait_for(f"link loss {i + 1}", lambda i=i: len(runner.link_losses) == i + 1)
            wait_for(f"trip {i + 1}", lambda: core.sup.latched)
            assert_loss_tripped(core, before)
        rearm(bg)
        summary = bg.stop()
    finally:
        end(dev)
        if bg.thread.is_alive():
            runner.request_stop()
            bg.thread.join(30)
    check_trips(summary, 10, ("broker gone", "device offline"))
    assert runner.link.stats.reconnects == 10


def test_run_ends_on_sigterm_while_the_broker_is_gone(mosquitto, tmp_path):  # noqa: F811
    """`corral run` over MQTT, the broker stopped under it: SIGTERM still ends the run
    (bounded shutdown), the exit status says the link was lost (3) and the summary
    names the trip."""
    import json

    dev = serve("--mqtt", mosquitto.url)
    run = subprocess.Popen(
        [*CORRAL, "run", str(SERVED), "--link", f"mqtt://{mosquitto.url}/pedestal-sim",
         "--headless", "--json", "--no-preflight", "--set", f"log.dir={tmp_path}",
         *[a for kv in TOLERANT for a in ("--set", kv)]],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    try:
        sock = tmp_path / "pedestal-sim-mqtt.sock"  # runtime.records.runinfo.run_name
        wait_for("the operator socket", lambda: sock.exists() or run.poll() is not None)
        time.sleep(0.5)
        mosquitto.stop()

        def loss_logged() -> bool:  # the runtime's "link lost" event, on disk
            for path in tmp_path.glob("*.trips"):
                try:
                    events = read_trip_records(path).events
                except Exception:  # noqa: BLE001 - a record still being written
                    return False
                if any(e.kind == "link" and "link lost" in str(e.detail) for e in events):
                    return True
            return False

        wait_for("the link loss noticed", lambda: loss_logged() or run.poll() is not None)
        run.send_signal(signal.SIGTERM)
        out, err = run.communicate(timeout=60)
    finally:
        if run.poll() is None:
            run.kill()
            run.communicate()
        end(dev)
    assert run.returncode == 3, err
    summary = json.loads(out)
    # Stopping mosquitto may deliver the device's last will before the host's own
    # connection drops: either names the loss.
    assert summary["link_losses"]
    assert summary["link_losses"][0]["detail"] in ("broker gone", "device offline")
