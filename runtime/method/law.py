"""The adaptive update laws, one sampled tick at a time.

Pure numpy, no I/O, no clocks. Every array may carry leading batch axes, so
the same `AdaptiveLaw.step` drives one live loop or a sweep of a thousand
plants.

Tick order (semi-implicit, see DEVELOPERS.md):

1. e_k = x_k - x_r,k; s = ||e_k||_P;
2. phi_d(s) with the clamp (never evaluated at s >= eps);
3. W <- W + Ts * gamma * phi_d * sigma_bar(x_k) (e_k' P B), per-step gain capped,
   then the optional modifiers (projection, leakage, dead zone);
4. u_k = u_n - W' sigma_bar with u_n = -K1 x_k + K2 c_k, using the new W;
5. x_r,k+1 = A_d x_r,k + B_d c_k (exact zero-order hold).

With unknown control effectiveness the regressor is augmented with the
nominal input, divided by `adaptation.input_regressor_scale` (default the input
limits): sigma_bar = [sigma(x); u_n / scale] (docs/sampled-data.md, "Choices").
The standard law is the same step with phi_d = 1.

What does not live here: the fallback laws and the watchdog (runtime),
the plant (sim_rigs).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runtime.config import Config
from runtime.method.barrier import clamped_phi_d, get_barrier
from runtime.method.design import Design, design_from_config
from runtime.method.modifiers import modifiers_from_config

Array = NDArray[np.float64]


class WeightModifier(Protocol):
    """Changes the weight derivative: projection, leakage or a dead zone."""

    def apply(self, W: Array, dW: Array, e: Array, ePB: Array, s: Array, eps: Array) -> Array:
        """Return the modified weight derivative (same shape as dW)."""
        ...


@dataclass
class LawState:
    """What the law carries from tick to tick: reference state and weights."""

    xr: Array
    """Reference-model state (..., n)."""
    W: Array
    """Weight estimate (..., N_bar, m)."""


@dataclass
class TickOut:
    """Everything one tick decides and measures."""

    u: Array
    """Input after saturation (..., m): what the rig is told to apply."""
    u_raw: Array
    """Input before saturation (..., m)."""
    u_n: Array
    """Nominal (baseline + tracking) part of the input (..., m)."""
    e: Array
    """Tracking error x - x_r (..., n)."""
    s: Array
    """||e||_P (...,)."""
    ratio: Array
    """Margin ratio ||e||_P / eps (...,)."""
    phi_d: Array
    """Barrier factor used this tick (1 for the standard law)."""
    eff_rate: Array
    """Effective learning rate gamma_max * phi_d (after the step-gain cap)."""
    step_gain: Array
    """Per-step adaptation gain g_k before the cap."""
    clamped: NDArray[np.bool_]
    """True where the phi_d clamp engaged (s beyond (1 - margin) eps)."""
    capped: NDArray[np.bool_]
    """True where the step-gain cap limited the update."""


class AdaptiveLaw:
    """The barrier-modified (or standard) MRAC law for one design."""

    def __init__(self, design: Design, modifiers: Sequence[WeightModifier] = ()) -> None:
        self.design = design
        d = design
        self.kind = d.law
        self.barrier = get_barrier(d.barrier)
        self.Ts = d.Ts
        self.P = d.P
        self.PB = d.PB
        self.K1T = np.ascontiguousarray(d.K1.T)
        self.K2T = np.ascontiguousarray(d.K2.T)
        self.AdT = np.ascontiguousarray(d.A_d.T)
        self.BdT = np.ascontiguousarray(d.B_d.T)
        self.gamma = np.asarray(d.gamma, dtype=float)
        self.gamma_max = float(np.max(self.gamma))
        self.eps = d.eps
        self.clamp_margin = d.clamp_margin
        self.augment = d.augment
        self.u_max = d.rig.input_limits
        self.u_scale = d.regressor_scale
        self.basis = d.basis
        self.lam_bpb = d.lam_max_BPB
        self.cap = d.step_gain_cap
        self.modifiers = list(modifiers)
        self.n, self.m = d.rig.n, d.rig.m
        self.n_reg = d.n_regressors
        self.frozen = False
        """When True the weights are held (a fallback is active)."""

    def init_state(self, x0: ArrayLike) -> LawState:
        """Engage: x_r = x0, weights zero (shape follows x0's batch axes)."""
        x0 = np.array(x0, dtype=float)
        return LawState(xr=x0.copy(), W=np.zeros(x0.shape[:-1] + (self.n_reg, self.m)))

    def regressor(self, x: Array, u_n: Array) -> Array:
        """sigma_bar(x, u_n): basis terms, plus the scaled nominal input when augmented."""
        sig = self.basis.evaluate(x)
        if self.augment:
            sig = np.concatenate((sig, u_n / self.u_scale), axis=-1)
        return sig

    def nominal_input(self, x: Array, c: Array) -> Array:
        """u_n = -K1 x + K2 c."""
        return c @ self.K2T - x @ self.K1T

    def step(self, state: LawState, x: ArrayLike, c: ArrayLike,
             eps: ArrayLike | None = None) -> TickOut:
        """One tick: update the weights with e_k, then compute u_k; advances x_r in place."""
        x = np.asarray(x, dtype=float)
        c = np.asarray(c, dtype=float)
        eps_k = self.eps if eps is None else np.asarray(eps, dtype=float)
        e = x - state.xr
        s = np.sqrt(np.maximum(np.einsum("...i,ij,...j->...", e, self.P, e), 0.0))
        if self.kind == "barrier":
            phi_d, clamped = clamped_phi_d(self.barrier, s, eps_k, self.clamp_margin)
        else:
            phi_d = np.ones_like(s)
            clamped = ~(s < eps_k)
        u_n = self.nominal_input(x, c)
        sig = self.regressor(x, u_n)
        sig_sq = np.einsum("...i,...i->...", sig, sig)
        g = self.Ts * self.gamma_max * phi_d * sig_sq * self.lam_bpb
        scale = np.where(g > self.cap, self.cap / np.maximum(g, 1e-300), 1.0)
        rate = phi_d * scale
        if not self.frozen:
            ePB = e @ self.PB
            dW = (self.gamma * (rate[..., None] * sig))[..., :, None] * ePB[..., None, :]
            for mod in self.modifiers:
                dW = mod.apply(state.W, dW, e, ePB, s, np.asarray(eps_k))
            state.W += self.Ts * dW
            for mod in self.modifiers:
                after = getattr(mod, "after_step", None)
                if after is not None:
                    after(state.W)  # e.g. projection: pull an Euler overshoot back onto the ball
        u_raw = u_n - np.einsum("...im,...i->...m", state.W, sig)
        u = np.clip(u_raw, -self.u_max, self.u_max)
        state.xr = state.xr @ self.AdT + c @ self.BdT
        return TickOut(
            u=u, u_raw=u_raw, u_n=u_n, e=e, s=s, ratio=s / eps_k, phi_d=phi_d,
            eff_rate=self.gamma_max * rate, step_gain=g, clamped=clamped, capped=g > self.cap,
        )

    def lyapunov_value(self, e: Array, W_tilde: Array, eps: float | None = None) -> Array:
        """phi(||e||_P) + tr(W_tilde' Gamma^-1 W_tilde) (standard law: e'Pe instead of phi)."""
        eps = self.eps if eps is None else eps
        s = np.sqrt(np.einsum("...i,ij,...j->...", e, self.P, e))
        first = self.barrier.phi(s, eps) if self.kind == "barrier" else s * s
        second = np.einsum("...im,...im->...", W_tilde / self.gamma[:, None], W_tilde)
        total: Array = first + second
        return total


def law_from_config(cfg: Config, design: Design | None = None) -> AdaptiveLaw:
    """The law a config describes, with its weight modifiers (`runtime.method.modifiers`).

    The time-varying bound is not part of the law: pass `eps` per tick from
    `runtime.method.bound.schedule_from_config(cfg, design).eps(t)`.
    """
    design = design_from_config(cfg) if design is None else design
    return AdaptiveLaw(design, modifiers_from_config(cfg, design))
