"""Command profiles (runtime.method.commands): smooth slews, steps, sines, holds, and segment
errors."""

from __future__ import annotations

import numpy as np
import pytest

from runtime.config import Config, ConfigError
from runtime.method.commands import schedule_from_config, tracked_names


def schedule(**commands):
    return schedule_from_config(Config(raw={"commands": commands}), ["az", "el"])


DEMO = {
    "duration": 12.0,
    "initial": [0.1, -0.2],
    "az": [
        {"at": 1.0, "kind": "slew", "to": 0.6, "duration": 1.5},
        {"at": 4.0, "kind": "step", "to": 0.2},
        {"at": 6.0, "kind": "sine", "amplitude": 0.3, "frequency_hz": 0.5, "duration": 4.0},
    ],
    "el": [{"at": 2.0, "kind": "hold"}],
}


def test_slew_is_smooth_and_reaches_its_target():
    sched = schedule(**DEMO)
    dt = 1e-4
    t = np.arange(0.5, 3.0, dt)
    az = sched.evaluate(t)[:, 0]
    start, end, T = 1.0, 2.5, 1.5
    # holds the initial value before, the target after (until the step at 4 s)
    assert np.all(az[t < start] == 0.1)
    assert np.allclose(az[t >= end], 0.6)
    # continuous: no jump larger than the peak slope allows over one sample
    v = np.diff(az) / dt
    # Raised-cosine path base + (to - base)(1 - cos(pi tau))/2 (a standard smooth move):
    # its peak velocity is pi (to - base) / (2 T) at mid-move (calculus, exact).
    v_peak = np.pi * 0.5 / (2 * T)
    assert np.max(np.abs(v)) <= v_peak * (1 + 1e-6)
    assert np.max(np.abs(v)) == pytest.approx(v_peak, rel=1e-3)
    # zero velocity at both ends of the move, velocity itself continuous (no kinks)
    near_start = (t[:-1] > start - 5 * dt) & (t[:-1] < start + 5 * dt)
    near_end = (t[:-1] > end - 5 * dt) & (t[:-1] < end + 5 * dt)
    assert np.max(np.abs(v[near_start])) < 1e-2 * v_peak
    assert np.max(np.abs(v[near_end])) < 1e-2 * v_peak
    assert np.max(np.abs(np.diff(v))) < 1e-3 * v_peak
    # monotone towards the target, half way at mid-move (symmetry of the raised cosine)
    assert np.all(np.diff(az[(t >= start) & (t <= end)]) >= -1e-15)
    assert float(sched.evaluate(start + T / 2)[0]) == pytest.approx(0.35, abs=1e-12)


def test_step_sine_and_holds_between_segments():
    sched = schedule(**DEMO)
    # hold between the slew end (2.5 s) and the step (4 s)
    hold = sched.evaluate(np.linspace(2.5, 3.999, 50))[:, 0]
    assert np.allclose(hold, 0.6)
    # step at 4 s: previous value just before, the new value from 4 s on
    assert float(sched.evaluate(3.9999)[0]) == pytest.approx(0.6)
    assert float(sched.evaluate(4.0)[0]) == 0.2
    # sine around the held value 0.2: quarter period (0.5 s at 0.5 Hz) is the crest,
    # three quarters the trough, whole periods the centre
    assert float(sched.evaluate(6.5)[0]) == pytest.approx(0.5, abs=1e-12)
    assert float(sched.evaluate(7.5)[0]) == pytest.approx(-0.1, abs=1e-12)
    assert float(sched.evaluate(8.0)[0]) == pytest.approx(0.2, abs=1e-12)
    # after the sine's duration the command holds its base again
    assert np.allclose(sched.evaluate(np.linspace(10.0, 12.0, 20))[:, 0], 0.2)
    # the other axis holds its initial value throughout
    assert np.all(sched.evaluate(np.linspace(0, 12, 100))[:, 1] == -0.2)
    assert sched.duration == 12.0


