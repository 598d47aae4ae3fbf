"""The compiled fast path agrees with the numpy reference tick by tick.

The reference is `runtime.method.law.AdaptiveLaw` and `sim_rigs.plant.RigPlant`
(the readable source of truth); the weight modifiers are checked against the
formulas of docs/method.md §4, written out again below in plain
numpy (projection: Pomet and Praly, IEEE TAC 1992, and Lavretsky and Wise,
Robust and Adaptive Control, 2013; sigma-modification: Ioannou and Kokotovic;
e-modification: Narendra and Annaswamy, IEEE TAC 1987).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numba
import numpy as np
import pytest

from runtime.config import load_config
from runtime.kernels import fast, lawtick, rigloops
from runtime.method.design import design_from_config
from runtime.method.law import AdaptiveLaw
from runtime.offline.dryrun import dry_run
from sim_rigs import RIGS
from sim_rigs.plant import RigPlant, SensorModel

DEMO = Path(__file__).resolve().parents[1] / "configs" / "pedestal-sim.toml"
NOISE_OFF = ["plant.sensors.angle_noise=0", "plant.sensors.rate_noise=0"]
TOL = 1e-9


def demo_design(*overrides: str):
    return design_from_config(load_config(DEMO, list(overrides)))


def close(a, b, tol: float = TOL) -> bool:
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    return bool(np.all(np.abs(a - b) <= tol * (1.0 + np.abs(a))))


def compare_ticks(design, xs, cs, eps_t=None, modifiers=(), settings=None, w0=None):
    """Run both laws on the same measurements; return the reference's clamp/cap flags."""
    ref = AdaptiveLaw(design, modifiers)
    fl = fast.FastLaw(design, settings)
    st = ref.init_state(xs[0])
    fl.init_state(xs[0])
    if w0 is not None:
        st.W[:] = w0
        fl.W[:] = w0
    clamped, capped = [], []
    for k in range(len(xs)):
        eps = None if eps_t is None else eps_t[k]
        a = ref.step(st, xs[k], cs[k], eps)
        b = fl.step(xs[k], cs[k], eps)
        for name in ("u", "u_raw", "u_n", "e", "s", "ratio", "phi_d", "eff_rate", "step_gain"):
            assert close(getattr(a, name), getattr(b, name)), (k, name)
        assert bool(a.clamped) == b.clamped, k
        assert bool(a.capped) == b.capped, k
        assert close(st.W, fl.W), k
        assert close(st.xr, fl.xr), k
        clamped.append(bool(a.clamped))
        capped.append(bool(a.capped))
    return np.array(clamped), np.array(capped)


def closed_loop_states(design, ticks: int, kicks: bool, seed: int = 3):
    """Measurements from the numpy plant under the numpy law, with commands (and kicks)."""
    law = AdaptiveLaw(design)
    plant = RigPlant.create(RIGS["pedestal"], batch=1, x0=[0.0, 0.1, 0.0, 0.0],
                            sensors=SensorModel(np.zeros(4), np.zeros(4)), substeps=2)
    t = np.arange(ticks) * design.Ts
    cs = np.stack((0.3 * np.sin(2 * np.pi * 0.5 * t), 0.2 + 0.1 * np.cos(2 * np.pi * t)), -1)
    xs = np.empty((ticks, 4))
    rng = np.random.default_rng(seed)
    st = law.init_state(plant.measure()[0])
    for k in range(ticks):
        y = plant.measure()[0]
        if kicks and k % 50 == 25:
            y = y + rng.normal(size=4) * 2.0 * design.limits  # far outside the bound
        xs[k] = y
        out = law.step(st, y, cs[k])
        plant.step(out.u, design.Ts)
    return xs, cs


