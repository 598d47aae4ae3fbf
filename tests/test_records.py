"""Crash-safe records: trip log torn tails, a real SIGKILL, the run log's bounded queue.

Also holds the builders of realistic trip logs (`write_trip_log`) that
tests/test_trips_cli.py and tests/test_comtrade.py import, so those tests do
not depend on the real-time loop being finished.
"""

from __future__ import annotations

import os
import signal
import stat
import subprocess
import sys
import textwrap
import threading
import tomllib
from pathlib import Path

import msgpack
import numpy as np
import pytest

from runtime.records.logs import (
    RUNLOG_FORMAT,
    TRIPS_FORMAT,
    RunLogWriter,
    TripLog,
    load_trips,
    read_run_log,
    read_stream,
    read_trip_records,
)

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"

# ---------------------------------------------------------------------------
# Builders of realistic trip records (the shared contract's trip log format)
# ---------------------------------------------------------------------------

STATES = ["az", "el", "az_rate", "el_rate"]
STATE_UNITS = ["rad", "rad", "rad/s", "rad/s"]
INPUTS = ["V_az", "V_el"]
CAPTURE_FIELDS = ["t", "tick", "mode", "c", "x", "xr", "e", "u", "u_raw", "ratio",
                  "eff_rate", "w_norm"]
CAPTURE_UNITS = ["s", "", "", ["rad", "rad"], STATE_UNITS, STATE_UNITS, STATE_UNITS,
                 ["V", "V"], ["V", "V"], "", "1/s", ""]
PERIOD = 0.001


def make_header(rig: str = "pedestal-sim") -> dict:
    """A trip log header as the loop writes it (the demo config as the config that ran)."""
    config = tomllib.loads(DEMO.read_text())
    return {"rig": rig, "config_hash": "0123456789abcdef", "software_version": "0.1.0",
            "config": config, "started_wall": 1_700_000_000.0,
            "capture_fields": CAPTURE_FIELDS, "capture_units": CAPTURE_UNITS,
            "period": PERIOD}


def capture_rows(tick0: int, n: int, trip_tick: int, rng: np.random.Generator,
                 spike: float = 0.03, mode_after: str = "fallback") -> list[list]:
    """Tick rows of a pedestal tracking a slew when an az sensor spike hits at `trip_tick`.

    The margin ratio follows ||e|| / eps_like, so it crosses the trip level at the spike.
    """
    rows = []
    for k in range(tick0, tick0 + n):
        t = k * PERIOD
        c = [0.6 * min(t / 1.5, 1.0), 0.5 * min(max(t - 1.0, 0) / 1.5, 1.0)]
        xr = [c[0] - 0.01, c[1] - 0.008, 0.4, 0.33]
        e = list(rng.normal(0.0, 2e-4, 4))
        if k >= trip_tick:
            e[0] += spike * np.exp(-(k - trip_tick) * PERIOD / 0.02)
        x = [xr[i] + e[i] for i in range(4)]
        ratio = float(np.linalg.norm(e[:2]) / 0.03)
        u = [2.0 - 40 * e[0], 3.5 - 40 * e[1]]
        mode = "engaged" if k < trip_tick else mode_after
        rows.append([t, k, mode, c, x, xr, e, u, [u[0] * 1.05, u[1] * 1.05], ratio,
                     2.0 / max(1e-3, 1.0 - min(ratio, 0.98)), 1.5 + 1e-4 * k])
    return rows


def make_trip(trip_id: int, tick: int, rng: np.random.Generator, n_pre: int = 40,
              n_post: int = 25, rule: str = "margin") -> tuple[dict, list[list]]:
    """One trip record plus its post-trip rows, following the contract."""
    pre = capture_rows(tick - n_pre + 1, n_pre, tick, rng)
    post = capture_rows(tick + 1, n_post, tick, rng)
    last = pre[-1]
    rec = {
        "type": "trip", "id": trip_id, "t_mono": 5000.0 + tick * PERIOD,
        "t_wall": 1_700_000_000.0 + tick * PERIOD, "tick": tick,
        "first_out": {"rule": rule, "signal": "ratio", "value": float(last[9]),
                      "threshold": 0.9},
        "later": [{"rule": "jump", "signal": "x.az", "value": 0.031, "threshold": 0.02,
                   "tick": tick + 1}],
        "action": "baseline", "detect_to_action_us": 37.5 + trip_id,
        "snapshot": {"mode": "engaged", "W": [[0.1 * i + j for j in range(2)] for i in range(9)],
                     "x": last[4], "xr": last[5], "e": last[6], "u_cmd": last[7],
                     "u_applied": last[7], "eps": 0.03, "phi_d": 12.5, "ratio": last[9],
                     "loop": {"rate_hz": 1000.0, "lateness_p99_us": 80.0, "deadline_misses": 0},
                     "link": {"sample_age_ms": 0.4, "crc_errors": 0}},
        "config_hash": "0123456789abcdef", "software_version": "0.1.0", "rig": "pedestal-sim",
        "events": [{"type": "event", "t_mono": 5000.0, "t_wall": 1_700_000_000.0, "tick": 0,
                    "kind": "arm", "detail": "operator"}],
        "pre": pre,
    }
    return rec, post


