"""The dashboard, driven by textual's own test pilot (Textual's `App.run_test`).

Recorded telemetry here follows the record layout of docs/telemetry.md; the
live tests against the real runtime socket are in tests/test_dashboard_live.py.
"""

import asyncio
import math
import time

import msgpack
import pytest
from textual.widgets import DataTable

from runtime.dashboard import panels
from runtime.dashboard.app import ConfirmArm, Dashboard, MarginPanel, SupervisorPanel
from runtime.dashboard.sources import RecordedSource

HELLO = {
    "type": "hello", "rig": "bench-a", "states": ["az", "el", "az_rate", "el_rate"],
    "state_units": ["rad", "rad", "rad/s", "rad/s"], "inputs": ["V_az", "V_el"],
    "input_units": ["V", "V"], "input_limits": [12.0, 12.0], "limits": [0.02, 0.02, 0.5, 0.5],
    "envelope": [0.0199, 0.02, 0.17, 0.19], "eps": 0.0535,
    "levels": {"warning": 0.8, "trip": 0.9}, "period": 0.001, "simulated": False,
    "tracked": ["az", "el"],
}


def telemetry(k: int, ratio: float, trip: dict | None = None) -> dict:
    return {
        "type": "telemetry", "t": k * 0.04, "tick": k * 40,
        "mode": "fallback" if trip else "engaged", "latched": bool(trip),
        "fallback": "baseline" if trip else None, "ratio": ratio, "s": ratio * 0.0535,
        "eps": 0.0535, "phi_d": 21.5, "eff_rate": 172.0, "step_gain": 0.25,
        "step_gain_cap": 1.0, "c": [0.5, 0.25], "x": [0.4987, 0.2511, 0.01, -0.02],
        "xr": [0.5, 0.25, 0.0, 0.0], "e": [-0.0013, 0.0011, 0.01, -0.02], "u": [1.25, 12.0],
        "u_raw": [1.25, 13.1], "w_norm": 2.75, "w_rate": 0.125, "sat_time": [0.0, 0.35],
        "time_to_bound": None,
        "loop": {"rate_hz": 1000.0, "lateness_p50_us": 21.0, "lateness_p99_us": 88.0,
                 "deadline_misses": 2, "ticks": k * 40},
        "link": {"sample_age_ms": 0.7, "frames_in": k * 40, "frames_out": k * 40,
                 "crc_errors": 3, "gaps": 1, "duplicates": 0},
        "trip": trip, "trips": [trip] if trip else [],
    }


TRIP = {"rule": "margin", "value": 0.913, "threshold": 0.9, "action": "baseline", "tick": 3960}


def recording(with_trip: bool = True) -> list[dict]:
    recs = [HELLO] + [telemetry(k, 0.3 + 0.005 * k) for k in range(100)]
    if with_trip:
        recs.append(telemetry(100, 0.913, TRIP))
    return recs


async def until(pilot, predicate, bound_s: float = 60.0) -> None:
    """Wait for an event on the app (a generous bound, not a deadline)."""
    end = time.monotonic() + bound_s
    while not predicate():
        assert time.monotonic() < end, "the dashboard never got there"
        await pilot.pause(0.02)


async def settle(app: Dashboard, pilot) -> None:
    """Wait until the whole recording has been read and drawn."""
    await until(pilot, lambda: app.status.startswith("end of recording") and not app._dirty)


def cells(app: Dashboard, selector: str) -> list[list[str]]:
    table = app.query_one(selector, DataTable)
    return [[getattr(c, "plain", str(c)) for c in table.get_row_at(i)]
            for i in range(table.row_count)]


def test_values_shown_match_the_telemetry_they_came_from():
    async def run():
        app = Dashboard(RecordedSource(records=recording(with_trip=False), speed=0))
        async with app.run_test(size=(140, 48)) as pilot:
            await settle(app, pilot)
            last = app.latest
            assert app.records_seen == 100
            tracking = cells(app, "#tracking")
            assert tracking[0][:4] == ["az [rad]", "0.5", "0.5", "0.4987"]
            assert tracking[1][3] == "0.2511"
            assert tracking[0][5] == "+-0.0199"
            inputs = cells(app, "#inputs")
            assert inputs[1][:4] == ["V_el", "12 V", "+-12 V", "0.35 s"]
            assert inputs[1][4] == "SATURATED" and inputs[0][4] == ""
            health = dict((r[0], r[1]) for r in cells(app, "#health"))
            assert health["lateness p50 / p99"] == "21 / 88 us"
            assert health["CRC errors"] == "3"
            margin = str(app.query_one(MarginPanel).render())
            assert f"{last.ratio:.3f}" in margin
            assert "WARNING" not in margin  # 0.795 is below the 0.8 warning level
    asyncio.run(run())


def test_a_trip_shows_its_first_out_rule_and_the_fallback():
    async def run():
        app = Dashboard(RecordedSource(records=recording(), speed=0))
        async with app.run_test(size=(140, 48)) as pilot:
            await settle(app, pilot)
            sup = str(app.query_one(SupervisorPanel).render())
            assert "LATCHED" in sup
            assert "first out: margin: 0.913 vs 0.9 -> baseline" in sup
            assert "FALLBACK ACTIVE: baseline" in sup
            assert "TRIP" in str(app.query_one(MarginPanel).render())
    asyncio.run(run())