# ---------------------------------------------------------------- law tick
@pytest.mark.parametrize("overrides", [
    (),
    ("adaptation.law=standard",),
    ("adaptation.barrier=log",),
    ("adaptation.unknown_effectiveness=false",),
    ("adaptation.law=standard", "adaptation.unknown_effectiveness=false"),
])
def test_law_tick_matches_reference_with_commands(overrides):
    design = demo_design(*overrides)
    xs, cs = closed_loop_states(design, 400, kicks=False)
    compare_ticks(design, xs, cs)


def test_law_tick_matches_reference_where_clamp_and_cap_engage():
    design = demo_design("adaptation.gamma=20")
    xs, cs = closed_loop_states(design, 400, kicks=True)
    clamped, capped = compare_ticks(design, xs, cs)
    assert clamped.any() and (~clamped).any()
    assert capped.any() and (~capped).any()


def test_law_tick_matches_reference_with_time_varying_eps():
    design = demo_design()
    xs, cs = closed_loop_states(design, 300, kicks=False)
    t = np.arange(300) * design.Ts
    eps_t = design.eps * (1.0 + 2.0 * np.exp(-t / 0.1))
    compare_ticks(design, xs, cs, eps_t=eps_t)


def test_frozen_law_holds_the_weights():
    design = demo_design()
    fl = fast.FastLaw(design)
    fl.init_state(np.zeros(4))
    fl.step(np.array([0.01, 0.0, 0.1, 0.0]), np.zeros(2))
    w = fl.W.copy()
    assert np.any(w != 0)
    fl.frozen = True
    fl.step(np.array([0.02, 0.01, 0.1, 0.0]), np.zeros(2))
    assert np.array_equal(fl.W, w)


# ------------------------------------------------- modifiers (docs/method.md §4, sources there)
@dataclasses.dataclass
class PublishedModifiers:
    """The formulas of docs/method.md §4 in plain numpy, applied in the fast kernel's order."""

    gamma: np.ndarray
    Ts: float
    leakage: str = "none"
    sigma0: float = 0.0
    mu: float = 0.0
    dead_zone: float = 0.0
    theta_max: np.ndarray | None = None
    eps_p: float = 0.1

    def apply(self, W, dW, e, ePB, s, eps):
        dW = dW.copy()
        if self.leakage == "sigma":  # W' = gamma (phi_d sigma e'PB - sigma_0 W)
            dW -= self.gamma[:, None] * self.sigma0 * W
        elif self.leakage == "e":  # W' = gamma (phi_d sigma e'PB - mu ||e'PB|| W)
            dW -= self.gamma[:, None] * self.mu * np.linalg.norm(ePB) * W
        if self.dead_zone > 0 and s < self.dead_zone:
            dW = np.zeros_like(dW)  # no adaptation; the projection's pull-back still holds
        if self.theta_max is not None:  # Proj(theta, y), column by column
            for j in range(W.shape[1]):
                th, y, tm = W[:, j], dW[:, j], self.theta_max[j]
                f = ((1 + self.eps_p) * th @ th - tm**2) / (self.eps_p * tm**2)
                grad = 2 * (1 + self.eps_p) * th / (self.eps_p * tm**2)
                if f > 0 and y @ grad > 0:
                    dW[:, j] = y - np.outer(grad, grad) @ y * f / (grad @ grad)
                # an Euler step that overshoots ||theta|| <= theta_max is pulled back onto it
                w_new = th + self.Ts * dW[:, j]
                norm = np.linalg.norm(w_new)
                if norm > tm:
                    dW[:, j] = (w_new * (tm / norm) - th) / self.Ts
        return dW


