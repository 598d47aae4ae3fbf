"""How each run ended, what it ran on, and finding trips among many runs.

- The end record: a run that ran out its duration, one tripped, one stopped by SIGTERM and
  one killed with SIGKILL (the reader says "cut short": nothing can be written on SIGKILL,
  POSIX signal semantics).
- The link kind: a real pseudo-terminal (os.openpty) is a served rig, the in-process rig
  is "sim"; the run's files and socket carry the kind.
- Times in ISO 8601 with the UTC offset (checked by parsing back with the standard
  library's ISO 8601 reader, datetime.fromisoformat).
- `corral trips` filters and `--summary`: expectations counted by hand from the logs the
  test writes.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from runtime_helpers import run_unpaced
from test_records import make_header, make_trip

from runtime.cli.main import main as corral
from runtime.records.logs import TripLog, load_trips, read_stream
from runtime.records.runinfo import (
    how_ended,
    iso_time,
    link_identity,
    parse_when,
    run_name,
    say_value,
)

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"
CALM = ["supervisor.settle_time=0.2", "watchdog.overrun_misses=100000",
        "watchdog.stale_periods=200", "log.pre_capture_s=0.2", "log.post_capture_s=0.2"]


# ---------------------------------------------------------------- names, kinds, times
def test_a_pseudo_terminal_is_a_served_rig_and_a_plain_file_is_not(tmp_path):
    master, slave = os.openpty()
    try:
        served = link_identity(f"serial:{os.ttyname(slave)}@115200")
    finally:
        os.close(master)
        os.close(slave)
    assert served["kind"] == "served_pty" and served["simulated"] is True
    real = link_identity(f"serial:{tmp_path / 'ttyUSB0'}")
    assert real["kind"] == "serial" and real["simulated"] is False
    assert link_identity("mqtt://h:1883/r")["kind"] == "mqtt"
    assert link_identity("sim")["kind"] == "sim"
    # The served run's name is not the simulated rig's.
    assert run_name("pedestal-sim", "served_pty") == "pedestal-sim-served"
    assert run_name("pedestal-sim", "sim") == "pedestal-sim"


def test_times_are_iso_8601_with_the_utc_offset():
    t = 1_700_000_000.25
    text = iso_time(t)
    back = dt.datetime.fromisoformat(text)  # ISO 8601 reader of the standard library
    assert back.utcoffset() is not None
    assert abs(back.timestamp() - t) < 1e-3
    assert text.endswith(back.strftime("%z")[:3] + ":" + back.strftime("%z")[3:])
    # 2023-11-14T22:13:20Z is 1 700 000 000 s after the epoch (POSIX time, from memory,
    # checked here against the standard library's UTC reading).
    assert parse_when("2023-11-14T22:13:20+00:00") == 1_700_000_000.0
    assert parse_when("2h", now=10_000.0) == 10_000.0 - 7200.0
    with pytest.raises(ValueError, match="ISO 8601"):
        parse_when("yesterday")


def test_values_are_said_with_units_and_a_word():
    # The reported case: a stale trip at 9.406 ms against a 7 ms limit.
    assert say_value("stale", 0.009406, 0.007) == "sample age 9.406 ms (limit 7 ms)"
    assert "held 0.2 s" in say_value("saturation", 0.6, 0.5, 0.2)


# ---------------------------------------------------------------- how runs end
def test_unpaced_runs_end_completed_or_tripped(tmp_path):
    r, s = run_unpaced(tmp_path / "a", 0.5)
    assert s["ended"] == "completed" and not s["trips"]
    header, records, _ = read_stream(r.core.trip_path)
    end = how_ended(records, header)
    assert end["how"] == "completed" and end["link"]["kind"] == "sim"
    assert dt.datetime.fromisoformat(end["time_iso"]).utcoffset() is not None
    # The run log ends with the same record after its rows.
    _, rows, _ = read_stream(r.core.run_path)
    assert rows[-1]["type"] == "end" and isinstance(rows[-2], list)
    r2, s2 = run_unpaced(tmp_path / "b", 1.0, faults=["spike@0.5"])
    assert s2["trips"] and s2["ended"] == "tripped_and_stopped"
    trip = load_trips([tmp_path / "b"])[0]
    assert trip.end.how == "tripped_and_stopped" and not trip.cut_short
    assert trip.summary()["link_kind"] == "sim" and trip.summary()["simulated"] is True


def _start_run(tmp_path: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())",
         "run", str(DEMO), "--headless", "--arm", "--fault", "spike@0.8", "--set",
         f"log.dir={tmp_path}", *[a for o in CALM for a in ("--set", o)], *extra],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)})


def _wait_for_post_capture(folder: Path, proc: subprocess.Popen) -> Path:
    """Until the trip's post capture is durable in the trip log (generous bound)."""
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        assert proc.poll() is None, proc.communicate()[1]
        for path in folder.glob("*.trips"):
            _, records, _ = read_stream(path)
            if any(isinstance(r, dict) and r.get("type") == "post" for r in records):
                return path
        time.sleep(0.1)
    raise AssertionError("no post-trip capture appeared")


