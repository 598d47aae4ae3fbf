"""The simulated plant and its sensors, for any rig description (batched numpy reference).

`RigPlant` steps a batch of plants of one rig (`sim_rigs.rigfile.RigSpec`):

    x' = A x + B (Lambda (lam_scale * sat(u))) + sum_terms param * coef * prod(factors)
         + disturbance on each input's driven row

with A, B the rig's nominal model, Lambda the effectiveness parameters, the terms
from the rig's term table; RK4 with substeps inside each tick, zero-order hold on
the input. `SensorModel` is the one sensor model: per measured state a noise
standard deviation (added first) and a quantum (then rounded to), and a delay in
whole ticks. Every parameter is an array of shape (batch,), the state (batch, n).

This is the source of truth; the compiled kernel (`sim_rigs.kernel`) interprets
the same term table and `tests/test_rig_plant.py` holds the two together. What
does not live here: the rig file format (`sim_rigs.rigfile`), fault scheduling
(`sim_rigs.faults`), the link wrappers.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from sim_rigs.rigfile import RigFileError, RigSpec

Array = NDArray[np.float64]


@dataclass
class SensorModel:
    """Per state: noise standard deviation and quantum (state units; 0 = none); delay in ticks."""

    resolution: Array
    noise: Array
    delay_ticks: int = 0

    @classmethod
    def for_rig(cls, spec: RigSpec, overrides: Mapping[str, Any] | None = None) -> SensorModel:
        """The rig's sensors, its named settings overridden by `overrides` ([plant.sensors])."""
        settings = dict(spec.sensor_settings)
        delay = spec.delay_ticks
        for k, v in (overrides or {}).items():
            if k == "delay_ticks":
                delay = int(v)
            elif k in settings:
                settings[k] = float(v)
            else:
                raise RigFileError(f"plant.sensors.{k}", "is not a sensor setting of this rig.",
                                   f"use one of: {', '.join([*settings, 'delay_ticks'])}.")
        res = np.zeros(spec.n)
        noise = np.zeros(spec.n)
        for i, (r, s) in enumerate(spec.sensor_channels):
            res[i] = settings[r] if isinstance(r, str) else r
            noise[i] = settings[s] if isinstance(s, str) else s
        return cls(res, noise, int(delay))

    def noiseless(self) -> SensorModel:
        """The same sensors without noise (quantum and delay kept)."""
        return SensorModel(self.resolution.copy(), np.zeros_like(self.noise), self.delay_ticks)

    @property
    def noisy(self) -> NDArray[np.int64]:
        """Indices of the channels with noise, in the order their draws are taken."""
        return np.flatnonzero(self.noise > 0)


def term_factors(spec: RigSpec, params: Mapping[str, Array], x: Array) -> Array:
    """coef * prod(factors) of every term (batch, T), without its parameter."""
    batch = x.shape[0]
    out = np.empty((batch, len(spec.terms)))
    for t, term in enumerate(spec.terms):
        v = np.full(batch, term.coef)
        for f in term.factors:
            xs = x[:, f.state]
            if f.kind == "x":
                v = v * xs
            elif f.kind == "sin":
                v = v * np.sin(f.k * xs)
            elif f.kind == "cos":
                v = v * np.cos(f.k * xs)
            elif f.kind == "abs":
                v = v * np.abs(xs)
            else:
                w = params[f.width] if isinstance(f.width, str) else f.width
                v = v * (np.tanh(xs / w) if f.kind == "tanh" else np.exp(-(xs / w) ** 2))
        out[:, t] = v
    return out


