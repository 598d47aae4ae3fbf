"""Weight modifiers for the adaptive law: projection, leakage and a dead zone.

Each modifier changes the weight DERIVATIVE the law computed,
``dW = gamma * phi_d * sigma_bar (e' P B)`` (gamma already multiplied in), via
``apply(W, dW, e, ePB, s, eps) -> dW``; every array may carry leading batch
axes (W, dW: (..., N, m); e: (..., n); ePB: (..., m); s, eps: (...,)).

- `DeadZone(threshold)`: no adaptation at all while ||e||_P < threshold
  (the classical remedy for bounded noise; Ioannou and Sun, Robust Adaptive
  Control, 1996, ch. 8).
- `SigmaModification(sigma0, gamma)`: ``W' = gamma (phi_d sigma e'PB - sigma0 W)``
  (Ioannou and Kokotovic).
- `EModification(mu, gamma)`: ``W' = gamma (phi_d sigma e'PB - mu ||e'PB|| W)``
  (Narendra and Annaswamy, IEEE TAC 1987).
- `Projection(theta_max, eps_p)`: the smooth projection operator of Pomet and
  Praly (IEEE TAC 1992) in the form of Lavretsky and Wise (Robust and Adaptive
  Control, 2013), applied to each input column ``theta = W[:, j]`` with
  ``f(theta) = ((1 + eps_p) ||theta||^2 - theta_max^2) / (eps_p theta_max^2)``:
  ``Proj(theta, y) = y - theta theta' y f / ||theta||^2`` when f > 0 and
  theta' y > 0, else y. (grad f is parallel to theta, so grad f grad f' /
  ||grad f||^2 = theta theta' / ||theta||^2.) In continuous time the column
  never leaves ``||theta|| <= theta_max``. The sampled law takes an Euler step,
  which can overshoot by at most one step; `Projection.after_step` then
  rescales any column found outside the ball back onto it, so the bound holds
  in the sampled law too. The projection works in the plain Euclidean metric
  on the full derivative (gamma included), as the compiled kernel does; the
  Lyapunov argument is exact when gamma is the same for all regressors.

Order (`modifiers_from_config`): leakage, dead zone (so below the threshold
nothing moves, leakage included), projection last (so the projected
derivative is the one applied): the order of the compiled kernel in
`runtime.kernels.fast`.

What does not live here: the law (`runtime.method.law`), the time-varying bound
(`runtime.method.bound`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runtime.config import Config, ConfigError

Array = NDArray[np.float64]

LEAKAGES = ("none", "sigma", "e")


def _gamma_col(gamma: ArrayLike | None, N: int) -> Array:
    """gamma as an (N, 1) column that broadcasts against (..., N, m)."""
    g = np.ones(N) if gamma is None else np.broadcast_to(np.asarray(gamma, float), (N,))
    return np.asarray(g, dtype=float)[:, None]


class DeadZone:
    """No adaptation while ||e||_P < threshold (threshold in ||e||_P units)."""

    def __init__(self, threshold: float) -> None:
        if not threshold >= 0:
            raise ValueError(f"dead-zone threshold must be >= 0, got {threshold}")
        self.threshold = float(threshold)

    def apply(self, W: Array, dW: Array, e: Array, ePB: Array, s: Array, eps: Array) -> Array:
        """dW where s >= threshold, zero elsewhere."""
        keep = ~(np.asarray(s) < self.threshold)
        return dW * keep[..., None, None]


class SigmaModification:
    """Fixed leakage: W' = gamma (... - sigma0 W) (Ioannou and Kokotovic)."""

    def __init__(self, sigma0: float, gamma: ArrayLike | None = None) -> None:
        self.sigma0 = float(sigma0)
        self.gamma = None if gamma is None else np.asarray(gamma, dtype=float)

    def apply(self, W: Array, dW: Array, e: Array, ePB: Array, s: Array, eps: Array) -> Array:
        """dW - gamma sigma0 W."""
        return dW - _gamma_col(self.gamma, W.shape[-2]) * (self.sigma0 * W)


