"""Supervisor: settling, latching, reset-without-restart and re-arm.

The pure mode machine first, then the same sequence driven through the real
operator socket against the real-time loop and the simulated pedestal.
"""

from __future__ import annotations

import asyncio

import numpy as np

from runtime.guard.supervisor import Supervisor
from runtime.realtime.telemetry import TelemetryClient
from tests.runtime_helpers import runner


def test_mode_machine_latch_reset_never_restarts():
    s = Supervisor(settle_time=0.002, settle_rate_tol=0.1, rate_states=(1,))
    assert not s.request("reset", []).ok  # nothing latched
    assert s.request("arm", []).ok and s.mode == "settling"
    assert not s.settle_step(np.array([0.0, 0.5]), 0.001)  # moving: not settled
    assert not s.settle_step(np.array([0.0, 0.0]), 0.001)
    assert s.settle_step(np.array([0.0, 0.0]), 0.001) and s.mode == "engaged"
    assert s.trip("margin", "baseline") == "baseline"
    assert s.mode == "fallback" and s.latched
    assert not s.request("arm", []).ok  # latched: refused
    assert not s.request("reset", ["margin"]).ok  # condition present: refused
    assert s.request("reset", []).ok and not s.latched
    assert s.mode == "fallback"  # a reset never restarts
    assert s.request("arm", []).ok and s.mode == "settling"
    # Escalation: a later outputs_off trip overrides a running baseline; never the reverse.
    s.mode, s.fallback = "fallback", "baseline"
    assert s.trip("nonfinite", "outputs_off") == "outputs_off" and s.mode == "stopped"
    assert s.trip("margin", "baseline") == "outputs_off" and s.mode == "stopped"
    assert s.request("stop", []).ok and s.mode == "stopped"


async def _until(client, pred, timeout=120.0):  # a bound on the event
    async with asyncio.timeout(timeout):
        while True:
            msg = await client.next("telemetry")
            if pred(msg):
                return msg


def test_sequence_through_the_operator_socket(tmp_path):
    r = runner(tmp_path, ["nan@2.0:duration=0.5"], arm=False)

    async def scenario():
        task = asyncio.create_task(r.run())
        client = TelemetryClient(r.socket_path)
        for _ in range(6000):  # up to 2 min: a bound on the event, not a deadline
            if r.socket_path.exists():
                break
            await asyncio.sleep(0.02)
        hello = await client.connect()
        assert hello["rig"] == r.design.rig.name and hello["levels"]["trip"] == 0.9
        try:
            assert (await client.request("reset"))["ok"] is False
            msg = await _until(client, lambda m: True)
            assert msg["mode"] == "idle"
            assert (await client.request("arm"))["ok"] is True
            await _until(client, lambda m: m["mode"] in ("engaged", "stopped"))
            first = r.core.engagements[0]
            assert first["xr"] == first["x"]  # x_r = x on entry
            tripped = await _until(client, lambda m: m["latched"])
            assert tripped["trip"]["rule"] in ("nonfinite", "stale")
            assert tripped["mode"] == "stopped"
            # Condition still present (NaN until 2.5 s): reset refused; arm refused.
            reply = await client.request("reset")
            assert reply["ok"] is False and "still present" in reply["message"]
            assert (await client.request("arm"))["ok"] is False
            await _until(client, lambda m: m["t"] > 2.6)
            reply = await client.request("reset")
            assert reply["ok"] is True, reply
            later = await _until(client, lambda m: m["t"] > 2.8)
            assert later["mode"] == "stopped" and not later["latched"]  # no restart
            assert later["u"] == [0.0, 0.0]
            assert (await client.request("arm"))["ok"] is True
            await _until(client, lambda m: m["mode"] == "engaged")
            second = r.core.engagements[1]
            assert second["tick"] > r.core.trips[0].tick
            assert second["xr"] == second["x"]  # re-initialised at the new pose
            assert second["x"] != first["x"]
            assert (await client.request("disarm"))["ok"] is True
            assert (await client.request("stop"))["ok"] is True
            await _until(client, lambda m: m["mode"] == "stopped")
        finally:
            await client.close()
            r.request_stop()
            await task

    asyncio.run(scenario())
    kinds = [e.kind for e in r.core.recent_events]
    assert "reset" in kinds and "stop" in kinds and "refused" in kinds
