"""Monte Carlo sweep: per-plant results agree with one-at-a-time runs; rules; grid; CLI keys."""

from __future__ import annotations

import json

import numpy as np
import pytest

from runtime.config import load_config
from runtime.method.design import design_from_config
from runtime.offline.sweep import (
    RULES,
    SweepSettings,
    _Rules,
    draw_plants,
    run_chunk,
    run_grid,
    run_sweep,
)

DEMO = "configs/pedestal-sim.toml"
QUIET = ["sweep.noise=false", "plant.sensors.angle_noise=0", "plant.sensors.rate_noise=0"]


@pytest.fixture(scope="module")
def cfg():
    # the sweep's plant integrates like the dry run's, so the two agree to rounding
    c = load_config(DEMO, QUIET)
    return c.with_overrides([f"sweep.substeps={int(c.number('plant.substeps', 4))}"])


@pytest.fixture(scope="module")
def batch(cfg):
    # 6 plants, 2 s, one process: the batch every comparison below checks against
    return run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=1, engine="reference")


def test_batch_equals_each_plant_alone_through_the_same_code_path(cfg, batch):
    # Same code, batch of 1: identical outcome and rule ticks; the ratio to rounding only
    # (matmul and reductions take other SIMD paths for other batch widths).
    settings = batch.settings
    for i in range(6):
        prm = {k: v[i:i + 1] for k, v in batch.truth.items()}
        one = run_chunk(cfg.raw, settings, prm, 0)
        assert one["max_ratio"][0] == pytest.approx(batch.per_plant["max_ratio"][i], rel=1e-12)
        for key in (f"first_{r}" for r in (*RULES, "breach", "diverged")):
            assert one[key][0] == batch.per_plant[key][i], (key, i)


def test_compiled_engine_matches_the_numpy_reference_law_and_plant(cfg, batch):
    # Reference: runtime.method.law.AdaptiveLaw.step + sim_rigs.plant.RigPlant.step over the batch.
    ref = run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=1, engine="compiled")
    np.testing.assert_allclose(ref.per_plant["max_ratio"], batch.per_plant["max_ratio"],
                               rtol=1e-9)
    np.testing.assert_array_equal(ref.per_plant["outcome"], batch.per_plant["outcome"])


def test_worker_count_does_not_change_noise_free_results(cfg, batch):
    two = run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=2, chunk=3, engine="reference")
    np.testing.assert_allclose(two.per_plant["max_ratio"], batch.per_plant["max_ratio"],
                               rtol=1e-12)
    np.testing.assert_array_equal(two.per_plant["outcome"], batch.per_plant["outcome"])


@pytest.mark.parametrize("i", [0, 3])
def test_plant_agrees_with_the_single_plant_dry_run(cfg, batch, i):
    # The dry run (runtime.offline.dryrun, compiled single-plant engine) with plant i's truth.
    from runtime.offline.dryrun import dry_run

    truth = {k: float(v[i]) for k, v in batch.truth.items()}
    sets = [f"plant.truth.{k}={v!r}" for k, v in truth.items()] + ["commands.duration=2.0"]
    r = dry_run(cfg.with_overrides(sets))
    assert r.summary["max_margin_ratio"] == pytest.approx(batch.per_plant["max_ratio"][i],
                                                          rel=1e-8)
    breach = batch.per_plant["first_breach"][i]
    assert (r.summary["breach_time"] is None) == (breach < 0)


def test_plants_are_drawn_inside_their_ranges(cfg):
    truth = draw_plants(cfg, 500, 3)
    for key, (lo, hi) in cfg.get("plant.ranges").items():
        assert np.all(truth[key] >= lo) and np.all(truth[key] <= hi), key
        assert np.ptp(truth[key]) > 0.5 * (hi - lo)  # uniform over the range, not one point


ON_DELAYS = ["watchdog.rules.margin.on_delay_s=0.005", "watchdog.rules.clamp.on_delay_s=0.0123",
             "watchdog.rules.saturation.on_delay_s=0.05"]
"""Non-zero on-delays (5, 12.3 and 50 ms: 5, 13 and 50 ticks at 1 kHz)."""