@pytest.mark.parametrize("kind", ["sigma", "e", "dead_zone", "projection", "all"])
def test_modifiers_match_the_published_formulas(kind):
    design = demo_design()
    m = design.rig.m
    xs, cs = closed_loop_states(design, 300, kicks=True)
    theta = np.array([0.2, 0.4])
    opts = {
        "sigma": dict(leakage="sigma", sigma0=0.5),
        "e": dict(leakage="e", mu=2.0),
        "dead_zone": dict(dead_zone=0.3 * design.eps),
        "projection": dict(projection=True, theta_max=tuple(theta)),
        "all": dict(leakage="e", mu=1.0, dead_zone=0.2 * design.eps, projection=True,
                    theta_max=tuple(theta)),
    }[kind]
    settings = fast.ModifierSettings(**opts)
    ref_mod = PublishedModifiers(
        gamma=np.asarray(design.gamma, float), Ts=design.Ts, leakage=settings.leakage,
        sigma0=settings.sigma0, mu=settings.mu, dead_zone=settings.dead_zone,
        theta_max=theta if settings.projection else None, eps_p=settings.projection_eps)
    rng = np.random.default_rng(5)
    w0 = rng.normal(size=(design.n_regressors, m)) * 0.12  # both columns start outside theta_max
    compare_ticks(design, xs, cs, modifiers=[ref_mod], settings=settings, w0=w0)


@pytest.mark.parametrize("overrides", [
    ("adaptation.leakage=sigma", "adaptation.sigma0=0.5"),
    ("adaptation.leakage=e", "adaptation.mu=2.0", "adaptation.dead_zone=0.01",
     "adaptation.projection=true", "adaptation.theta_max=[0.3, 0.5]"),
])
def test_modifiers_match_runtime_modifiers(overrides):
    # The numpy modifiers of runtime.method.modifiers (an independent implementation) as reference.
    from runtime.method.modifiers import modifiers_from_config

    cfg = load_config(DEMO, list(overrides))
    design = design_from_config(cfg)
    mods = modifiers_from_config(cfg, design)
    settings = fast.ModifierSettings.from_config(cfg, design)
    xs, cs = closed_loop_states(design, 300, kicks=True)
    w0 = np.random.default_rng(6).normal(size=(design.n_regressors, 2)) * 0.1
    compare_ticks(design, xs, cs, modifiers=mods, settings=settings, w0=w0)


def test_modifier_order_the_kernel_cannot_follow_is_refused():
    from runtime.method.modifiers import DeadZone, Projection, SigmaModification

    with pytest.raises(ValueError, match="order"):
        fast.ModifierSettings.from_modifiers([Projection([1.0, 1.0]), DeadZone(0.1)], 2)
    with pytest.raises(ValueError, match="order"):
        fast.ModifierSettings.from_modifiers([SigmaModification(1.0), SigmaModification(1.0)], 2)


def test_sigma_modification_decays_weights_geometrically_at_zero_error():
    # With e = 0 the update is pure leakage: W_k+1 = (1 - Ts gamma_i sigma_0) W_k (Euler of
    # W' = -gamma sigma_0 W; docs/method.md §4, Ioannou and Kokotovic).
    design = demo_design()
    fl = fast.FastLaw(design, fast.ModifierSettings(leakage="sigma", sigma0=3.0))
    x = np.zeros(4)
    w0 = np.ones((design.n_regressors, 2))
    fl.init_state(x, w0)
    fl.step(x, np.zeros(2))
    expect = (1 - design.Ts * np.asarray(design.gamma)[:, None] * 3.0) * w0
    assert close(fl.W, expect, 1e-12)


def test_projection_keeps_each_column_near_its_radius():
    # Pomet and Praly: with Proj the weights stay in ||theta|| <= theta_max (continuous time);
    # the sampled kernel pulls an overshooting Euler step back onto that ball.
    design = demo_design("adaptation.gamma=20")
    theta = (0.2, 0.4)
    fl = fast.FastLaw(design, fast.ModifierSettings(projection=True, theta_max=theta))
    fl.init_state(np.zeros(4))
    rng = np.random.default_rng(2)
    for _ in range(3000):
        fl.init_state(np.zeros(4), fl.W.copy())  # keep the error persistent and large
        fl.step(rng.normal(size=4) * 0.5 * design.limits, np.zeros(2))
    norms = np.linalg.norm(fl.W, axis=0)
    assert np.all(np.isfinite(fl.W))
    assert np.all(norms <= np.array(theta) * (1 + 1e-12))
    assert np.all(norms >= np.array(theta) * 0.5)  # it did reach the boundary region


