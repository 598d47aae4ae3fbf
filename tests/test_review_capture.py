"""The signal each watchdog rule judged, per tick, in the capture, the plot and the exports.

A sensor spike (an injected fault on the simulated rig) trips the jump rule; its signal (the
innovation over the jump limit) must cross the threshold at the trip tick in the capture,
and read back the same from the COMTRADE pair through the `comtrade` package (PyPI, a
reader we did not write; IEEE C37.111-2013 layout) and from the CSV through the standard
csv module. Logs written before the per-rule capture still plot and export.
"""

from __future__ import annotations

import csv

import comtrade
import numpy as np
import pytest
from matplotlib import image as mpimg
from runtime_helpers import run_unpaced
from test_records import write_trip_log

from runtime.records.logs import RULES, load_trips
from runtime.review.comtrade_export import export_comtrade, export_csv
from runtime.review.triplot import plot_trip, rule_series


@pytest.fixture(scope="module")
def jump_trip(tmp_path_factory):
    folder = tmp_path_factory.mktemp("jump")
    _, summary = run_unpaced(folder, 1.0, faults=["spike@0.5"])
    assert summary["trips"] and summary["trips"][0]["rule"] == "jump"
    return load_trips([folder])[0]


def test_the_capture_holds_every_rules_signal_and_the_first_out_crosses_at_the_trip(jump_trip):
    cap = jump_trip.capture()
    for rule in RULES:
        assert f"sig_{rule}" in cap.fields
    sig = cap.numeric("sig_jump")
    i = cap.trip_index
    thr = jump_trip.threshold
    assert sig[i] == pytest.approx(jump_trip.value)
    assert sig[i] >= thr and np.all(sig[:i] < thr)  # it crossed on the trip tick, not before
    fo = jump_trip.rec.first_out
    assert fo.on_delay_s == 0.0 and fo.reaction == jump_trip.action
    assert fo.capture_field == "sig_jump"


def test_comtrade_and_csv_carry_the_rule_signals(jump_trip, tmp_path):
    cfg_path, dat_path = export_comtrade(jump_trip, tmp_path / "trip")
    rec = comtrade.load(str(cfg_path), str(dat_path), use_double_precision=True,
                        use_numpy_arrays=True)
    names = list(rec.analog_channel_ids)
    assert "sig_jump" in names and "sig_stale" in names
    ch = np.asarray(rec.analog[names.index("sig_jump")])
    cap = jump_trip.capture()
    # ASCII samples are integers times a scale: equal to within one step of the scale.
    step = np.max(np.abs(cap.numeric("sig_jump"))) / 99998
    assert ch[cap.trip_index] == pytest.approx(jump_trip.value, abs=2 * step)
    assert rec.cfg.analog_channels[names.index("sig_stale")].uu == "s"
    out = export_csv(jump_trip, tmp_path / "trip.csv")
    with open(out, newline="") as fh:
        rows = list(csv.reader(fh))
    col = rows[0].index("sig_jump [1]")
    assert float(rows[1 + cap.trip_index][col]) == pytest.approx(jump_trip.value)


def test_the_plot_draws_the_first_out_signal_with_its_threshold(jump_trip, tmp_path):
    vals, thr, word, unit = rule_series(jump_trip, "jump")
    assert thr == jump_trip.threshold and "innovation" in word and unit == "x limit"
    png = plot_trip(jump_trip, tmp_path / "trip.png")
    img = mpimg.imread(png)
    assert img.ndim == 3 and img.shape[0] > 500


def test_logs_from_before_the_rule_signals_still_plot_and_export(tmp_path):
    write_trip_log(tmp_path / "old.trips", 1)
    trip = load_trips([tmp_path / "old.trips"])[0]
    assert not any(f.startswith("sig_") for f in trip.capture().fields)
    vals, thr, _, _ = rule_series(trip, "margin")  # from the ratio field
    assert thr == 0.9 and np.allclose(vals, trip.capture().numeric("ratio"))
    assert rule_series(trip, "weight_rate") is None
    plot_trip(trip, tmp_path / "old.png")
    export_comtrade(trip, tmp_path / "old")
    assert trip.end.how == "unknown"  # no link in its header: it predates end records
