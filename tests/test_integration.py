"""The runtime wired to the parts around it: law with modifiers and eps(t), run-log
contents, key aliases, MQTT telemetry, the dashboard process, preflight before arming.

Unpaced runs (`Runner.run_ticks`) execute every real decision of the tick
without the clock; the MQTT tests run against a real mosquitto broker; the
dashboard lifecycle runs `corral run` as a subprocess.
"""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import numpy as np
import pytest

from runtime.config import load_config
from runtime.realtime.loop import Runner, RunSettings
from runtime.records.logs import read_run_log, read_trip_records
from tests.runtime_helpers import BASE, DEMO, ROOT

NARROWING = ROOT / "configs" / "pedestal-narrowing.toml"


def _runner(config: Path, tmp_path: Path, overrides: list[str] = (), faults: list[str] = (),
            arm: bool = True) -> Runner:
    cfg = load_config(config, [*BASE, f"log.dir={tmp_path}", *overrides])
    return Runner(cfg, RunSettings(auto_arm=arm, faults=list(faults), echo_trips=False))


def _unpaced(r: Runner, seconds: float) -> dict:
    return asyncio.run(r.run_ticks(int(round(seconds / r.design.Ts))))


# ------------------------------------------------------------------ 1. law in the loop
def test_narrowing_bound_reaches_law_run_log_and_telemetry(tmp_path):
    r = _runner(NARROWING, tmp_path)
    assert r.core.law.impl == "fast"  # the default law is the compiled one
    summary = _unpaced(r, 2.5)
    _, cols = read_run_log(summary["run_log"])
    engaged = cols["mode"] == 2  # MODE_CODE["engaged"]
    assert engaged.sum() > 1000
    k0 = int(cols["tick"][engaged][0])
    t_since = (cols["tick"][engaged] - k0) * r.design.Ts
    eps_log = cols["eps"][engaged]
    # The schedule's closed form, eps_inf + (eps0 - eps_inf) exp(-alpha t) (runtime/method/bound.py
    # docstring), from the config's own numbers; eps0 defaults to the design's eps.
    raw = load_config(NARROWING, []).raw["adaptation"]["bound"]
    eps0, eps_inf, alpha = r.design.eps, raw["eps_inf"], raw["alpha"]
    expect = eps_inf + (eps0 - eps_inf) * np.exp(-alpha * t_since)
    np.testing.assert_allclose(eps_log, expect, rtol=1e-9)
    assert np.all(np.diff(eps_log) < 0) and eps_log[-1] < eps0 * (1 - 1e-3)
    # The law used eps_k: its margin ratio is ||e||_P / eps_k, not ||e||_P / eps0.
    s, ratio = cols["s"][engaged], cols["ratio"][engaged]
    live = s > 1e-6
    np.testing.assert_allclose(s[live] / ratio[live], eps_log[live], rtol=1e-9)
    # Telemetry carries eps(t), the hello the starting bound and the schedule.
    tel = r.core.telemetry_record()
    assert tel.eps == pytest.approx(eps_log[-1], rel=1e-3)
    hello = r.core.hello()
    assert hello.eps == pytest.approx(eps0) and hello.bound["kind"] == "exponential"


def test_constant_bound_run_log_eps_is_the_design_eps(tmp_path):
    r = _runner(DEMO, tmp_path)
    summary = _unpaced(r, 1.0)
    _, cols = read_run_log(summary["run_log"])
    assert np.all(cols["eps"] == r.design.eps)


def test_fast_law_carries_the_config_modifiers(tmp_path):
    r = _runner(DEMO, tmp_path, ["adaptation.leakage=sigma", "adaptation.sigma0=0.5"])
    assert r.core.law._fast.modifiers.leakage == "sigma"
    assert r.core.law._fast.modifiers.sigma0 == 0.5
    # Another folder: two runtimes of one rig in one folder is refused (one owner per rig).
    ref = _runner(DEMO, tmp_path / "ref", ["loop.law=reference", "adaptation.leakage=sigma",
                                   "adaptation.sigma0=0.5"])
    assert [type(m).__name__ for m in ref.core.law._law.modifiers] == ["SigmaModification"]