# ---------------------------------------------------------------- radial basis block
class CodedRBFBasis:
    """Coded terms then Gaussian radial terms sigma_i = exp(-||x - c_i||^2 / (2 w_i^2))."""

    def __init__(self, codes, centres, widths, tanh_width=0.05):
        self.codes = tuple(codes)
        self.rbf_centres = np.asarray(centres, float)
        self.rbf_widths = np.asarray(widths, float)
        self.tanh_width = tanh_width
        self.names = tuple(f"t{i}" for i in range(len(codes) + len(widths)))

    @property
    def size(self):
        return len(self.names)

    def evaluate(self, x, out=None):
        x = np.asarray(x, float)
        cols = []
        for op, i, j in self.codes:
            cols.append({"bias": np.ones(x.shape[:-1]), "x": x[..., i],
                         "sin": np.sin(x[..., i]), "cos": np.cos(x[..., i]),
                         "abs": np.abs(x[..., i]), "tanh": np.tanh(x[..., i] / self.tanh_width),
                         "mul": x[..., i] * x[..., j]}[op])
        d2 = np.sum((x[..., None, :] - self.rbf_centres) ** 2, axis=-1)
        rbf = np.exp(-d2 / (2 * self.rbf_widths**2))
        return np.concatenate([np.stack(cols, -1), rbf], axis=-1)


def test_radial_basis_block_matches_reference():
    base = demo_design()
    rng = np.random.default_rng(9)
    codes = [("bias", 0, 0), ("x", 1, 0), ("sin", 0, 0), ("cos", 1, 0), ("abs", 2, 0),
             ("tanh", 3, 0), ("mul", 2, 3)]
    centres = rng.uniform(-0.3, 0.3, size=(12, 4))
    basis = CodedRBFBasis(codes, centres, rng.uniform(0.1, 0.4, size=12), tanh_width=0.02)
    n_reg = basis.size + 2
    design = dataclasses.replace(base, basis=basis, gamma=np.full(n_reg, 0.5))
    xs, cs = closed_loop_states(base, 300, kicks=False)
    compare_ticks(design, xs, cs)


def test_radial_basis_from_config_matches_reference():
    design = demo_design('basis.kind="rbf"', 'basis.terms=["bias", "cos:el"]',
                         'basis.rbf_states=["el", "el_rate"]', "basis.rbf_per_axis=[4, 3]",
                         "basis.rbf_span=[0.6, 1.0]", "basis.rbf_width=[0.3, 0.8]",
                         "adaptation.gamma=1.0")
    assert design.basis.rbf_centres is not None and design.basis.rbf_scale is not None
    assert design.n_regressors == 2 + 12 + 2
    xs, cs = closed_loop_states(design, 300, kicks=False)
    compare_ticks(design, xs, cs)


# ---------------------------------------------------------------- plant kernels
# The plant kernel (sim_rigs.kernel) against its numpy reference: tests/test_rig_plant.py.


# ---------------------------------------------------------------- dry run engines
KEYS = ("max_margin_ratio", "rms_error_final", "weight_norm", "max_eff_rate", "max_step_gain")


@pytest.mark.parametrize("extra", [(), ("adaptation.law=standard", "adaptation.gamma=8")])
def test_dry_run_engines_agree(extra):
    cfg = load_config(DEMO, ["commands.duration=2", *NOISE_OFF, *extra])
    a = dry_run(cfg, engine="fast")
    b = dry_run(cfg, engine="reference")
    assert a.summary["engine"] == "fast" and b.summary["engine"] == "reference"
    for key in KEYS:
        assert close(a.summary[key], b.summary[key]), key
    for key in ("ticks", "sim_seconds", "clamp_ticks", "breach_time", "law"):
        assert a.summary[key] == b.summary[key], key
    assert a.columns.keys() == b.columns.keys()
    for name, col in a.columns.items():
        assert close(col, b.columns[name], 1e-8), name


