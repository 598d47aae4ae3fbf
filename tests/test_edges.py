"""The runtime at its edges: the last line of defence, durable-before-announced trips, one
owner per rig, and start-up inputs that used to crash.

Real parts only: real subprocesses of ``corral run``, the real operator socket, real
SIGKILLs, real files. Faults are injected through the fault schedule the operator uses
(``tick_error`` raises inside the tick; ``malformed`` sends a sample one reading short).

What does not live here: the operator socket's own guards (tests/test_operator_socket.py),
the links (tests/test_serial_link.py, tests/test_mqtt_link.py).
"""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from runtime.config import ConfigError, load_config
from runtime.realtime.loop import EXIT_INTERNAL_TRIP, RigBusy, Runner, RunSettings
from runtime.realtime.telemetry import TelemetryClient
from runtime.records.logs import load_trips, read_run_log, read_trip_records
from tests.runtime_helpers import BASE, DEMO, ROOT, run_unpaced, runner

SETS = [a for kv in BASE for a in ("--set", kv)]


def corral(*args: str) -> list[str]:
    return [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), *args, *SETS]


# ------------------------------------------------------------------ 1. last line of defence
def test_exception_inside_the_tick_is_an_internal_trip_with_outputs_off(tmp_path):
    """An exception raised inside the tick (the ``tick_error`` fault) ends the run through the
    `internal` trip: first-out ``internal``, outputs off from that tick on (the run log's
    last row), the record read back from disk, exit status 71, one line, no traceback.
    Outputs off on an untrusted controller is a stop category 0 (IEC 60204-1; common
    practice for a software fault)."""
    out = subprocess.run(corral("--headless", "--arm", "--duration", "3",
                                "--fault", "tick_error@0.8", "--set", f"log.dir={tmp_path}"),
                         capture_output=True, text=True, timeout=90, cwd=ROOT)
    assert out.returncode == EXIT_INTERNAL_TRIP, out.stderr
    assert "Traceback" not in out.stderr
    assert "INTERNAL trip 1 (InjectedTickError" in out.stderr
    trips = load_trips([tmp_path])
    assert [t.rule for t in trips] == ["internal"]
    rec = trips[0].rec
    assert rec.action == "outputs_off" and rec.tick == 800
    assert "InjectedTickError" in rec.exception
    # The run ended at the trip (not at --duration) and its last tick had outputs off.
    run_log = next(tmp_path.glob("*.run"))
    _, cols = read_run_log(run_log)
    assert len(cols["t"]) <= 802
    assert cols["outputs_on"][-1] == 0.0 and not cols["u"][-1].any()


def test_a_malformed_sample_ends_in_a_trip_never_a_crash(tmp_path):
    """A well-formed sample one reading short (3 of 4) used to crash the loop with exit 70
    and no record: it must end in a trip with outputs off and a record on disk."""
    r, summary = run_unpaced(tmp_path, 1.5, ["malformed@1.0"])
    assert summary["trips"], summary
    assert summary["trips"][0]["action"] == "outputs_off"
    got = read_trip_records(summary["trip_log"])
    assert not got.torn and got.trips[0].rule == summary["trips"][0]["rule"]
    assert not r.core.outputs_on


def test_internal_rule_is_in_the_one_rule_list_and_cannot_be_reconfigured(tmp_path):
    r = runner(tmp_path, overrides=["watchdog.rules.internal.reaction=baseline",
                                    "watchdog.rules.internal.enabled=false"])
    rule = r.core.watchdog.by_id["internal"]
    assert rule.reaction == "outputs_off" and rule.enabled
    r.lock.release()