def test_fast_and_reference_loops_agree(tmp_path):
    """The same unpaced run through both law engines gives the same inputs (to rounding)."""
    cols = []
    for law in ("fast", "reference"):
        r = _runner(NARROWING, tmp_path / law, [f"loop.law={law}"])
        summary = _unpaced(r, 1.2)
        cols.append(read_run_log(summary["run_log"])[1])
    np.testing.assert_allclose(cols[0]["u"], cols[1]["u"], atol=1e-8)
    np.testing.assert_allclose(cols[0]["ratio"], cols[1]["ratio"], atol=1e-8)
    assert math.isfinite(float(cols[0]["ratio"].max()))


# ------------------------------------------------------------------ 2. run log
def test_tripping_tick_is_in_the_run_log_with_its_ratio(tmp_path):
    """A margin trip: the run log's row of the trip tick holds the ratio that tripped."""
    r = _runner(DEMO, tmp_path, faults=["disturbance_step@1.5:axis=el,size=40"])
    summary = _unpaced(r, 2.1)
    trip = summary["trips"][0]
    assert trip["rule"] in ("margin", "predicted_crossing")
    header, cols = read_run_log(summary["run_log"])
    row = int(np.flatnonzero(cols["tick"] == trip["tick"])[0])
    assert cols["mode"][row] != 2  # the tick ended in the fallback ...
    assert cols["ratio"][row] > 0 and cols["s"][row] > 0  # ... but the law's figures are there
    if trip["rule"] == "margin":
        assert cols["ratio"][row] == pytest.approx(trip["value"])
    assert np.any(cols["e"][row] != 0)
    # The trip record's pre-capture ends on that same row, ratio included.
    got = read_trip_records(summary["trip_log"])
    th, trips = got.header, got.trips
    pre = trips[0].rec.pre
    ratio_col = th["capture_fields"].index("ratio")
    offs = np.cumsum([0] + th["capture_widths"])
    assert pre[-1][int(offs[ratio_col])] == pytest.approx(cols["ratio"][row])
    # Later ticks in the fallback: the law no longer runs, nothing is recorded for it.
    assert cols["ratio"][row + 5] == 0.0


def test_fault_schedule_labels_in_both_log_headers(tmp_path):
    cfg_path = tmp_path / "faulty.toml"
    cfg_path.write_text(DEMO.read_text() + '\n[[faults]]\nkind = "spike"\nat = 1.2\nsize = 0.3\n')
    r = _runner(cfg_path, tmp_path, faults=["dropout@1.8:duration=0.01"])
    summary = _unpaced(r, 0.3)
    want = {"config": ["spike@1.2:size=0.3"], "command_line": ["dropout@1.8:duration=0.01"]}
    run_header, _ = read_run_log(summary["run_log"])
    trip_header = read_trip_records(summary["trip_log"]).header
    assert run_header["faults"] == want
    assert trip_header["faults"] == want


# ------------------------------------------------------------------ 3. key names
@pytest.mark.parametrize(("overrides", "expect"), [
    ([], 0.05),
    (["link.command_timeout=0.08"], 0.08),
    (["rig.command_timeout_s=0.07"], 0.07),  # the older name, still accepted
])
def test_command_timeout_key_and_alias_reach_the_simulated_device(tmp_path, overrides, expect):
    r = _runner(DEMO, tmp_path, overrides, arm=False)
    assert r.link.hello.command_timeout_s == pytest.approx(expect)


def test_command_timeout_conflicting_names_refused(tmp_path):
    from runtime.config import ConfigError

    with pytest.raises(ConfigError) as err:
        _runner(DEMO, tmp_path, ["link.command_timeout=0.08", "rig.command_timeout_s=0.07"])
    assert err.value.field == "link.command_timeout"