def test_dry_run_engines_agree_with_a_narrowing_bound_and_modifiers():
    cfg = load_config(DEMO, ["commands.duration=2", *NOISE_OFF,
                             'adaptation.bound.kind="exponential"', "adaptation.bound.eps0=0.1",
                             "adaptation.bound.eps_inf=0.05", "adaptation.bound.alpha=100",
                             'adaptation.bound.on_violation="rate_limit"',
                             'adaptation.leakage="e"', "adaptation.mu=0.5",
                             "adaptation.projection=true", "adaptation.theta_max=[2.0, 2.0]"])
    a = dry_run(cfg, engine="fast")
    b = dry_run(cfg, engine="reference")
    assert a.summary["eps_min"] < 0.1  # the bound did narrow
    for name, col in a.columns.items():
        assert close(col, b.columns[name], 1e-8), name
    assert a.summary["breach_time"] == b.summary["breach_time"]


def test_dry_run_engines_agree_with_sensor_noise():
    # The fast engine pre-draws the same normal variates the reference draws per reading.
    cfg = load_config(DEMO, ["commands.duration=1"])
    a = dry_run(cfg, engine="fast")
    b = dry_run(cfg, engine="reference")
    assert close(a.columns["y"], b.columns["y"], 1e-8)
    assert close(a.summary["max_margin_ratio"], b.summary["max_margin_ratio"], 1e-8)


def test_unknown_engine_is_refused():
    cfg = load_config(DEMO, ["commands.duration=0.1"])
    with pytest.raises(ValueError, match="engine"):
        dry_run(cfg, engine="quick")


# ---------------------------------------------------------------- the sized law tick
def sized_vs_reference(design, xs, cs, eps_t=None, settings=None, modifiers=()):
    """The law tick as the dry-run loop and the sweep kernel call it (`law_tick_rig`, compiled
    in the pedestal's module with its sizes as constants: the compiler unrolls the loops over
    states and inputs) against the numpy reference (`AdaptiveLaw.step`) on the same
    measurements, and to the bit against `law_tick` with the sizes read at run time; returns
    the clamp and cap flags per tick."""
    tick_rig = rigloops.compiled(RIGS["pedestal"]).law_tick_rig
    ref = AdaptiveLaw(design, modifiers)
    ic, fc = fast.pack_law(design, settings)
    n, m, n_reg = 4, 2, design.n_regressors
    sa, sb = np.zeros(n + n_reg * m), np.zeros(n + n_reg * m)
    oa, ob = np.zeros(fast.out_size(n, m, n_reg)), np.zeros(fast.out_size(n, m, n_reg))
    sa[:n] = sb[:n] = xs[0]
    st = ref.init_state(xs[0])
    flags = []
    o = lawtick.OUT_HEADER
    for k in range(len(xs)):
        eps = design.eps if eps_t is None else eps_t[k]
        a = ref.step(st, xs[k], cs[k], eps)
        fast.law_tick(xs[k], cs[k], eps, ic, fc, sa, oa)
        tick_rig(xs[k], cs[k], eps, ic, fc, sb, ob)
        assert np.array_equal(oa[:o + 3 * m + n + n_reg], ob[:o + 3 * m + n + n_reg]), k
        assert np.array_equal(sa, sb), k
        assert close(ob[o:o + m], a.u) and close(ob[o + m:o + 2 * m], a.u_raw), k
        assert close(ob[lawtick.O_RATIO], a.ratio), k
        assert close(sb[n:].reshape(n_reg, m), st.W) and close(sb[:n], st.xr), k
        assert bool(ob[lawtick.O_CLAMPED]) == bool(a.clamped), k
        assert bool(ob[lawtick.O_CAPPED]) == bool(a.capped), k
        flags.append((ob[lawtick.O_CLAMPED], ob[lawtick.O_CAPPED]))
    return np.array(flags)


