"""Fallbacks: bumpless rate-limited baseline, controlled stop to park, outputs off."""

from __future__ import annotations

import numpy as np

from runtime.config import load_config
from runtime.guard.fallback import DEFAULTS, make_fallback, settings_from_config
from runtime.method.design import design_from_config
from runtime.records.logs import read_run_log
from tests.runtime_helpers import DEMO, run_unpaced


def test_handover_is_bumpless_in_a_real_run(tmp_path):
    # A spike trips "jump" -> baseline while the adaptive law drives the rig.
    r, summary = run_unpaced(tmp_path, 2.2, ["spike@1.5:size=0.2"],
                             ["fallback.rate_limit=100"])
    trip = summary["trips"][0]
    assert trip["action"] == "baseline"
    _, cols = read_run_log(summary["run_log"])
    u = cols["u"]
    k = trip["tick"]
    limit = 100.0 * r.design.Ts
    steps = np.abs(np.diff(u[k - 1:k + 300], axis=0))
    assert np.all(steps <= limit + 1e-9)
    # ...and the baseline really moved off the applied input (not a frozen output).
    assert np.max(np.abs(u[k + 299] - u[k - 1])) > 0


def test_controlled_stop_parks_then_turns_outputs_off():
    cfg = load_config(DEMO, ["fallback.park=[0.05, 0.0]", "fallback.park_rate=1.0"])
    d = design_from_config(cfg)
    st = settings_from_config(cfg, 2)
    from sim_rigs import RIGS
    from sim_rigs.kernel import CompiledPlant
    from sim_rigs.plant import RigPlant

    plant = RigPlant.create(RIGS["pedestal"], {"gravity_el": 0.0, "bias_az": 0.0, "bias_el": 0.0},
                            x0=[0.0, 0.0, 0.0, 0.0])
    stepper = CompiledPlant(plant)
    fb = make_fallback("controlled_stop", d, st, np.zeros(2), plant.x[0])
    done = False
    u_prev = np.zeros(2)
    for _ in range(20000):
        u, on, done = fb.step(plant.x[0].copy())
        assert np.all(np.abs(u - u_prev) <= st["rate_limit"] * d.Ts + 1e-9)
        u_prev = u.copy()
        stepper.step(u if on else np.zeros(2), d.Ts)
        if done:
            break
    assert done and not on and np.all(u == 0)
    assert abs(plant.x[0, 0] - 0.05) <= DEFAULTS["park_tolerance"] + 0.01


def test_outputs_off_is_immediate():
    d = design_from_config(load_config(DEMO))
    fb = make_fallback("outputs_off", d, settings_from_config(load_config(DEMO), 2),
                       np.array([5.0, -5.0]), np.zeros(4))
    u, on, done = fb.step(np.zeros(4))
    assert not on and done and np.all(u == 0)