def write_trip_log(path: Path, n_trips: int, seed: int = 1, with_post: bool = True,
                   first_tick: int = 2000, spacing: int = 1500) -> list[tuple[dict, list]]:
    """Write a whole trip log through TripLog: header, arm event, trips, posts, resets."""
    rng = np.random.default_rng(seed)
    made = []
    with TripLog(path, make_header()) as log:
        log.event("arm", "operator", tick=0, t_mono=5000.0)
        for i in range(1, n_trips + 1):
            tick = first_tick + (i - 1) * spacing
            rec, post = make_trip(i, tick, rng)
            log.append(rec)
            if with_post:
                log.append({"type": "post", "trip_id": i, "rows": post})
            log.event("reset", "operator", tick=tick + 500, t_mono=5000.0 + (tick + 500) * PERIOD)
            made.append((rec, post))
    return made


def _same(a: object, b: object) -> bool:
    """Equality after a msgpack round trip (tuples become lists, floats stay exact)."""
    return msgpack.unpackb(msgpack.packb(a), strict_map_key=False) == b


# ---------------------------------------------------------------------------
# Trip log
# ---------------------------------------------------------------------------

def test_trip_log_round_trip_merges_post_and_keeps_header(tmp_path):
    made = write_trip_log(tmp_path / "a.trips", 3)
    got = read_trip_records(tmp_path / "a.trips")
    header, trips, events = got.header, got.trips, got.events
    assert header["format"] == TRIPS_FORMAT and header["version"] == 1
    assert not got.torn and not got.bad
    assert [t.id for t in trips] == [1, 2, 3]
    for trip, (rec, post) in zip(trips, made, strict=True):
        assert _same(rec, trip.rec.to_wire())
        assert _same(post, trip.post)
        assert trip.capture_fields == CAPTURE_FIELDS
        assert trip.config["rig"]["sim"] == "pedestal"
        assert not trip.cut_short
    assert [e.kind for e in events] == ["arm", "reset", "reset", "reset"]


def test_capture_locates_the_trip_tick_and_builds_columns(tmp_path):
    made = write_trip_log(tmp_path / "a.trips", 1)
    trip = load_trips([tmp_path])[0]
    cap = trip.capture()
    rec, post = made[0]
    assert len(cap) == len(rec["pre"]) + len(post)
    assert cap.columns["tick"][cap.trip_index] == rec["tick"]
    assert cap.t[cap.trip_index] == 0.0
    assert cap.columns["x"].shape == (len(cap), 4)
    assert cap.columns["mode"][cap.trip_index - 1] == "engaged"
    assert cap.unit("x", 2) == "rad/s"
    assert cap.period == pytest.approx(PERIOD)


def test_truncation_anywhere_in_the_last_record_keeps_the_others(tmp_path):
    """Cut the file at every byte offset inside the last trip: N-1 trips intact, torn flagged."""
    src = tmp_path / "full.trips"
    rng = np.random.default_rng(3)
    n = 3
    recs = []
    with TripLog(src, make_header()) as log:
        for i in range(1, n + 1):
            rec, _ = make_trip(i, 1000 * i, rng, n_pre=6, n_post=0)
            log.append(rec)
            recs.append(rec)
    data = src.read_bytes()
    last_start = len(data) - len(msgpack.packb(recs[-1]))
    cut = tmp_path / "cut.trips"
    for end in range(last_start, len(data)):
        cut.write_bytes(data[:end])
        got = read_trip_records(cut)
        assert got.header["format"] == TRIPS_FORMAT
        assert got.torn == (end > last_start)
        assert [t.id for t in got.trips] == list(range(1, n))
        assert _same(recs[:-1], [t.rec.to_wire() for t in got.trips])
    header, records, torn = read_stream(src)
    assert not torn and len(records) == n


