"""Acceptance of `corral run`, `corral rig serve` and `corral watch` as an operator meets them.

Through real subprocesses (`python -m runtime.cli.main`), a real pseudo-terminal and a real
mosquitto broker: the JSON summary contract of the runtime and links issues, and bad input
that must end in one `corral:` line on stderr, a non-zero status and no traceback.

What does not live here: the loop's own behaviour (tests/test_run.py), the links
(tests/test_serial_link.py, tests/test_mqtt_link.py), the dashboard (tests/test_dashboard*.py).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
from mqtt_broker import free_port, mosquitto  # noqa: F401 - the fixture

ROOT = Path(__file__).resolve().parents[1]
SIM = "configs/pedestal-sim.toml"
SERVED = "configs/pedestal-served.toml"
# A loaded machine must not trip the overrun rule in these short real-time runs.
CALM = ["--set", "watchdog.overrun_misses=100000"]
SUMMARY_KEYS = ("ticks", "deadline_misses", "lateness_p50_us", "lateness_p99_us",
                "max_margin_ratio", "trips", "trip_log", "link")
LINK_KEYS = ("frames_in", "frames_out", "crc_errors", "gaps", "duplicates", "late_frames",
             "latency_p50_us", "latency_p99_us")


def corral(*args: str, timeout: float = 40) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "runtime.cli.main", *args], cwd=ROOT,
                          capture_output=True, text=True, timeout=timeout)


def strict_json(text: str) -> Any:
    """RFC 8259 JSON has no NaN or Infinity; refuse Python's extensions."""
    def refuse(c: str) -> Any:
        raise ValueError(f"non-standard JSON constant {c}")
    return json.loads(text, parse_constant=refuse)


def assert_one_clear_line(res: subprocess.CompletedProcess[str], *words: str) -> None:
    assert res.returncode != 0, res.stdout
    assert "Traceback" not in res.stderr, res.stderr
    last = res.stderr.strip().splitlines()[-1]
    assert last.startswith("corral"), res.stderr
    for w in words:
        assert w in last, last


def check_summary(summary: dict[str, Any]) -> None:
    for key in SUMMARY_KEYS:
        assert key in summary, key
    for t in summary["trips"]:
        for key in ("rule", "tick", "action", "detect_to_action_us"):
            assert key in t, (key, t)
    for key in LINK_KEYS:
        assert key in summary["link"], key


def test_sim_run_json_contract_with_a_scheduled_spike(tmp_path: Path) -> None:
    res = corral("run", SIM, "--headless", "--arm", "--duration", "3", "--json",
                 "--fault", "spike@1.5:axis=az,size=0.2", "--set", f"log.dir={tmp_path}", *CALM)
    assert res.returncode == 0, res.stderr
    summary = strict_json(res.stdout)
    check_summary(summary)
    # A 0.2 rad spike is beyond the default jump limit (half of design.limits): first-out jump.
    assert [t["rule"] for t in summary["trips"]][:1] == ["jump"]
    assert Path(summary["trip_log"]).is_file()


BAD_RUN = [
    # (extra arguments, words the last line must hold)
    (["--link", "serial:/nonexistent/tty0", "--no-preflight"], ["/nonexistent/tty0", "start"]),
    (["--duration", "inf"], ["--duration"]),
    (["--fault", "spike@1:axis=zz"], ["axis", "zz"]),
    (["--fault", "spike@1:size=abc"], ["size"]),
    (["--fault", "delay@1:ticks=-3"], ["ticks"]),
    (["--fault", "delay@1:ticks=2.5"], ["ticks"]),
    (["--fault", "spike@inf"], ["time"]),
]


@pytest.mark.parametrize(("extra", "words"), BAD_RUN, ids=[" ".join(e) for e, _ in BAD_RUN])
def test_run_bad_input_ends_in_one_line(tmp_path: Path, extra: list[str],
                                        words: list[str]) -> None:
    args = ["run", SIM, "--headless", "--set", f"log.dir={tmp_path}", *CALM]
    if "--duration" not in extra:
        args += ["--duration", "1"]
    assert_one_clear_line(corral(*args, *extra), *words)


def test_run_with_broker_down_ends_in_one_line(tmp_path: Path) -> None:
    port = free_port()  # nothing listens there: connection refused
    res = corral("run", SERVED, "--headless", "--duration", "1", "--no-preflight",
                 "--link", f"mqtt://127.0.0.1:{port}/pedestal-sim",
                 "--set", f"log.dir={tmp_path}", *CALM)
    assert_one_clear_line(res, f"127.0.0.1:{port}", "broker")


def test_run_with_an_unwritable_log_dir_names_the_field(tmp_path: Path) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    res = corral("run", SIM, "--headless", "--duration", "1",
                 "--set", f"log.dir={blocker / 'logs'}", *CALM)
    assert_one_clear_line(res, "log.dir")
    assert res.returncode == 2  # a user error, not the crash handler's status


