"""Fitting the simulated rig's parameters to a recorded run.

`fit_plant(rec, cfg)` (formerly `fit_pedestal`): least squares of the measured
derivatives (finite differences of the measured rates) against the simulated rig's own
model (`sim_rigs.plant.RigPlant`, any rig), for the parameters it is linear in.
Used by `runtime.review.replay` for ``--plant fitted``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.review.recording import Recording, RunFileError

Array = NDArray[np.float64]


# ---------------------------------------------------------------------------
# Fitting the simulated rig's parameters to the record
# ---------------------------------------------------------------------------

@dataclass
class PlantFit:
    """Fitted pedestal parameters and how well the model explains the record."""

    params: dict[str, float]
    stderr: dict[str, float]
    config_truth: dict[str, float]
    fixed: list[str]
    skipped: dict[str, str]
    residual_rms: list[float]
    """Acceleration residual per axis (rad/s^2)."""
    relative_residual: list[float]
    """Residual rms over the rms of the acceleration the fitted terms explain."""
    samples: int
    """Number of windows fitted."""
    rank: int
    window_s: float
    """Length of each finite-difference window (s)."""

    def truth(self) -> dict[str, float]:
        """Config truth with the fitted values in place."""
        return {**self.config_truth, **self.params}

    def to_json(self) -> dict[str, Any]:
        """Plain numbers for --json."""
        return {
            "parameters": {k: {"value": v, "stderr": self.stderr[k],
                               "config": self.config_truth.get(k)}
                           for k, v in self.params.items()},
            "fixed": self.fixed, "not_fitted": self.skipped,
            "residual_rms": self.residual_rms, "residual_units": "rad/s^2",
            "relative_residual": self.relative_residual, "samples": self.samples,
            "window_s": self.window_s, "rank": self.rank,
        }


def fit_plant(rec: Recording, cfg: Config, names: list[str] | None = None,
                 window_s: float = 0.02, _refit: bool = True) -> PlantFit:
    """Least-squares fit of the rig's uncertain parameters (its term parameters) to the record.

    Target: the mean measured acceleration over a window of `window_s`
    seconds, (w_end - w_start) / (t_end - t_start), a finite difference of the
    measured rates. Model: `Pedestal.accel` itself, per tick the mean of its
    two ends (trapezoid) with the tick's applied input held, averaged over the
    same window (so the two sides are the same integral). Windows longer than
    one tick divide the rate noise in the target by their length and dilute
    the correlation between the noise and the feedback input (a closed-loop
    fit bias); non-overlapping windows keep the residuals independent, so the
    standard errors mean something. Each candidate parameter
    is checked to enter linearly (its column at 2 equals twice its column at
    1); the others (the tanh and Stribeck speeds) stay at the config truth.
    Fitted by default: the parameters with a `[plant.ranges]` entry (the
    uncertain ones), else every linear one except the nominal a, b. Ticks with
    the outputs off are left out. A parameter the record does not excite
    (standard error over half its config range) is held at the config truth
    and the rest are fitted again, once.
    """
    from runtime.method.rig import rig_spec
    from sim_rigs.plant import RigPlant

    spec = rig_spec(cfg)
    if spec is None:
        raise ConfigError("rig.sim", "--plant fitted needs a simulated rig whose parameters "
                          "it fits.", "use --plant config, or set rig.sim to the rig's file.")
    TRUTH_DEFAULTS = spec.truth_defaults  # noqa: N806 - the rig's parameters
    truth = {k: float(v) for k, v in TRUTH_DEFAULTS.items()}
    truth.update({k: float(v) for k, v in dict(cfg.get("plant.truth") or {}).items()})
    ranges = {**spec.ranges, **dict(cfg.get("plant.ranges") or {})}
    if names is None:
        names = [k for k in TRUTH_DEFAULTS if k in ranges] or list(TRUTH_DEFAULTS)
    unknown = [k for k in names if k not in TRUTH_DEFAULTS]
    if unknown:
        raise ConfigError("plant.ranges", f"{', '.join(unknown)} is not a parameter of this rig.",
                          f"use names from: {', '.join(TRUTH_DEFAULTS)}.")
    # the rows the terms and the inputs act on: their derivative is what the record measures
    rows = sorted({t.row for t in spec.terms} | set(spec.drives))
    nr = len(rows)

    lo = 0
    delay = int(cfg.number("plant.sensors.delay_ticks"))
    span = max(1, int(round(window_s / rec.period)))
    y = rec.y
    k = np.arange(max(lo, delay), rec.ticks - 1)
    dt = rec.t[k + 1] - rec.t[k]
    ok = np.abs(dt - rec.period) < 0.25 * rec.period  # no dropped rows between the two ends
    ku = k - delay  # the measurement at k shows the true state of k - delay
    ok &= np.all(np.isfinite(y[k]), axis=1) & np.all(np.isfinite(y[k + 1]), axis=1)
    ok &= np.all(np.isfinite(rec.u[ku]), axis=1) & rec.outputs_on[ku]
    # blocks of `span` consecutive usable ticks (non-overlapping, so residuals stay independent)
    k = k[ok]
    breaks = np.flatnonzero(np.diff(k) != 1) + 1
    blocks = [run[: (run.size // span) * span] for run in np.split(k, breaks)]
    k = np.concatenate(blocks) if blocks else k[:0]
    n_blocks = k.size // span
    if 2 * n_blocks < 5 * max(1, len(names)):  # at least 5 equations per parameter
        raise RunFileError(f"{rec.path}: too few usable ticks ({k.size}, "
                           f"{k.size * rec.period:.2f} s) to fit {len(names)} parameters over "
                           f"{span * rec.period:g} s windows; record a longer run")
    ku = k - delay
    xa, xb, v = y[k], y[k + 1], rec.u[ku]
    batch = k.size

    def accel(values: dict[str, float]) -> Array:
        """Per-block mean of the trapezoid derivative of the driven rows: (n_blocks, nr)."""
        plant = RigPlant.create(spec, values, batch=batch)
        a = 0.5 * (plant.deriv(xa, v) + plant.deriv(xb, v))[:, rows]
        return a.reshape(n_blocks, span, nr).mean(axis=1)

    zero = {**truth, **{n: 0.0 for n in names}}
    base = accel(zero)
    cols, fitted, skipped = [], [], {}
    for name in names:
        one = accel({**zero, name: 1.0}) - base
        two = accel({**zero, name: 2.0}) - base
        scale = max(float(np.max(np.abs(one))), 1e-300)
        if float(np.max(np.abs(two - 2 * one))) > 1e-9 * scale:
            skipped[name] = "enters the model nonlinearly; held at the config truth"
            continue
        if float(np.max(np.abs(one))) == 0.0:
            skipped[name] = "has no effect on this record"
            continue
        cols.append(one.reshape(-1))  # the driven rows stacked: (nr * n_blocks,)
        fitted.append(name)
    if not fitted:
        raise RunFileError(f"{rec.path}: none of {', '.join(names)} can be fitted linearly")
    if skipped:
        base = accel({**truth, **{n: 0.0 for n in fitted}})
    first, last = k[::span], k[span - 1::span] + 1
    dt_block = rec.t[last] - rec.t[first]
    meas = (y[last][:, rows] - y[first][:, rows]) / dt_block[:, None]  # mean measured derivative
    target = (meas - base).reshape(-1)
    phi = np.column_stack(cols)
    theta, _, rank, _ = np.linalg.lstsq(phi, target, rcond=None)
    resid = (target - phi @ theta).reshape(n_blocks, nr)
    dof = max(1, target.size - len(fitted))
    sigma2 = float(np.sum(resid**2)) / dof
    try:
        cov = sigma2 * np.linalg.inv(phi.T @ phi)
        se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        se = np.full(len(fitted), math.inf)
    explained = target.reshape(n_blocks, nr)
    rms = np.sqrt(np.mean(resid**2, axis=0))
    rel = rms / np.maximum(np.sqrt(np.mean(explained**2, axis=0)), 1e-300)
    # A parameter the record barely excites (standard error beyond half its
    # config range, or beyond its own size without a range) would only add
    # noise to the plant: hold it at the config truth and fit the rest again.
    weak = []
    for name, value, err in zip(fitted, theta, se, strict=True):
        lo_hi = ranges.get(name)
        width = abs(float(lo_hi[1]) - float(lo_hi[0])) if lo_hi is not None else abs(value)
        if not err <= 0.5 * width:
            weak.append(name)
    if weak and len(weak) < len(fitted) and _refit:
        again = fit_plant(rec, cfg, [n for n in names if n not in weak], window_s,
                             _refit=False)
        again.skipped.update(skipped)
        for name, value, err in zip(fitted, theta, se, strict=True):
            if name in weak:
                again.skipped[name] = (f"poorly identified by this record ({value:.3g} +- "
                                       f"{err:.2g}); held at the config truth")
        return again
    return PlantFit(
        params={n: float(v) for n, v in zip(fitted, theta, strict=True)},
        stderr={n: float(s) for n, s in zip(fitted, se, strict=True)},
        config_truth=truth, fixed=[n for n in truth if n not in fitted],
        skipped=skipped, residual_rms=rms.tolist(), relative_residual=rel.tolist(),
        samples=int(n_blocks), rank=int(rank), window_s=span * rec.period)


fit_pedestal = fit_plant
"""The older name (it fitted only the pedestal)."""