# ------------------------------------------------------------------ 4. MQTT telemetry
from mqtt_broker import mosquitto  # noqa: E402, F401  (the fixture: a real broker)


async def _next(it, kind: str, timeout: float = 10.0, pred=lambda r: True) -> dict:
    async with asyncio.timeout(timeout):
        async for rec in it:
            if rec.get("type") == kind and pred(rec):
                return rec
    raise AssertionError(f"no {kind} record")


@pytest.mark.parametrize("allow_arm", [False, True])
def test_mqtt_telemetry_and_remote_requests(tmp_path, mosquitto, allow_arm):  # noqa: F811
    from runtime.dashboard.sources import MqttSource

    extra = ['link.mqtt.remote_requests=["arm"]'] if allow_arm else []
    cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}", *extra])
    r = Runner(cfg, RunSettings(auto_arm=True, echo_trips=False, duration=30.0,
                                telemetry_mqtt=mosquitto.url))
    rig = r.design.rig.name

    async def scenario():
        task = asyncio.create_task(r.run())
        try:
            # The dashboard's own MQTT source (runtime.dashboard.sources) reads what we publish.
            async with MqttSource(mosquitto.host, mosquitto.port, rig) as src:
                it = src.records().__aiter__()
                hello = await _next(it, "hello")
                assert hello["rig"] == rig and hello["eps"] == pytest.approx(r.design.eps)
                tel = await _next(it, "telemetry", pred=lambda x: x["mode"] == "engaged")
                assert len(tel["x"]) == r.design.rig.n and tel["eps"] > 0
                await src.request("arm")
                arm = await _next(it, "reply", pred=lambda x: x["op"] == "arm")
                assert arm["ok"] is False  # engaged already, or not allowed remotely
                if not allow_arm:
                    assert "remote_requests" in arm["message"]
                else:
                    assert "already armed" in arm["message"]  # reached the supervisor
                await src.request("stop")
                stop = await _next(it, "reply", pred=lambda x: x["op"] == "stop")
                assert stop["ok"] is True
                tel = await _next(it, "telemetry", pred=lambda x: x["mode"] == "stopped")
                assert tel["u"] == [0.0] * r.design.rig.m
                if allow_arm:  # after the stop, a remote arm settles again
                    await src.request("arm")
                    arm = await _next(it, "reply", pred=lambda x: x["op"] == "arm")
                    assert arm["ok"] is True, arm
                    await _next(it, "telemetry", pred=lambda x: x["mode"] in
                                ("settling", "engaged"))
        finally:
            r.request_stop()
            summary = await task
        return summary

    summary = asyncio.run(scenario())
    assert summary["mqtt"]["published"] > 5
    ops = [op for op, ok, _ in summary["mqtt"]["requests"]]
    assert ops[:2] == ["arm", "stop"]
    # The operator stop went through the supervisor like a socket stop: an event is logged.
    events = read_trip_records(summary["trip_log"]).events
    assert any(e.kind == "stop" for e in events)


# ------------------------------------------------------------------ 5. dashboard process
FAKE_DASHBOARD = '''\
"""Stands in for the dashboard: connect, read telemetry until the spike's trip has
latched and 1 s of rig time more has passed (its post capture logged), exit."""
import socket, sys, time, os
import msgpack
path = sys.argv[sys.argv.index("--socket") + 1]
out = sys.argv[1]
deadline = time.monotonic() + 120
while not os.path.exists(path) and time.monotonic() < deadline:
    time.sleep(0.05)
s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
s.connect(path)
s.settimeout(30.0)
unpacker = msgpack.Unpacker(raw=False)
kinds = []
latched_at = last_t = None
end = time.monotonic() + 120  # a bound on the event, not a deadline
while time.monotonic() < end:
    unpacker.feed(s.recv(65536))
    for m in unpacker:
        kinds.append(m.get("type"))
        if m.get("type") == "telemetry" and m.get("latched") and latched_at is None:
            latched_at = m.get("t", 0.0)
        last_t = m.get("t", 0.0) if m.get("type") == "telemetry" else None
    if latched_at is not None and last_t is not None and last_t >= latched_at + 1.0:
        break
s.close()
with open(out, "w") as fh:
    fh.write(" ".join(kinds))
'''