@pytest.mark.parametrize(("sig", "how"), [(signal.SIGKILL, "cut_short"),
                                          (signal.SIGTERM, "interrupted")])
def test_a_killed_run_reads_cut_short_and_a_terminated_one_interrupted(tmp_path, sig, how):
    proc = _start_run(tmp_path)
    try:
        path = _wait_for_post_capture(tmp_path, proc)
        proc.send_signal(sig)
        proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    trips = load_trips([path])
    assert trips and trips[0].end.how == how
    assert trips[0].post is not None  # the capture was durable before the kill
    assert corral(["trips", str(path)]) == 0


# ---------------------------------------------------------------- filters and summary
def _log(path: Path, rig: str, kind: str, walls: list[float], rules: list[str],
         end: str | None) -> None:
    rng = np.random.default_rng(len(walls))
    header = {**make_header(rig=rig), "link": {"kind": kind, "simulated": kind != "serial"}}
    with TripLog(path, header) as log:
        for i, (wall, rule) in enumerate(zip(walls, rules, strict=True), start=1):
            rec, post = make_trip(i, 2000 + 1500 * i, rng, rule=rule)
            rec["t_wall"], rec["rig"] = wall, rig
            log.append(rec)
            log.append({"type": "post", "trip_id": i, "rows": post})
        if end is not None:
            log.append({"type": "end", "how": end, "t_wall": walls[-1] + 5})


DAY1 = dt.datetime(2026, 3, 2, 10, 0, tzinfo=dt.UTC).timestamp()
DAY2 = DAY1 + 86400


@pytest.fixture
def many(tmp_path):
    d = tmp_path / "runs"
    _log(d / "bench-20260302-100000.trips", "bench", "sim", [DAY1, DAY1 + 60],
         ["margin", "jump"], "tripped_and_stopped")
    _log(d / "bench-serial-20260303-100000.trips", "bench", "serial",
         [DAY2, DAY2 + 10, DAY2 + 20], ["stale", "stale", "margin"], None)
    _log(d / "arm2-mqtt-20260303-120000.trips", "arm2", "mqtt", [DAY2 + 7200], ["jump"],
         "link_lost")
    return d


def _keys(capsys) -> list[str]:
    return sorted(it["key"] for it in json.loads(capsys.readouterr().out))


def test_filters_by_time_rule_rig_and_link(many, capsys):
    assert corral(["trips", str(many), "--json"]) == 0
    assert len(_keys(capsys)) == 6
    assert corral(["trips", str(many), "--json", "--rule", "stale"]) == 0
    assert _keys(capsys) == ["bench-serial-20260303-100000.trips:1",
                             "bench-serial-20260303-100000.trips:2"]
    assert corral(["trips", str(many), "--json", "--rig", "arm2"]) == 0
    assert _keys(capsys) == ["arm2-mqtt-20260303-120000.trips:1"]
    assert corral(["trips", str(many), "--json", "--link", "sim"]) == 0
    assert len(_keys(capsys)) == 2
    assert corral(["trips", str(many), "--json", "--since", "2026-03-03T00:00+00:00",
                   "--until", "2026-03-03T11:00:00+00:00"]) == 0
    assert len(_keys(capsys)) == 3  # the serial run's three, not the mqtt one at 12:00
    # In another zone the same instant: 11:00 UTC is 12:00 at +01:00.
    assert corral(["trips", str(many), "--json", "--since", "2026-03-03T12:00:01+01:00"]) == 0
    assert _keys(capsys) == ["arm2-mqtt-20260303-120000.trips:1"]
    assert corral(["trips", str(many), "--json", "--since", "1h"]) == 0
    assert _keys(capsys) == []