def test_arm_on_hardware_asks_first_and_shows_the_cautions():
    async def run():
        source = RecordedSource(records=recording(with_trip=False), speed=0)
        app = Dashboard(source)
        async with app.run_test(size=(140, 48)) as pilot:
            await settle(app, pilot)
            await pilot.press("a")
            await until(pilot, lambda: isinstance(app.screen, ConfirmArm))
            text = str(app.screen.query_one("#cautions").render())
            assert "emergency stop" in text and "not a safety-rated function" in text
            await pilot.press("n")
            await until(pilot, lambda: not isinstance(app.screen, ConfirmArm))
            assert app.status == "arm: cancelled"
            assert source.replies == []  # nothing was sent
    asyncio.run(run())


def test_values_keep_updating_behind_the_arm_confirmation():
    async def run():
        recs = recording(with_trip=False)
        app = Dashboard(RecordedSource(records=[], speed=0))
        async with app.run_test(size=(140, 48)) as pilot:
            app.ingest(recs[0])
            app.ingest(recs[1])
            await pilot.press("a")
            await until(pilot, lambda: isinstance(app.screen, ConfirmArm))
            app.ingest(recs[-1])
            app.redraw()  # must not look for the panels on the confirmation screen
            margin = str(app.screen_stack[0].query_one(MarginPanel).render())
            assert f"{recs[-1]['ratio']:.3f}" in margin
            await pilot.press("n")
    asyncio.run(run())


def test_stop_is_one_key_and_reaches_the_source():
    async def run():
        source = RecordedSource(records=recording(with_trip=False), speed=0)
        app = Dashboard(source)
        async with app.run_test(size=(140, 48)) as pilot:
            await settle(app, pilot)
            await pilot.press("s")
            await until(pilot, lambda: source.replies)
            assert [r["op"] for r in source.replies] == ["stop"]
    asyncio.run(run())


def test_pause_freezes_the_traces_but_not_the_values():
    async def run():
        recs = recording(with_trip=False)
        app = Dashboard(RecordedSource(records=[], speed=0))
        async with app.run_test(size=(140, 48)) as pilot:
            for rec in recs[:50]:
                app.ingest(rec)
            await pilot.press("p")
            frozen = list(app.ratio_trace)
            for rec in recs[50:]:
                app.ingest(rec)
            assert list(app.ratio_trace) == frozen
            assert app.latest.to_wire() == recs[-1]  # the typed record of that map
            await pilot.press("p")
            app.ingest(recs[-1])
            assert len(app.ratio_trace) == len(frozen) + 1
    asyncio.run(run())


def test_recorded_file_replays(tmp_path):
    path = tmp_path / "bench-a.tel"
    path.write_bytes(b"".join(msgpack.packb(r) for r in recording()))

    async def run():
        app = Dashboard(RecordedSource(path, speed=0))
        async with app.run_test(size=(140, 48)) as pilot:
            await settle(app, pilot)
            assert app.records_seen == 101
            assert app.hello.rig == "bench-a"
    asyncio.run(run())


# -- the pure panel functions -------------------------------------------------
@pytest.mark.parametrize("ratio,level", [
    (0.0, "ok"), (0.79, "ok"), (0.8, "warning"), (0.9, "trip"), (0.99, "trip"),
    (1.0, "breach"), (math.nan, "breach"),
])
def test_margin_level_follows_the_configured_levels(ratio, level):
    assert panels.margin_level(ratio, 0.8, 0.9) == level


def test_margin_is_not_shown_while_the_adaptive_law_is_off():
    view = panels.margin_view(HELLO, {"mode": "settling", "ratio": 0.0, "eps": 0.0})
    assert view.level == panels.LEVEL_OFF and view.ratio_text == "-"
    view = panels.margin_view(HELLO, {"mode": "engaged", "ratio": 0.0, "eps": 0.05})
    assert view.level == panels.LEVEL_OK and view.ratio_text == "0.000"


def test_trace_lines_scale_and_mark_levels():
    rows = panels.trace_lines([0.0, 0.5, 1.0], width=3, height=4, top=1.0, marks=(0.8,))
    assert len(rows) == 4 and all(len(r) == 3 for r in rows)
    # Full bar in the last column reaches the top row; where a bar stops short
    # of the row that holds the 0.8 mark (the top row: 0.75..1.0), the mark shows.
    assert rows[0][2] == panels.BLOCKS[-1]
    assert rows[0][0] == "┄" and rows[0][1] == "┄"
    assert rows[3][1] == panels.BLOCKS[-1] and rows[1][1] == " "


def test_learning_rate_is_marked_frozen_outside_engaged():
    view = panels.learning_view({"mode": "fallback", "eff_rate": 160.0})
    assert view.eff_rate_text == "160 (adaptation frozen)"


def test_learning_view_reports_gain_against_cap():
    view = panels.learning_view({"step_gain": 0.25, "step_gain_cap": 0.5, "eff_rate": 172.0})
    assert view.cap_fraction == pytest.approx(0.5)
    assert view.eff_rate_text == "172"
