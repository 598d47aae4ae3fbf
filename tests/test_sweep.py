"""Monte Carlo sweep: per-plant results agree with one-at-a-time runs; rules; grid; CLI keys."""

from __future__ import annotations

import json

import numpy as np
import pytest

from runtime.config import load_config
from runtime.design import design_from_config
from runtime.sweep import (
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
    return load_config(DEMO, QUIET)


@pytest.fixture(scope="module")
def batch(cfg):
    # 6 plants, 2 s, one process: the batch every comparison below checks against
    return run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=1, engine="fused")


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


def test_fused_engine_matches_the_numpy_reference_law_and_plant(cfg, batch):
    # Reference: runtime.law.AdaptiveLaw.step + sim_rigs.pedestal.Pedestal.step over the batch.
    ref = run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=1, engine="reference")
    np.testing.assert_allclose(ref.per_plant["max_ratio"], batch.per_plant["max_ratio"],
                               rtol=1e-9)
    np.testing.assert_array_equal(ref.per_plant["outcome"], batch.per_plant["outcome"])


def test_worker_count_does_not_change_noise_free_results(cfg, batch):
    two = run_sweep(cfg, plants=6, seed=11, duration=2.0, workers=2, chunk=3, engine="fused")
    np.testing.assert_allclose(two.per_plant["max_ratio"], batch.per_plant["max_ratio"],
                               rtol=1e-12)
    np.testing.assert_array_equal(two.per_plant["outcome"], batch.per_plant["outcome"])


@pytest.mark.parametrize("i", [0, 3])
def test_plant_agrees_with_the_single_plant_dry_run(cfg, batch, i):
    # The dry run (runtime.dryrun, compiled single-plant engine) with plant i's truth.
    from runtime.dryrun import dry_run

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


def test_rule_bookkeeping_against_a_plain_loop(cfg):
    # Synthetic ratios and raw inputs; the expected first ticks come from a tick-by-tick loop.
    design = design_from_config(cfg)
    st = SweepSettings.from_config(cfg, plants=5, workers=1)
    rng = np.random.default_rng(0)
    K, B = 700, 5
    R = np.abs(rng.normal(0.5, 0.25, size=(K, B)))
    UR = np.zeros((K, 2, B))
    UR[100:700, 0, 1] = 13.0        # plant 1 saturated from tick 100 on
    UR[50:300, 1, 2] = -12.5        # plant 2 saturated 250 ticks only (0.25 s < 0.5 s)
    R[:, 3] = 0.1
    R[400, 3] = np.nan              # plant 3 goes non-finite at tick 400
    rules = _Rules(B, design, st)
    for k0 in range(0, K, 64):      # fed in blocks, as the engines do
        rules.block(k0, R[k0:k0 + 64], UR[k0:k0 + 64])
    res = rules.result()
    sat_ticks = st.saturation_time / design.Ts
    for b in range(B):
        exp = {r: -1 for r in RULES}
        run = np.zeros(2)
        for k in range(K):
            r = R[k, b]
            if exp["margin"] < 0 and r >= st.margin_trip:
                exp["margin"] = k
            if exp["clamp"] < 0 and r >= 1 - design.clamp_margin:
                exp["clamp"] = k
            if exp["nonfinite"] < 0 and not np.isfinite(r):
                exp["nonfinite"] = k
            run = np.where(np.abs(UR[k, :, b]) > design.rig.input_limits, run + 1, 0)
            if exp["saturation"] < 0 and np.any(run > sat_ticks):
                exp["saturation"] = k
        for r in RULES:
            assert res[f"first_{r}"][b] == exp[r], (r, b)
    assert res["first_saturation"][1] == 100 + int(sat_ticks)
    assert res["first_saturation"][2] == -1


def test_grid_reports_refused_settings_and_the_best(cfg):
    grid = run_grid(cfg, [("adaptation.gamma", [1e6, 2.0])], plants=2, duration=0.5,
                    workers=1)
    assert [e["setting"] for e in grid["grid"]] == [{"adaptation.gamma": 1e6},
                                                    {"adaptation.gamma": 2.0}]
    refused, ran = grid["grid"]
    assert refused["refused"] and refused["reasons"] and "plants" not in refused
    assert not ran["refused"] and ran["plants"] == 2
    assert grid["best"]["setting"] == {"adaptation.gamma": 2.0}
    assert grid["axes"] == [{"key": "adaptation.gamma", "values": [1e6, 2.0]}]


def test_cli_json_has_the_contract_keys(tmp_path, capsys):
    from runtime.cli import main

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
    from runtime.cli import main

    main(["sweep", DEMO, "--plants", "2", "--duration", "0.3", "--workers", "1", "--no-plot",
          "--grid", "adaptation.gamma=1,2", "--grid", "adaptation.clamp_margin=0.02,0.05",
          "--out", str(tmp_path), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert len(out["grid"]) == 4 and len(out["axes"]) == 2
    assert {"setting", "refused", "inside_fraction"} <= set(out["grid"][0])
    assert out["best"] is not None


def test_bad_grid_is_one_line_error(capsys):
    from runtime.cli import main

    assert main(["sweep", DEMO, "--grid", "adaptation.gamma"]) == 2
    err = capsys.readouterr().err
    assert "--grid" in err and "Traceback" not in err