def test_evaluate_shapes_and_segment_order():
    ordered = schedule(az=[{"at": 1.0, "kind": "step", "to": 1.0},
                           {"at": 2.0, "kind": "step", "to": 2.0}])
    shuffled = schedule(az=[{"at": 2.0, "kind": "step", "to": 2.0},
                            {"at": 1.0, "kind": "step", "to": 1.0}])
    t = np.array([[0.5, 1.5], [2.5, 3.0]])
    assert ordered.evaluate(t).shape == (2, 2, 2)
    assert ordered.evaluate(0.0).shape == (2,)
    np.testing.assert_array_equal(ordered.evaluate(t), shuffled.evaluate(t))
    assert ordered.evaluate(t)[..., 0].tolist() == [[0.0, 1.0], [2.0, 2.0]]
    assert ordered.duration == 30.0  # the documented default


@pytest.mark.parametrize(
    ("az", "field"),
    [
        ([{"at": 1.0, "kind": "ramp", "to": 1.0}], "commands.az[0].kind"),
        ([{"at": 1.0, "to": 1.0}], "commands.az[0].kind"),
        ([{"at": 1.0, "kind": "step"}], "commands.az[0].to"),
        ([{"kind": "step", "to": 1.0}], "commands.az[0].at"),
        ([{"at": 1.0, "kind": "step", "to": 0.1},
          {"at": 2.0, "kind": "slew", "to": 1.0, "duration": 0.0}], "commands.az[1].duration"),
        ([{"at": 1.0, "kind": "sine", "amplitude": 0.1, "frequency_hz": -1.0,
           "duration": 1.0}], "commands.az[0].frequency_hz"),
        ([{"at": "soon", "kind": "step", "to": 1.0}], "commands.az[0].at"),
        ([1.0], "commands.az[0]"),
        ({"at": 1.0}, "commands.az"),
    ],
)
def test_bad_segments_name_the_field(az, field):
    with pytest.raises(ConfigError) as info:
        schedule(az=az)
    assert info.value.field == field
    assert f"'{field}'" in str(info.value)
    assert info.value.fix


def test_unknown_axis_is_named():
    with pytest.raises(ConfigError) as info:
        schedule(roll=[{"at": 1.0, "kind": "step", "to": 1.0}])
    assert info.value.field == "commands.roll"
    assert "az" in str(info.value) and "el" in str(info.value)


def test_tracked_names_come_from_the_rows_of_C():
    states = ("az", "el", "az_rate", "el_rate")
    C = np.array([[1.0, 0, 0, 0], [0, 1.0, 0, 0]])
    assert tracked_names(C, states) == ["az", "el"]
    C2 = np.array([[1.0, 0, 0, 0], [0, 0.5, 0.5, 0]])
    assert tracked_names(C2, states) == ["az", "y1"]


def test_bad_segment_through_the_cli_is_one_line(corral, tmp_path):
    res = corral("dry-run", "configs/pedestal-sim.toml", "--no-plot", "--out", tmp_path,
                 "--set", "commands.az=[{ at = 1.0, kind = 'ramp', to = 0.1 }]")
    assert res.code == 2 and "Traceback" not in res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "'commands.az[0].kind'" in lines[0]


@pytest.mark.parametrize("initial", [[0.1], [0.1, 0.2, 0.3], ["a", "b"]])
def test_bad_initial_commands_name_the_field(initial):
    # House rule: a user error is a ConfigError naming the field, never an IndexError or
    # ValueError from deep inside (one initial value per tracked output: az, el).
    with pytest.raises(ConfigError) as info:
        schedule(initial=initial, az=[{"at": 1.0, "kind": "step", "to": 1.0}])
    assert info.value.field == "commands.initial"


def test_bad_initial_commands_through_the_cli_are_one_line(corral, tmp_path):
    res = corral("dry-run", "configs/pedestal-sim.toml", "--no-plot", "--out", tmp_path,
                 "--set", "commands.duration=0.1", "--set", "commands.initial=[0.1]")
    assert "Traceback" not in res.stderr
    assert res.code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "'commands.initial'" in lines[0]
