"""The time-varying bound eps(t): the rate condition, derived in runtime/method/bound.py, checked.

Sources: our own derivation (runtime/method/bound.py docstring) of
dV/dt = -phi_d e'Re - s^2 eps'/(eps - s)^2 for the rational barrier; the
condition eps' >= -(c_bar/2) eps follows from it (docs/method.md §7) and is
checked here by an accurate continuous simulation (scipy solve_ivp) of a
small plant under the continuous-time barrier law with eps(t).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from runtime.config import Config, ConfigError, load_config
from runtime.method.bound import BoundSchedule, schedule_from_config
from runtime.method.design import design_from_config, lqr, lyapunov

# a small plant: double integrator, x' = A x + B (u + W' sigma(x)), sigma = [x1, x2, 1]
A = np.array([[0.0, 1.0], [0.0, 0.0]])
B = np.array([[0.0], [1.0]])
K1, _, _ = lqr(A, B, np.eye(2), np.eye(1))
A_r = A - B @ K1
R = np.eye(2)
P = lyapunov(A_r, R)
PB = P @ B
C_BAR = float(np.min(np.linalg.eigvalsh(R)) / np.max(np.linalg.eigvalsh(P)))
W_TRUE = np.array([0.8, -0.6, 0.5])
GAMMA = 3.0


def sigma(x: np.ndarray) -> np.ndarray:
    return np.array([x[0], x[1], 1.0])


def lyapunov_trace(sched: BoundSchedule, T: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """V(t), s(t), eps(t) along the continuous closed loop (command c = 0)."""

    def rhs(t, z):
        x, xr, W = z[:2], z[2:4], z[4:]
        e = x - xr
        s = np.sqrt(e @ P @ e)
        eps = float(sched.eps(t))
        phi_d = (2 * eps - s) / (2 * (eps - s) ** 2)
        sg = sigma(x)
        u = -K1 @ x - W @ sg
        dx = A @ x + B[:, 0] * (u[0] + W_TRUE @ sg)
        dxr = A_r @ xr
        dW = GAMMA * phi_d * sg * float(e @ PB[:, 0])
        return np.concatenate((dx, dxr, dW))

    x0 = np.array([0.3, 0.0])
    z0 = np.concatenate((x0, np.zeros(2), np.zeros(3)))  # x_r(0) = 0: e(0) = x0
    t = np.linspace(0.0, T, 4001)
    sol = solve_ivp(rhs, (0.0, T), z0, t_eval=t, method="DOP853", rtol=1e-11, atol=1e-13)
    assert sol.success
    x, xr, W = sol.y[:2].T, sol.y[2:4].T, sol.y[4:].T
    e = x - xr
    s = np.sqrt(np.einsum("ki,ij,kj->k", e, P, e))
    eps = sched.eps(t)
    assert np.all(s < eps)
    Wt = W - W_TRUE
    V = s * s / (eps - s) + np.sum(Wt * Wt, axis=1) / GAMMA
    return V, s, eps


def test_lyapunov_never_increases_under_an_admissible_schedule():
    # alpha = c_bar / 2 exactly: the limit of docs/method.md §7 (derivation in
    # runtime/method/bound.py).
    sched = BoundSchedule("exponential", eps0=2.0, eps_inf=0.6, alpha=C_BAR / 2)
    assert sched.admissible(C_BAR, np.linspace(0, 20, 2001))
    V, s, eps = lyapunov_trace(sched, 20.0)
    assert eps[-1] < 0.7 * eps[0]  # it really narrowed
    assert np.max(np.diff(V)) <= 1e-9 * V[0]


def test_lyapunov_increases_when_the_bound_shrinks_too_fast():
    # 40 x the admissible rate: the -s^2 eps'/(eps - s)^2 term wins and V rises.
    sched = BoundSchedule("exponential", eps0=2.0, eps_inf=0.6, alpha=40 * C_BAR / 2)
    assert not sched.admissible(C_BAR, np.linspace(0, 20, 2001))
    V, s, eps = lyapunov_trace(sched, 3.0)
    assert np.max(np.diff(V)) > 1e-3 * V[0]


def test_growing_is_always_allowed():
    sched = BoundSchedule("exponential", eps0=0.8, eps_inf=2.0, alpha=5.0)
    assert sched.admissible(C_BAR, np.linspace(0, 5, 501))
    V, _, _ = lyapunov_trace(sched, 5.0)
    assert np.max(np.diff(V)) <= 1e-9 * V[0]


def test_exponential_formula_and_rate():
    # eps(t) = eps_inf + (eps0 - eps_inf) exp(-alpha t) (docs/method.md §7); rate by finite
    # difference.
    sched = BoundSchedule("exponential", eps0=3.0, eps_inf=1.0, alpha=0.5)
    t = np.array([0.0, 1.0, 4.0])
    np.testing.assert_allclose(sched.eps(t), 1.0 + 2.0 * np.exp(-0.5 * t))
    h = 1e-6
    np.testing.assert_allclose(sched.rate(t[1:]), (sched.eps(t[1:] + h) - sched.eps(t[1:] - h))
                               / (2 * h), rtol=1e-6)


@pytest.fixture(scope="module")
def base() -> Config:
    return load_config("configs/pedestal-sim.toml")


def _with(cfg: Config, **bound) -> Config:
    return cfg.with_overrides([f"adaptation.bound.{k}={v!r}".replace("'", '"')
                               for k, v in bound.items()])


def test_config_refuses_too_fast_narrowing_and_names_the_limit(base):
    design = design_from_config(base)
    fast = _with(base, kind="exponential", eps_inf=0.02, alpha=10 * design.c_bar)
    with pytest.raises(ConfigError) as err:
        schedule_from_config(fast, design)
    assert err.value.field == "adaptation.bound.alpha"
    assert f"{design.c_bar / 2:.4g}" in str(err.value)


def test_config_rate_limit_slows_the_schedule_and_the_report_says_so(base):
    design = design_from_config(base)
    cfg = _with(base, kind="exponential", eps_inf=0.04, alpha=10 * design.c_bar,
                on_violation="rate_limit")
    sched = schedule_from_config(cfg, design)
    assert sched.alpha == pytest.approx(design.c_bar / 2)
    assert sched.admissible(design.c_bar, np.linspace(0, 60, 6001))
    d2 = design_from_config(cfg)
    assert d2.feasible, d2.reasons
    assert any("rate_limit" in w for w in d2.warnings)


def test_piecewise_rate_limit_stretches_the_fast_segment(base):
    design = design_from_config(base)
    cfg = _with(base, kind="piecewise", times=[0.0, 1.0, 5.0], values=[0.05, 0.03, 0.03],
                on_violation="rate_limit")
    sched = schedule_from_config(cfg, design)
    # the drop 0.05 -> 0.03 needs at least 0.02 / (c_bar/2 * 0.03) s
    assert sched.times[1] == pytest.approx(0.02 / (design.c_bar / 2 * 0.03))
    assert sched.admissible(design.c_bar, np.linspace(0, 30, 30001))
    with pytest.raises(ConfigError) as err:
        schedule_from_config(_with(base, kind="piecewise", times=[0.0, 1.0],
                                   values=[0.05, 0.03]), design)
    assert err.value.field == "adaptation.bound.times"


def test_widen_on_command_rewidens_after_a_step_and_stays_admissible(base):
    design = design_from_config(base)
    cfg = _with(base, kind="widen_on_command", eps_inf=0.03, alpha=design.c_bar / 2,
                change=0.1, widen_time=0.1)
    sched = schedule_from_config(cfg, design)
    assert sched.events  # the demo commands move by more than 0.1 rad
    tk = sched.events[0]
    assert sched.eps(tk) < sched.eps0 - 1e-6
    assert sched.eps(tk + sched.widen_time) == pytest.approx(sched.eps0)
    t = np.linspace(0, 30, 300001)
    eps = sched.eps(t)
    assert np.max(np.abs(np.diff(eps))) < 1e-4  # continuous (no jumps)
    assert sched.admissible(design.c_bar, t)


def test_absent_section_is_the_constant_design_eps(base):
    design = design_from_config(base)
    sched = schedule_from_config(base, design)
    np.testing.assert_allclose(sched.eps(np.array([0.0, 10.0])), design.eps)
