"""The update law (runtime.method.law) against the theorem it implements.

The continuous-time closed loop is written out here from the formulas of
docs/method.md §1, §2.2 and §5 (set-theoretic MRAC, Arabi et al. 2018; the MRAC
form of Lavretsky and Wise 2013; sources from memory) and integrated accurately
with scipy's solve_ivp (rtol 1e-9); only P, K1, K2, A_r, B_r, the basis and phi/phi_d come from the
project. On it we check the Lyapunov argument itself: V = phi(||e||_P) +
tr(W_tilde' Gamma^-1 W_tilde Lam) never increases and equals V(0) minus the
dissipation integral of phi_d e'Re. Then the sampled `AdaptiveLaw.step` is
checked against this continuous solution at a small sample period.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from runtime.config import Config
from runtime.method.barrier import BARRIERS, get_barrier
from runtime.method.design import Design, design_from_config
from runtime.method.law import AdaptiveLaw, LawState

# The unknown weights on sigma = [bias, pos, vel, sin(pos)] of the small test rig:
# a destabilising stiffness and damping plus a bias and a nonlinear term.
W_STAR = np.array([[0.8], [-2.0], [1.5], [3.0]])
GAMMA = [10.0, 20.0, 30.0, 15.0]  # one learning rate per regressor (Gamma diagonal)


def command(t: float) -> np.ndarray:
    """A persistent command on the tracked output pos [m]."""
    return np.array([0.3 * np.sin(1.3 * t)])


def make_design(raw: dict, **adaptation: object) -> Design:
    raw["adaptation"].update(adaptation)
    return design_from_config(Config(raw=raw))


@dataclass
class ClosedLoop:
    """x' = A x + B Lam (u + W*' sigma(x)), u = u_n - W_hat' sigma_bar (docs/method.md §1, §5).

    sigma_bar = [sigma; u_n / u_scale] when `augment` (u_scale = 1 is the textbook form;
    the runtime normalises by the input limits). The update law is
    W_hat' = sign * Gamma * phi_d * sigma_bar (e'PB) (phi_d = 1 for the standard law).
    """

    d: Design
    law: str = "barrier"
    lam: np.ndarray = field(default_factory=lambda: np.ones(1))
    augment: bool = False
    u_scale: np.ndarray = field(default_factory=lambda: np.ones(1))
    sign: float = 1.0
    gamma: np.ndarray = field(default_factory=lambda: np.array(GAMMA))

    def __post_init__(self) -> None:
        self.n, self.m = self.d.rig.n, self.d.rig.m
        self.N = self.d.basis.size + (self.m if self.augment else 0)
        assert self.gamma.shape == (self.N,)
        self.bar = get_barrier(self.d.barrier)
        self.Lam = np.diag(self.lam)
        # The ideal weights of the augmented regressor: Lam W_bar*' sigma_bar must equal
        # Lam W*' sigma + (Lam - I) u_n, so the u_n rows are diag(u_scale) (I - Lam^-1).
        self.W_bar = W_STAR
        if self.augment:
            W_u = np.diag(self.u_scale) @ (np.eye(self.m) - np.linalg.inv(self.Lam))
            self.W_bar = np.vstack([W_STAR, W_u])

    def phi_d(self, s: float) -> float:
        return float(self.bar.phi_d(s, self.d.eps)) if self.law == "barrier" else 1.0

    def phi(self, s: np.ndarray) -> np.ndarray:
        return self.bar.phi(s, self.d.eps) if self.law == "barrier" else s * s

    def rhs(self, t: float, z: np.ndarray) -> np.ndarray:
        d, n, m, N = self.d, self.n, self.m, self.N
        x, xr, W = z[:n], z[n:2 * n], z[2 * n:2 * n + N * m].reshape(N, m)
        e = x - xr
        s = np.sqrt(e @ d.P @ e)
        sig = d.basis.evaluate(x)
        c = command(t)
        u_n = -d.K1 @ x + d.K2 @ c
        sig_bar = np.concatenate([sig, u_n / self.u_scale]) if self.augment else sig
        u = u_n - W.T @ sig_bar
        x_dot = d.A @ x + d.rig.B @ self.Lam @ (u + W_STAR.T @ sig)
        xr_dot = d.A_r @ xr + d.B_r @ c
        pd = self.phi_d(s)
        W_dot = self.sign * pd * (self.gamma * sig_bar)[:, None] * (e @ d.PB)[None, :]
        dissipation = pd * (e @ d.R @ e)  # -dV/dt by the Lyapunov argument, docs/method.md §2.2
        return np.concatenate([x_dot, xr_dot, W_dot.ravel(), [dissipation]])

    def simulate(self, x0: np.ndarray, T: float, points: int = 4001,
                 stop_at_bound: bool = False) -> Trajectory:
        n, N, m = self.n, self.N, self.m
        z0 = np.concatenate([x0, np.zeros(n), np.zeros(N * m), [0.0]])
        eps = self.d.eps

        def crossing(t: float, z: np.ndarray) -> float:
            e = z[:n] - z[n:2 * n]
            return float(np.sqrt(e @ self.d.P @ e)) - (0.999 * eps if stop_at_bound else eps)

        crossing.terminal = stop_at_bound  # type: ignore[attr-defined]
        crossing.direction = 1.0  # type: ignore[attr-defined]
        sol = solve_ivp(self.rhs, (0.0, T), z0, t_eval=np.linspace(0.0, T, points),
                        rtol=1e-9, atol=1e-12, max_step=0.01, events=crossing)
        assert sol.status in (0, 1), sol.message
        z = sol.y.T
        x, xr = z[:, :n], z[:, n:2 * n]
        W = z[:, 2 * n:2 * n + N * m].reshape(-1, N, m)
        e = x - xr
        s = np.sqrt(np.einsum("ki,ij,kj->k", e, self.d.P, e))
        Wt = W - self.W_bar
        V = self.phi(s) + np.einsum("kij,j,kij->k", Wt / self.gamma[:, None], self.lam, Wt)
        return Trajectory(sol.t, x, xr, W, e, s, V, z[:, -1], sol.t_events[0])


@dataclass
class Trajectory:
    t: np.ndarray
    x: np.ndarray
    xr: np.ndarray
    W: np.ndarray
    e: np.ndarray
    s: np.ndarray
    V: np.ndarray
    dissipated: np.ndarray
    crossings: np.ndarray


def start_inside(d: Design, fraction: float) -> np.ndarray:
    """An initial state x0 (with x_r(0) = 0) at ||e(0)||_P = fraction * eps."""
    return np.array([fraction * d.eps / np.sqrt(d.P[0, 0]), 0.0])


@pytest.fixture(params=sorted(BARRIERS))
def design(small_rig_raw, request) -> Design:
    """The small rig's design, once per barrier family (the argument holds for any family)."""
    return make_design(small_rig_raw, gamma=GAMMA, barrier=request.param)


