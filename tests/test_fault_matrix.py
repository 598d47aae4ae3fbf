"""Every in-process fault kind ends in the right first-out trip (or is below threshold by
design), through the real tick, watchdog and trip log; the injectors do what they say.

The expected first-out of each kind is the trade's reading of the fault (common
practice): lost or late data -> stale / seq_gap, no link -> link_loss, a value that is no
number -> nonfinite, an implausible step -> jump, a software fault -> internal.
The full table with times is bench/fault_matrix.py's (docs/faults.md).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from mqtt_broker import mosquitto  # noqa: F401  (the fixture)

from bench.fault_matrix import MATRIX
from runtime.records.logs import read_trip_records
from tests.runtime_helpers import run_unpaced

AT = 1.0


@pytest.mark.parametrize("kind", [k for k in MATRIX if k != "overrun"])
def test_each_kind_trips_with_its_first_out(tmp_path, kind):
    text, right, _ = MATRIX[kind]
    head, _, tail = text.partition(":")
    fault = f"{head}@{AT}" + (f":{tail}" if tail else "")
    r, summary = run_unpaced(tmp_path, 2.0, [fault])
    got = read_trip_records(summary["trip_log"])
    trips = got.trips
    assert not got.torn and not got.bad
    if not right:
        assert not trips
        return
    assert trips, f"{kind}: no trip"
    first = trips[0].rec
    assert first.first_out.rule in right, first.first_out
    assert first.t is not None and first.t >= AT - 1e-9  # not before the fault


def test_drop_loses_exactly_count_samples(tmp_path):
    r, _ = run_unpaced(tmp_path, 1.5, ["drop@1.0:count=3"])
    ticks = r.core.tick
    assert r.link.stats.frames_in == ticks - 3


def test_corrupt_frames_are_counted_as_crc_errors_and_lost(tmp_path):
    r, summary = run_unpaced(tmp_path, 1.5, ["corrupt@1.0:every=4,duration=0.2"])
    assert r.link.stats.crc_errors == 50  # 200 frames in 0.2 s, every 4th
    assert summary["trips"][0]["rule"] == "seq_gap"


def test_duplicates_are_counted(tmp_path):
    r, _ = run_unpaced(tmp_path, 1.5, ["duplicate@1.0:every=10,duration=0.1"])
    assert r.link.stats.duplicates == 10


# ---------------------------------------------------------------- the served links
# A few rows of the matrix on the real parts: `corral rig serve` in a subprocess over a real
# pseudo-terminal and through a real mosquitto (tests/mqtt_broker.py), the runtime
# rig-clocked in this process with the matrix's tolerant timing (bench/fault_matrix.py
# TOLERANT). Only the first-out is checked (no timings); every wait is for an event with a
# generous bound. Expected first-outs as above (common practice of first-out alarm review).

# `drop` once ended with no trip: the runtime was built after the device's clock started and
# on the loaded machine the one dropped sample passed before the host watched.
# `run_served` now builds the runtime first and reports a host that came late (run again).
SERIAL_ROWS = ["drop", "malformed", "device_kill"]
MQTT_ROWS = ["corrupt", "duplicate", "broker_restart"]


def _served_row(kind: str, link: str, tmp_path, broker=None) -> None:
    from bench.fault_matrix import realtime_broker, run_served_row, served_spec

    _, right, _ = served_spec(kind, link)
    if broker is not None:
        realtime_broker(broker)
    # A short folder: the operator socket lives in log.dir (AF_UNIX paths are short).
    with tempfile.TemporaryDirectory(prefix="fm-") as short:
        res = run_served_row(kind, link, Path(short), broker)
    assert res.get("error") in (None, ""), res
    if res.get("before") or res.get("late"):
        pytest.skip(f"{kind} on {link}: in three runs this loaded machine tripped before the "
                    f"fault or the host came late (not what this row checks): {res}")
    assert res["rule"] is not None, f"{kind} on {link}: no trip"
    assert res["rule"] in right, (kind, link, res)


@pytest.mark.timeout(300)
@pytest.mark.parametrize("kind", SERIAL_ROWS)
def test_served_rows_over_a_pty_trip_with_their_first_out(tmp_path, kind):
    _served_row(kind, "serial", tmp_path)


@pytest.mark.timeout(300)
@pytest.mark.parametrize("kind", MQTT_ROWS)
def test_served_rows_over_mqtt_trip_with_their_first_out(tmp_path, kind, mosquitto):  # noqa: F811
    _served_row(kind, "mqtt", tmp_path, mosquitto)


def test_the_served_device_and_the_in_process_link_share_one_injector():
    # One definition of each link fault: the device keeps no copy of its own.
    import inspect

    import sim_rigs.device as device

    src = inspect.getsource(device.RigDevice._tick)
    assert "on_link" in src
    for kind in ("\"drop\"", "\"corrupt\"", "\"link_delay\"", "\"duplicate\""):
        assert kind not in src, kind


# ---------------------------------------------------------------- lost data, wide stale limit
# Lost, late or frozen data must end in the rule that names it (stale / link_loss), not in
# the tracking-error rules judging a held estimate (common practice of first-out alarm
# review: the first-out names the cause). Before the error rules were gated on a fresh
# estimate, the served recipe at a 100 ms stale limit tripped predicted_crossing 16-20 ms
# into each of these faults and margin 22-24 ms in (measured with this test's setup).

def test_error_rules_hold_on_a_stale_estimate_and_judge_a_fresh_one():
    from runtime.guard.watchdog import FRESH_PERIODS, Signals, Watchdog, build_rules

    T = 0.002
    errors = {"margin", "predicted_crossing", "clamp"}
    dog = Watchdog(build_rules(None, T, 0.02))
    held = Signals(t=0.0, engaged=True, ratio=1.5, ratio_rate=50.0, clamped=True,
                   sample_age=(FRESH_PERIODS + 0.5) * T)
    assert not errors & {r.id for r in dog.check(held)}
    frozen = Signals(t=0.002, engaged=True, ratio=1.5, ratio_rate=50.0, clamped=True,
                     sample_age=0.5 * T, frozen_age=(FRESH_PERIODS + 0.5) * T)
    assert not errors & {r.id for r in dog.check(frozen)}
    fresh = Signals(t=0.004, engaged=True, ratio=1.5, ratio_rate=50.0, clamped=True,
                    sample_age=0.5 * T)
    assert errors <= {r.id for r in dog.check(fresh)}
    # Held, a tripped condition is not cleared either (nothing measured says it went).
    calm_held = Signals(t=0.006, engaged=True, ratio=0.0, sample_age=(FRESH_PERIODS + 0.5) * T)
    dog.check(calm_held)
    assert "margin" in dog.conditions_present()
    calm = Signals(t=0.008, engaged=True, ratio=0.0, sample_age=0.5 * T)
    dog.check(calm)
    assert "margin" not in dog.conditions_present()


@pytest.mark.parametrize("fault", ["corrupt@3", "dropout@3", "sensor_freeze@3",
                                   "burst@3:ticks=100", "link_delay@3:seconds=0.2"])
def test_lost_data_at_a_wide_stale_limit_ends_in_stale_or_link_loss(tmp_path, fault):
    import asyncio

    from runtime.config import load_config
    from runtime.realtime.loop import Runner, RunSettings

    served = Path(__file__).resolve().parents[1] / "configs" / "pedestal-served.toml"
    cfg = load_config(served, ["supervisor.settle_time=0.2", "watchdog.overrun_misses=100000",
                               f"log.dir={tmp_path}", "watchdog.stale_periods=50",
                               "log.pre_capture_s=0.2", "log.post_capture_s=0.1"])
    r = Runner(cfg, RunSettings(auto_arm=True, faults=[fault], echo_trips=False,
                                preflight=False, duration=None))
    summary = asyncio.run(r.run_ticks(int(round(3.5 / r.design.Ts))))
    trips = read_trip_records(summary["trip_log"]).trips
    assert trips, f"{fault}: no trip"
    first = trips[0].rec
    assert first.t >= 3.0 - 1e-9, first.first_out  # not before the fault
    assert first.first_out.rule in ("stale", "link_loss"), first.first_out