@pytest.mark.parametrize("delays", [[], ON_DELAYS], ids=["no-delay", "on-delays"])
def test_rule_bookkeeping_against_the_live_watchdog(cfg, delays):
    # Synthetic ratios and raw inputs; the expected trip ticks come from the live watchdog's own
    # rules (runtime.guard.watchdog.build_rules, Rule.evaluate) fed the same signals tick by tick.
    cfg = cfg.with_overrides(delays)
    design = design_from_config(cfg)
    st = SweepSettings.from_config(cfg, plants=6, workers=1)
    rng = np.random.default_rng(0)
    K, B = 700, 6
    R = np.abs(rng.normal(0.5, 0.25, size=(K, B)))
    UR = np.zeros((K, 2, B))
    UR[100:700, 0, 1] = 13.0        # plant 1 saturated from tick 100 on
    UR[50:300, 1, 2] = -12.5        # plant 2 saturated 250 ticks only (0.25 s < 0.5 s)
    R[:, 3] = 0.1
    R[400, 3] = np.nan              # plant 3 goes non-finite at tick 400
    R[:, 4] = 0.2                   # plant 4: short excursions past margin and clamp, then long
    R[100:104, 4] = 0.99
    R[200:211, 4] = 0.995
    R[300:400, 4] = 0.999
    R[:, 5] = 0.2                   # plant 5: one over, one under, repeating, then held
    R[100:300:2, 5] = 0.999
    R[500:600, 5] = 0.98
    C = ~(R <= 1 - design.clamp_margin)  # clamped as runtime.method.law defines it
    from runtime.guard.watchdog import Signals, build_rules
    from runtime.offline.sweep import _setup

    rules = _Rules(B, design, st, _setup(cfg.raw, st).levels)
    for k0 in range(0, K, 64):      # fed in blocks, as the engines do
        rules.block(k0, R[k0:k0 + 64], C[k0:k0 + 64], UR[k0:k0 + 64])
    res = rules.result()
    # Reference: the live watchdog's own rules (runtime.guard.watchdog), fed tick by tick the way
    # the runtime feeds them (runtime.realtime.loop: seconds at the limit, |u| >= limit).
    Ts = design.Ts
    for b in range(B):
        live = {r.id: r for r in build_rules(cfg, Ts, design.clamp_margin)}
        exp = {r: -1 for r in RULES}
        sat_time = np.zeros(2)
        for k in range(K):
            r = R[k, b]
            sat_time = np.where(np.abs(UR[k, :, b]) >= design.rig.input_limits,
                                sat_time + Ts, 0.0)
            sig = Signals(t=k * Ts, tick=k, engaged=True, ratio=r, clamped=bool(C[k, b]),
                          nonfinite=not np.isfinite(r), sat_time=float(np.max(sat_time)))
            for rid in RULES:
                if live[rid].evaluate(sig) and exp[rid] < 0:
                    exp[rid] = k
        for r in RULES:
            assert res[f"first_{r}"][b] == exp[r], (r, b)
    on = {r.id: r.on_delay for r in build_rules(cfg, Ts, design.clamp_margin)}
    # saturated from tick 100: 0.5 s at the limit is reached on tick 100 + 500 - 1, by the
    # live rule and the sweep alike (the sweep used to trip one tick later), plus the on-delay
    assert res["first_saturation"][1] == (100 + round(st.saturation_time / Ts) - 1
                                          + round(on["saturation"] / Ts))
    assert res["first_saturation"][2] == -1
    # plant 4: without on-delays the first excursion trips margin and clamp; with them the
    # 4-tick one trips neither, the 11-tick one the margin (5 ms), the long one the clamp
    if delays:
        assert res["first_margin"][4] == 200 + 5 and res["first_clamp"][4] == 300 + 13
        assert res["first_margin"][5] == 500 + 5 and res["first_clamp"][5] == -1
    else:
        assert res["first_margin"][4] == 100 and res["first_clamp"][4] == 100
        assert res["first_margin"][5] == 100


def test_grid_reports_refused_settings_and_the_best(cfg):
    # the guard lifted, gamma 1e6 makes the sampled loop unstable: refused by the closed form
    lifted = cfg.with_overrides(["adaptation.step_gain_cap=1e12"])
    grid = run_grid(lifted, [("adaptation.gamma", [1e6, 2.0])], plants=2, duration=0.5,
                    workers=1)
    assert [e["setting"] for e in grid["grid"]] == [{"adaptation.gamma": 1e6},
                                                    {"adaptation.gamma": 2.0}]
    refused, ran = grid["grid"]
    assert refused["refused"] and refused["reasons"] and "plants" not in refused
    assert not ran["refused"] and ran["plants"] == 2
    assert grid["best"]["setting"] == {"adaptation.gamma": 2.0}
    assert grid["axes"] == [{"key": "adaptation.gamma", "values": [1e6, 2.0]}]