@pytest.mark.parametrize("overrides", [
    ("adaptation.gamma=20",),
    ("adaptation.law=standard",),
    ("adaptation.barrier=log", "adaptation.unknown_effectiveness=false"),
    ("adaptation.dead_zone=0.01",),
])
def test_sized_law_tick_matches_the_reference(overrides):
    # One law tick: the sized form the compiled loops use equals law_tick to the bit and
    # follows the numpy reference (runtime.method.law); kicks push the error past the clamp
    # and the cap.
    from runtime.method.modifiers import modifiers_from_config

    cfg = load_config(DEMO, list(overrides))
    design = design_from_config(cfg)
    mods = list(modifiers_from_config(cfg, design))
    xs, cs = closed_loop_states(design, 400, kicks=True)
    t = np.arange(400) * design.Ts
    flags = sized_vs_reference(design, xs, cs, eps_t=design.eps * (1 + np.exp(-t / 0.1)),
                               settings=fast.ModifierSettings.from_modifiers(mods, 2),
                               modifiers=mods)
    if overrides == ("adaptation.gamma=20",):
        assert flags[:, 0].any() and flags[:, 1].any()  # clamp and cap both engaged


def test_sized_law_tick_with_radial_basis():
    design = demo_design('basis.kind="rbf"', 'basis.terms=["bias", "cos:el"]',
                         'basis.rbf_states=["el", "el_rate"]', "basis.rbf_per_axis=[4, 3]",
                         "basis.rbf_span=[0.6, 1.0]", "basis.rbf_width=[0.3, 0.8]",
                         "adaptation.gamma=1.0")
    xs, cs = closed_loop_states(design, 300, kicks=False)
    sized_vs_reference(design, xs, cs)


def test_sized_law_tick_with_weight_modifiers():
    # leakage, dead zone and projection: the sweep kernel runs them through the same tick
    from runtime.method.modifiers import modifiers_from_config

    cfg = load_config(DEMO, ["adaptation.gamma=20", "adaptation.leakage=e", "adaptation.mu=2.0",
                             "adaptation.dead_zone=0.01", "adaptation.projection=true",
                             "adaptation.theta_max=[0.3, 0.5]"])
    design = design_from_config(cfg)
    mods = list(modifiers_from_config(cfg, design))
    xs, cs = closed_loop_states(design, 300, kicks=True)
    sized_vs_reference(design, xs, cs, settings=fast.ModifierSettings.from_config(cfg, design),
                       modifiers=mods)


@numba.njit
def _draw(seed, plant, count):
    st = np.zeros(1, dtype=np.uint64)
    st[0] = fast.stream_key(seed, plant)
    out = np.empty(count)
    fast.stream_normals(st, out)
    return out


def test_noise_streams_are_standard_normal_and_independent():
    from scipy import stats

    a = _draw(7, 0, 200_000)
    b = _draw(7, 1, 200_000)
    # Kolmogorov-Smirnov against N(0, 1) (scipy.stats.kstest); a fixed seed, so not flaky
    assert stats.kstest(a, "norm").pvalue > 1e-3
    assert abs(a.mean()) < 5 / np.sqrt(a.size) and abs(a.var() - 1) < 5 * np.sqrt(2 / a.size)
    assert abs(np.corrcoef(a, b)[0, 1]) < 5 / np.sqrt(a.size)          # plant to plant
    assert abs(np.corrcoef(a[:-1], a[1:])[0, 1]) < 5 / np.sqrt(a.size)  # draw to draw
    assert np.array_equal(_draw(7, 0, 1000), a[:1000])                 # reproducible
    assert not np.array_equal(_draw(8, 0, 1000), a[:1000])             # the seed matters