# --------------------------------------------------------------- the theorem
def test_barrier_law_lyapunov_function_never_increases(design):
    # Theorem (docs/method.md §2.2; Arabi et al. 2018): V' = -phi_d e'Re <= 0 along the loop.
    loop = ClosedLoop(design)
    tr = loop.simulate(start_inside(design, 0.3), T=6.0)
    V0 = tr.V[0]
    assert np.all(np.diff(tr.V) <= 1e-9 * V0)
    assert tr.V[-1] < 0.95 * V0  # it really decreases (the error was not trivially zero)
    # The identity behind it: V(t) = V(0) - integral of phi_d e'Re.
    np.testing.assert_allclose(tr.V + tr.dissipated, V0, rtol=1e-6)
    # The runtime's own Lyapunov value (Lam = I) agrees with the formula of docs/method.md §2.2.
    law = AdaptiveLaw(design)
    np.testing.assert_allclose(law.lyapunov_value(tr.e, tr.W - W_STAR), tr.V, rtol=1e-9)


def test_flipped_update_sign_makes_the_lyapunov_function_rise(design):
    # The same check on a deliberately wrong law (W_hat' = -Gamma phi_d sigma e'PB) fails:
    # this is what the test above would report for a sign error in the update law.
    loop = ClosedLoop(design, sign=-1.0)
    tr = loop.simulate(start_inside(design, 0.3), T=6.0, stop_at_bound=True)
    assert np.max(np.diff(tr.V)) > 1e-4 * tr.V[0]
    assert np.max(tr.V) > 1.01 * tr.V[0]


