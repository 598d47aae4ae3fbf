"""The dashboard at a glance, at the two sizes an operator meets: an 80x24 terminal and a
large one (200x50), driven by textual's own test pilot (`App.run_test`).

What must be on screen at both sizes (issue 13): the margin ratio, the mode, the latch,
the first-out trip with its explanation in words, and the margin chart's levels on rows
labelled with their own values. The words of a timing trip come from
`runtime.realtime.hostcheck.explain_trip` (one source of those words); the checks here read the
text actually drawn on the screen, not a widget's own content.
"""

from __future__ import annotations

import asyncio
import math

import pytest

from runtime.dashboard import panels
from runtime.dashboard.app import ConfirmArm, Dashboard
from runtime.dashboard.sources import RecordedSource
from runtime.realtime.hostcheck import explain_trip
from tests.test_dashboard import HELLO, TRIP, settle, telemetry, until

SIZES = [(80, 24), (200, 50)]

HOSTCHECK = {"ok": False, "lateness_p99_us": 850.0, "worst_stall_ms": 9.1, "realtime": False,
             "thresholds": {"stall_budget_ms": 5.0}}
STALE = {"rule": "stale", "value": 0.0094, "threshold": 0.007, "action": "baseline",
         "tick": 5120}


def screen_text(app: Dashboard) -> list[str]:
    """The characters on the terminal, row by row (what the operator sees)."""
    return [strip.text for strip in app.screen._compositor.render_strips()]


def recording(trip: dict | None, hello: dict | None = None) -> list[dict]:
    recs: list[dict] = [dict(hello or HELLO)]
    recs.append({"type": "event", "t_wall": 1.7e9, "t_mono": 1.0, "tick": 0, "kind": "mode",
                 "detail": "settling -> engaged"})
    recs += [telemetry(k, 0.3 + 0.005 * k) for k in range(100)]
    if trip is not None:
        recs.append(telemetry(100, 0.913, trip))
        recs.append({"type": "trip", "t_wall": 1.7e9 + 4, **trip})
    return recs


async def _shown(size, recs):
    app = Dashboard(RecordedSource(records=recs, speed=0))
    async with app.run_test(size=size) as pilot:
        await settle(app, pilot)
        await pilot.pause(0.3)
        await until(pilot, lambda: not app._dirty)
        await pilot.pause(0.2)
        return app, screen_text(app)


@pytest.mark.parametrize("size", SIZES)
def test_margin_mode_and_latch_are_on_screen_at_both_sizes(size):
    app, rows = asyncio.run(_shown(size, recording(TRIP)))
    text = "\n".join(rows)
    assert len(rows) == size[1] and all(len(r) <= size[0] for r in rows)
    assert "FALLBACK" in text and "LATCHED" in text
    assert "0.913" in text and "TRIP" in text
    # The first-out line is drawn whole (not cut at the right edge).
    assert "first out: margin: 0.913 vs 0.9 -> baseline (tick 3960)" in text
    # The event list with its time stamps and the trip.
    assert "to acknowledge (k)" in text and "TRIP margin" in text


@pytest.mark.parametrize("size", SIZES)
def test_the_chart_levels_are_labelled_with_their_own_values(size):
    hello = dict(HELLO, levels={"warning": 0.7, "trip": 0.85})
    _, rows = asyncio.run(_shown(size, recording(None, hello)))
    labelled = {}
    for row in rows:
        for name in ("bound", "trip", "warn"):
            if f" {name} ┤" in row:
                labelled[name] = row
    assert set(labelled) == {"bound", "trip", "warn"}
    assert "1.00 bound ┤" in labelled["bound"]
    assert "0.85 trip ┤" in labelled["trip"]
    assert "0.70 warn ┤" in labelled["warn"]
    # Ordered top to bottom as their values are.
    order = [rows.index(labelled[n]) for n in ("bound", "trip", "warn")]
    assert order == sorted(order) and len(set(order)) == 3
    assert any("-30 s" in r and "now" in r for r in rows), "\n".join(rows)  # the time axis