class EModification:
    """Error-scaled leakage: W' = gamma (... - mu ||e'PB|| W) (Narendra and Annaswamy 1987)."""

    def __init__(self, mu: float, gamma: ArrayLike | None = None) -> None:
        self.mu = float(mu)
        self.gamma = None if gamma is None else np.asarray(gamma, dtype=float)

    def apply(self, W: Array, dW: Array, e: Array, ePB: Array, s: Array, eps: Array) -> Array:
        """dW - gamma mu ||e'PB|| W."""
        norm = np.sqrt(np.sum(np.asarray(ePB) ** 2, axis=-1))
        leak = _gamma_col(self.gamma, W.shape[-2]) * (self.mu * norm[..., None, None] * W)
        out: Array = dW - leak
        return out


class Projection:
    """The projection operator, column by column, radius theta_max per input column."""

    def __init__(self, theta_max: ArrayLike, eps_p: float = 0.1) -> None:
        self.theta_max = np.asarray(theta_max, dtype=float)
        if np.any(self.theta_max <= 0):
            raise ValueError("theta_max must be positive")
        if not eps_p > 0:
            raise ValueError("projection eps_p must be positive")
        self.eps_p = float(eps_p)

    def f(self, W: Array) -> Array:
        """The convex function f(theta) per column, shape (..., m)."""
        tt = np.sum(W * W, axis=-2)
        tm2 = self.theta_max**2
        f: Array = ((1.0 + self.eps_p) * tt - tm2) / (self.eps_p * tm2)
        return f

    def project(self, W: Array, Y: Array) -> Array:
        """Proj(theta, y) for each column theta = W[..., :, j], y = Y[..., :, j]."""
        W = np.asarray(W, dtype=float)
        Y = np.asarray(Y, dtype=float)
        f = self.f(W)
        ty = np.sum(W * Y, axis=-2)
        tt = np.sum(W * W, axis=-2)
        active = (f > 0) & (ty > 0)
        k = np.where(active, ty * f / np.where(tt > 0, tt, 1.0), 0.0)
        return Y - W * k[..., None, :]

    def apply(self, W: Array, dW: Array, e: Array, ePB: Array, s: Array, eps: Array) -> Array:
        """The projected derivative."""
        return self.project(W, dW)

    def after_step(self, W: Array) -> None:
        """Rescale (in place) any column the Euler step left outside ||theta|| <= theta_max."""
        norm = np.sqrt(np.sum(W * W, axis=-2))
        tm = np.broadcast_to(self.theta_max, norm.shape)
        over = norm > tm
        if np.any(over):
            scale = np.where(over, tm / np.where(over, norm, 1.0), 1.0)
            W *= scale[..., None, :]


def modifiers_from_config(cfg: Config, design: Any) -> list[Any]:
    """The modifiers `[adaptation]` asks for, in application order (empty when all off).

    Keys: leakage ("none" | "sigma" | "e"), sigma0 (1/s), mu (1), dead_zone
    (||e||_P units, 0 = off), projection (bool), theta_max (scalar or one per
    input), projection_eps (default 0.1).
    """
    m = design.rig.m
    gamma = np.asarray(design.gamma, dtype=float)
    Ts = float(design.Ts)
    mods: list[Any] = []
    leakage = cfg.choice("adaptation.leakage")
    if leakage == "sigma":
        sigma0 = cfg.number("adaptation.sigma0")
        if Ts * float(np.max(gamma)) * sigma0 >= 1.0:
            raise ConfigError(
                "adaptation.sigma0", f"Ts * gamma * sigma0 = {Ts * np.max(gamma) * sigma0:.3g} "
                "is at least 1: the sampled leakage overshoots zero every tick.",
                f"lower sigma0 below {0.5 / (Ts * float(np.max(gamma))):.3g} 1/s.")
        mods.append(SigmaModification(sigma0, gamma))
    elif leakage == "e":
        mu = cfg.number("adaptation.mu")
        mods.append(EModification(mu, gamma))
    dz = cfg.number("adaptation.dead_zone")
    if dz > 0:
        if dz >= design.eps:
            raise ConfigError(
                "adaptation.dead_zone", f"{dz:.4g} is not below the bound eps = "
                f"{design.eps:.4g}: the law would never adapt inside the bound.",
                f"use a dead zone well below eps, e.g. {0.1 * design.eps:.3g}.")
        mods.append(DeadZone(dz))
    if cfg.flag("adaptation.projection"):
        theta = cfg.vector("adaptation.theta_max", m)
        eps_p = cfg.number("adaptation.projection_eps")
        mods.append(Projection(theta, eps_p))
    return mods
