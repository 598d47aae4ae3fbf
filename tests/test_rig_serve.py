"""`corral rig serve` as a subprocess (real pseudo-terminal, real mosquitto), and the
served device's fail-safe and link faults.

The host side is the real `drivers.serial_link.SerialLink` / `drivers.mqtt_link.MqttLink`.
What a device must do when commands stop (outputs to zero, report
STATUS_COMMAND_TIMEOUT) is the protocol's own rule (docs/wire-protocol.md).
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from mqtt_broker import mosquitto  # noqa: F401  (the fixture)
from test_clock_starvation import _child_policy

from drivers.base import (
    STATUS_COMMAND_TIMEOUT,
    STATUS_OUTPUTS_OFF,
    Command,
    LinkClosed,
)
from drivers.mqtt_link import MqttLink, MqttSettings
from drivers.serial_link import SerialLink
from sim_rigs import RIGS
from sim_rigs.device import RigDevice
from sim_rigs.faults import FaultSchedule, parse_fault
from sim_rigs.plant import RigPlant
from sim_rigs.transports import end_fifo, try_fifo

pytestmark = pytest.mark.timeout(60)

ROOT = Path(__file__).resolve().parents[1]
# The `corral` console script, run by this interpreter.
CORRAL = [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())"]
CONFIG = ROOT / "configs" / "pedestal-sim.toml"
SERVED = ROOT / "configs" / "pedestal-served.toml"


class Serve:
    """`corral rig serve CONFIG ...` in a subprocess; `.first` is its first output line."""

    def __init__(self, *args: str, config: Path = CONFIG) -> None:
        self.proc = subprocess.Popen(
            [*CORRAL, "rig", "serve", str(config), *args],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT,
        )
        self.first = self.proc.stdout.readline().strip()

    def __enter__(self) -> Serve:
        if not self.first:
            err = self.proc.stderr.read()
            raise AssertionError(f"rig serve printed nothing: {err}")
        return self

    def finish(self, timeout: float = 20) -> tuple[str, str]:
        out, err = self.proc.communicate(timeout=timeout)
        return out, err

    def __exit__(self, *exc) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.communicate(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.communicate()


async def drive_then_stop(link, n: int = 200) -> tuple[list[int], int]:
    """Answer n samples, then stop commanding; return statuses while driven and after."""
    statuses = []
    for _ in range(n):
        s = await link.receive()
        statuses.append(s.status)
        await link.send(Command(s.seq, (2.0, -2.0)))
    await asyncio.sleep(0.25)  # five command timeouts with no command
    # The device's answer to the silence, waited for: on a loaded machine its clock may
    # not have run five periods in that wall time (a generous bound, not a deadline).
    end = asyncio.get_running_loop().time() + 60
    s = await link.receive_latest()
    while not s.status & STATUS_COMMAND_TIMEOUT and asyncio.get_running_loop().time() < end:
        s = await link.receive_latest()
    return statuses, s.status


def test_serve_serial_first_line_samples_commands_and_timeout():
    with Serve("--serial", "--duration", "6", "--json") as serve:
        path = serve.first
        assert Path(path).exists()

        async def main():
            async with SerialLink(path) as link:
                assert link.hello.rig_id == "pedestal-sim-served"
                assert link.hello.channels == ("az", "el", "az_rate", "el_rate")
                statuses, after = await drive_then_stop(link)
                # While commanded the outputs are on (no timeout, not off) ...
                assert not statuses[-1] & (STATUS_COMMAND_TIMEOUT | STATUS_OUTPUTS_OFF)
                # ... and with commands gone the device switched them off by itself.
                assert after & STATUS_COMMAND_TIMEOUT and after & STATUS_OUTPUTS_OFF
                assert link.stats.crc_errors == 0

        asyncio.run(main())
        out, err = serve.finish()
    report = json.loads(out.strip().splitlines()[-1])
    assert report["commands_applied"] >= 150
    assert report["timeouts"] > 0
    assert report["ticks"] > 1000
    assert serve.proc.returncode == 0


def test_serve_mqtt_samples_commands_and_timeout(mosquitto):  # noqa: F811
    with Serve("--mqtt", mosquitto.url, "--set", "loop.period=0.004", "--duration", "8") as serve:
        assert serve.first == f"mqtt://{mosquitto.url}/pedestal-sim"
        settings = MqttSettings(host=mosquitto.host, port=mosquitto.port, rig="pedestal-sim")

        async def main():
            async with MqttLink(settings) as link:
                assert link.hello.sample_rate_hz == pytest.approx(250.0)
                statuses, after = await drive_then_stop(link, 100)
                assert not statuses[-1] & STATUS_COMMAND_TIMEOUT
                assert after & STATUS_COMMAND_TIMEOUT and after & STATUS_OUTPUTS_OFF

        asyncio.run(main())


def test_serve_refuses_bad_fault_in_one_line():
    p = subprocess.run(
        [*CORRAL, "rig", "serve", str(CONFIG), "--serial",
         "--fault", "explode@3"], capture_output=True, text=True, cwd=ROOT, timeout=30)
    assert p.returncode == 2
    assert "unknown fault kind 'explode'" in p.stderr and "Traceback" not in p.stderr


class InProcess:
    """A RigDevice over a pty, its clock in a thread (to read its outputs directly)."""

    def __init__(self, tmp_path: Path, faults: list[str] = ()) -> None:
        schedule = FaultSchedule([parse_fault(f) for f in faults])
        self.device = RigDevice(RigPlant.create(RIGS["pedestal"]), period=0.002, faults=schedule)
        self.path = self.device.serve_pty(str(tmp_path / "rig.tty"))
        self.thread = threading.Thread(target=self.device.run, daemon=True)

    def __enter__(self) -> InProcess:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.device.stop()
        self.thread.join(10)


def test_command_timeout_zeroes_outputs(tmp_path):
    with InProcess(tmp_path) as rig:

        async def main():
            async with SerialLink(rig.path) as link:
                for _ in range(100):
                    s = await link.receive()
                    await link.send(Command(s.seq, (3.0, -4.0)))
                await asyncio.sleep(0.01)
                assert rig.device.applied == (3.0, -4.0)  # zero-order hold of the last command
                await asyncio.sleep(0.2)
                assert rig.device.applied == (0.0, 0.0)
                assert rig.device.status & STATUS_COMMAND_TIMEOUT

        asyncio.run(main())


def test_link_faults_corrupt_and_drop_are_counted(tmp_path):
    # corrupt every frame from 0.3 s for 0.2 s; drop 5 samples at 0.8 s
    faults = ["corrupt@0.3:duration=0.2", "drop@0.8:count=5"]
    with InProcess(tmp_path, faults) as rig:

        async def main():
            async with SerialLink(rig.path) as link:
                while True:
                    s = await link.receive()
                    await link.send(Command(s.seq, (0.0, 0.0)))
                    if s.t_device > 1.2:
                        break
                st = link.stats
                # ~100 corrupted frames (0.2 s at 500 Hz): CRC or COBS errors, never delivered.
                assert st.crc_errors + st.cobs_errors + st.decode_errors >= 50
                # The CRC-failed samples and the 5 dropped ones show up as sequence gaps.
                assert st.gaps >= 55

        asyncio.run(main())


def test_disconnect_fault_and_serial_reconnect(tmp_path):
    with InProcess(tmp_path) as rig:

        async def main():
            link = SerialLink(rig.path)
            await link.open()
            s = await asyncio.wait_for(link.receive(), 30)
            # The unplug is scheduled on the device's clock from the first sample the host
            # saw (a fixed time raced the host's open on a loaded machine: the pty came
            # back before the host looked and the loop below never ended).
            t_down = s.t_device + 0.3
            rig.device.schedule.faults.append(parse_fault(f"disconnect@{t_down}:duration=0.5"))
            with pytest.raises(LinkClosed):
                while True:
                    s = await asyncio.wait_for(link.receive(), 5)
                    assert s.t_device < t_down + 0.5, "the host never saw the unplug"
                    await link.send(Command(s.seq, (0.0, 0.0)))
            # The same path (a symlink to the new pty) comes back; no restart needed.
            await link.reconnect(timeout_s=10)
            s = await link.receive()
            assert s.t_device >= t_down + 0.5 and link.stats.reconnects == 1
            await link.close()

        asyncio.run(main())



E2E_SLOW = ["--set", "loop.period=0.004", "--set", "adaptation.gamma=0.5"]  # 250 Hz over MQTT


# The preflight sweep runs before the run's socket appears; on a loaded 2-core machine it
# took well past 15 s, so the waits below are bounds on events, not deadlines.
LOAD_TOLERANT = ["--set", "watchdog.stale_periods=50", "--set", "watchdog.link_timeout_s=1.0",
                 "--set", "watchdog.rules.overrun.enabled=false"]


@pytest.mark.timeout(600)
@pytest.mark.parametrize("transport", ["serial", "mqtt"])
def test_end_to_end_serve_and_run_close_the_loop(transport, mosquitto, tmp_path):  # noqa: F811
    """`corral rig serve` in one process, `corral run --link ...` in another.

    `corral run --arm` arms only the in-process simulated rig, so the served rig is
    armed the way an operator would: an "arm" request on the run's operator socket.
    Serial runs the served-rig recipe (configs/pedestal-served.toml, 500 Hz) with the
    preflight on: it must pass preflight to arm. MQTT keeps the 1 kHz demo slowed to
    250 Hz with no preflight (that design is NO-GO at 250 Hz). Both widen the stale
    rule to 20 periods: the test is about the link closing the loop, and whether the
    default rule holds is a timing question for `bench/bench_loop.py --link serial`
    (this VM stalls a real-time thread for 4-9 ms now and then, more while the rest of
    the suite runs, which the default 3.5-period rule would rightly trip on; it did in
    1 of 11 runs here, inside the full suite, before the engagement it waits for).
    """
    import json as _json
    import signal
    import socket
    import time

    import msgpack

    # This test is about the link closing the loop, not about this host's timing: on a loaded
    # 2-core machine the pty can stall for hundreds of milliseconds, so the timing rules are
    # widened (the timing rules have their own tests and bench/fault_matrix.py).
    if transport == "serial":
        # A short host check before arming (it runs with the preflight on a real link).
        config, serve_args, extra = SERVED, ["--serial"], [*LOAD_TOLERANT,
                                                           "--set", "loop.hostcheck_s=0.5"]
    else:
        # The preflight (run before the first arm on a real link) judges the design
        # slowed to 250 Hz NO-GO (most sampled plants trip); this test is about the
        # link closing the loop, so it arms without it, as an operator may on a sim.
        config, serve_args = CONFIG, ["--mqtt", mosquitto.url, *E2E_SLOW]
        extra = [*E2E_SLOW, "--no-preflight", *LOAD_TOLERANT]
    # The served rig runs until this test ends it (Serve.__exit__), however long the
    # preflight takes; the duration is only a guard against a leaked process.
    with Serve(*serve_args, "--duration", "900", config=config) as serve:
        spec = f"serial:{serve.first}" if transport == "serial" else serve.first
        # No --duration: the run ends (SIGINT, as an operator's Ctrl-C) once the law has
        # engaged and 3 s worth of samples crossed the link (a trip after engaging is
        # allowed: the slowed MQTT design trips its margin rule, the fallback keeps the
        # loop closed), however long the preflight and the settling took.
        run = subprocess.Popen(
            [*CORRAL, "run", str(config), "--link", spec, "--headless",
             "--json", "--set", f"log.dir={tmp_path}", *extra],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
        try:
            # The run names itself after its link kind (runtime.records.runinfo.run_name).
            sock_path = tmp_path / ("pedestal-sim-served.sock" if transport == "serial"
                                    else "pedestal-sim-mqtt.sock")
            deadline = time.monotonic() + 300  # the preflight first: minutes under load
            while not sock_path.exists() and time.monotonic() < deadline:
                assert run.poll() is None, run.communicate()[1]
                time.sleep(0.05)
            rate = 500 if transport == "serial" else 250
            reply, engaged_at, latest = None, None, {}
            with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
                s.connect(str(sock_path))
                s.sendall(msgpack.packb({"type": "request", "op": "arm"}))
                s.settimeout(60)
                unpacker = msgpack.Unpacker(raw=False)
                deadline = time.monotonic() + 300
                while time.monotonic() < deadline:
                    unpacker.feed(s.recv(65536))
                    for m in unpacker:
                        if m.get("type") == "reply" and m.get("op") == "arm":
                            reply = m
                        elif m.get("type") == "telemetry":
                            latest = m
                            if engaged_at is None and m.get("mode") == "engaged":
                                engaged_at = m["t"]
                    if reply is not None and engaged_at is not None \
                            and latest.get("link", {}).get("frames_in", 0) > 3 * rate:
                        break
            run.send_signal(signal.SIGINT)
            out, err = run.communicate(timeout=900)
        finally:
            if run.poll() is None:
                run.kill()
                run.communicate()
    assert run.returncode == 0, err
    assert reply["ok"], reply
    summary = _json.loads(out)
    assert summary["simulated"] is False
    assert summary["engagements"] >= 1, summary["trips"]
    link = summary["link"]
    for key in ("frames_in", "frames_out", "crc_errors", "gaps", "duplicates", "late_frames",
                "latency_p50_us", "latency_p99_us"):
        assert key in link
    if transport == "serial":
        assert summary["preflight"]["go"] is True, summary["preflight"]
    assert link["frames_in"] > 2 * rate and link["frames_out"] > 2 * rate  # ran past 3 s of samples
    assert link["crc_errors"] == 0 and link["decode_errors"] == 0
    assert link["latency_p50_us"] > 0


def test_rig_clocked_overrun_counts_late_samples(tmp_path):
    """A served rig whose samples arrive 3 periods late (a `link_delay` fault) makes every
    rig-clocked tick a deadline miss (handled over one period after its expected
    arrival, runtime.realtime.clock.ArrivalTracker), so the overrun rule (25 misses in 1000
    ticks, the default) trips with its reaction. The stale rule is turned off here:
    it would trip on the same delay and take the first-out place."""
    from runtime.config import load_config
    from runtime.realtime.loop import Runner, RunSettings

    with InProcess(tmp_path, ["link_delay@1.2:seconds=0.006"]) as rig:
        assert rig.device.period == 0.002  # the served config's period
        # link_loss widened too: a loaded machine can hold the device's thread off past
        # its 0.1 s silence and take the first-out place (not what this test checks)
        cfg = load_config(SERVED, [f"log.dir={tmp_path}",
                                   "watchdog.rules.stale.enabled=false",
                                   "watchdog.link_timeout_s=5"])
        r = Runner(cfg, RunSettings(duration=2.5, auto_arm=True, link=f"serial:{rig.path}",
                                    preflight=False, echo_trips=False))
        summary = asyncio.run(r.run())
    trips = summary["trips"]
    assert trips and trips[0]["rule"] == "overrun", trips
    assert trips[0]["action"] == "baseline"  # the rule's default reaction (docs/operating.md)
    assert trips[0]["value"] >= 25
    assert summary["deadline_misses"] >= 25


def test_served_rig_declares_its_estop_and_reports_it_in_the_status_bits(tmp_path):
    # docs/wire-protocol.md section 5: declared flag k is status bit 8 + k.
    from drivers.wire import STATUS_DEVICE_BASE_BIT

    with InProcess(tmp_path) as rig:

        async def main():
            async with SerialLink(rig.path) as link:
                assert link.hello.status_flags == ("estop",)
                bit = 1 << STATUS_DEVICE_BASE_BIT
                s = await link.receive()
                assert not s.status & bit
                rig.device.estop_pressed = True
                for _ in range(2000):  # until a sample taken after the press arrives
                    s = await link.receive()
                    await link.send(Command(s.seq, (3.0, -4.0)))
                    if s.status & bit:
                        break
                assert s.status & bit
                await asyncio.sleep(0.02)
                assert rig.device.applied == (0.0, 0.0)  # a pressed e-stop removes power
                rig.device.estop_pressed = False
                for _ in range(2000):
                    s = await link.receive()
                    await link.send(Command(s.seq, (3.0, -4.0)))
                    if not s.status & bit:
                        break
                assert not s.status & bit

        asyncio.run(main())


def test_the_served_devices_priority_is_not_inherited_and_ends_normal() -> None:
    # sched(7): SCHED_RESET_ON_FORK keeps a real-time policy from the threads and processes
    # the raised thread starts; serving ends at SCHED_OTHER even when the thread had
    # inherited a real-time policy before (here FIFO 3, as from a raised parent).
    seen: dict[str, int] = {}
    no_reset = ~getattr(os, "SCHED_RESET_ON_FORK", 0)

    def device_thread() -> None:
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(3))
        except PermissionError:
            return
        seen["granted"] = int(try_fifo())
        seen["raised"] = os.sched_getscheduler(0) & no_reset
        t = threading.Thread(target=lambda: seen.__setitem__("thread",
                                                             os.sched_getscheduler(0)))
        t.start()
        t.join(30.0)
        seen["process"] = _child_policy()
        end_fifo()
        seen["after"] = os.sched_getscheduler(0)

    t = threading.Thread(target=device_thread)
    t.start()
    t.join(120.0)
    if not seen:
        pytest.skip("SCHED_FIFO is not permitted here")
    assert seen == {"granted": 1, "raised": os.SCHED_FIFO, "thread": os.SCHED_OTHER,
                    "process": os.SCHED_OTHER, "after": os.SCHED_OTHER}