@pytest.mark.parametrize("size", SIZES)
def test_a_timing_trip_shows_its_explanation_in_words(size):
    hello = dict(HELLO, hostcheck=HOSTCHECK)
    _, rows = asyncio.run(_shown(size, recording(STALE, hello)))
    flat = " ".join(r.strip(" │") for r in rows)
    flat = " ".join(flat.split())
    expected = explain_trip("stale", 0.0094, 0.007, HELLO["period"], None, HOSTCHECK,
                            telemetry(100, 0.913)["loop"])
    assert expected is not None
    # The words as the host check's module says them, wrapped but whole up to the cause.
    head = expected.split(". Likely cause")[0]
    assert head.startswith("no fresh sample for 9.4 ms; limit 7")
    assert head in flat
    assert "Likely cause: this computer held the loop off" in flat


def test_events_are_acknowledged_with_one_key():
    async def run():
        app = Dashboard(RecordedSource(records=recording(TRIP), speed=0))
        async with app.run_test(size=(80, 24)) as pilot:
            await settle(app, pilot)
            assert app.acknowledged == 0 and len(app.events) == 2
            await pilot.press("k")
            await pilot.pause(0.3)
            await until(pilot, lambda: not app._dirty)
            await pilot.pause(0.2)
            text = "\n".join(screen_text(app))
            assert "events: 2, all acknowledged" in text
            assert "! " not in text
    asyncio.run(run())


def test_the_arm_dialog_wraps_the_cautions_and_shows_the_host_check_at_80x24():
    hello = dict(HELLO, hostcheck=HOSTCHECK, preflight={"go": True, "reasons": ["no trips"]})

    async def run():
        app = Dashboard(RecordedSource(records=recording(None, hello), speed=0))
        async with app.run_test(size=(80, 24)) as pilot:
            await settle(app, pilot)
            await pilot.press("a")
            await until(pilot, lambda: isinstance(app.screen, ConfirmArm))
            await pilot.pause(0.2)
            rows = screen_text(app)
            assert all(len(r) <= 80 for r in rows)
            flat = " ".join(" ".join(r.strip(" ┃│▊▎").split()) for r in rows)
            assert "not a safety-rated function" in flat
            assert "host check NOT OK" in flat and "preflight GO" in flat
            assert "Arm (y)" in flat
            await pilot.press("n")
    asyncio.run(run())


def test_device_status_flags_show_when_the_hello_declares_them():
    hello = dict(HELLO, status_flags=["estop", "interlock"])
    recs = recording(None, hello)
    recs[-1] = dict(recs[-1], status=0x100 | 0x08)  # bit 8: the first declared flag

    _, rows = asyncio.run(_shown((80, 24), recs))
    assert "device: ESTOP SET, interlock clear" in "\n".join(rows)


def test_startup_progress_shows_while_the_runtime_is_not_there_yet(tmp_path):
    progress = tmp_path / "run.console"
    progress.write_text("corral: preflight: sweeping 200 simulated plants before arming\n")
    from runtime.dashboard.sources import SocketSource

    async def run():
        app = Dashboard(SocketSource(tmp_path / "absent.sock"), progress=progress,
                        wait_s=600.0)
        async with app.run_test(size=(80, 24)) as pilot:
            await until(pilot, lambda: any("sweeping 200" in r for r in screen_text(app)))
            assert "waiting for the runtime" in app.status
    asyncio.run(run())


# -- the pure functions behind them ------------------------------------------------
@pytest.mark.parametrize("height", range(3, 41))
@pytest.mark.parametrize("levels", [(0.8, 0.9), (0.7, 0.85), (0.5, 0.95), (0.9, 0.95)])
def test_chart_rows_put_each_level_on_a_row_of_its_own(height, levels):
    warning, trip = levels
    rows = panels.margin_chart([], [], 0.0, 30.0, 60, height, warning, trip)
    labels = [r[:panels.CHART_LABEL] for r in rows[:height]]
    gap = min(1 - trip, trip - warning)
    if (1 - warning) / (height - 1) <= gap + 1e-12:
        # Room enough: each level on a row of its own, labelled with its value and name.
        names = [next((n for n in ("bound", "trip", "warn") if f" {n} ┤" in lb), None)
                 for lb in labels]
        assert [n for n in names if n] == ["bound", "trip", "warn"]
        assert f"{trip:.2f} trip ┤" in "".join(labels)
        assert f"{warning:.2f} warn ┤" in "".join(labels)
        assert panels.chart_band(height, warning, trip) <= gap + 1e-12
    # Always: every level's value labels a row of the chart.
    for v in (1.0, trip, warning):
        assert f"{v:.2f}" in "".join(labels)
    if 1.0 / (height - 1) <= gap:
        assert labels[height - 1].strip().startswith("0.00")  # the whole range fits


