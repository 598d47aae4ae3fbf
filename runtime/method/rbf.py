"""Gaussian radial basis functions for unstructured uncertainty (the neuroadaptive basis).

``sigma_k(x) = exp(-||S (x - c_k)||^2 / (2 w_k^2))`` where S = diag(scale)
picks the states the grid spans (scale 0 elsewhere; scale 1 on every grid
state when one width serves them all, w_ref / w_i when the config gives a
width per state). The block is appended after the named terms of
`runtime.method.basis`, which supplies the bias.

Config (``[basis]``, with ``kind = "rbf"``):

- ``rbf_states``   names of the states the grid spans (default: all);
- ``rbf_per_axis`` centres per grid state (int or one per state, default 5);
- ``rbf_span``     half-width of the grid per grid state (state units);
- ``rbf_centre``   grid middle per grid state (default 0);
- ``rbf_centres``  explicit centres, one row per centre over the grid states
  (replaces per_axis/span/centre);
- ``rbf_width``    width w (state units; scalar or one per grid state;
  default: the grid spacing of each axis).

Also here: the design checks of docs/method.md §6, `coverage` (does the grid
cover ``{x_r + e : ||e||_P <= eps}`` along the commanded reference?) and
`residual_eps` (the bound a residual |d| <= d_max needs,
``eps > 2 ||P^{1/2} B|| d_max / c_bar``).

What does not live here: the named terms (`runtime.method.basis`), the law.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.commands import schedule_from_config, tracked_names

Array = NDArray[np.float64]


@dataclass(frozen=True)
class RbfBlock:
    """A radial-basis block over the full state: centres (K, n), widths (K,), scale (n,)."""

    centres: Array
    widths: Array
    scale: Array
    states: tuple[str, ...]
    """Names of the states the grid spans."""

    @property
    def size(self) -> int:
        """Number of radial terms K."""
        return int(self.centres.shape[0])

    def evaluate(self, x: Array) -> Array:
        """sigma_k(x) for x of shape (..., n): (..., K)."""
        return rbf_evaluate(x, self.centres, self.widths, self.scale)


def rbf_evaluate(x: Array, centres: Array, widths: Array, scale: Array | None = None) -> Array:
    """exp(-||scale * (x - c_k)||^2 / (2 w_k^2)) for every centre; x (..., n) -> (..., K)."""
    x = np.asarray(x, dtype=float)
    d = x[..., None, :] - centres
    if scale is not None:
        d = d * scale
    d2 = np.einsum("...ki,...ki->...k", d, d)
    act: Array = np.exp(-d2 / (2.0 * widths * widths))
    return act


def grid(centre: Sequence[float] | Array, span: Sequence[float] | Array,
         per_axis: Sequence[int]) -> Array:
    """A tensor grid: per_axis[i] points evenly over centre[i] +- span[i]; (prod, len)."""
    axes = [np.linspace(c - s, c + s, k) if k > 1 else np.array([c])
            for c, s, k in zip(centre, span, per_axis, strict=True)]
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.stack([m.ravel() for m in mesh], axis=-1)


def rbf_from_config(cfg: Config, states: Sequence[str]) -> RbfBlock:
    """The radial-basis block `[basis]` describes for a rig with these state names."""
    n = len(states)
    names = cfg.strings("basis.rbf_states", None, list(states))
    index = {s: i for i, s in enumerate(states)}
    for s in names:
        if s not in index:
            raise ConfigError("basis.rbf_states", f"no state called {s!r}.",
                              f"use some of: {', '.join(states)}.")
    if not names or len(set(names)) != len(names):
        raise ConfigError("basis.rbf_states", "must list at least one state, each once.",
                          'write e.g. rbf_states = ["el", "el_rate"].')
    g = len(names)
    dims = [index[s] for s in names]
    if cfg.has("basis.rbf_centres"):
        local = cfg.matrix("basis.rbf_centres", (None, g))
        spacing = np.ones(g)
        if local.shape[0] > 1:
            spacing = np.ptp(local, axis=0) / max(round(local.shape[0] ** (1 / g)) - 1, 1)
            spacing = np.where(spacing > 0, spacing, 1.0)
    else:
        per = cfg.vector("basis.rbf_per_axis", g)
        if np.any(per != np.round(per)):
            raise ConfigError("basis.rbf_per_axis", "must be whole numbers.",
                              "write e.g. rbf_per_axis = 5.")
        per_i = [int(k) for k in per]
        if int(np.prod(per_i)) > 2000:
            raise ConfigError("basis.rbf_per_axis", f"gives {int(np.prod(per_i))} centres.",
                              "use fewer centres per axis or fewer grid states (<= 2000).")
        span = cfg.vector("basis.rbf_span", g)
        centre = cfg.vector("basis.rbf_centre", g)
        local = grid(centre, span, per_i)
        spacing = np.array([2 * s / (k - 1) if k > 1 else 2 * s
                            for s, k in zip(span, per_i, strict=True)])
    w_state = cfg.vector("basis.rbf_width", g, spacing)
    w_ref = float(w_state[0])
    scale = np.zeros(n)
    scale[dims] = w_ref / w_state
    centres = np.zeros((local.shape[0], n))
    centres[:, dims] = local
    widths = np.full(local.shape[0], w_ref)
    return RbfBlock(centres=centres, widths=widths, scale=scale, states=tuple(names))


# ---------------------------------------------------------------- design checks
def envelope_points(design: Any, cfg: Config, eps: float, reference_step: tuple[Array, Array],
                    dt: float, count: int = 24,
                    rng: np.random.Generator | None = None) -> Array:
    """Points of {x_r + e : ||e||_P = eps} along the reference the commands drive.

    x_r: the reference model, stepped by `reference_step` = (A_d, B_d) (its exact
    zero-order hold at `dt`, from `runtime.method.sampled.zoh`; passed in so this module does
    not import the design, which imports it), driven by `[commands]` (or the operating
    box of design.state_range when there are none); e: the per-state extreme points of
    the ellipsoid plus `count` random directions.
    """
    rng = np.random.default_rng(3) if rng is None else rng
    n = design.rig.n
    if cfg.has("commands"):
        rig = design.rig
        sched = schedule_from_config(cfg, tracked_names(rig.C, rig.states))
        t = np.arange(0.0, sched.duration, dt)
        c = np.asarray(sched.evaluate(t), dtype=float).reshape(t.size, -1)
        Ad, Bd = reference_step
        xr = np.zeros((t.size, n))
        for k in range(1, t.size):
            xr[k] = Ad @ xr[k - 1] + Bd @ c[k - 1]
        step = max(1, t.size // 400)
        xr = xr[::step]
    else:
        r = np.asarray(design.state_range, dtype=float)
        xr = rng.uniform(-1, 1, size=(400, n)) * r
    Pinv = np.linalg.inv(design.P)
    extremes = [eps * Pinv[:, i] / np.sqrt(Pinv[i, i]) for i in range(n)]
    L = np.linalg.cholesky(design.P)  # P = L L'; e = eps L'^-1 u with |u| = 1
    u = rng.normal(size=(count, n))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    rand = eps * np.linalg.solve(L.T, u.T).T
    dirs = np.vstack([np.array(extremes), -np.array(extremes), rand, np.zeros((1, n))])
    pts: Array = (xr[:, None, :] + dirs[None, :, :]).reshape(-1, n)
    return pts


def coverage(centres: Array, widths: Array, scale: Array, points: Array,
             min_activation: float = 0.3) -> dict[str, Any]:
    """How well the grid covers the points: the largest activation at each point.

    A point counts as covered when some centre's activation there is at least
    `min_activation`. Returns the covered fraction, the worst activation and
    the worst point (state units).
    """
    best = np.empty(points.shape[0])
    for lo in range(0, points.shape[0], 4096):
        best[lo:lo + 4096] = np.max(rbf_evaluate(points[lo:lo + 4096], centres, widths, scale),
                                    axis=-1)
    worst = int(np.argmin(best))
    return {"covered_fraction": float(np.mean(best >= min_activation)),
            "worst_activation": float(best[worst]),
            "worst_point": points[worst].tolist(),
            "min_activation": float(min_activation)}


def residual_eps(P: Array, B: Array, c_bar: float, d_max: float) -> float:
    """The bound a residual |d| <= d_max (input units) needs: 2 ||P^1/2 B|| d_max / c_bar.

    ||P^1/2 B||_2 = sqrt(lambda_max(B' P B)).
    """
    gain = float(np.sqrt(np.max(np.linalg.eigvalsh(B.T @ P @ B))))
    return 2.0 * gain * d_max / c_bar