@dataclass
class RigPlant:
    """A batch of plants of one rig with their true parameters, state and sensors."""

    spec: RigSpec
    params: dict[str, Array]
    x: Array
    sensors: SensorModel
    substeps: int = 4
    rng: np.random.Generator = field(default_factory=lambda: np.random.default_rng(0))
    disturbance: Array | None = None
    """Extra acceleration (batch, m) on each input's driven row: a disturbance step fault."""
    lam_scale: Array | None = None
    """Multiplies the effectiveness (batch, m): an effectiveness loss fault."""
    limits: Array = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        self.x = np.array(self.x, dtype=float, ndmin=2)
        if self.limits.size == 0:
            self.limits = np.array(self.spec.input_limits, dtype=float)
        self._delay: list[Array] = []

    @classmethod
    def create(cls, spec: RigSpec, truth: Mapping[str, ArrayLike] | None = None, batch: int = 1,
               x0: ArrayLike | None = None, sensors: SensorModel | None = None,
               **kwargs: Any) -> RigPlant:
        """Plants with the given truth (the rig's values fill the rest), all starting at x0."""
        unknown = set(truth or {}) - set(spec.params)
        if unknown:
            raise KeyError(f"unknown {spec.name} parameter(s): {', '.join(sorted(unknown))}")
        params = {name: np.broadcast_to(np.asarray((truth or {}).get(name, p.value), dtype=float),
                                        (batch,)).copy() for name, p in spec.params.items()}
        x = np.zeros((batch, spec.n)) if x0 is None else np.broadcast_to(
            np.asarray(x0, dtype=float), (batch, spec.n)).copy()
        return cls(spec=spec, params=params, x=x,
                   sensors=sensors or SensorModel.for_rig(spec), **kwargs)

    @property
    def batch(self) -> int:
        """Number of plants."""
        return self.x.shape[0]

    def effectiveness(self) -> Array:
        """Lambda (batch, m), with the effectiveness-loss fault applied."""
        lam = np.ones((self.batch, self.spec.m))
        for j, name in enumerate(self.spec.effectiveness):
            if name is not None:
                lam[:, j] = self.params[name]
        if self.lam_scale is not None:
            lam = lam * self.lam_scale
        return lam

    def uncertainty(self, x: Array) -> Array:
        """The terms' accelerations summed per state row (batch, n)."""
        spec = self.spec
        out = np.zeros_like(x)
        vals = term_factors(spec, self.params, x)
        for t, term in enumerate(spec.terms):
            p = self.params[term.param] if term.param is not None else 1.0
            out[:, term.row] += p * vals[:, t]
        return out

    def deriv(self, x: Array, v: Array, lam: Array | None = None) -> Array:
        """State derivative (batch, n) for states (batch, n) and applied inputs (batch, m)."""
        spec = self.spec
        lam = self.effectiveness() if lam is None else lam
        dx = x @ spec.A.T + (lam * v) @ spec.B.T + self.uncertainty(x)
        if self.disturbance is not None:
            for j, row in enumerate(spec.drives):
                dx[:, row] += self.disturbance[:, j]
        return dx

    def saturate(self, u: ArrayLike) -> Array:
        """Clip commanded inputs to the drive limits."""
        return np.clip(np.asarray(u, dtype=float), -self.limits, self.limits)

    def step(self, u: ArrayLike, dt: float) -> Array:
        """Advance all plants by dt holding u (saturated here); returns the inputs applied."""
        v = np.broadcast_to(self.saturate(u), (self.batch, self.spec.m))
        lam = self.effectiveness()
        h = dt / self.substeps
        x = self.x
        for _ in range(self.substeps):
            k1 = self.deriv(x, v, lam)
            k2 = self.deriv(x + 0.5 * h * k1, v, lam)
            k3 = self.deriv(x + 0.5 * h * k2, v, lam)
            k4 = self.deriv(x + h * k3, v, lam)
            x = x + (h / 6.0) * (k1 + 2 * k2 + 2 * k3 + k4)
        self.x = x
        return v

    def measure(self) -> Array:
        """What the sensors report now (batch, n): noise added, then quantised; delayed.

        Noise: one block of standard normals (batch, noisy channels) a reading, in
        channel order, scaled by each channel's standard deviation.
        """
        s = self.sensors
        y = self.x.copy()
        idx = s.noisy
        if idx.size:
            y[:, idx] += s.noise[idx] * self.rng.standard_normal((self.batch, idx.size))
        q = s.resolution > 0
        if q.any():
            y[:, q] = np.round(y[:, q] / s.resolution[q]) * s.resolution[q]
        if s.delay_ticks > 0:
            self._delay.append(y)
            if len(self._delay) <= s.delay_ticks:
                return self._delay[0].copy()
            return self._delay.pop(0)
        return y


def draw_truth(spec: RigSpec, ranges: Mapping[str, tuple[float, float]],
               truth: Mapping[str, float], batch: int, rng: np.random.Generator,
               ) -> dict[str, Array]:
    """Draw `batch` plants: each ranged parameter uniform in [lo, hi], others at truth."""
    out: dict[str, Array] = {}
    for name, p in spec.params.items():
        if name in ranges:
            lo, hi = ranges[name]
            out[name] = rng.uniform(lo, hi, size=batch)
        else:
            out[name] = np.full(batch, float(truth.get(name, p.value)))
    return out
