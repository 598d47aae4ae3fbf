"""The sampled-data check and the design verdict (runtime.method.design, runtime.offline.verdict).

Outside references:
- Symplectic Euler on the harmonic oscillator x'' = -w^2 x is stable exactly for
  |h w| < 2 (its step matrix has characteristic polynomial z^2 - (2 - h^2 w^2) z + 1;
  Hairer, Lubich and Wanner, Geometric Numerical Integration, ch. on linear stability;
  from memory, re-derived in docs/sampled-data.md). The semi-implicit tick is that
  scheme for the adaptive loop, so the one-tick map's limit must approach
  Ts^2 gamma ||sigma_bar||^2 lambda(B'PB) = 4 as Ts -> 0.
- The plant's exact zero-order hold from scipy.signal.cont2discrete (not our `zoh`).
- The acceptance rule of issue 10: on the gamma grid 0.25 ... 256, no config the verdict
  calls feasible breaks the bound in its dry run, and at most a quarter of those that
  hold are refused.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from runtime.config import Config, load_config
from runtime.kernels import fast
from runtime.method.design import SAMPLED_LIMIT, design_from_config, sampled_spectral_radius
from runtime.method.law import AdaptiveLaw
from runtime.offline.dryrun import dry_run
from runtime.offline.verdict import FEASIBLE, REFUSED, decide

ROOT = Path(__file__).resolve().parents[1]
GAMMAS = (0.25, 0.5, 1, 2, 4, 8, 16, 32, 64, 128, 256)
# The demo rigs the acceptance rule covers: one line per rig.
VERDICT_CONFIGS = [
    "configs/pedestal-sim.toml",
    "configs/pitch-stand.toml",
]


def _plant_zoh(design, Ts):
    """Phi, Gam of the nominal plant by scipy's zero-order hold (outside reference)."""
    n, m = design.rig.B.shape
    Phi, Gam, *_ = scipy.signal.cont2discrete(
        (design.rig.A, design.rig.B, np.eye(n), np.zeros((n, m))), Ts, method="zoh")
    return Phi, Gam


def _critical_kappa(design, Phi, Gam):
    lo, hi = 1e-3, 1e12
    for _ in range(200):
        mid = np.sqrt(lo * hi)
        if sampled_spectral_radius(Phi, Gam, design.K1, design.PB, mid) < 1.0:
            lo = mid
        else:
            hi = mid
    return lo


@pytest.mark.parametrize("Ts", [1e-3, 2e-4])
@pytest.mark.parametrize("which", ["small", "demo"])
def test_one_tick_map_limit_is_the_symplectic_euler_limit(which, Ts, small_rig_raw):
    cfg = (Config(raw=small_rig_raw) if which == "small"
           else load_config(ROOT / "configs/pedestal-sim.toml"))
    d = design_from_config(cfg.with_overrides([f"loop.period={Ts}"]))
    Phi, Gam = _plant_zoh(d, Ts)
    kc = _critical_kappa(d, Phi, Gam)
    # kappa Ts lambda_max(B'PB) -> 4 as Ts -> 0 (|h w| < 2 with w^2 = kappa lambda / Ts)
    assert kc * Ts * d.lam_max_BPB == pytest.approx(SAMPLED_LIMIT, rel=0.02)


def test_one_tick_map_is_what_the_law_code_does(small_rig_raw):
    """The real AdaptiveLaw on an exact-ZOH plant with a constant matched uncertainty
    (bias only, standard law, guard lifted) follows the one-tick map exactly, and it is
    bounded just below the map's limit and grows just above it."""
    raw = small_rig_raw
    raw["basis"]["terms"] = ["bias"]
    raw["adaptation"].update(law="standard", step_gain_cap=1e15)
    raw["rig"]["input_limits"] = [1e15]  # no saturation: the map is linear
    base = design_from_config(Config(raw=raw))
    Ts = base.Ts
    Phi, Gam = _plant_zoh(base, Ts)
    kc = _critical_kappa(base, Phi, Gam)
    w_star = 0.7  # the plant adds B * 0.7 (in input units) that the nominal model omits
    growth = {}
    for factor in (0.9, 1.1):
        raw["adaptation"]["gamma"] = factor * kc / Ts  # kappa = Ts gamma ||sigma||^2, sigma = 1
        d = design_from_config(Config(raw=raw))
        law = AdaptiveLaw(d)
        st = law.init_state(np.zeros(2))
        x = np.zeros(2)
        kappa = Ts * float(d.gamma[0])
        e_map = np.zeros(2)
        v = np.array([-w_star])  # v = (W_hat - W*)' sigma, W_hat(0) = 0
        top = Phi - Gam @ d.K1
        peak = []
        for _ in range(1500):
            out = law.step(st, x, np.zeros(1))
            if np.any(out.u != out.u_raw):
                break  # saturated: the loop is no longer linear (only when unstable)
            assert np.allclose(out.e, e_map, rtol=1e-7, atol=1e-12 * (1 + np.abs(e_map).max()))
            x = Phi @ x + Gam @ (out.u + w_star)
            v = v + kappa * d.PB.T @ e_map
            e_map = top @ e_map - Gam @ v
            peak.append(float(np.max(np.abs(out.e))))
        growth[factor] = max(peak[-20:]) / max(peak[:20])
    assert growth[0.9] < 1.0  # below the limit the error dies out
    assert growth[1.1] > 1e3  # above it, it grows without bound