def test_filter_errors_are_one_line(many):
    res = subprocess.run([sys.executable, "-c",
                          "import sys; from runtime.cli.main import main; sys.exit(main())",
                          "trips", str(many), "--since", "lately"], capture_output=True,
                         text=True, cwd=ROOT)
    assert res.returncode == 2 and "--since" in res.stderr and "Traceback" not in res.stderr
    res = subprocess.run([sys.executable, "-c",
                          "import sys; from runtime.cli.main import main; sys.exit(main())",
                          "trips", str(many), "--rule", "margn"], capture_output=True,
                         text=True, cwd=ROOT)
    assert res.returncode == 2 and "margin" in res.stderr and "Traceback" not in res.stderr


def test_summary_counts_per_rule_rig_day_and_the_worst_margins(many, capsys):
    assert corral(["trips", str(many), "--summary", "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["trips"] == 6 and s["runs"] == 3
    assert s["per_rule"] == {"margin": 2, "jump": 2, "stale": 2}
    assert s["per_rig"] == {"bench": 5, "arm2": 1}
    assert s["per_link"] == {"serial": 3, "sim": 2, "mqtt": 1}
    walls = [DAY1, DAY1 + 60, DAY2, DAY2 + 10, DAY2 + 20, DAY2 + 7200]
    days: dict[str, int] = {}
    for w in walls:  # the local calendar day of each trip
        day = dt.datetime.fromtimestamp(w).astimezone().date().isoformat()
        days[day] = days.get(day, 0) + 1
    assert s["per_day"] == days
    # The serial run has no end record: cut short.
    assert s["runs_ended"] == {"tripped_and_stopped": 1, "cut_short": 1, "link_lost": 1}
    # The worst margin: the highest ratio in any capture (test_records builds the ratio as
    # ||e_az, e_el|| / 0.03, so it is read back from the rows, not computed here).
    assert s["worst_margins"] and s["worst_margins"][0]["max_margin_ratio"] >= max(
        w["max_margin_ratio"] for w in s["worst_margins"])
    assert all(t["rule"] in ("margin", "clamp", "predicted_crossing", "margin_warning")
               for t in s["worst_margin_trips"])
    assert corral(["trips", str(many), "--summary", "--rule", "stale"]) == 0
    out = capsys.readouterr().out
    assert "2 trip(s)" in out and "stale" in out and "trips per day" in out


# ---------------------------------------------------------------- one definition per figure
def test_dry_run_reports_the_step_gain_before_and_after_the_cap(tmp_path):
    """The law applies min(g_k, cap) (the per-step gain cap, docs/method.md §8): the
    peak before the cap and the applied one are both reported and labelled."""
    from runtime.config import load_config
    from runtime.offline.dryrun import dry_run

    cfg = load_config(DEMO, ["commands.duration=4", "adaptation.step_gain_cap=0.5"])
    s = dry_run(cfg).summary
    assert s["step_gain_cap"] == 0.5
    assert s["max_step_gain_applied"] == min(s["max_step_gain"], 0.5)
    assert s["max_step_gain"] > 0.5  # the demo's peak exceeds this cap, so the two differ
    res = subprocess.run([sys.executable, "-c",
                          "import sys; from runtime.cli.main import main; sys.exit(main())",
                          "dry-run", str(DEMO), "--no-plot", "--out", str(tmp_path), "--set",
                          "commands.duration=4"], capture_output=True, text=True, cwd=ROOT)
    assert "peak step gain before the cap" in res.stdout and "applied" in res.stdout