def test_a_log_cut_inside_its_header_is_a_clear_error_not_a_crash(tmp_path):
    from runtime.records.logs import LogReadError

    src = tmp_path / "h.trips"
    TripLog(src, make_header()).close()
    src.write_bytes(src.read_bytes()[:40])
    with pytest.raises(LogReadError, match="cut short before its header"):
        read_trip_records(src)


def test_reopening_a_torn_log_cuts_the_tail_and_appends_readably(tmp_path):
    path = tmp_path / "r.trips"
    write_trip_log(path, 2, with_post=False)
    data = path.read_bytes()
    path.write_bytes(data[:-7])              # the last record (a reset event) torn
    rng = np.random.default_rng(9)
    with TripLog(path, make_header()) as log:
        rec, _ = make_trip(3, 9000, rng)
        log.append(rec)
    got = read_trip_records(path)
    assert not got.torn
    assert [t.id for t in got.trips] == [1, 2, 3]
    assert [e.kind for e in got.events] == ["arm", "reset"]


def test_records_survive_a_sigkill_of_the_writer(tmp_path):
    """A real child process appends trips, reports each one, and is SIGKILLed mid-stream.

    Every trip the child reported (append returned, so write + flush + fsync
    done) must read back intact. A killed process keeps what reached the page
    cache; fsync is what also covers a power loss, which a test cannot stage.
    """
    path = tmp_path / "killed.trips"
    child = textwrap.dedent(f"""
        import sys
        import numpy as np
        sys.path.insert(0, {str(Path(__file__).parent)!r})
        from test_records import make_header, make_trip
        from runtime.records.logs import TripLog
        rng = np.random.default_rng(5)
        log = TripLog({str(path)!r}, make_header())
        i = 0
        while True:
            i += 1
            rec, post = make_trip(i, 1000 * i, rng, n_pre=200, n_post=0)
            log.append(rec)
            print(i, flush=True)
    """)
    proc = subprocess.Popen([sys.executable, "-c", child], stdout=subprocess.PIPE, text=True,
                            cwd=ROOT)
    reported = 0
    try:
        for line in proc.stdout:
            reported = int(line)
            if reported >= 8:
                break
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
        proc.stdout.close()
    assert proc.returncode == -signal.SIGKILL
    assert reported >= 8
    trips = read_trip_records(path).trips
    ids = [t.id for t in trips]
    assert ids[:reported] == list(range(1, reported + 1))
    rng = np.random.default_rng(5)
    for trip in trips:
        rec, _ = make_trip(trip.id, 1000 * trip.id, rng, n_pre=200, n_post=0)
        assert _same(rec, trip.rec.to_wire())
        assert trip.post is None and trip.cut_short


# ---------------------------------------------------------------------------
# Run log
# ---------------------------------------------------------------------------

def _runlog_header(n_states: int = 4) -> dict:
    return {"fields": ["t", "tick", "x", "u"], "widths": [1, 1, n_states, 2],
            "units": ["s", "", "rad", "V"], "config": {}, "config_hash": "x",
            "software_version": "0.1.0", "rig": "test", "period": PERIOD}


def test_run_log_round_trip_and_torn_tail(tmp_path):
    path = tmp_path / "a.run"
    rows = [[k * PERIOD, k, *np.sin([k, k + 1, k + 2, k + 3]).tolist(), 0.5 * k, -0.5 * k]
            for k in range(3000)]
    with RunLogWriter(path, _runlog_header()) as w:
        for r in rows:
            assert w.append(r)
    assert w.dropped == 0 and w.written == 3000 and w.error is None
    header, cols = read_run_log(path)
    assert header["format"] == RUNLOG_FORMAT
    np.testing.assert_array_equal(cols["tick"], np.arange(3000))
    np.testing.assert_array_equal(cols["x"], np.array(rows)[:, 2:6])
    assert cols["u"].shape == (3000, 2)
    data = path.read_bytes()
    path.write_bytes(data[:-5])              # torn last row
    header, cols = read_run_log(path)
    assert len(cols["t"]) == 2999
    _, _, torn = read_stream(path)
    assert torn