@pytest.fixture(scope="module", params=VERDICT_CONFIGS)
def grid(request):
    """(gamma, verdict, dry-run summary) over the gamma grid for one demo rig."""
    rows = []
    for g in GAMMAS:
        cfg = load_config(ROOT / request.param, [f"adaptation.gamma={g}"])
        v = decide(cfg, suggest=False)
        s = dry_run(cfg).summary  # the dry run `corral dry-run` does, run on its own
        rows.append((g, v, s))
    return request.param, rows


def test_verdict_agrees_with_the_dry_run_on_the_gamma_grid(grid):
    name, rows = grid
    held = [(g, v) for g, v, s in rows if s["breach_time"] is None]
    for g, v, s in rows:
        assert v.verdict in (FEASIBLE, REFUSED), (name, g, v)
        if v.verdict == FEASIBLE:
            assert s["breach_time"] is None, (name, g, s["max_margin_ratio"])
    refused_holding = [g for g, v in held if v.verdict == REFUSED]
    assert len(refused_holding) <= len(held) / 4, (name, refused_holding)
    assert held, name  # the grid is not all failures: the rule above is not empty


def test_a_refusal_comes_with_a_gamma_the_dry_run_holds():
    cfg = load_config(ROOT / "configs/pedestal-sim.toml", ["adaptation.gamma=0.25"])
    v = decide(cfg)
    assert v.verdict == REFUSED and v.basis == "dry run"
    match = re.search(r"adaptation\.gamma = ([0-9.eE+-]+)", v.fix)
    assert match, v.fix
    again = dry_run(cfg.with_overrides([f"adaptation.gamma={match.group(1)}"]))
    assert again.summary["breach_time"] is None


def test_a_rig_without_a_simulation_is_unverified_not_feasible(small_rig_raw):
    v = decide(Config(raw=small_rig_raw))
    assert v.verdict == "UNVERIFIED" and not v.refused and v.basis == "closed form"


def test_dry_run_and_sweep_refuse_a_refused_design_unless_forced(corral, tmp_path):
    bad = ("--set", "adaptation.gamma=0.25", "--set", "commands.duration=2")
    res = corral("dry-run", "configs/pedestal-sim.toml", "--no-plot", "--out", tmp_path, *bad)
    assert res.code == 1 and "Traceback" not in res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "refused" in lines[0] and "--force" in lines[0]
    assert "Fix:" in lines[0]
    forced = corral("dry-run", "configs/pedestal-sim.toml", "--no-plot", "--out", tmp_path,
                    "--json", "--force", *bad)
    s = json.loads(forced.stdout)
    assert s["verdict"] == REFUSED and s["breach_time"] is not None
    sweep = corral("sweep", "configs/pedestal-sim.toml", "--plants", "2", "--no-plot",
                   "--out", tmp_path, *bad)
    assert sweep.code == 1 and "--force" in sweep.stderr and "Traceback" not in sweep.stderr


@pytest.mark.parametrize("scale", ["none", 4.0, "u_max"])
def test_input_regressor_scale_is_honoured_by_both_laws(scale):
    value = f'"{scale}"' if isinstance(scale, str) else repr(scale)
    cfg = load_config(ROOT / "configs/pedestal-sim.toml",
                      [f"adaptation.input_regressor_scale={value}"])
    d = design_from_config(cfg)
    expect = {"none": np.ones(2), "u_max": d.rig.input_limits}.get(scale, np.full(2, 4.0))
    np.testing.assert_array_equal(d.regressor_scale, expect)
    ref, fl = AdaptiveLaw(d), fast.FastLaw(d)
    rng = np.random.default_rng(5)
    st = ref.init_state(np.zeros(4))
    fl.init_state(np.zeros(4))
    for _ in range(50):
        x = rng.normal(size=4) * 0.01
        c = rng.normal(size=2) * 0.1
        a = ref.step(st, x, c)
        b = fl.step(x, c)
        sig = ref.regressor(x, a.u_n)
        # the augmented entries are u_n / scale, by definition of the setting
        np.testing.assert_allclose(sig[-2:], a.u_n / expect, rtol=1e-12)
        np.testing.assert_allclose(b.sigma_bar, sig, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(b.u, a.u, rtol=1e-9, atol=1e-12)
    # the one law tick, as the sweep and the dry run call it, packs and reads the same scale
    out = np.zeros(fast.out_size(4, 2, d.n_regressors))
    st2 = np.zeros(4 + d.n_regressors * 2)
    fast.law_tick(np.full(4, 0.01), np.array([0.2, 0.1]), d.eps, fl.ic, fl.fc, st2, out)
    o = fast.OUT_HEADER + 3 * 2 + 4
    un = out[fast.OUT_HEADER + 2 * 2: fast.OUT_HEADER + 3 * 2]
    np.testing.assert_allclose(out[o + d.n_regressors - 2: o + d.n_regressors], un / expect,
                               rtol=1e-12)


def test_bad_input_regressor_scale_names_the_field(corral):
    res = corral("design", "configs/pedestal-sim.toml", "--closed-form", "--set",
                 'adaptation.input_regressor_scale="volts"')
    assert res.code == 2 and "adaptation.input_regressor_scale" in res.stderr
    assert "Traceback" not in res.stderr
