"""`corral trips`: listing across runs, logs cut short, show, plot, exports, clear id errors.

Most tests call the command in-process (`runtime.cli.main.main`); the error-path
and the real-run tests start the real `corral` process.
"""

from __future__ import annotations

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import msgpack
import pytest
from test_records import DEMO, ROOT, make_header, make_trip, write_trip_log

from runtime.cli.main import main as corral
from runtime.records.logs import TripLog

# The console script's own code path (`python -m runtime.cli.main` would load the CLI twice, as
# __main__ and as runtime.cli.main, so its UserError would not be the one the commands raise).
ENTRY = "import sys; from runtime.cli.main import main; sys.exit(main())"


def run_cli(*argv: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", ENTRY, *argv], capture_output=True,
                          text=True, cwd=ROOT, timeout=900)


@pytest.fixture
def logs(tmp_path):
    """Two runs in a folder (one torn by a crash after its 3rd trip) and one elsewhere."""
    folder = tmp_path / "runs"
    a = write_trip_log(folder / "pedestal-sim-20240101-100000.trips", 2)
    b_path = folder / "pedestal-sim-20240101-110000.trips"
    b = write_trip_log(b_path, 3, seed=2, first_tick=10_000, with_post=False)
    data = b_path.read_bytes()
    # cut inside the last record: the 3rd reset event; the 3 trips stay complete
    b_path.write_bytes(data[:-10])
    other = tmp_path / "elsewhere" / "bench-20240102-090000.trips"
    rng = __import__("numpy").random.default_rng(4)
    header = make_header(rig="bench")
    with TripLog(other, header) as log:
        rec, post = make_trip(1, 500, rng, rule="stale")
        rec["rig"] = "bench"
        rec["t_wall"] = 1_700_100_000.0
        rec["action"] = "controlled_stop"
        log.append(rec)
        log.append({"type": "post", "trip_id": 1, "rows": post})
    return {"folder": folder, "other": other, "a": a, "b": b, "b_path": b_path}


def test_list_spans_runs_and_marks_the_log_cut_short(logs, capsys):
    assert corral(["trips", str(logs["folder"]), str(logs["other"])]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].split()[:5] == ["TIME", "RIG", "LINK", "ID", "FIRST-OUT"]
    trip_lines = [ln for ln in lines if ".trips:" in ln and not ln.startswith("more")]
    assert len(trip_lines) == 6
    # sorted by wall time: run a (2), run b (3) share the builder's clock; bench is a day later
    assert "bench-20240102-090000.trips:1" in trip_lines[-1]
    assert "stale" in trip_lines[-1] and "controlled_stop" in trip_lines[-1]
    b_lines = [ln for ln in trip_lines if "110000.trips" in ln]
    assert len(b_lines) == 3 and all(ln.rstrip().endswith("*") for ln in b_lines)
    a_lines = [ln for ln in trip_lines if "100000.trips" in ln]
    assert not any(ln.rstrip().endswith("*") for ln in a_lines)
    rec = logs["a"][0][0]
    # the value in words and units (runtime.records.runinfo.say_value)
    assert f"{rec['first_out']['value']:.4g} of eps (limit 0.9 of eps)" in a_lines[0]
    assert f"{rec['detect_to_action_us']:.3g}" in a_lines[0]
    assert "cut short" in out and "110000.trips" in out.split("cut short")[1]
    assert "6 trips in 3 logs" in out


def test_json_list_carries_the_contract_fields(logs, capsys):
    assert corral(["trips", str(logs["folder"]), "--json"]) == 0
    items = json.loads(capsys.readouterr().out)
    assert len(items) == 5
    for it in items:
        for key in ("rule", "tick", "action", "detect_to_action_us", "time", "rig", "value",
                    "threshold"):
            assert key in it
    by_key = {it["key"]: it for it in items}
    rec = logs["a"][1][0]
    it = by_key["pedestal-sim-20240101-100000.trips:2"]
    assert (it["rule"], it["tick"], it["action"], it["value"], it["threshold"]) == (
        rec["first_out"]["rule"], rec["tick"], rec["action"], rec["first_out"]["value"],
        rec["first_out"]["threshold"])
    assert it["time"] == rec["t_wall"] and it["cut_short"] is False
    assert all(by_key[f"pedestal-sim-20240101-110000.trips:{i}"]["cut_short"] for i in (1, 2, 3))


def test_show_prints_events_in_order_snapshot_with_units_and_the_config(logs, capsys):
    assert corral(["trips", str(logs["b_path"]), "--show", "2"]) == 0
    out = capsys.readouterr().out
    assert "first out: margin" in out and "action: baseline" in out
    seq = out.split("sequence of events")[1].split("snapshot at the trip")[0]
    order = [ln.split()[4] for ln in seq.strip().splitlines()[1:] if ln.strip()]
    # arm, trip 1 (+ its later rule), reset, trip 2 (+ later), reset, trip 3 (+ later);
    # the 3rd reset was torn off by the crash
    assert order == ["arm", "TRIP", "later:", "reset", "TRIP", "later:", "reset", "TRIP",
                     "later:"]
    assert "<- this trip" in [ln for ln in seq.splitlines() if "TRIP 2" in ln][0]
    snap = out.split("snapshot at the trip:")[1]
    assert "az_rate = " in snap and "rad/s" in snap and "V_az = " in snap and " V" in snap
    assert "later rules (in order):" in out and "jump" in out
    assert "config that ran (hash 0123456789abcdef)" in out
    assert "[adaptation]" in out and "[loop]" in out
    assert "NOTE: log cut short" in out