def test_barrier_law_keeps_the_error_inside_the_bound_and_the_error_decays(design):
    # Theorem (docs/method.md §2.2; Arabi et al. 2018): ||e(0)||_P < eps implies
    # ||e(t)||_P < eps for all t and e -> 0. Quantitatively phi(s(t)) <= V(0), so
    # s(t) <= s*, the s where phi(s*) = V(0) (for the rational family the positive root
    # of s^2 + V0 s - V0 eps = 0).
    eps = design.eps
    loop = ClosedLoop(design)
    tr = loop.simulate(start_inside(design, 0.3), T=10.0)
    assert tr.crossings.size == 0  # solve_ivp's event search found no crossing of eps
    assert np.max(tr.s) < eps
    V0 = tr.V[0]
    s_star = brentq(lambda s: float(loop.bar.phi(s, eps)) - V0, 0.0, eps * (1 - 1e-15))
    if design.barrier == "rational":
        assert s_star == pytest.approx(0.5 * (-V0 + np.sqrt(V0 * V0 + 4 * V0 * eps)))
    assert np.max(tr.s) <= s_star * (1 + 1e-9)
    peak = float(np.max(tr.s))
    late = tr.s[tr.t >= 8.0]
    assert np.max(late) < 0.25 * peak
    # e is square integrable: the dissipation integral of phi_d e'Re never exceeds V(0).
    assert tr.dissipated[-1] <= V0 * (1 + 1e-6)


def test_standard_law_with_the_same_gamma_leaves_the_bound(design):
    # Same plant, same start, same Gamma, phi_d = 1: the standard law is stable in its own
    # Lyapunov function e'Pe + tr(W_tilde' Gamma^-1 W_tilde) but does not respect eps.
    loop = ClosedLoop(design, law="standard")
    tr = loop.simulate(start_inside(design, 0.3), T=3.0)
    assert np.all(np.diff(tr.V) <= 1e-9 * tr.V[0])
    assert tr.crossings.size > 0
    assert np.max(tr.s) > 1.5 * design.eps


# ----------------------------------------------------- unknown effectiveness
def test_unknown_effectiveness_without_augmentation_lets_the_lyapunov_function_rise(design):
    # Brief 2a: with Lam != I the term B (Lam - I) u_n is not cancelled by the plain law.
    loop = ClosedLoop(design, lam=np.array([0.6]))
    tr = loop.simulate(start_inside(design, 0.3), T=6.0, stop_at_bound=True)
    assert np.max(np.diff(tr.V)) > 1e-4 * tr.V[0]


def test_unknown_effectiveness_with_augmented_regressor_never_rises(small_rig_raw):
    # Brief 2a: sigma_bar = [sigma; u_n] absorbs (Lam - I) u_n; with the Lyapunov function
    # phi + tr(W_tilde' Gamma^-1 W_tilde Lam) the derivative is again -phi_d e'Re.
    d = make_design(small_rig_raw, gamma=[*GAMMA, 10.0], unknown_effectiveness=True)
    loop = ClosedLoop(d, lam=np.array([0.6]), augment=True, gamma=np.array([*GAMMA, 10.0]))
    tr = loop.simulate(start_inside(d, 0.3), T=6.0)
    assert tr.crossings.size == 0
    assert np.all(np.diff(tr.V) <= 1e-9 * tr.V[0])
    np.testing.assert_allclose(tr.V + tr.dissipated, tr.V[0], rtol=1e-6)


