"""The simulated two-axis pan-tilt pointing pedestal.

Azimuth and elevation axes, each a 12 V DC gearmotor through a gear train,
angle sensors on the output shafts and rate sensors (tachometers) on the
motors. State ``x = [az, el, az_rate, el_rate]`` (rad, rad, rad/s, rad/s),
input ``V = [V_az, V_el]`` (V, saturating at +-12 V).

Nominal model, per axis: ``theta'' = -a theta' + b V``. Numbers chosen for a
small camera/antenna pedestal:

- ``a_az = 4 /s``: a 0.25 s mechanical time constant of a loaded gearmotor.
- ``b_az = 1.2 rad/s^2/V``: 12 V then gives a top speed of b*12/a = 3.6 rad/s
  (about 200 deg/s at the output), typical of such pedestals.
- ``a_el = 5 /s``, ``b_el = 1.5 rad/s^2/V``: a lighter, quicker tilt axis with
  the same top speed.

The true plant adds, all as accelerations (rad/s^2) so they enter where the
input does (matched uncertainty):

- ``gravity_el * cos(el)``: an elevation imbalance (payload centre of mass off
  the tilt axis; largest at the horizon, el = 0);
- ``visc_*``: extra viscous friction (1/s), ``coulomb_*`` Coulomb friction in
  the smooth form ``coulomb * tanh(rate / coulomb_speed)``;
- ``spring_az``: the cable wrap pulling azimuth back toward zero (1/s^2);
- ``coupling``: inertial cross-coupling between the axes
  (az gets ``-coupling az_rate el_rate``, el gets ``+coupling/2 az_rate^2 sin 2el``);
- ``bias_*``: a constant torque bias (cogging, a leaning mount);
- ``lam_*``: motor effectiveness (worn brushes, low supply): the applied
  voltage acts as ``lam * V``.
- ``stribeck_*``: stick-slip (Stribeck) friction, rad/s^2: extra breakaway
  friction near standstill that fades with speed,
  ``stribeck * exp(-(rate / stribeck_speed)^2) * tanh(rate / coulomb_speed)``
  with ``stribeck_speed`` in rad/s. Default 0 (off). Its hump shape is not in
  any small named basis (tanh alone gives a constant level), which is what
  the radial-basis demo (configs/pedestal-rbf.toml) is for.

Everything broadcasts over a leading batch axis: each parameter is an array
of shape (batch,) and the state (batch, 4), so one call steps a thousand
plants. Integration is RK4 with substeps inside each tick (zero-order hold
on V). What does not live here: the link wrapper (`sim_rigs.link`) and
fault injection scheduling (the runtime's job).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

STATES = ("az", "el", "az_rate", "el_rate")
STATE_UNITS = ("rad", "rad", "rad/s", "rad/s")
INPUTS = ("V_az", "V_el")
INPUT_UNITS = ("V", "V")
INPUT_LIMITS = (12.0, 12.0)

NOMINAL = {"a_az": 4.0, "b_az": 1.2, "a_el": 5.0, "b_el": 1.5}

# Truth of the demo plant: what the nominal model omits. Units in the docstring.
TRUTH_DEFAULTS: dict[str, float] = {
    "gravity_el": 2.0,
    "visc_az": 0.8,
    "visc_el": 0.8,
    "coulomb_az": 0.6,
    "coulomb_el": 0.6,
    "coulomb_speed": 0.02,
    "spring_az": 1.0,
    "coupling": 0.3,
    "bias_az": 0.4,
    "bias_el": -0.4,
    "lam_az": 0.7,
    "lam_el": 0.7,
    "stribeck_az": 0.0,
    "stribeck_el": 0.0,
    "stribeck_speed": 0.1,
    "a_az": NOMINAL["a_az"],
    "b_az": NOMINAL["b_az"],
    "a_el": NOMINAL["a_el"],
    "b_el": NOMINAL["b_el"],
}

PARAM_UNITS: dict[str, str] = {
    "gravity_el": "rad/s^2", "visc_az": "1/s", "visc_el": "1/s",
    "coulomb_az": "rad/s^2", "coulomb_el": "rad/s^2", "coulomb_speed": "rad/s",
    "spring_az": "1/s^2", "coupling": "1", "bias_az": "rad/s^2", "bias_el": "rad/s^2",
    "lam_az": "1", "lam_el": "1", "stribeck_az": "rad/s^2", "stribeck_el": "rad/s^2",
    "stribeck_speed": "rad/s", "a_az": "1/s", "b_az": "rad/s^2/V",
    "a_el": "1/s", "b_el": "rad/s^2/V",
}


def nominal_model() -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Nominal (A, B, C): double integrators with viscous damping; C picks the two angles."""
    a1, b1, a2, b2 = NOMINAL["a_az"], NOMINAL["b_az"], NOMINAL["a_el"], NOMINAL["b_el"]
    A = np.array([[0, 0, 1, 0], [0, 0, 0, 1], [0, 0, -a1, 0], [0, 0, 0, -a2]], dtype=float)
    B = np.array([[0, 0], [0, 0], [b1, 0], [0, b2]], dtype=float)
    C = np.array([[1, 0, 0, 0], [0, 1, 0, 0]], dtype=float)
    return A, B, C