def test_show_json_and_file_colon_id(logs, capsys):
    assert corral(["trips", str(logs["folder"]), "--show",
                   "pedestal-sim-20240101-100000.trips:1", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    rec = logs["a"][0][0]
    assert d["tick"] == rec["tick"] and d["snapshot"]["eps"] == rec["snapshot"]["eps"]
    assert d["later_rules"][0]["rule"] == "jump"


def test_ambiguous_and_unknown_ids_name_the_available_ones(logs):
    res = run_cli("trips", str(logs["folder"]), "--show", "1")
    assert res.returncode == 2
    assert "Traceback" not in res.stderr and len(res.stderr.strip().splitlines()) == 1
    assert "ambiguous" in res.stderr and "pedestal-sim-20240101-100000.trips:1" in res.stderr
    res = run_cli("trips", str(logs["b_path"]), "--plot", "7")
    assert res.returncode == 2 and "no trip '7'" in res.stderr
    assert "110000.trips:3" in res.stderr
    res = run_cli("trips", str(logs["folder"] / "nope"))
    assert res.returncode == 2 and "no such log or folder" in res.stderr
    assert "Traceback" not in res.stderr


def test_plot_csv_and_comtrade_from_the_command_line(logs, tmp_path, capsys):
    import matplotlib.image as mpimg

    png = tmp_path / "out" / "trip.png"
    assert corral(["trips", str(logs["other"]), "--plot", "1", "--out", str(png)]) == 0
    img = mpimg.imread(png)
    assert img.ndim == 3 and img.shape[0] > 400 and img.shape[1] > 400
    csv_path = tmp_path / "out" / "trip.csv"
    assert corral(["trips", str(logs["other"]), "--csv", "1", "--out", str(csv_path)]) == 0
    assert csv_path.read_text().startswith("t_trip [s],tick,")
    base = tmp_path / "out" / "trip"
    assert corral(["trips", str(logs["other"]), "--comtrade", "1", "--out", str(base)]) == 0
    out = capsys.readouterr().out
    assert "trip.cfg" in out and "trip.dat" in out
    assert (tmp_path / "out" / "trip.cfg").read_text().splitlines()[0].endswith(",2013")


def test_a_log_with_only_a_torn_header_among_others_does_not_hide_them(logs, capsys):
    broken = logs["folder"] / "pedestal-sim-20240101-120000.trips"
    broken.write_bytes(msgpack.packb(make_header())[:30])
    assert corral(["trips", str(logs["folder"])]) == 0
    out = capsys.readouterr().out
    assert "5 trips in 3 logs" in out and "120000.trips" in out


def test_a_malformed_record_is_named_on_stderr_and_the_rest_listed(logs, capsys):
    # A trip whose first-out is not a map, and an event whose kind is a number: each
    # skipped with one line naming the file and the field; the good trips still listed.
    path = logs["folder"] / "pedestal-sim-20240101-100000.trips"
    with open(path, "ab") as fh:
        fh.write(msgpack.packb({"type": "trip", "id": 9, "first_out": "margin"}))
        fh.write(msgpack.packb({"type": "event", "kind": 5}))
    assert corral(["trips", str(logs["folder"]), "--json"]) == 0
    got = capsys.readouterr()
    assert [t["id"] for t in json.loads(got.out)] == [1, 2, 1, 2, 3]  # stdout stays JSON
    skipped = [ln for ln in got.err.splitlines() if "does not match its schema" in ln]
    assert len(skipped) == 2 and all(path.name in ln for ln in skipped), got.err
    assert "field 'first_out'" in skipped[0] and "field 'kind'" in skipped[1]


@pytest.mark.skipif(importlib.util.find_spec("runtime.realtime.loop") is None
                    or importlib.util.find_spec("runtime.cli.cmd_run") is None,
                    reason="needs the real-time loop: runtime/realtime/loop.py and "
                           "runtime/cli/cmd_run.py "
                           "(`corral run`) are not in the tree yet")
def test_trips_of_a_real_run_with_a_fault(tmp_path):
    """`corral run` on the demo with a spike fault, then `corral trips` on its log folder."""
    run = subprocess.run(
        [sys.executable, "-c", ENTRY, "run", str(DEMO), "--headless", "--duration", "4",
         "--arm", "--fault", "spike@2", "--json", "--set", f"log.dir={tmp_path}"],
        capture_output=True, text=True, cwd=ROOT, timeout=900)
    assert run.returncode in (0, 1), run.stderr
    summary = json.loads(run.stdout)
    assert summary["trips"], "a spike at 2 s should trip the watchdog"
    res = run_cli("trips", str(tmp_path), "--json")
    assert res.returncode == 0, res.stderr
    listed = json.loads(res.stdout)
    assert [t["rule"] for t in listed] == [t["rule"] for t in summary["trips"]]
    assert [t["tick"] for t in listed] == [t["tick"] for t in summary["trips"]]
    assert Path(summary["trip_log"]).exists()
    res = run_cli("trips", summary["trip_log"], "--show", "1")
    assert res.returncode == 0, res.stderr
    assert f"first out: {summary['trips'][0]['rule']}" in res.stdout
    assert "snapshot at the trip:" in res.stdout and "config that ran" in res.stdout
    res = run_cli("trips", summary["trip_log"], "--comtrade", "1", "--out",
                  str(tmp_path / "real"))
    assert res.returncode == 0, res.stderr
    import comtrade

    rec = comtrade.load(str(tmp_path / "real.cfg"), str(tmp_path / "real.dat"))
    assert rec.total_samples > 0 and rec.analog_count > 0