def test_cli_json_has_the_contract_keys(tmp_path, capsys):
    from runtime.cli.main import main

    rc = main(["sweep", DEMO, "--plants", "3", "--duration", "0.5", "--workers", "1",
               "--out", str(tmp_path), "--json", "--set", f"log.dir={tmp_path}"])
    out = json.loads(capsys.readouterr().out)
    for key in ("plants", "inside_fraction", "diverged_fraction", "trip_fraction",
                "worst_margin_ratio", "plant_steps_per_second", "trips_by_rule", "worst_cases"):
        assert key in out, key
    assert out["plants"] == 3
    assert out["inside_fraction"] + out["trip_fraction"] + out["diverged_fraction"] == \
        pytest.approx(1.0)
    assert rc == (0 if out["inside_fraction"] == 1.0 else 1)
    assert (tmp_path / out["plot"].split("/")[-1]).exists()


def test_cli_grid_json_structure(tmp_path, capsys):
    from runtime.cli.main import main

    main(["sweep", DEMO, "--plants", "2", "--duration", "0.3", "--workers", "1", "--no-plot",
          "--grid", "adaptation.gamma=1,2", "--grid", "adaptation.clamp_margin=0.02,0.05",
          "--out", str(tmp_path), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert len(out["grid"]) == 4 and len(out["axes"]) == 2
    assert {"setting", "refused", "inside_fraction"} <= set(out["grid"][0])
    assert out["best"] is not None


def test_bad_grid_is_one_line_error(capsys):
    from runtime.cli.main import main

    assert main(["sweep", DEMO, "--grid", "adaptation.gamma"]) == 2
    err = capsys.readouterr().err
    assert "--grid" in err and "Traceback" not in err


# ---------------------------------------------------------------- the compiled engine
FIRSTS = tuple(f"first_{r}" for r in (*RULES, "breach", "diverged"))


def assert_same_plants(a, b, rtol=1e-9):
    """Per plant: identical rule ticks (hence outcome and first-out), worst ratio to rtol."""
    for key in FIRSTS:
        np.testing.assert_array_equal(a[key], b[key], err_msg=key)
    np.testing.assert_allclose(a["max_ratio"], b["max_ratio"], rtol=rtol)


# Harder settings than the demo, so that rules fire: sensor delay, command latency and a
# bound that narrows (time-varying eps); then also a command step far beyond the bound.
HARD = ["plant.sensors.delay_ticks=2", "sweep.latency_ticks=3", "watchdog.saturation_s=0.02",
        "adaptation.gamma=1.5", 'adaptation.bound.kind="exponential"',
        "adaptation.bound.eps0=0.05", "adaptation.bound.eps_inf=0.012",
        "adaptation.bound.alpha=50", 'adaptation.bound.on_violation="rate_limit"']
STEP = ['commands.az=[{at=0.3, kind="step", to=1.0}]']


@pytest.mark.parametrize("extra", [[], HARD, HARD + STEP, HARD + STEP + ON_DELAYS])
def test_compiled_engine_matches_the_reference_engine_noise_off(cfg, extra):
    # With ON_DELAYS the compiled kernel applies the on-delays as the reference engine's
    # bookkeeping does, itself held to the live watchdog above.
    c = cfg.with_overrides(extra)
    a = run_sweep(c, plants=10, seed=5, duration=1.5, workers=1, engine="reference")
    b = run_sweep(c, plants=10, seed=5, duration=1.5, workers=2, engine="compiled")
    assert b.summary["engine"] == "compiled"
    assert_same_plants(a.per_plant, b.per_plant)
    np.testing.assert_array_equal(a.per_plant["outcome"], b.per_plant["outcome"])
    fired = {r for r in (*RULES, "breach") if np.any(b.per_plant[f"first_{r}"] >= 0)}
    if extra:  # the comparison covered rules that fired, not only plants that stayed inside
        assert {"margin", "clamp", "breach"} <= fired, fired
    if extra[-len(STEP):] == STEP or extra[-len(ON_DELAYS):] == ON_DELAYS:
        assert "saturation" in fired


def test_compiled_engine_matches_the_reference_engine_with_the_same_noise():
    # The reference engine (RigPlant.measure) draws rng.standard_normal((B, 4)) per reading
    # from default_rng([seed, chunk]); replaying those draws into the kernel gives the same noise.
    from runtime.offline.sweep import _run_compiled, _setup

    c = load_config(DEMO, ["sweep.latency_ticks=1"])
    st = SweepSettings.from_config(c, plants=5, seed=3, duration=1.0, workers=1, engine="reference")
    prm = draw_plants(c, 5, 3)
    fused = run_chunk(c.raw, st, prm, 0)
    ticks = len(_setup(c.raw, st).cmd)
    rng = np.random.default_rng([3, 0])
    given = np.stack([rng.standard_normal((5, 4)).T for _ in range(ticks + 1)], axis=0)
    st_c = SweepSettings.from_config(c, plants=5, seed=3, duration=1.0, workers=1,
                                     engine="compiled")
    comp = _run_compiled(_setup(c.raw, st_c), prm, np.arange(5),
                         noise_given=np.ascontiguousarray(given.transpose(2, 0, 1)))
    assert_same_plants(fused, comp)
    noisy = run_sweep(c, plants=5, seed=3, duration=1.0, workers=1, engine="compiled")
    assert not np.array_equal(noisy.per_plant["max_ratio"], comp["max_ratio"])  # own streams


def test_compiled_engine_runs_modifiers_and_radial_basis_like_the_reference():
    # The reference engine: runtime.method.law.AdaptiveLaw (with runtime.method.modifiers)
    # + RigPlant.step.
    for extra in (['adaptation.leakage="e"', "adaptation.mu=0.5", "adaptation.projection=true",
                   "adaptation.theta_max=[2.0, 2.0]"],
                  ['basis.kind="rbf"', 'basis.terms=["bias", "cos:el"]',
                   'basis.rbf_states=["el", "el_rate"]', "basis.rbf_per_axis=[4, 3]",
                   "basis.rbf_span=[0.6, 1.0]", "basis.rbf_width=[0.3, 0.8]",
                   "adaptation.gamma=1.0"]):
        c = load_config(DEMO, QUIET + extra)
        a = run_sweep(c, plants=4, seed=2, duration=1.0, workers=1, engine="reference")
        b = run_sweep(c, plants=4, seed=2, duration=1.0, workers=1)
        assert b.summary["engine"] == "compiled", extra
        assert_same_plants(a.per_plant, b.per_plant)


def test_compiled_results_do_not_depend_on_threads_or_slicing():
    # Noise on: each plant has its own stream keyed by (seed, plant index).
    c = load_config(DEMO, [])
    one = run_sweep(c, plants=11, seed=4, duration=0.8, workers=1, engine="compiled")
    two = run_sweep(c, plants=11, seed=4, duration=0.8, workers=2, chunk=3, engine="compiled")
    assert one.summary["noise"] and two.summary["workers"] == 2 and two.summary["chunk"] == 3
    for key in (*FIRSTS, "max_ratio"):
        np.testing.assert_array_equal(one.per_plant[key], two.per_plant[key], err_msg=key)


def test_compiled_noise_statistics_match_the_reference_engine():
    # Different streams, same distribution: the worst ratio over 60 noisy plants agrees in
    # the mean to within a few standard errors; with the noise off both are identical above.
    c = load_config(DEMO, ["plant.sensors.rate_noise=0.02"])
    a = run_sweep(c, plants=60, seed=9, duration=1.0, workers=1, engine="reference")
    b = run_sweep(c, plants=60, seed=9, duration=1.0, workers=2, engine="compiled")
    q = load_config(DEMO, QUIET)
    z = run_sweep(q, plants=60, seed=9, duration=1.0, workers=2, engine="compiled")
    da = a.per_plant["max_ratio"] - z.per_plant["max_ratio"]  # the noise's effect per plant
    db = b.per_plant["max_ratio"] - z.per_plant["max_ratio"]
    assert np.std(db) > 0 and np.std(da) > 0
    se = np.sqrt(np.var(da) / da.size + np.var(db) / db.size)
    assert abs(np.mean(da) - np.mean(db)) < 4 * se + 1e-12


def test_auto_picks_the_compiled_engine(cfg):
    st = SweepSettings.from_config(cfg, plants=2, duration=0.1, workers=1)
    assert st.engine == "auto"
    r = run_sweep(cfg, plants=2, duration=0.1, workers=1)
    assert r.summary["engine"] == "compiled" and r.summary["compile_seconds"] >= 0


def test_default_substeps_keep_steps_at_most_one_millisecond_and_agree_with_four():
    # RK4's global error is O(h^4) (Butcher, Numerical Methods for ODEs): at 1 kHz one
    # substep already resolves this plant, so the worst ratio barely moves.
    from runtime.offline.sweep import default_substeps

    demo = load_config(DEMO, QUIET)
    assert SweepSettings.from_config(demo, plants=1).substeps == 1  # demo: 1 kHz
    assert default_substeps(demo.with_overrides(["loop.period=0.0025"])) == 3
    one = run_sweep(demo, plants=6, seed=1, duration=2.0, workers=2)
    four = run_sweep(demo.with_overrides(["sweep.substeps=4"]), plants=6, seed=1, duration=2.0,
                     workers=2)
    assert one.summary["substeps"] == 1 and four.summary["substeps"] == 4
    np.testing.assert_allclose(one.per_plant["max_ratio"], four.per_plant["max_ratio"],
                               rtol=1e-6)
    assert not np.array_equal(one.per_plant["max_ratio"], four.per_plant["max_ratio"])
    np.testing.assert_array_equal(one.per_plant["outcome"], four.per_plant["outcome"])
