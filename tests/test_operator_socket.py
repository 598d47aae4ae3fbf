"""Who may use the operator socket, and how hard: mode, peer uid, rate limit, bounded events.

Real parts: ``corral run`` subprocesses, the real Unix socket, a real second user (the
machine's ``nobody``, when the tests run as root), a real flood of 50 000 requests.
No timing assertions: the flooded run's deadline misses are printed beside an idle run's;
the checks are counts (requests reaching the tick, events written, bytes on disk).
"""

from __future__ import annotations

import asyncio
import json
import os
import stat
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import msgpack
import pytest

from runtime.realtime.telemetry import TokenBucket
from runtime.records.logs import read_trip_records
from tests.runtime_helpers import BASE, DEMO, ROOT

SETS = [a for kv in BASE for a in ("--set", kv)]
NOBODY = 65534



def start(log_dir: Path, *sets: str, umask: int | None = None) -> subprocess.Popen[str]:
    cmd = [sys.executable, "-m", "runtime.cli.main", "run", str(DEMO), "--headless", "--json",
           "--duration", "60", "--set", f"log.dir={log_dir}", *SETS]
    for kv in sets:
        cmd += ["--set", kv]
    pre = (lambda: os.umask(umask)) if umask is not None else None
    return subprocess.Popen(cmd, cwd=ROOT, stderr=subprocess.PIPE, stdout=subprocess.PIPE,
                            text=True, preexec_fn=pre)


def wait_socket(proc: subprocess.Popen[str], sock: Path) -> None:
    deadline = time.monotonic() + 60
    while not sock.exists():
        assert proc.poll() is None, proc.communicate()[1]
        assert time.monotonic() < deadline
        time.sleep(0.05)


def stop(proc: subprocess.Popen[str]) -> dict:
    proc.send_signal(2)
    out, err = proc.communicate(timeout=60)
    return {"stdout": out, "stderr": err}


def peek_as_nobody(sock: Path) -> str:
    """Connect as the user nobody (a forked child that drops to uid/gid 65534: the
    interpreter itself lives where nobody may not read) and say what came back."""
    import socket

    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: never returns into pytest
        text = "child failed"
        try:
            os.close(r)
            os.setgroups([])
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            s = socket.socket(socket.AF_UNIX)
            try:
                s.connect(str(sock))
            except OSError as exc:
                text = f"refused-by-file {type(exc).__name__}"
            else:
                s.settimeout(10)
                u = msgpack.Unpacker(raw=False)
                u.feed(s.recv(65536))
                first = next(iter(u), {})
                text = f"{first.get('type')} {first.get('ok')} {first.get('message', '')}"
        finally:
            os.write(w, text.encode())
            os._exit(0)
    os.close(w)
    with os.fdopen(r) as fh:
        out = fh.read()
    os.waitpid(pid, 0)
    return out.strip()


@pytest.fixture
def open_dir():
    """A log folder other users can traverse (pytest's own tmp folders are 0700), so only
    the socket's own mode and the peer check stand between them and the rig."""
    d = Path(tempfile.mkdtemp(prefix="corral-op-", dir="/tmp"))
    os.chmod(d, 0o755)
    yield d
    import shutil

    shutil.rmtree(d, ignore_errors=True)


needs_root = pytest.mark.skipif(os.geteuid() != 0, reason="needs root to act as another user")


@needs_root
def test_socket_is_0600_even_with_umask_000_and_another_user_cannot_connect(open_dir):
    """The issue: with umask 000 the socket was 0777 and another local user armed the rig."""
    proc = start(open_dir, umask=0)
    sock = open_dir / "pedestal-sim.sock"
    try:
        wait_socket(proc, sock)
        assert stat.S_IMODE(sock.stat().st_mode) == 0o600
        assert peek_as_nobody(sock).startswith("refused-by-file PermissionError")
    finally:
        stop(proc)


@needs_root
@pytest.mark.parametrize("allowed, expect", [
    (None, "reply False uid 65534 may not use"),
    ("[0, 65534]", "hello"),
])
def test_group_socket_admits_the_group_and_the_peer_check_decides(open_dir, allowed, expect):
    """0660 for ``operator.socket_group``; then SO_PEERCRED against ``operator.allowed_uids``
    (default: own uid and root) decides, whatever the file mode allowed."""
    sets = ["operator.socket_group=nogroup"]
    if allowed:
        sets.append(f"operator.allowed_uids={allowed}")
    proc = start(open_dir, *sets)
    sock = open_dir / "pedestal-sim.sock"
    try:
        wait_socket(proc, sock)
        st = sock.stat()
        assert stat.S_IMODE(st.st_mode) == 0o660 and st.st_gid == NOBODY
        assert peek_as_nobody(sock).startswith(expect)
    finally:
        stop(proc)


