"""The sweep's settings, its plants and its result: what a sweep is asked and what it gives.

`SweepSettings.from_config` reads ``[sweep]`` (arguments win) once, for every worker;
`draw_plants` draws the uncertain plants from the rig's and the config's ranges;
`SweepResult` holds per-plant outcomes and the summary (`runtime.offline.sweep`).

What does not live here: the engines (`runtime.offline.sweep_engines`), the summary and the
grid (`runtime.offline.sweep`), the plots (`runtime.offline.sweep_plots`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.design import Design
from runtime.method.rig import rig_spec
from runtime.offline.dryrun import check_effectiveness, check_truth_value, weight_norm_limit
from sim_rigs import RIGS
from sim_rigs.plant import draw_truth

Array = NDArray[np.float64]
Columns = dict[str, NDArray[Any]]
"""Named per-plant columns: parameters and results (float, or int tick indices)."""
Progress = Callable[[int, int], None]

RULES = ("margin", "clamp", "nonfinite", "saturation")
"""Rules the sweep evaluates offline, contract ids, in first-out tie order."""
OUTCOMES = ("inside", "tripped", "diverged")
ENGINES = ("auto", "compiled", "reference")
MAX_PLANTS = 1_000_000  # parameters and results of every plant are held at once
MAX_TICKS = 3_000_000  # per plant: 50 min at 1 kHz


# ------------------------------------------------------------------ settings
@dataclass(frozen=True)
class SweepSettings:
    """Everything a worker needs besides the plants; read from the config once."""

    plants: int
    seed: int
    duration: float
    workers: int
    chunk: int
    latency_ticks: int
    noise: bool
    substeps: int
    margin_trip: float
    saturation_time: float
    divergence_factor: float
    weight_norm_limit: float
    engine: str

    @classmethod
    def from_config(cls, cfg: Config, plants: int | None = None, seed: int | None = None,
                    duration: float | None = None, workers: int | None = None,
                    chunk: int | None = None, engine: str | None = None) -> SweepSettings:
        """Sweep settings: arguments win over `[sweep]` keys, which win over defaults."""
        n = plants if plants is not None else int(cfg.number("sweep.plants"))
        if n < 1:
            raise ConfigError("sweep.plants", f"must be at least 1, got {n}.",
                              "ask for one plant or more, e.g. --plants 500.")
        s = seed if seed is not None else int(cfg.number("sweep.seed", cfg.number("plant.seed")))
        dur = duration if duration is not None else cfg.number("commands.duration")
        if not dur > 0:
            raise ConfigError("commands.duration", f"the sweep duration must be positive, got "
                              f"{dur}.", "give --duration S with S > 0.")
        if s < 0:
            raise ConfigError("sweep.seed", f"must be zero or more, got {s}.",
                              "give --seed 0 or another non-negative integer.")
        if n > MAX_PLANTS:
            raise ConfigError("sweep.plants", f"{n:,} plants is more than a sweep draws at "
                              f"once ({MAX_PLANTS:,}).",
                              f"give --plants {MAX_PLANTS:,} or fewer (run several seeds).")
        Ts = cfg.number("loop.period")
        if not dur / Ts <= MAX_TICKS:  # also catches an infinite duration
            raise ConfigError("commands.duration", f"{dur:g} s at loop.period = {Ts:g} s is "
                              f"more than {MAX_TICKS:,} ticks per plant.",
                              "give a shorter --duration (or commands.duration).")
        w = workers if workers is not None else int(cfg.number(
            "sweep.workers", os.cpu_count() or 1))
        ch = chunk if chunk is not None else int(cfg.number("sweep.chunk"))
        eng = engine or cfg.choice("sweep.engine", ENGINES)
        return cls(
            plants=int(n), seed=int(s), duration=float(dur), workers=max(1, int(w)),
            chunk=max(1, int(ch)),
            latency_ticks=int(cfg.number("sweep.latency_ticks")),
            noise=cfg.flag("sweep.noise"),
            substeps=int(cfg.number("sweep.substeps", default_substeps(cfg))),
            margin_trip=cfg.number("watchdog.margin_trip"),
            saturation_time=cfg.number("watchdog.saturation_s"),
            divergence_factor=cfg.number("sweep.divergence_factor"),
            weight_norm_limit=weight_norm_limit(cfg),
            engine=eng,
        )


SUBSTEP_MAX = 1e-3
"""Longest RK4 substep (s) the sweep takes by default: 1 substep a tick at 1 kHz."""


def default_substeps(cfg: Config) -> int:
    """RK4 substeps a tick when `sweep.substeps` is not set: enough for steps <= 1 ms.

    The dry run keeps `plant.substeps` (4 in the demo). For sweeps, 1 substep at 1 kHz
    gave the same per-plant worst margin ratio to ~3e-9 and the same outcome for every
    plant (`bench/bench_sweep.py`, docs/sweeps.md), at about twice the speed.
    """
    Ts = cfg.number("loop.period")
    return max(1, math.ceil(Ts / SUBSTEP_MAX - 1e-9))


def _ranges(cfg: Config, truth_names: Sequence[str], spec: Any = None,
            ) -> dict[str, tuple[float, float]]:
    raw = cfg.get("plant.ranges") or {}
    if not isinstance(raw, dict):
        raise ConfigError("plant.ranges", "must be a table of [lo, hi] pairs.",
                          "write e.g. gravity_el = [1.0, 3.0] under [plant.ranges].")
    out: dict[str, tuple[float, float]] = {}
    for key, val in raw.items():
        where = f"plant.ranges.{key}"
        if key not in truth_names:
            raise ConfigError(where, "is not a parameter of this rig.",
                              f"use one of: {', '.join(truth_names)}.")
        ok = (isinstance(val, list) and len(val) == 2
              and all(isinstance(v, int | float) and not isinstance(v, bool)
                      and math.isfinite(v) for v in val))
        if not ok or val[0] > val[1]:
            raise ConfigError(where, f"must be [lo, hi] with lo <= hi, got {val!r}.",
                              f"write {key} = [lo, hi].")
        check_effectiveness(where, val, spec)
        out[key] = (float(val[0]), float(val[1]))
    return out


def draw_plants(cfg: Config, plants: int, seed: int) -> Columns:
    """The truth of `plants` plants: ranged parameters uniform in [lo, hi], others at truth."""
    spec = rig_spec(cfg)
    if spec is None:
        raise ConfigError("rig.sim", "a sweep needs a simulated rig to stand in for the plant.",
                          f"set rig.sim to a built-in rig ({', '.join(RIGS)}) or a rig file "
                          "(see README, 'Your own rig'), or give [plant] terms.")
    truth = dict(cfg.get("plant.truth") or {})
    for key in truth:
        if key not in spec.params:
            raise ConfigError(f"plant.truth.{key}", "is not a parameter of this rig.",
                              f"use one of: {', '.join(spec.params)}.")
        check_truth_value(f"plant.truth.{key}", truth[key], spec)
    ranges = {**spec.ranges, **_ranges(cfg, tuple(spec.params), spec)}
    return draw_truth(spec, ranges, truth, plants, np.random.default_rng(seed))


@dataclass
class SweepResult:
    """Per-plant outcomes plus the summary the CLI prints."""

    design: Design
    settings: SweepSettings
    truth: Columns
    per_plant: Columns
    summary: dict[str, Any] = field(default_factory=dict)