def test_watch_with_broker_down_ends_in_one_line() -> None:
    res = corral("watch", "--mqtt", f"127.0.0.1:{free_port()}", "--rig", "pedestal-sim")
    assert_one_clear_line(res, "broker")


@pytest.mark.parametrize(("extra", "words"), [
    (["--fault", "spike@1:axis=zz"], ["axis", "zz"]),
    (["--duration", "0"], ["--duration"]),
    (["--pty-link", "/nonexistent/dir/rig.tty"], ["--pty-link"]),
], ids=["bad-axis", "duration-0", "pty-link-folder-missing"])
def test_rig_serve_bad_input_ends_in_one_line(extra: list[str], words: list[str]) -> None:
    args = ["rig", "serve", SERVED, "--serial", *extra]
    if "--duration" not in extra:
        args += ["--duration", "1"]
    assert_one_clear_line(corral(*args), *words)


def serve(*args: str) -> tuple[subprocess.Popen[str], str]:
    """Start `corral rig serve`; return it and its first output line."""
    proc = subprocess.Popen([sys.executable, "-m", "runtime.cli.main", "rig", "serve", SERVED,
                             *args], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL, text=True)
    assert proc.stdout is not None
    return proc, proc.stdout.readline().strip()


def test_served_rig_over_a_pty_closes_the_loop_with_link_figures(tmp_path: Path) -> None:
    proc, first = serve("--serial", "--duration", "20")
    try:
        assert os.path.exists(first), first  # the first line is the pty path
        res = corral("run", SERVED, "--headless", "--duration", "2", "--json", "--no-preflight",
                     "--link", f"serial:{first}", "--set", f"log.dir={tmp_path}", *CALM)
        assert res.returncode == 0, res.stderr
        summary = strict_json(res.stdout)
        check_summary(summary)
        assert summary["link"]["frames_in"] > 0
        assert summary["link"]["latency_p99_us"] is not None
    finally:
        proc.terminate()
        proc.wait(10)


def test_served_rig_over_mqtt_closes_the_loop(tmp_path: Path, mosquitto) -> None:  # noqa: F811
    proc, first = serve("--mqtt", mosquitto.url, "--duration", "20")
    try:
        assert first == f"mqtt://{mosquitto.url}/pedestal-sim"
        res = corral("run", SERVED, "--headless", "--duration", "2", "--json", "--no-preflight",
                     "--link", first, "--set", f"log.dir={tmp_path}", *CALM)
        assert res.returncode == 0, res.stderr
        summary = strict_json(res.stdout)
        check_summary(summary)
        assert summary["link"]["frames_in"] > 0
    finally:
        proc.terminate()
        proc.wait(10)


def test_sigint_ends_the_run_with_a_readable_trip_log(tmp_path: Path) -> None:
    proc = subprocess.Popen([sys.executable, "-m", "runtime.cli.main", "run", SIM, "--headless",
                             "--arm", "--json", "--fault", "spike@1", "--set",
                             f"log.dir={tmp_path}", *CALM], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    sock = tmp_path / "pedestal-sim.sock"
    deadline = time.monotonic() + 120
    while not sock.exists() and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.1)
    # Wait for the spike's trip on the operator socket (an event, not a fixed 2 s).
    import socket

    import msgpack
    tripped = False
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.connect(str(sock))
        s.settimeout(60)
        unpacker = msgpack.Unpacker(raw=False)
        deadline = time.monotonic() + 120
        while not tripped and time.monotonic() < deadline:
            unpacker.feed(s.recv(65536))
            # the trip message, or the latched first-out in telemetry if it came first
            tripped = any(m.get("type") == "trip" or m.get("trip") for m in unpacker)
    assert tripped, "the spike at 1 s never tripped"
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    summary = strict_json(out)
    check_summary(summary)
    listed = corral("trips", str(tmp_path))
    assert listed.returncode == 0, listed.stderr
    assert "jump" in listed.stdout


def test_telemetry_broker_down_is_a_warning_and_the_run_goes_on(tmp_path: Path) -> None:
    port = free_port()  # nothing listens here
    res = corral("run", SIM, "--headless", "--arm", "--duration", "4", "--json",
                 "--telemetry-mqtt", f"127.0.0.1:{port}", "--set", f"log.dir={tmp_path}",
                 "--set", "watchdog.overrun_misses=100000")
    assert res.returncode == 0, res.stderr
    assert f"telemetry broker 127.0.0.1:{port} is not reachable" in res.stderr
    assert "Traceback" not in res.stderr
    assert strict_json(res.stdout)["ticks"] >= 3000


def test_missing_serial_port_fails_before_the_preflight(tmp_path: Path) -> None:
    res = corral("run", SIM, "--link", "serial:/nonexistent/tty0", "--headless",
                 "--set", f"log.dir={tmp_path}")
    assert res.returncode == 2
    assert_one_clear_line(res, "/nonexistent/tty0", "corral rig serve")
    # No preflight sweep ran: no preflight record was written.
    assert not list(tmp_path.glob("preflight-*.json"))