def test_token_bucket_worked_example():
    """Token bucket (common practice): burst 3 at 10 per second admits 3 at once, then none
    until a token has accrued (0.1 s)."""
    b = TokenBucket(10.0, 3.0)
    assert [b.take() for _ in range(4)] == [True, True, True, False]
    b.t -= 0.1  # as if 0.1 s had passed
    assert b.take() and not b.take()


async def _flood(sock: Path, n: int) -> dict[str, int]:
    """Send n requests (arm, disarm, ...) as fast as the server takes them, reading every
    answer; reconnect whenever the server cuts the connection (as a flood)."""
    counts = {"busy": 0, "answered": 0, "sent": 0, "cut": 0}
    ops = [msgpack.packb({"type": "request", "op": op}, use_bin_type=True)
           for op in ("arm", "disarm")]
    while counts["sent"] < n:
        reader, writer = await asyncio.open_unix_connection(str(sock))
        unpacker = msgpack.Unpacker(raw=False)
        try:
            while counts["sent"] < n:
                batch = min(50, n - counts["sent"])
                writer.write(b"".join(ops[(counts["sent"] + k) % 2] for k in range(batch)))
                counts["sent"] += batch
                await writer.drain()
                got = 0
                while got < batch:
                    chunk = await reader.read(65536)
                    if not chunk:
                        raise ConnectionResetError
                    unpacker.feed(chunk)
                    for msg in unpacker:
                        if msg.get("type") == "reply":
                            got += 1
                            counts["answered"] += 1
                            counts["busy"] += str(msg.get("message", "")).startswith("busy")
        except (ConnectionResetError, BrokenPipeError):
            counts["cut"] += 1
        finally:
            writer.close()
    return counts


def test_fifty_thousand_requests_do_not_starve_the_tick_and_the_log_stays_bounded(tmp_path):
    """The issue: 50 000 requests caused 1 328 missed deadlines, an overrun trip and 7.1 MB
    of fsynced events. Now the excess is answered busy; at most burst + rate x elapsed
    requests reach the tick, and the event records stay within the per-second budget (the
    flooded run's deadline misses are printed beside an idle run's). A client still
    sending after 100 busy answers is cut off; the flooder reconnects until all 50 000
    requests are sent."""
    results = {}
    for name in ("idle", "flood"):
        d = tmp_path / name
        # Overrun rule off: the misses are compared as counts, not left to latch a trip.
        proc = start(d, "watchdog.overrun_misses=100000", "log.events_per_s=20")
        sock = d / "pedestal-sim.sock"
        try:
            wait_socket(proc, sock)
            time.sleep(1.0)
            counts = asyncio.run(_flood(sock, 50_000)) if name == "flood" else {}
            time.sleep(1.0)
        finally:
            res = stop(proc)
        results[name] = (counts, json.loads(res["stdout"]), d)
    counts, summary, d = results["flood"]
    assert counts["sent"] == 50_000 and counts["busy"] > 0
    op = summary["operator"]
    # The token bucket's bound (common practice): at most burst + rate x elapsed requests
    # reach the tick (20 + 20 per second here; the run's ticks at 1 kHz give its length).
    assert op["requests"] <= 20 + 20 * summary["ticks"] / 1000 + 1, op
    assert op["busy"] >= counts["busy"] and op["flood_drops"] == counts["cut"] > 0
    trip_log = next(d.glob("*.trips"))
    got = read_trip_records(trip_log)
    header, events = got.header, got.events
    misses = {name: r[1]["deadline_misses"] for name, r in results.items()}
    started = header["started_wall"]
    per_second: dict[int, int] = {}
    for ev in events:
        if ev.kind != "events_suppressed":
            per_second[int(ev.t_wall - started)] = per_second.get(
                int(ev.t_wall - started), 0) + 1
    assert max(per_second.values()) <= 20 + 1
    assert any(ev.kind == "events_suppressed" for ev in events) or \
        sum(per_second.values()) < 40
    assert trip_log.stat().st_size < 1_000_000
    # Deadline misses are a timing figure, so they are printed, not asserted (house rule:
    # speed lives in bench/). Measured on the shared 2-core machine: about 10 misses under
    # the flood against 3 to 15 idle (the issue: 1 328). What keeps the tick fed is checked
    # above without a clock: the token bucket's bound on requests reaching the tick.
    print(f"deadline misses idle {misses['idle']}, under the flood {misses['flood']}")


def test_operator_settings_errors_are_one_line(tmp_path):
    for kv, field in (("operator.socket_group=no-such-group-xyz", "operator.socket_group"),
                      ("operator.allowed_uids=[-1]", "operator.allowed_uids")):
        out = subprocess.run([sys.executable, "-m", "runtime.cli.main", "run", str(DEMO),
                              "--headless", "--duration", "1", "--set", f"log.dir={tmp_path}",
                              "--set", kv], capture_output=True, text=True, timeout=60,
                             cwd=ROOT)
        assert out.returncode == 2 and "Traceback" not in out.stderr
        assert f"'{field}'" in out.stderr, out.stderr

