"""Each injected fault kind trips the rule that should catch it, first, at once.

Runs the real tick (estimator, supervisor, law, watchdog, fallbacks, records)
against the simulated pedestal, unpaced, and reads the trip log back with
runtime.records.logs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from runtime.records.logs import read_run_log, read_trip_records
from sim_rigs.faults import FaultError, FaultSchedule, parse_fault
from tests.runtime_helpers import run_unpaced

AT = 1.5  # s: engaged by then (settling 0.2 s)

# kind -> (expected first-out rule, expected action, ticks allowed from onset to trip)
# Stale data may take up to the configured stale periods (3 by default).
CASES = {
    "sensor_freeze": ("stale", "outputs_off", 4),
    "spike:size=0.2": ("jump", "baseline", 1),
    "dropout": ("stale", "outputs_off", 4),
    "nan": ("nonfinite", "outputs_off", 1),
    "delay:ticks=6": ("stale", "outputs_off", 4),
    "effectiveness_loss:scale=0.02": (("margin", "predicted_crossing"), "baseline", 400),
    "disturbance_step:axis=el,size=40": (("margin", "predicted_crossing"), "baseline", 100),
    "drop:duration=0.0015": ("seq_gap", "baseline", 3),
    "disconnect": ("link_loss", "outputs_off", 1),
}


@pytest.mark.parametrize("fault", list(CASES))
def test_fault_trips_expected_rule_first_and_acts_in_the_same_tick(tmp_path, fault):
    kind, _, params = fault.partition(":")
    text = f"{kind}@{AT}" + (f":{params}" if params else "")
    rule, action, within = CASES[fault]
    r, summary = run_unpaced(tmp_path, AT + 0.6, [text])
    onset = int(round(AT / r.design.Ts))
    assert summary["trips"], f"{fault} did not trip"
    trip = summary["trips"][0]
    expected = rule if isinstance(rule, tuple) else (rule,)
    assert trip["rule"] in expected
    assert trip["action"] == action
    assert onset <= trip["tick"] <= onset + within
    # The process kept running after the trip: every tick ran.
    assert summary["ticks"] == int(round((AT + 0.6) / r.design.Ts))

    got = read_trip_records(summary["trip_log"])
    header, trips, events = got.header, got.trips, got.events
    assert not got.torn and not got.bad and len(trips) >= 1
    rec = trips[0].rec
    assert rec.first_out.rule == trip["rule"]
    assert rec.action == action and rec.tick == trip["tick"]
    pre = rec.pre
    assert len(pre) == int(round(0.2 / r.design.Ts))
    tick_col = header["capture_fields"].index("tick")
    assert pre[-1][tick_col] == trip["tick"]  # the capture ends on the trip tick
    assert trips[0].post is not None  # post capture written
    assert [e.kind for e in events][:1] == ["mode"] or any(e.kind == "arm" for e in events)

    # The reaction is in force on the trip tick itself (run log row of that tick).
    _, cols = read_run_log(summary["run_log"])
    k = trip["tick"]
    on = cols["outputs_on"][k]
    if action == "outputs_off":
        assert on == 0.0 and np.all(cols["u"][k] == 0.0)
    else:
        assert cols["mode"][k] == 3  # fallback
        assert on == 1.0


def test_no_fault_no_trip(tmp_path):
    _, summary = run_unpaced(tmp_path, 2.0)
    assert summary["trips"] == []
    assert summary["engagements"] == 1


def test_parse_fault_forms():
    f = parse_fault("disturbance_step@8:axis=el,size=3")
    assert (f.kind, f.at, f.params) == ("disturbance_step", 8.0, {"axis": "el", "size": 3})
    assert math.isinf(f.duration)
    g = parse_fault("dropout@2:duration=0.5")
    assert g.active(2.2) and not g.active(2.6) and not g.active(1.9)
    for bad in ("spike", "bogus@1", "spike@x", "spike@1:colour=red", "spike@1:size"):
        with pytest.raises(FaultError):
            parse_fault(bad)


def test_schedule_from_config_tables_and_command_line(tmp_path):
    from runtime.config import load_config
    from tests.runtime_helpers import DEMO

    cfg = load_config(DEMO)
    cfg.raw["faults"] = [{"kind": "nan", "at": 3.0, "axis": "az"}]
    sched = FaultSchedule.from_config(cfg, ["dropout@1:duration=0.5"])
    assert [f.kind for f in sched.faults] == ["dropout", "nan"]
    assert [f.kind for f in sched.active(3.5)] == ["nan"]


def test_link_stepper_matches_the_numpy_plant_under_faults():
    # Reference: sim_rigs.plant.RigPlant.step (batched numpy RK4) is the source of truth; the
    # links step the compiled kernel, with the fault hooks set by the injector.
    from sim_rigs import RIGS
    from sim_rigs.kernel import CompiledPlant
    from sim_rigs.plant import RigPlant

    rng = np.random.default_rng(3)
    spec = RIGS["pedestal"]
    for _ in range(5):
        x0 = rng.uniform(-1, 1, 4)
        u = rng.uniform(-14, 14, 2)
        a = RigPlant.create(spec, {"stribeck_az": 1.0, "stribeck_el": 0.5}, x0=x0)
        b = RigPlant.create(spec, {"stribeck_az": 1.0, "stribeck_el": 0.5}, x0=x0)
        a.disturbance = b.disturbance = np.array([[0.5, -2.0]])
        a.lam_scale = b.lam_scale = np.array([[0.5, 0.8]])
        a.step(u, 1e-3)
        CompiledPlant(b).step(u, 1e-3)
        np.testing.assert_allclose(b.x, a.x, rtol=1e-12, atol=1e-14)