@dataclass
class SensorModel:
    """Encoder and tachometer imperfections."""

    angle_resolution: float = 2 * np.pi / 2**16
    """Encoder quantum (rad): a 16-bit absolute encoder on the output shaft."""
    angle_noise: float = 2e-5
    """Angle noise standard deviation (rad)."""
    rate_noise: float = 2e-3
    """Tachometer noise standard deviation (rad/s)."""
    delay_ticks: int = 0
    """Sensor delay in whole ticks."""


@dataclass
class Pedestal:
    """A batch of pedestals with their true parameters, state and sensors.

    `params` maps each name of TRUTH_DEFAULTS to an array of shape (batch,).
    """

    params: dict[str, NDArray[np.float64]]
    x: NDArray[np.float64]
    sensors: SensorModel = field(default_factory=SensorModel)
    substeps: int = 4
    rng: np.random.Generator = field(default_factory=lambda: np.random.default_rng(0))
    disturbance: NDArray[np.float64] | None = None
    """Extra acceleration (batch, 2) in rad/s^2: a disturbance torque step."""
    lam_scale: NDArray[np.float64] | None = None
    """Multiplies lam (batch, 2): an effectiveness loss fault."""
    limits: NDArray[np.float64] = field(default_factory=lambda: np.array(INPUT_LIMITS))

    def __post_init__(self) -> None:
        self.x = np.array(self.x, dtype=float, ndmin=2)
        self._delay: list[NDArray[np.float64]] = []

    @classmethod
    def create(
        cls,
        truth: Mapping[str, ArrayLike] | None = None,
        batch: int = 1,
        x0: ArrayLike | None = None,
        **kwargs: Any,
    ) -> Pedestal:
        """Pedestals with the given truth (defaults fill the rest), all starting at x0."""
        params = {}
        for name, default in TRUTH_DEFAULTS.items():
            value = (truth or {}).get(name, default)
            params[name] = np.broadcast_to(np.asarray(value, dtype=float), (batch,)).copy()
        unknown = set(truth or {}) - set(TRUTH_DEFAULTS)
        if unknown:
            raise KeyError(f"unknown pedestal parameter(s): {', '.join(sorted(unknown))}")
        x = np.zeros((batch, 4)) if x0 is None else np.broadcast_to(
            np.asarray(x0, dtype=float), (batch, 4)).copy()
        return cls(params=params, x=x, **kwargs)

    @property
    def batch(self) -> int:
        """Number of plants."""
        return self.x.shape[0]

    def accel(self, x: NDArray[np.float64], v: NDArray[np.float64]) -> NDArray[np.float64]:
        """Angular accelerations (batch, 2) for states (batch, 4) and applied volts (batch, 2)."""
        p = self.params
        el = x[:, 1]
        wa = x[:, 2]
        we = x[:, 3]
        lam_a, lam_e = p["lam_az"], p["lam_el"]
        if self.lam_scale is not None:
            lam_a = lam_a * self.lam_scale[:, 0]
            lam_e = lam_e * self.lam_scale[:, 1]
        vs = p["coulomb_speed"]
        ss = p["stribeck_speed"]
        acc_az = (
            -(p["a_az"] + p["visc_az"]) * wa
            + p["b_az"] * lam_a * v[:, 0]
            - p["coulomb_az"] * np.tanh(wa / vs)
            - p["stribeck_az"] * np.exp(-(wa / ss) ** 2) * np.tanh(wa / vs)
            - p["spring_az"] * x[:, 0]
            - p["coupling"] * wa * we
            + p["bias_az"]
        )
        acc_el = (
            -(p["a_el"] + p["visc_el"]) * we
            + p["b_el"] * lam_e * v[:, 1]
            - p["coulomb_el"] * np.tanh(we / vs)
            - p["stribeck_el"] * np.exp(-(we / ss) ** 2) * np.tanh(we / vs)
            - p["gravity_el"] * np.cos(el)
            + 0.5 * p["coupling"] * wa * wa * np.sin(2 * el)
            + p["bias_el"]
        )
        out = np.stack((acc_az, acc_el), axis=-1)
        if self.disturbance is not None:
            out = out + self.disturbance
        return out

    def deriv(self, x: NDArray[np.float64], v: NDArray[np.float64]) -> NDArray[np.float64]:
        """State derivative (batch, 4)."""
        return np.concatenate((x[:, 2:], self.accel(x, v)), axis=-1)

    def saturate(self, u: ArrayLike) -> NDArray[np.float64]:
        """Clip commanded volts to the drive limits."""
        return np.clip(np.asarray(u, dtype=float), -self.limits, self.limits)

    def step(self, u: ArrayLike, dt: float) -> NDArray[np.float64]:
        """Advance all plants by dt seconds holding u (volts, saturated here); returns V applied."""
        v = np.broadcast_to(self.saturate(u), (self.batch, 2))
        h = dt / self.substeps
        x = self.x
        for _ in range(self.substeps):
            k1 = self.deriv(x, v)
            k2 = self.deriv(x + 0.5 * h * k1, v)
            k3 = self.deriv(x + 0.5 * h * k2, v)
            k4 = self.deriv(x + h * k3, v)
            x = x + (h / 6.0) * (k1 + 2 * k2 + 2 * k3 + k4)
        self.x = x
        return v

    def measure(self) -> NDArray[np.float64]:
        """What the sensors report now (batch, 4): quantised noisy angles, noisy rates."""
        s = self.sensors
        y = self.x.copy()
        if s.angle_noise > 0:
            y[:, :2] += self.rng.normal(0.0, s.angle_noise, size=(self.batch, 2))
        if s.angle_resolution > 0:
            y[:, :2] = np.round(y[:, :2] / s.angle_resolution) * s.angle_resolution
        if s.rate_noise > 0:
            y[:, 2:] += self.rng.normal(0.0, s.rate_noise, size=(self.batch, 2))
        if s.delay_ticks > 0:
            self._delay.append(y)
            if len(self._delay) <= s.delay_ticks:
                return self._delay[0].copy()
            return self._delay.pop(0)
        return y


def draw_truth(
    ranges: Mapping[str, tuple[float, float]],
    truth: Mapping[str, float],
    batch: int,
    rng: np.random.Generator,
) -> dict[str, NDArray[np.float64]]:
    """Draw `batch` plants: each ranged parameter uniform in [lo, hi], others at truth."""
    out: dict[str, NDArray[np.float64]] = {}
    for name, default in TRUTH_DEFAULTS.items():
        if name in ranges:
            lo, hi = ranges[name]
            out[name] = rng.uniform(lo, hi, size=batch)
        else:
            out[name] = np.full(batch, float(truth.get(name, default)))
    return out
