"""Trip exports read back by outside readers: COMTRADE by the `comtrade` package (PyPI), CSV by csv.

The COMTRADE layout follows IEEE C37.111-2013 (from memory: line 1
station,rec_dev_id,rev_year; line 2 TT,##A,##D; one line per analogue and
digital channel; lf; nrates; samp,endsamp; first-sample and trigger date-times
dd/mm/yyyy,hh:mm:ss.ssssss; ft; timemult; time_code,local_code;
tmq_code,leap_sec). The independent check is that the `comtrade` package, a
reader we did not write, parses it to the same channels, values, rate and
trigger time.
"""

from __future__ import annotations

import csv
import datetime as dt
import math

import comtrade
import numpy as np
import pytest
from test_records import make_header, make_trip, write_trip_log

from runtime.records.logs import RULES, TripLog, load_trips
from runtime.review.comtrade_export import export_comtrade, export_csv, trip_channels


@pytest.fixture
def trip(tmp_path):
    write_trip_log(tmp_path / "a.trips", 2)
    return load_trips([tmp_path / "a.trips"])[1]


def test_comtrade_round_trip_through_the_comtrade_package(trip, tmp_path):
    cfg_path, dat_path = export_comtrade(trip, tmp_path / "trip")
    assert cfg_path.name == "trip.cfg" and dat_path.name == "trip.dat"
    rec = comtrade.load(str(cfg_path), str(dat_path), use_double_precision=True,
                        use_numpy_arrays=True)
    cap = trip.capture()
    n = len(cap)
    assert rec.rev_year == "2013"
    assert rec.ft.upper() == "ASCII"
    assert rec.total_samples == n
    # sample rate from the capture period (1 ms -> 1000 Hz)
    assert rec.cfg.sample_rates == [[pytest.approx(1000.0), n]]

    # channels: one analogue per element of c(2), x(4), xr(4), e(4), u(2), u_raw(2), plus
    # ratio, eff_rate, w_norm; digital: 5 modes, fallback, one per watchdog rule
    expected_analog = (["c_az", "c_el"] + [f"{f}_{s}" for f in ("x", "xr", "e")
                                            for s in ("az", "el", "az_rate", "el_rate")]
                       + ["u_V_az", "u_V_el", "u_raw_V_az", "u_raw_V_el", "ratio", "eff_rate",
                          "w_norm"])
    assert rec.analog_channel_ids == expected_analog
    expected_digital = (["mode_idle", "mode_settling", "mode_engaged", "mode_fallback",
                         "mode_stopped", "fallback"] + [f"rule_{r}" for r in RULES])
    assert rec.status_channel_ids == expected_digital
    assert rec.channels_count == len(expected_analog) + len(expected_digital)
    units = [ch.uu for ch in rec.cfg.analog_channels]
    assert units[expected_analog.index("x_az_rate")] == "rad/s"
    assert units[expected_analog.index("u_V_el")] == "V"

    # values within the scaling resolution (half of the multiplier a)
    x = cap.columns["x"]
    for ch in rec.cfg.analog_channels:
        got = np.asarray(rec.analog[ch.n - 1])
        if ch.name.startswith("x_"):
            j = ["az", "el", "az_rate", "el_rate"].index(ch.name[2:])
            want = x[:, j]
        elif ch.name == "ratio":
            want = cap.columns["ratio"]
        else:
            continue
        assert np.max(np.abs(got - want)) <= 0.5 * ch.a * (1 + 1e-9) + 1e-15
        assert ch.a <= (want.max() - want.min()) / (2 * 99998) * (1 + 1e-9) + 1e-12

    # the trip is the trigger: -t[0] seconds after the first sample, at the trip tick's row
    assert rec.trigger_time == pytest.approx(-cap.t[0], abs=1.5e-6)
    t = np.asarray(rec.time)
    assert t[cap.trip_index] == pytest.approx(rec.trigger_time, abs=1.5e-6)
    ts = rec.trigger_timestamp.replace(tzinfo=None)
    want_ts = dt.datetime.fromtimestamp(trip.t_wall, tz=dt.UTC).replace(tzinfo=None)
    assert abs((ts - want_ts).total_seconds()) < 1.5e-6

    # digital channels: the first-out rule is active from the trip tick on, the later rule
    # from its own tick; the fallback follows the recorded mode
    status = {name: np.asarray(rec.status[i]) for i, name in enumerate(rec.status_channel_ids)}
    k = cap.trip_index
    assert status["rule_margin"][:k].sum() == 0 and status["rule_margin"][k:].all()
    assert status["rule_jump"][:k + 1].sum() == 0 and status["rule_jump"][k + 1:].all()
    assert status["rule_stale"].sum() == 0
    modes = list(cap.columns["mode"])
    np.testing.assert_array_equal(status["mode_fallback"], [m == "fallback" for m in modes])
    np.testing.assert_array_equal(status["fallback"], status["mode_fallback"])
    np.testing.assert_array_equal(status["mode_engaged"], [m == "engaged" for m in modes])


def test_comtrade_marks_non_finite_samples_missing(tmp_path):
    """A NaN in the capture (the nonfinite rule's case) is written as 99999 and read as NaN."""
    rng = np.random.default_rng(2)
    rec, post = make_trip(1, 3000, rng, rule="nonfinite")
    rec["pre"][-1][4] = [math.nan, *rec["pre"][-1][4][1:]]
    with TripLog(tmp_path / "n.trips", make_header()) as log:
        log.append(rec)
        log.append({"type": "post", "trip_id": 1, "rows": post})
    tr = load_trips([tmp_path])[0]
    cfg_path, dat_path = export_comtrade(tr, tmp_path / "nan")
    out = comtrade.load(str(cfg_path), str(dat_path), use_double_precision=True,
                        use_numpy_arrays=True)
    x_az = np.asarray(out.analog[out.analog_channel_ids.index("x_az")])
    k = tr.capture().trip_index
    assert math.isnan(x_az[k])
    assert np.isfinite(np.delete(x_az, k)).all()
    assert out.status[out.status_channel_ids.index("rule_nonfinite")][k] == 1


def test_csv_round_trip_with_the_csv_module(trip, tmp_path):
    path = export_csv(trip, tmp_path / "trip.csv")
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    head, body = rows[0], rows[1:]
    cap = trip.capture()
    chans = trip_channels(trip)
    assert len(body) == len(cap)
    assert head[0] == "t_trip [s]" and head[1] == "tick" and head[-1] == "mode"
    assert "x_az_rate [rad/s]" in head and "u_V_az [V]" in head and "rule_margin" in head
    cols = {name: [r[i] for r in body] for i, name in enumerate(head)}
    np.testing.assert_array_equal([float(v) for v in cols["t_trip [s]"]], cap.t)
    np.testing.assert_array_equal([int(v) for v in cols["tick"]], cap.columns["tick"])
    for ch in chans:
        name = f"{ch.name} [{ch.unit}]" if ch.unit else ch.name
        got = [float(v) for v in cols[name]]
        np.testing.assert_array_equal(got, ch.values)   # repr() floats round-trip exactly
    # the tick the trip happened on is at t = 0 and the mode changes there
    k = [float(v) for v in cols["t_trip [s]"]].index(0.0)
    assert int(cols["tick"][k]) == trip.tick
    assert cols["mode"][k - 1] == "engaged" and cols["mode"][k] == "fallback"