def test_run_log_never_blocks_when_the_disk_stalls(tmp_path):
    """The writer's "disk" is a FIFO nobody reads, so the writer thread is stuck in write().

    The tick keeps appending: every append returns (this test would hang
    otherwise), the overflow is counted in `dropped`, and once the reader
    drains the FIFO, every accepted row arrives.
    """
    fifo = tmp_path / "stalled.run"
    os.mkfifo(fifo)
    assert stat.S_ISFIFO(fifo.stat().st_mode)
    reader_fd = os.open(fifo, os.O_RDONLY | os.O_NONBLOCK)
    queue_size = 64
    writer = RunLogWriter(fifo, _runlog_header(), queue_size=queue_size)
    row = [0.0, 0, *([1.0e-3] * 4), 1.0, 2.0]
    total = 20_000                    # ~0.9 MB packed: far beyond a 64 KiB pipe buffer
    accepted = sum(bool(writer.append([k * PERIOD, k, *row[2:]])) for k in range(total))
    assert writer.dropped == total - accepted
    assert writer.dropped > 0
    assert writer.appended == accepted

    received = bytearray()

    def drain() -> None:
        os.set_blocking(reader_fd, True)
        while chunk := os.read(reader_fd, 1 << 16):
            received.extend(chunk)

    t = threading.Thread(target=drain)
    t.start()
    writer.close(timeout=30)
    t.join(timeout=30)
    os.close(reader_fd)
    assert writer.error is None
    unpacker = msgpack.Unpacker(raw=False)
    unpacker.feed(bytes(received))
    objs = list(unpacker)
    assert objs[0]["format"] == RUNLOG_FORMAT
    ticks = [o[1] for o in objs[1:]]
    assert len(ticks) == accepted
    assert ticks == sorted(ticks)


def test_run_log_queue_of_one_counts_every_drop_while_writer_is_busy(tmp_path):
    """A tiny queue: appends beyond it come back False at once and are counted, none lost."""
    path = tmp_path / "tiny.run"
    w = RunLogWriter(path, _runlog_header(), queue_size=1)
    results = [w.append([float(k), k, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]) for k in range(5000)]
    w.close()
    _, cols = read_run_log(path)
    assert w.dropped == results.count(False)
    assert len(cols["tick"]) == results.count(True) == w.written
    assert set(cols["tick"].astype(int)) == {k for k, ok in enumerate(results) if ok}


def test_flattened_rows_with_widths_mode_codes_and_joined_units(tmp_path):
    """The loop may store capture rows flat (capture_widths), modes as integer codes
    (index into idle, settling, engaged, fallback, stopped) and vector units joined by commas."""
    from runtime.review.comtrade_export import trip_channels

    rng = np.random.default_rng(6)
    rec, post = make_trip(1, 4000, rng)
    widths = [1, 1, 1, 2, 4, 4, 4, 2, 2, 1, 1, 1]
    codes = {"engaged": 2, "fallback": 3}

    def flat(row):
        out = []
        for v in row:
            v = codes[v] if isinstance(v, str) else v
            out.extend(v if isinstance(v, list) else [v])
        return out

    header = make_header()
    header["capture_widths"] = widths
    header["capture_units"] = ["s", "1", "code", "rad,rad", "rad,rad,rad/s,rad/s",
                               "rad,rad,rad/s,rad/s", "rad,rad,rad/s,rad/s", "V,V", "V,V",
                               "1", "1", "1"]
    nested_pre = rec["pre"]
    rec["pre"] = np.array([flat(r) for r in nested_pre])       # numpy, as a ring buffer gives
    with TripLog(tmp_path / "f.trips", header) as log:
        log.append(rec)
        log.append({"type": "post", "trip_id": 1, "rows": [flat(r) for r in post]})
    trip = load_trips([tmp_path])[0]
    cap = trip.capture()
    assert len(cap) == len(nested_pre) + len(post)
    np.testing.assert_array_equal(cap.columns["x"][: len(nested_pre)],
                                  [r[4] for r in nested_pre])
    assert cap.unit("x", 3) == "rad/s" and cap.unit("u", 1) == "V"
    assert cap.columns["tick"][cap.trip_index] == rec["tick"]
    chans = {c.name: c for c in trip_channels(trip)}
    assert chans["x_el_rate"].unit == "rad/s"
    want = [float(m == "fallback") for m in [r[2] for r in nested_pre + post]]
    np.testing.assert_array_equal(chans["mode_fallback"].values, want)
    assert "mode" not in chans                     # a mode is digital, never an analogue channel