# ------------------------------------------------------------------ 2. durable before announced
def test_killed_at_the_announcement_every_trip_reads_back(tmp_path):
    """100 runtimes, each SIGKILLed the moment its operator socket announces the trip (a
    rehearsed spike): 100 of 100 trips read back from their trip logs (the announcement
    comes only after the record is fsynced). Before, 1 of 50 read back."""
    n, parallel = int(os.environ.get("KILLS", "100")), 5
    got: dict[int, int] = {}
    killed: set[int] = set()
    why: dict[int, str] = {}

    async def watch(i: int, pid: int) -> None:
        sock = tmp_path / str(i) / "pedestal-sim.sock"
        for _ in range(6000):
            if sock.exists():
                break
            await asyncio.sleep(0.005)
        client = TelemetryClient(sock)
        try:
            for _ in range(6000):  # the file exists from bind(), connections from listen()
                try:
                    await client.connect()
                    break
                except ConnectionRefusedError:
                    await asyncio.sleep(0.01)
            # Armed only once we listen, so no trip can come before we are there.
            reply = await client.request("arm", timeout=30)
            if not reply["ok"]:
                why[i] = reply["message"]
                return
            trip = await client.next("trip", timeout=30)
        except (OSError, TimeoutError, ConnectionError) as exc:
            why[i] = repr(exc)
            return
        os.kill(pid, signal.SIGKILL)
        killed.add(i)
        got[i] = int(trip["id"])
        await client.close()

    async def farm() -> list[str]:
        proc = await asyncio.create_subprocess_exec(
            sys.executable, str(ROOT / "tests" / "trip_kill_farm.py"), str(tmp_path), str(n),
            str(parallel), stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.DEVNULL)
        assert proc.stdout is not None
        tasks, ends = [], []
        async with asyncio.timeout(600):
            async for raw in proc.stdout:
                words = raw.decode().split()
                if words[0] == "end":
                    ends.append(raw.decode())
                else:
                    tasks.append(asyncio.ensure_future(watch(int(words[0]), int(words[1]))))
            await asyncio.gather(*tasks)
            await proc.wait()
        return ends

    ends = asyncio.run(farm())
    assert len(ends) == n
    # Every child was killed at its announcement (a missed connection would leave a child
    # that ran to its end and make this check meaningless).
    missed = {i: [t.rule for t in load_trips([tmp_path / str(i)])]
              for i in range(n) if i not in killed}
    assert len(killed) == n, f"only {len(killed)} of {n} announcements seen: {missed} {why}"
    read_back = 0
    for i, trip_id in got.items():
        trips = read_trip_records(next((tmp_path / str(i)).glob("*.trips"))).trips
        if any(t.id == trip_id and t.rule == "jump" for t in trips):
            read_back += 1
    assert read_back == n


# ------------------------------------------------------------------ 3. one owner per rig
def test_second_runtime_of_one_rig_refuses_and_leaves_the_first_socket(tmp_path):
    """A second ``corral run`` with the same rig name and log folder refuses in one line
    naming the owner's pid and the lock; the first runtime's socket stays and still answers."""
    first = subprocess.Popen(corral("--headless", "--duration", "60", "--set",
                                    f"log.dir={tmp_path}"),
                             stderr=subprocess.PIPE, text=True, cwd=ROOT)
    try:
        sock = tmp_path / "pedestal-sim.sock"
        deadline = time.monotonic() + 60
        while not sock.exists():
            assert first.poll() is None and time.monotonic() < deadline
            time.sleep(0.05)
        second = subprocess.run(corral("--headless", "--duration", "1", "--set",
                                       f"log.dir={tmp_path}"),
                                capture_output=True, text=True, timeout=60, cwd=ROOT)
        assert second.returncode == 2
        assert "Traceback" not in second.stderr
        lines = second.stderr.strip().splitlines()
        assert len(lines) == 1, second.stderr
        assert f"pid {first.pid}" in lines[0] and "pedestal-sim.lock" in lines[0]
        assert sock.exists()
        # Only the first runtime's files: the refused one created no logs.
        assert len(list(tmp_path.glob("*.trips"))) == 1

        async def ask() -> dict:
            c = TelemetryClient(sock)
            hello = await c.connect()
            await c.close()
            return hello

        assert asyncio.run(ask())["rig"] == "pedestal-sim"
    finally:
        first.send_signal(signal.SIGINT)
        first.communicate(timeout=60)
    assert not (tmp_path / "pedestal-sim.sock").exists()