def test_run_stops_when_the_dashboard_exits_and_keeps_its_lines_off_the_terminal(tmp_path):
    import json
    import os
    import subprocess
    import sys

    script = tmp_path / "fake_dash.py"
    script.write_text(FAKE_DASHBOARD)
    seen = tmp_path / "seen.txt"
    env = {**os.environ, "CORRAL_DASHBOARD_CMD": f"{sys.executable} {script} {seen}"}
    sets = [a for kv in [*BASE, f"log.dir={tmp_path}"] for a in ("--set", kv)]
    # No --duration: only the dashboard's exit can end this run (the timeout is a guard).
    proc = subprocess.run([sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--arm",
                           "--json", "--fault", "spike@0.5:size=0.3", *sets],
                          capture_output=True, text=True, timeout=120, env=env, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    kinds = seen.read_text().split()
    assert kinds[0] == "hello" and "telemetry" in kinds  # the dashboard read the live socket
    assert summary["dashboard_exit"] == 0 and summary["ticks"] > 0
    assert [t["rule"] for t in summary["trips"]] == ["jump"]
    # The trip's echo line went to the console file, not to the terminal.
    console = Path(summary["console"])
    assert console.parent == tmp_path and console.suffix == ".console"
    text = console.read_text()
    assert "trip 1 (jump" in text and "dashboard exited (0)" in text
    assert "trip 1 (jump" not in proc.stderr


# ------------------------------------------------------------------ 6. preflight gate
class _Serve:
    """`corral rig serve DEMO --serial` in a subprocess (first line: the pty path)."""

    def __init__(self) -> None:
        import subprocess
        import sys

        self.proc = subprocess.Popen(
            [sys.executable, "-m", "runtime.cli.main", "rig", "serve", str(DEMO), "--serial",
             "--duration", "60"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
        self.path = self.proc.stdout.readline().strip()
        assert self.path, self.proc.stderr.read()

    def close(self) -> None:
        self.proc.terminate()
        try:
            self.proc.communicate(timeout=10)
        except Exception:  # noqa: BLE001
            self.proc.kill()
            self.proc.communicate()


# Stale/overrun widened as in tests/test_rig_serve.py: two Python processes ticking on a
# shared 2-core machine see multi-millisecond stalls; this test is about the gate.
# A short host check: it runs before the preflight on a real link, inside the device's 60 s.
SERVED = ["watchdog.stale_periods=20", "preflight.plants=4", "preflight.duration=5",
          "loop.hostcheck_s=0.5"]


@pytest.mark.parametrize("gamma_ok", [True, False])
def test_preflight_gates_the_first_arm_on_a_served_rig(tmp_path, gamma_ok):
    from runtime.realtime.telemetry import TelemetryClient

    serve = _Serve()
    try:
        # gamma = 0.01 is too slow to hold the demo's bound: the design verdict's nominal dry
        # run breaks it (NO-GO), as in tests/test_preflight.py; the demo's own gamma passes.
        extra = [] if gamma_ok else ["adaptation.gamma=0.01"]
        cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}", *SERVED, *extra])
        r = Runner(cfg, RunSettings(link=f"serial:{serve.path}", echo_trips=False))
        assert not r.simulated

        async def scenario():
            task = asyncio.create_task(r.run())
            try:
                for _ in range(600):
                    if r.socket_path.exists():
                        break
                    await asyncio.sleep(0.05)
                c = TelemetryClient(r.socket_path)
                hello = await c.connect()
                reply = await c.request("arm")
                await c.close()
                return hello, reply
            finally:
                r.request_stop()
                await task

        hello, reply = asyncio.run(scenario())
    finally:
        serve.close()
    verdict = r.preflight
    assert verdict is not None and verdict["go"] is gamma_ok
    assert hello["preflight"]["go"] is gamma_ok
    assert isinstance(hello["hostcheck"]["ok"], bool)  # the host check ran before arming
    assert Path(verdict["record"]).is_file()
    if gamma_ok:
        assert reply["ok"], reply
    else:
        assert not reply["ok"]
        assert "preflight NO-GO" in reply["message"] and "broke the bound" in reply["message"]
    events = read_trip_records(r.core.trip_path).events
    pre = [e for e in events if e.kind == "preflight"]
    assert len(pre) == 1 and pre[0].extra["preflight"]["go"] is gamma_ok
    assert pre[0].extra["preflight"]["record"] == verdict["record"]
    if not gamma_ok:
        assert any(e.kind == "refused" and "NO-GO" in e.detail for e in events)


def test_no_preflight_for_the_simulated_rig(tmp_path):
    r = _runner(DEMO, tmp_path)
    summary = _unpaced(r, 0.3)
    assert summary["preflight"] is None and r.core.arm_refusal is None


# ------------------------------------------------------------------ rig-clocked lateness
def test_arrival_tracker_worked_example():
    """`runtime.realtime.clock.ArrivalTracker` against its rule, worked by hand (our own rule,
    docs/operating.md "Rig-clocked timing"): expected arrival = device time + the
    smallest transit seen; a miss is a sample handled over one period after it, plus
    one per sample the sequence skipped."""
    from runtime.realtime.clock import ArrivalTracker

    T = 0.001
    tr = ArrivalTracker(T, creep=0.0)
    # seq 1: device t=1.000, received 1.0002 (transit 0.2 ms), handled 1.00025.
    late, missed = tr.handle(1, 1.000, 1.0002, 1.00025)
    assert late == pytest.approx(50e-6) and missed == 0
    # seq 2: 1.5 periods late (a stall after receipt): one miss.
    late, missed = tr.handle(2, 1.001, 1.0012, 1.0027)
    assert late == pytest.approx(1.5e-3) and missed == 1
    # seq 3: on time, faster transit (0.1 ms) lowers the floor; not a miss.
    late, missed = tr.handle(3, 1.002, 1.0021, 1.0021)
    assert late == pytest.approx(0.0, abs=1e-12) and missed == 0
    # seq 6: seq 4 and 5 never came; on time itself: two misses.
    late, missed = tr.handle(6, 1.005, 1.0051, 1.0052)
    assert missed == 2
    # Just under one period late: not a miss.
    late, missed = tr.handle(7, 1.006, 1.0061, 1.0061 + 0.9e-3)
    assert missed == 0


def test_arrival_tracker_creep_absorbs_a_slow_device_clock_but_not_a_stall():
    from runtime.realtime.clock import ArrivalTracker

    T = 0.001
    tr = ArrivalTracker(T)  # default creep 500 ppm
    lates = []
    for k in range(10_000):  # 10 s; the device clock 100 ppm slow: transit grows 1 ms
        t_dev = k * T
        t_host = t_dev * (1 + 100e-6) + 2e-4
        lates.append(tr.handle(k, t_dev, t_host, t_host)[0])
    assert max(lates) < 0.5 * T  # without the creep the last would read ~1 ms (a miss)
    # A 5 ms stall right after: still five periods late, a miss.
    t_dev = 10_000 * T
    late, missed = tr.handle(10_000, t_dev, t_dev * (1 + 100e-6) + 2e-4 + 5e-3,
                             t_dev * (1 + 100e-6) + 2e-4 + 5e-3)
    assert late > 4.9e-3 and missed == 1