def test_chart_columns_keep_the_largest_ratio_of_their_time_slice():
    # Two columns over 2 s: 0.2 and a 0.95 spike in the first second, 0.5 in the second.
    cols = panels.resample_max([0.25, 0.5, 1.5], [0.2, 0.95, 0.5], 2.0, 2.0, 2)
    assert cols == [0.95, 0.5]
    assert math.isnan(panels.resample_max([], [], 2.0, 2.0, 1)[0])


def test_a_bar_at_the_trip_level_fills_the_rows_up_to_the_trip_rule():
    # Six rows (an 80x24 terminal): rows of 0.1, each level the bottom edge of its row.
    assert panels.chart_band(6, 0.8, 0.9) == pytest.approx(0.1)
    w = panels.CHART_LABEL + 1
    rows = panels.margin_chart([1.0], [0.9], 1.0, 1.0, w, 6, 0.8, 0.9)
    trip_row = next(i for i, r in enumerate(rows) if " trip ┤" in r)
    col = [r[-1] for r in rows[:6]]
    assert col[trip_row + 1] == panels.BLOCKS[-1]  # U+2588 full block up to the level
    assert col[trip_row] == panels.LEVEL_RULE  # exactly at it: nothing above the rule
    # Half way between trip and bound: half of the trip row (U+2584 lower half block).
    rows = panels.margin_chart([1.0], [0.95], 1.0, 1.0, w, 6, 0.8, 0.9)
    assert rows[trip_row][-1] == "▄" and rows[trip_row - 1][-1] == panels.BOUND_RULE


def test_the_learning_strip_stays_readable_when_the_rate_is_constant():
    rows, scale = panels.strip_lines([172.0] * 50, 50, 2)
    assert scale == "constant 172"
    # Half height: the lower row full, the upper row empty (neither all-blank nor a block).
    assert set(rows[1]) == {panels.BLOCKS[-1]} and set(rows[0]) == {" "}
    rows, scale = panels.strip_lines([0.0] * 10, 10, 2)
    assert scale == "constant 0" and set(rows[1]) == {panels.BLOCKS[-1]}
    rows, scale = panels.strip_lines([1.0, 2.0], 2, 2)
    assert scale == "1 .. 2"


def test_device_flags_map_names_to_bits_from_eight():
    from drivers.wire import STATUS_DEVICE_BASE_BIT

    hello = {"status_flags": ["estop", "interlock", "door"]}
    assert panels.device_flags(hello, {"status": 1 << (STATUS_DEVICE_BASE_BIT + 2)}) == [
        ("estop", False), ("interlock", False), ("door", True)]
    assert panels.device_flags({}, {"status": 0xFFFF}) == []


def test_event_lines_are_stamped_with_their_own_time_else_the_arrival():
    import time

    t = time.mktime((2026, 12, 4, 21, 30, 5, 0, 0, -1))
    assert panels.event_line({"type": "event", "t_wall": t, "kind": "mode",
                              "detail": "idle -> settling"}) == "21:30:05 mode: idle -> settling"
    line = panels.event_line({"type": "trip", **TRIP}, received=t)
    assert line == "21:30:05 TRIP margin: 0.913 vs 0.9 -> baseline (tick 3960)"
    assert panels.event_line({"type": "telemetry"}) is None


def test_event_rows_mark_what_is_not_acknowledged():
    lines = ["a", "b", "c"]
    assert panels.event_rows(lines, 1, 3) == ["events: 2 to acknowledge (k)", "! b", "! c"]
    assert panels.event_rows(lines, 3, 10)[0] == "events: 3, all acknowledged"


def test_time_axis_names_the_window_and_now():
    axis = panels.time_axis(30.0, 40)
    assert axis.startswith("-30 s") and axis.endswith("now") and "-15 s" in axis
    assert len(axis) == 40