# ------------------------------------------- the sampled law vs the theory
def rk4_plant_step(d: Design, lam: np.ndarray, x: np.ndarray, u: np.ndarray,
                   T: float) -> np.ndarray:
    """One RK4 step of the true plant with the input held (zero-order hold)."""
    def f(x: np.ndarray) -> np.ndarray:
        return d.A @ x + d.rig.B @ (lam * (u + W_STAR.T @ d.basis.evaluate(x)))

    k1 = f(x)
    k2 = f(x + 0.5 * T * k1)
    k3 = f(x + 0.5 * T * k2)
    k4 = f(x + T * k3)
    return x + T / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)


@pytest.mark.parametrize(("lam", "augment"), [(1.0, False), (0.6, True)])
def test_sampled_law_follows_the_continuous_solution_at_a_small_period(small_rig_raw, lam,
                                                                       augment):
    # Brief 2b: the sampled law (semi-implicit Euler weights, exact-ZOH reference model) is a
    # consistent discretisation of the continuous law: at Ts = 1e-4 it tracks the accurate
    # continuous solution to a small fraction of the signals' size.
    small_rig_raw["rig"]["input_limits"] = [50.0]
    small_rig_raw["loop"]["period"] = 1e-4
    gamma = [*GAMMA, 10.0] if augment else GAMMA
    d = make_design(small_rig_raw, gamma=gamma, unknown_effectiveness=augment)
    Ts, T = d.Ts, 1.0
    ticks = int(round(T / Ts))
    lam_v = np.array([lam])
    loop = ClosedLoop(d, lam=lam_v, augment=augment, u_scale=d.rig.input_limits,
                      gamma=np.array(gamma))
    x0 = start_inside(d, 0.3)
    ref = loop.simulate(x0, T, points=ticks + 1)

    law = AdaptiveLaw(d)
    state = law.init_state(np.zeros(2))
    x = x0.copy()
    xs, Ws = [x.copy()], [state.W.copy()]
    for k in range(ticks):
        out = law.step(state, x, command(k * Ts))
        assert not out.capped and not out.clamped
        assert np.all(np.abs(out.u_raw) < d.rig.input_limits)  # no saturation in the theory
        x = rk4_plant_step(d, lam_v, x, out.u, Ts)
        xs.append(x.copy())
        Ws.append(state.W.copy())
    xs_a, Ws_a = np.array(xs), np.array(Ws)
    x_scale = np.max(np.abs(ref.x), axis=0)
    assert np.all(np.max(np.abs(xs_a - ref.x), axis=0) < 5e-3 * x_scale)
    assert np.max(np.abs(Ws_a - ref.W)) < 5e-3 * np.max(np.abs(ref.W))
    assert np.max(ref.s) > 0.3 * d.eps  # the comparison covers a real transient