def test_lock_is_released_at_the_end_and_by_a_killed_owner(tmp_path):
    cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}"])
    a = Runner(cfg, RunSettings(echo_trips=False))
    with pytest.raises(RigBusy) as err:
        Runner(cfg, RunSettings(echo_trips=False))
    assert f"pid {os.getpid()}" in str(err.value)
    asyncio.run(a.run_ticks(10))
    b = Runner(cfg, RunSettings(echo_trips=False))  # the first run ended: free again
    b.lock.release()
    # A SIGKILLed owner leaves the lock file but not the lock (the kernel drops it).
    lock_path = str(tmp_path / "pedestal-sim.lock")
    code = (f"import sys, time; sys.path.insert(0, {str(ROOT)!r})\n"
            "from runtime.realtime.loop import RigLock\n"
            "from pathlib import Path\n"
            f"lock = RigLock(Path({lock_path!r})); print('held', flush=True); time.sleep(60)")
    holder = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        with pytest.raises(RigBusy, match=f"pid {holder.pid}"):
            Runner(cfg, RunSettings(echo_trips=False))
    finally:
        holder.kill()
        holder.wait(10)
    Runner(cfg, RunSettings(echo_trips=False)).lock.release()


def test_runs_started_in_the_same_second_never_share_a_file(tmp_path):
    """Two runs of one rig in one second (one after the other in one process): two run
    logs, two trip logs, each trip log with its own trip 1."""
    paths = []
    for _ in range(2):
        _, summary = run_unpaced(tmp_path, 1.2, ["spike@1.0:size=0.5"])
        paths.append((summary["trip_log"], summary["run_log"]))
    assert len({p for pair in paths for p in pair}) == 4
    for trip_log, _ in paths:
        assert [t.id for t in read_trip_records(trip_log).trips] == [1]


# ------------------------------------------------------------------ 5. inputs that crashed
@pytest.mark.parametrize("override, field", [
    ("rig.name=" + "a" * 300, "rig.name"),
    ("rig.name=a/b", "rig.name"),
    ("rig.sim=[1, 2]", "rig.sim"),
])
def test_start_up_inputs_are_one_line_errors(tmp_path, override, field):
    out = subprocess.run(corral("--headless", "--duration", "1", "--set",
                                f"log.dir={tmp_path}", "--set", override),
                         capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert out.returncode == 2, out.stderr
    assert "Traceback" not in out.stderr and len(out.stderr.strip().splitlines()) == 1
    assert f"'{field}'" in out.stderr


def test_nul_byte_in_log_dir_is_a_one_line_error(tmp_path):
    text = DEMO.read_text()
    assert '\ndir = "runs"' in text
    cfg = tmp_path / "nul.toml"
    cfg.write_text(text.replace('\ndir = "runs"', '\ndir = "a\\u0000b"'))
    out = subprocess.run([sys.executable, "-m", "runtime.cli.main", "run", str(cfg), "--headless",
                          "--duration", "1"], capture_output=True, text=True, timeout=60,
                         cwd=ROOT)
    assert out.returncode == 2 and "Traceback" not in out.stderr
    assert "'log.dir'" in out.stderr and "NUL" in out.stderr


def test_long_log_dir_for_the_socket_is_a_config_error(tmp_path):
    deep = tmp_path / ("d" * 100)
    with pytest.raises(ConfigError, match="log.dir"):
        Runner(load_config(DEMO, [*BASE, f"log.dir={deep}"]), RunSettings())


def test_a_dot_in_the_rig_name_keeps_both_file_names(tmp_path):
    _, summary = run_unpaced(tmp_path, 0.2, overrides=["rig.name=lab.v2"])
    assert Path(summary["trip_log"]).name.startswith("lab.v2-")
    assert summary["trip_log"].endswith(".trips") and summary["run_log"].endswith(".run")
    assert Path(summary["trip_log"]).stem == Path(summary["run_log"]).stem