# ------------------------------------------------------------ broadcasting
def test_batched_step_equals_separate_single_plant_steps(small_rig_raw):
    # Five plants in one call must give exactly what five separate calls give, including
    # one plant near the bound (clamp and step-gain cap engaged) and per-plant eps.
    d = make_design(small_rig_raw, gamma=[*GAMMA, 10.0], unknown_effectiveness=True)
    rng = np.random.default_rng(3)
    batch = 5
    law_b = AdaptiveLaw(d)
    laws_1 = [AdaptiveLaw(d) for _ in range(batch)]
    xr0 = rng.normal(scale=0.05, size=(batch, 2))
    W0 = rng.normal(size=(batch, d.n_regressors, 1))
    eps = d.eps * np.array([1.0, 1.0, 0.8, 1.2, 1.0])
    state_b = LawState(xr=xr0.copy(), W=W0.copy())
    states_1 = [LawState(xr=xr0[i].copy(), W=W0[i].copy()) for i in range(batch)]
    x_all = xr0 + rng.normal(scale=0.01, size=(4, batch, 2))
    # plant 1 starts at 0.995 eps along the first axis: the clamp engages
    x_all[0, 1] = xr0[1] + np.array([0.995 * d.eps / np.sqrt(d.P[0, 0]), 0.0])
    c_all = rng.normal(scale=0.2, size=(4, batch, 1))
    seen_clamp = False
    for k in range(4):
        out_b = law_b.step(state_b, x_all[k], c_all[k], eps=eps)
        for i in range(batch):
            out_1 = laws_1[i].step(states_1[i], x_all[k, i], c_all[k, i], eps=eps[i])
            for name in ("u", "u_raw", "u_n", "e", "s", "ratio", "phi_d", "eff_rate",
                         "step_gain", "clamped", "capped"):
                np.testing.assert_allclose(getattr(out_b, name)[i], getattr(out_1, name),
                                           rtol=1e-12, atol=1e-15, err_msg=name)
            np.testing.assert_allclose(state_b.W[i], states_1[i].W, rtol=1e-12, atol=1e-15)
            np.testing.assert_allclose(state_b.xr[i], states_1[i].xr, rtol=1e-12, atol=1e-15)
        seen_clamp |= bool(out_b.clamped[1])
    assert seen_clamp


def test_update_uses_the_error_of_this_tick_before_the_control(small_rig_raw):
    # Brief 2b tick order: W_k+1 = W_k + Ts Gamma phi_d(s_k) sigma_bar(x_k) e_k'PB, then
    # u_k = u_n - W_k+1' sigma_bar, then x_r advances by the exact ZOH.
    d = make_design(small_rig_raw, gamma=GAMMA)
    law = AdaptiveLaw(d)
    state = law.init_state(np.zeros(2))
    x = np.array([0.01, -0.02])
    c = np.array([0.1])
    out = law.step(state, x, c)
    e = x
    s = np.sqrt(e @ d.P @ e)
    phi_d = float(get_barrier("rational").phi_d(s, d.eps))
    sig = d.basis.evaluate(x)
    W1 = d.Ts * phi_d * (np.array(GAMMA) * sig)[:, None] * (e @ d.PB)[None, :]
    np.testing.assert_allclose(state.W, W1, rtol=1e-12)
    u_n = -d.K1 @ x + d.K2 @ c
    np.testing.assert_allclose(out.u, u_n - W1.T @ sig, rtol=1e-12)
    np.testing.assert_allclose(state.xr, d.B_d @ c, rtol=1e-12)
    assert float(out.phi_d) == pytest.approx(phi_d, rel=1e-12)
    assert float(out.ratio) == pytest.approx(s / d.eps, rel=1e-12)



def test_frozen_law_holds_the_weights_but_keeps_the_reference_moving(small_rig_raw):
    # Brief 2b: adaptation is frozen while a fallback is active; the reference model and
    # the control (from the held weights) still run.
    d = make_design(small_rig_raw, gamma=GAMMA)
    law = AdaptiveLaw(d)
    W0 = np.random.default_rng(5).normal(size=(d.n_regressors, 1))
    state = LawState(xr=np.zeros(2), W=W0.copy())
    law.frozen = True
    x, c = np.array([0.01, -0.02]), np.array([0.1])
    out = law.step(state, x, c)
    np.testing.assert_array_equal(state.W, W0)
    u_n = -d.K1 @ x + d.K2 @ c
    np.testing.assert_allclose(out.u, u_n - W0.T @ d.basis.evaluate(x), rtol=1e-12)
    np.testing.assert_allclose(state.xr, d.B_d @ c, rtol=1e-12)
    law.frozen = False
    law.step(state, x, c)
    assert not np.array_equal(state.W, W0)
