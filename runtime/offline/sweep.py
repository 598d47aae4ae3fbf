"""Monte Carlo sweeps: many uncertain plants through the closed loop at once.

`run_sweep(cfg)` draws N plants from the config's `[plant.ranges]` (each
ranged parameter uniform in [lo, hi], `sim_rigs.plant.draw_truth`), runs
them in chunks spread over the machine's cores, and evaluates offline the
watchdog rules a simulation can see (contract rule ids): ``margin``
(ratio >= watchdog.margin_trip), ``clamp`` (phi_d clamp engaged, ratio >=
1 - clamp_margin; ratio >= 1 for the standard law), ``nonfinite`` and
``saturation`` (an input beyond its limit longer than watchdog.saturation_s,
the live watchdog's key; runtime.config maps watchdog.saturation_time onto it),
plus ``diverged`` (true state beyond sweep.divergence_factor x
design.state_range, or non-finite). Each plant ends *inside* (no rule fired),
*tripped* (first rule by time) or *diverged*. `run_grid` repeats the sweep
over settings (`--grid adaptation.gamma=1,2,4`); `plot_sweep` and
`plot_grid` draw the PNGs.

Two engines, over the same plant (`sim_rigs.kernel`, interpreting the rig's term table):

- ``compiled`` (the default of ``auto``): `runtime.kernels.fast.sweep_kernel`, a numba
  kernel with a prange over plants on `workers` threads; each plant runs its
  own time loop with its own truth, law state and noise stream, and only the
  rule bookkeeping is kept (no per-tick arrays). Any rig; any basis the law
  kernel packs (named terms, radial-basis block), weight modifiers,
  time-varying eps, latency, sensor delay. Plants go in slices so the
  progress bar moves.
- ``reference``: `AdaptiveLaw.step` and `RigPlant.step` (the numpy reference)
  over the batch (slow; any design). Tests check the engines against each other
  and against the single-plant dry run.

Rules: the sweep evaluates the live watchdog's rules (`runtime.guard.watchdog.build_rules`:
the same thresholds, comparisons and on-delays). Divergence covers the weights too:
a plant whose weight norm is non-finite or beyond ``sweep.weight_norm_limit``
(default: the watchdog's ``weight_norm_max``) has diverged.

Runs are reproducible: plant i's parameters depend on (seed, plants) only.
Sensor noise: in the compiled engine plant i's noise is its own stream keyed
by (seed, i), so results do not depend on the thread count or the slicing;
in the reference engine it depends on (seed, chunk layout). With
the noise off a plant's result depends on neither.

What does not live here: the CLI (`runtime.cli.cmd_sweep`), the go / no-go
verdict (`runtime.offline.preflight`), the live watchdog (`runtime.guard.watchdog`).
"""

from __future__ import annotations

import json
import math
import os
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError, check_config
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.method.design import Design, design_from_config
from runtime.offline.dryrun import weight_norm_limit

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
BLOCK = 64
"""Ticks between rule bookkeeping passes (buffers hold one block)."""


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
        from runtime.offline.dryrun import check_effectiveness

        check_effectiveness(where, val, spec)
        out[key] = (float(val[0]), float(val[1]))
    return out


def draw_plants(cfg: Config, plants: int, seed: int) -> Columns:
    """The truth of `plants` plants: ranged parameters uniform in [lo, hi], others at truth."""
    from runtime.method.rig import rig_spec
    from sim_rigs import RIGS
    from sim_rigs.plant import draw_truth

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
        from runtime.offline.dryrun import check_truth_value

        check_truth_value(f"plant.truth.{key}", truth[key], spec)
    ranges = {**spec.ranges, **_ranges(cfg, tuple(spec.params), spec)}
    return draw_truth(spec, ranges, truth, plants, np.random.default_rng(seed))


# ------------------------------------------------------------------ per-process setup
@dataclass
class _Setup:
    design: Design
    settings: SweepSettings
    cmd: Array
    eps_t: Array
    x0: Array
    sensors: Any
    modifiers: list[Any]
    engine: str
    packed: tuple[Any, Any] | None = None
    """(ic, fc) of `runtime.kernels.fast.pack_law` when the compiled engine can run this design."""
    levels: dict[str, float] = field(default_factory=dict)
    """From the live rule set (`runtime.guard.watchdog.sweep_levels`): margin, clamp, breach
    ratios and the saturation threshold in ticks."""


_SETUP_CACHE: dict[str, _Setup] = {}


def _compiled_packing(design: Design, mods: Sequence[Any]) -> tuple[Any, str]:
    """((ic, fc), "") when the compiled engine can run this design, else (None, why)."""
    rig = design.rig
    if rig.spec is None:
        return None, "it needs a simulated rig."
    try:
        from runtime.kernels import fast
    except ImportError:  # pragma: no cover - numba is a dependency
        return None, "numba is not installed."
    try:
        return fast.pack_law(design, fast.ModifierSettings.from_modifiers(mods, rig.m)), ""
    except ValueError as exc:
        return None, str(exc)


def _setup(raw: dict[str, Any], settings: SweepSettings) -> _Setup:
    key = json.dumps([raw, settings.__dict__], sort_keys=True, default=str)
    if key in _SETUP_CACHE:
        return _SETUP_CACHE[key]
    from runtime.method.modifiers import modifiers_from_config
    from runtime.offline.dryrun import eps_schedule, plant_from_config

    cfg = Config(raw=raw)
    design = design_from_config(cfg)
    rig = design.rig
    schedule = schedule_from_config(cfg, tracked_names(rig.C, rig.states))
    ticks = max(1, int(round(settings.duration / design.Ts)))
    t = np.arange(ticks, dtype=np.float64) * design.Ts
    cmd = np.ascontiguousarray(schedule.evaluate(t), dtype=float)
    eps_t = eps_schedule(cfg, design, t)
    plant = plant_from_config(cfg, design)
    mods = list(modifiers_from_config(cfg, design))
    packed, why = _compiled_packing(design, mods)
    engine = settings.engine
    if engine == "auto":
        engine = "compiled" if packed is not None else "reference"
    if engine == "compiled" and packed is None:
        raise ConfigError("sweep.engine", f"the compiled engine cannot run this config: {why}",
                          'use engine "reference" (or "auto", which falls back by itself).')
    from runtime.guard.watchdog import build_rules, sweep_levels

    lv = sweep_levels(build_rules(cfg, design.Ts, design.clamp_margin), design.Ts)
    levels = {"margin": lv["margin"],
              # the standard law's clamp signal is the ratio reaching 1 (runtime.method.law)
              "clamp": lv["clamp"] if design.law == "barrier" else 1.0,
              "breach": 1.0, "saturation_ticks": lv["saturation_ticks"]}
    out = _Setup(design, settings, cmd, eps_t, np.array(plant.x[0]), plant.sensors, mods,
                 engine, packed, levels)
    _SETUP_CACHE.clear()
    _SETUP_CACHE[key] = out
    return out


# ------------------------------------------------------------------ rule bookkeeping
def _over(value: Any, threshold: Any) -> Any:
    """`runtime.guard.watchdog.over` element by element."""
    from runtime.guard.watchdog import over

    with np.errstate(invalid="ignore"):
        return np.vectorize(over, otypes=[bool])(value, threshold)


class _Rules:
    """First tick of each rule per plant, fed one block of ticks at a time."""

    def __init__(self, B: int, design: Design, settings: SweepSettings,
                 levels: dict[str, float]) -> None:
        self.B = B
        self.max_ratio = np.zeros(B)
        self.first = {r: np.full(B, -1, dtype=np.int64)
                      for r in (*RULES, "breach", "diverged", "weights")}
        self.levels = {k: levels[k] for k in ("margin", "clamp", "breach")}
        self.u_max = design.rig.input_limits[:, None]
        self.sat_ticks = levels["saturation_ticks"]
        self.w_limit = settings.weight_norm_limit
        self.carry = np.zeros((design.rig.m, B))
        self.bound = settings.divergence_factor * design.state_range

    def block(self, k0: int, R: Array, UR: Array) -> None:
        """R (K, B) ratios and UR (K, m, B) raw inputs of ticks k0 .. k0+K-1."""
        K = R.shape[0]
        blockmax = np.max(np.where(np.isfinite(R), R, -np.inf), axis=0)
        np.fmax(self.max_ratio, blockmax, out=self.max_ratio)
        for rule, level in self.levels.items():
            hit = _over(R, level)
            first = self.first[rule]
            newly = (first < 0) & hit.any(axis=0)
            if newly.any():
                first[newly] = k0 + np.argmax(hit[:, newly], axis=0)
        bad = ~np.isfinite(R) | ~np.isfinite(UR).all(axis=1)
        first = self.first["nonfinite"]
        newly = (first < 0) & bad.any(axis=0)
        if newly.any():
            first[newly] = k0 + np.argmax(bad[:, newly], axis=0)
        sat = _over(np.abs(UR), self.u_max)  # (K, m, B)
        idx = np.arange(K)[:, None, None]
        last = np.maximum.accumulate(np.where(sat, -1, idx), axis=0)
        run = np.where(last < 0, idx + 1 + self.carry, idx - last)
        over = _over(run + 1e-9, self.sat_ticks)
        self.carry = run[-1].astype(float)
        first = self.first["saturation"]
        any_over = over.any(axis=(0, 1))
        newly = (first < 0) & any_over
        if newly.any():
            o = over[:, :, newly].any(axis=1)
            first[newly] = k0 + np.argmax(o, axis=0)

    def state(self, k: int, x: Array, w_norm: Array) -> None:
        """Divergence checks after tick k: the true state x (n, B), the weight norms (B,)."""
        bad = ~(np.abs(x) <= self.bound[:, None]).all(axis=0)
        first = self.first["diverged"]
        newly = (first < 0) & bad
        if newly.any():
            first[newly] = k
        bad = ~(w_norm <= self.w_limit)
        first = self.first["weights"]
        newly = (first < 0) & bad
        if newly.any():
            first[newly] = k

    def result(self) -> Columns:
        out: Columns = {f"first_{r}": v for r, v in self.first.items()}
        ratio = self.max_ratio.copy()
        ratio[self.first["nonfinite"] >= 0] = np.inf
        out["max_ratio"] = ratio
        return out


# ------------------------------------------------------------------ the reference engine
def _run_reference(setup: _Setup, prm: Columns, rng: np.random.Generator,
                   ) -> Columns:
    from runtime.method.law import AdaptiveLaw
    from sim_rigs.plant import RigPlant

    d = setup.design
    st = setup.settings
    B = len(next(iter(prm.values())))
    m = d.rig.m
    sens = setup.sensors
    sensors = sens if st.noise else sens.noiseless()
    plant = RigPlant.create(d.rig.spec, prm, batch=B, x0=setup.x0, sensors=sensors,
                            substeps=st.substeps, rng=rng,
                            limits=np.asarray(d.rig.input_limits, dtype=float))
    law = AdaptiveLaw(d, setup.modifiers)
    rules = _Rules(B, d, st, setup.levels)
    R = np.empty((BLOCK, B))
    UR = np.empty((BLOCK, m, B))
    lat = st.latency_ticks
    ubuf = np.zeros((lat + 1, B, m))
    y = plant.measure()
    state = law.init_state(y)
    blk = 0
    k_block0 = 0
    ticks = len(setup.cmd)
    with np.errstate(all="ignore"):
        for k in range(ticks):
            out = law.step(state, y, setup.cmd[k], setup.eps_t[k])
            R[blk] = out.ratio
            UR[blk] = out.u_raw.T
            ubuf[k % (lat + 1)] = out.u
            plant.step(ubuf[(k - lat) % (lat + 1)] if k >= lat else np.zeros((B, m)), d.Ts)
            y = plant.measure()
            blk += 1
            if blk == BLOCK or k == ticks - 1:
                rules.block(k_block0, R[:blk], UR[:blk])
                rules.state(k, plant.x.T, np.sqrt(np.sum(state.W * state.W, axis=(-2, -1))))
                blk = 0
                k_block0 = k + 1
    return rules.result()


# ------------------------------------------------------------------ the compiled engine
def _run_compiled(setup: _Setup, prm: Columns, plant_ids: NDArray[np.int64],
                  noise_given: Array | None = None) -> Columns:
    """Plants `plant_ids` through `runtime.kernels.fast.sweep_kernel` (threads: numba's current
    count).

    Noise: each plant's own stream keyed by (seed, plant id), or `noise_given`
    (B, ticks + 1, 4) standard normals (tests use it to replay another engine's draws).
    """
    from runtime.kernels import fast, rigloops
    from sim_rigs import kernel

    d = setup.design
    st = setup.settings
    sens = setup.sensors
    spec = d.rig.spec
    B = len(plant_ids)
    assert setup.packed is not None, "the fused engine runs only on a packed plant"
    ic, fc = setup.packed
    pcode, pmat = kernel.pack_rig(spec)
    P = kernel.pack_params(spec, {k: np.broadcast_to(np.asarray(prm[k], dtype=float), (B,))
                                  for k in spec.params})
    noisy = st.noise and bool(np.any(sens.noise > 0))
    mode = fast.NOISE_OFF if not noisy else (
        fast.NOISE_STREAM if noise_given is None else fast.NOISE_GIVEN)
    given = np.zeros((1, 1, 1)) if noise_given is None else np.ascontiguousarray(
        noise_given, dtype=float)
    lv = setup.levels
    levels = np.array([lv["margin"], lv["clamp"], lv["breach"]])
    first = np.empty((B, len(fast.SWEEP_RULES)), dtype=np.int64)
    max_ratio = np.empty(B)
    rigloops.compiled(spec).sweep_kernel(
        setup.cmd, setup.eps_t, np.ascontiguousarray(setup.x0, dtype=float), pcode, pmat, P,
        np.ascontiguousarray(plant_ids, dtype=np.int64), int(st.seed), int(st.substeps),
        np.asarray(d.rig.input_limits, dtype=float),
        np.ascontiguousarray(sens.resolution, dtype=float),
        np.ascontiguousarray(sens.noise, dtype=float), int(sens.delay_ticks),
        int(st.latency_ticks), mode, given, ic, fc, fast.sweep_law_fits(ic), levels,
        float(lv["saturation_ticks"]), np.asarray(st.divergence_factor * d.state_range,
                                                  dtype=float),
        float(st.weight_norm_limit), first, max_ratio)
    out: Columns = {f"first_{r}": first[:, j].copy() for j, r in enumerate(fast.SWEEP_RULES)}
    max_ratio[out["first_nonfinite"] >= 0] = np.inf
    out["max_ratio"] = max_ratio
    return out


def _compiled_threads(workers: int) -> int:
    import numba

    return max(1, min(int(workers), int(numba.config.NUMBA_NUM_THREADS)))


def run_chunk(raw: dict[str, Any], settings: SweepSettings, prm: Columns,
              chunk_index: int, plant_ids: NDArray[np.int64] | None = None) -> Columns:
    """Simulate one chunk of plants (in this process); per-plant result arrays.

    The compiled engine keys each plant's noise stream by its number: `plant_ids`
    (the plants' indices in the whole sweep, as `run_sweep` numbers them, so a chunk
    run elsewhere gives the same plant the same noise), by default 0.. in the chunk.
    """
    setup = _setup(raw, settings)
    rng = np.random.default_rng([settings.seed, chunk_index])
    prm = {k: np.ascontiguousarray(v, dtype=float) for k, v in prm.items()}
    if setup.engine == "compiled":
        B = len(next(iter(prm.values())))
        ids = np.arange(B, dtype=np.int64) if plant_ids is None else np.ascontiguousarray(
            plant_ids, dtype=np.int64)
        return _run_compiled(setup, prm, ids)
    return _run_reference(setup, prm, rng)


# ------------------------------------------------------------------ the sweep
@dataclass
class SweepResult:
    """Per-plant outcomes plus the summary the CLI prints."""

    design: Design
    settings: SweepSettings
    truth: Columns
    per_plant: Columns
    summary: dict[str, Any] = field(default_factory=dict)


def _clean(v: Any) -> Any:
    """JSON-safe: numpy scalars to Python, inf / NaN to None."""
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_clean(x) for x in v]
    if isinstance(v, np.ndarray):
        return _clean(v.tolist())
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, float | np.floating):
        f = float(v)
        return f if math.isfinite(f) else None
    return v


def classify(per_plant: Columns, Ts: float) -> Columns:
    """Outcome (0 inside, 1 tripped, 2 diverged), first-out rule index and its time per plant."""
    B = len(per_plant["max_ratio"])
    big = np.iinfo(np.int64).max
    ticks = np.stack([np.where(per_plant[f"first_{r}"] >= 0, per_plant[f"first_{r}"], big)
                      for r in RULES])
    first_rule = np.argmin(ticks, axis=0)  # ties: RULES order
    first_tick = ticks[first_rule, np.arange(B)]
    tripped = first_tick < big
    diverged = (per_plant["first_diverged"] >= 0) | (per_plant["first_weights"] >= 0)
    outcome = np.where(diverged, 2, np.where(tripped, 1, 0))
    trip_time = np.where(tripped, first_tick * Ts, np.nan)
    return {"outcome": outcome, "first_rule": np.where(tripped, first_rule, -1),
            "trip_time": trip_time}


def summarise(design: Design, settings: SweepSettings, truth: Columns,
              per_plant: Columns, wall: float, worst: int = 5) -> dict[str, Any]:
    """The report: fractions, trips by rule, worst margin and its distribution, worst cases."""
    Ts = design.Ts
    cls = classify(per_plant, Ts)
    per_plant.update(cls)
    N = len(per_plant["max_ratio"])
    ticks = max(1, int(round(settings.duration / Ts)))
    out = cls["outcome"]
    ratio = per_plant["max_ratio"]
    finite = ratio[np.isfinite(ratio)]
    pct = {f"p{q}": float(np.percentile(finite, q)) for q in (5, 50, 90, 95, 99)} \
        if finite.size else {}
    tripped = out == 1
    by_rule = {r: int(np.sum(tripped & (cls["first_rule"] == i))) for i, r in enumerate(RULES)}
    fired = {r: int(np.sum(per_plant[f"first_{r}"] >= 0)) for r in RULES}
    breach = per_plant["first_breach"]
    order = np.argsort(-np.where(np.isnan(ratio), np.inf, ratio), kind="stable")[:worst]
    cases = []
    for i in order:
        ft = per_plant["first_breach"][i]
        cases.append({
            "plant": int(i),
            "outcome": OUTCOMES[int(out[i])],
            "first_rule": RULES[cls["first_rule"][i]] if cls["first_rule"][i] >= 0 else None,
            "trip_time": cls["trip_time"][i],
            "breach_time": ft * Ts if ft >= 0 else None,
            "diverged_time": (per_plant["first_diverged"][i] * Ts
                              if per_plant["first_diverged"][i] >= 0 else None),
            "weights_diverged_time": (per_plant["first_weights"][i] * Ts
                                      if per_plant["first_weights"][i] >= 0 else None),
            "max_margin_ratio": ratio[i],
            "params": {k: float(v[i]) for k, v in truth.items()},
        })
    trip_times = cls["trip_time"][tripped]
    summary = {
        "plants": N,
        "ticks": ticks,
        "duration": ticks * Ts,
        "sample_period": Ts,
        "latency_ticks": settings.latency_ticks,
        "noise": settings.noise,
        "substeps": settings.substeps,
        "seed": settings.seed,
        "law": design.law,
        "gamma_max": float(np.max(design.gamma)),
        "eps": design.eps,
        "margin_trip": settings.margin_trip,
        "inside_fraction": float(np.mean(out == 0)),
        "trip_fraction": float(np.mean(out == 1)),
        "diverged_fraction": float(np.mean(out == 2)),
        "diverged_states_fraction": float(np.mean(per_plant["first_diverged"] >= 0)),
        "diverged_weights_fraction": float(np.mean(per_plant["first_weights"] >= 0)),
        "weight_norm_limit": settings.weight_norm_limit,
        "bound_held_fraction": float(np.mean(breach < 0)),
        "trips_by_rule": by_rule,
        "rules_fired": fired,
        "worst_margin_ratio": float(np.max(ratio)) if N else None,
        "margin_ratio_percentiles": pct,
        "median_trip_time": float(np.median(trip_times)) if trip_times.size else None,
        "plant_steps_per_second": N * ticks / wall if wall > 0 else None,
        "wall_seconds": wall,
        "workers": settings.workers,
        "chunk": min(settings.chunk, -(-N // settings.workers)),
        "worst_cases": cases,
    }
    return _clean(summary)


def _sweep_compiled(setup: _Setup, truth: Columns, progress: Progress | None,
                    ) -> tuple[dict[int, Columns], int, float, float]:
    """All plants through the compiled kernel on numba threads, in plant slices so the
    progress bar moves; returns (results by slice start, slice size, wall, compile) seconds."""
    import numba

    settings = setup.settings
    N = settings.plants
    threads = _compiled_threads(settings.workers)
    before = numba.get_num_threads()
    numba.set_num_threads(threads)
    results: dict[int, Columns] = {}
    try:
        t0 = time.perf_counter()
        short = _Setup(**{**setup.__dict__, "cmd": setup.cmd[:1], "eps_t": setup.eps_t[:1]})
        _run_compiled(short, {k: v[:1] for k, v in truth.items()}, np.zeros(1, np.int64))
        compile_s = time.perf_counter() - t0  # compiling, or loading numba's cache
        cs = min(settings.chunk, max(4 * threads, -(-N // 20)))
        wall0 = time.perf_counter()
        # dynamic scheduling, one group of plants at a time: on a shared machine a thread
        # that loses its core does not hold the others up at the end of a slice
        with numba.parallel_chunksize(1):
            for s in range(0, N, cs):
                ids = np.arange(s, min(N, s + cs), dtype=np.int64)
                results[s] = _run_compiled(setup, {k: v[ids] for k, v in truth.items()}, ids)
                if progress:
                    progress(int(ids[-1]) + 1, N)
        wall = time.perf_counter() - wall0
    finally:
        numba.set_num_threads(before)
    return results, cs, wall, compile_s


def run_sweep(cfg: Config, plants: int | None = None, seed: int | None = None,
              duration: float | None = None, workers: int | None = None,
              chunk: int | None = None, engine: str | None = None,
              progress: Progress | None = None) -> SweepResult:
    """Draw the plants, run them (compiled: `workers` threads; reference: chunks
    over `workers` processes), summarise."""
    settings = SweepSettings.from_config(cfg, plants, seed, duration, workers, chunk, engine)
    design = design_from_config(cfg)
    if not design.feasible:
        raise ConfigError("adaptation.gamma", "the design is refused: "
                          + "; ".join(design.reasons), "fix the design first (corral design).")
    truth = draw_plants(cfg, settings.plants, settings.seed)
    # validate in this process: errors are one line, not a traceback
    setup = _setup(cfg.raw, settings)
    N = settings.plants
    if progress:
        progress(0, N)
    compile_s = 0.0
    if setup.engine == "compiled":
        results, cs, wall, compile_s = _sweep_compiled(setup, truth, progress)
    else:
        results = {}
        cs = min(settings.chunk, -(-N // settings.workers))  # every worker gets a chunk
        jobs = [(i, s, {k: v[s:s + cs] for k, v in truth.items()})
                for i, s in enumerate(range(0, N, cs))]
        done = 0
        wall0 = time.perf_counter()
        if settings.workers == 1 or len(jobs) == 1:
            for i, s, prm in jobs:
                results[s] = run_chunk(cfg.raw, settings, prm, i)
                done += len(next(iter(prm.values())))
                if progress:
                    progress(done, N)
        else:
            with ProcessPoolExecutor(max_workers=min(settings.workers, len(jobs))) as pool:
                futs = {pool.submit(run_chunk, cfg.raw, settings, prm, i): (s, prm)
                        for i, s, prm in jobs}
                for fut in as_completed(futs):
                    s, prm = futs[fut]
                    results[s] = fut.result()
                    done += len(next(iter(prm.values())))
                    if progress:
                        progress(done, N)
        wall = time.perf_counter() - wall0
    starts = sorted(results)
    per_plant = {k: np.concatenate([results[s][k] for s in starts]) for k in results[starts[0]]}
    summary = summarise(design, settings, truth, per_plant, wall)
    summary["engine"] = setup.engine
    summary["compile_seconds"] = compile_s
    if setup.engine == "compiled":
        summary["workers"] = _compiled_threads(settings.workers)
        summary["chunk"] = cs
    return SweepResult(design, settings, truth, per_plant, summary)


# ------------------------------------------------------------------ grids
def check_grid_keys(cfg: Config, axes: Sequence[tuple[str, list[Any]]]) -> None:
    """Refuse a grid key the schema does not declare: a misspelt key would otherwise be
    ignored by every module and the grid would show the same result in every cell."""
    check_config(cfg.raw, "--grid", keys=[key for key, _vals in axes])


def parse_grid(items: Sequence[str]) -> list[tuple[str, list[Any]]]:
    """`KEY=v1,v2,...` items into (key, values); values parsed like --set values."""
    from runtime.config import parse_value

    axes = []
    for item in items:
        key, sep, vals = item.partition("=")
        key = key.strip()
        if not sep or not key or not vals.strip():
            raise ConfigError("--grid", f"cannot read {item!r}.",
                              "write KEY=v1,v2,..., e.g. --grid adaptation.gamma=1,2,4,8.")
        values = [parse_value(v.strip()) for v in vals.split(",") if v.strip()]
        axes.append((key, values))
    if len(axes) > 2:
        raise ConfigError("--grid", f"{len(axes)} axes given; at most 2 are supported.",
                          "sweep one or two keys at a time.")
    return axes


def _fmt(v: Any) -> str:
    return json.dumps(v) if not isinstance(v, str) else v


def run_grid(cfg: Config, axes: Sequence[tuple[str, list[Any]]], progress: Progress | None = None,
             **kwargs: Any) -> dict[str, Any]:
    """One sweep per grid setting; refused designs are reported, not run.

    Returns {"axes": [{"key", "values"}], "grid": [entry...], "best": entry | None} where
    each entry is {"setting": {key: value}, "refused": bool, "reasons": [...], plus the
    sweep summary keys when run}; "best" is the run setting with the highest
    inside_fraction (ties: lower worst_margin_ratio).
    """
    import itertools

    check_grid_keys(cfg, axes)
    entries: list[dict[str, Any]] = []
    combos = list(itertools.product(*[vals for _k, vals in axes]))
    for combo in combos:
        setting = {k: v for (k, _vals), v in zip(axes, combo, strict=True)}
        sub = cfg.with_overrides([f"{k}={_fmt(v)}" for k, v in setting.items()])
        check_config(sub.raw, "--grid", keys=list(setting))  # a value of the wrong kind
        entry: dict[str, Any] = {"setting": setting}
        try:
            design = design_from_config(sub)
        except ConfigError as exc:
            entry.update(refused=True, reasons=[str(exc)])
            entries.append(entry)
            continue
        if not design.feasible:
            entry.update(refused=True, reasons=list(design.reasons))
            entries.append(entry)
            continue
        res = run_sweep(sub, progress=progress, **kwargs)
        entry.update(refused=False, reasons=[])
        entry.update({k: v for k, v in res.summary.items() if k != "worst_cases"})
        entry["worst_cases"] = res.summary["worst_cases"][:3]
        entries.append(entry)
    ran = [e for e in entries if not e["refused"]]
    best = max(ran, key=lambda e: (e["inside_fraction"], -(e["worst_margin_ratio"] or 0)),
               default=None)
    return {"axes": [{"key": k, "values": list(v)} for k, v in axes], "grid": entries,
            "best": best}


# ------------------------------------------------------------------ plots
def plot_sweep(result: SweepResult, path: Path) -> Path:
    """Histogram of the worst margin ratio (trip level and bound marked) and outcome fractions."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    s = result.summary
    ratio = result.per_plant["max_ratio"]
    shown = np.clip(np.where(np.isfinite(ratio), ratio, 2.0), 0.0, 2.0)
    fig, (ax, ax2) = plt.subplots(1, 2, figsize=(11, 4), constrained_layout=True,
                                  gridspec_kw={"width_ratios": [3, 1.2]})
    ax.hist(shown, bins=60, range=(0.0, max(1.1, float(shown.max()) * 1.02)),
            color="tab:purple", alpha=0.8)
    ax.axvline(s["margin_trip"], color="tab:red", ls=":", lw=1.2,
               label=f"trip level {s['margin_trip']:.2f}")
    ax.axvline(1.0, color="tab:red", lw=1.8, label="bound (ratio 1)")
    ax.set_xlabel("worst margin ratio ||e||_P / eps per plant [1] (values > 2 shown at 2)")
    ax.set_ylabel("plants")
    ax.legend(loc="upper right", fontsize=8)
    ax.grid(alpha=0.3)
    fr = [s["inside_fraction"], s["trip_fraction"], s["diverged_fraction"]]
    bars = ax2.bar(OUTCOMES, fr, color=["tab:green", "tab:orange", "tab:red"])
    for b, f in zip(bars, fr, strict=True):
        ax2.text(b.get_x() + b.get_width() / 2, f + 0.01, f"{100 * f:.1f} %", ha="center",
                 fontsize=9)
    ax2.set_ylim(0, 1.12)
    ax2.set_ylabel("fraction of plants")
    ax2.grid(alpha=0.3, axis="y")
    rules = ", ".join(f"{k} {v}" for k, v in s["trips_by_rule"].items() if v) or "none"
    fig.suptitle(f"corral sweep: {s['plants']} plants, {s['law']} law, gamma {s['gamma_max']:g}, "
                 f"{s['duration']:g} s at {1 / s['sample_period']:g} Hz; first-out trips: {rules}",
                 fontsize=10)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_grid(grid: dict[str, Any], path: Path) -> Path:
    """Trip / inside / diverged fraction against the setting; refused settings shaded."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    axes = grid["axes"]
    entries = grid["grid"]
    path.parent.mkdir(parents=True, exist_ok=True)
    if len(axes) == 1:
        key, values = axes[0]["key"], axes[0]["values"]
        numeric = all(isinstance(v, int | float) and not isinstance(v, bool) for v in values)
        xs = np.array(values, dtype=float) if numeric else np.arange(len(values), dtype=float)
        fig, ax = plt.subplots(figsize=(8, 4), constrained_layout=True)
        pos = xs[xs > 0] if numeric else xs
        if numeric and pos.size == xs.size and xs.size > 1 and xs.max() / xs.min() >= 10:
            ax.set_xscale("log")
        for name, color in (("inside_fraction", "tab:green"), ("trip_fraction", "tab:orange"),
                            ("diverged_fraction", "tab:red")):
            pts = [(x, e[name]) for x, e in zip(xs, entries, strict=True) if not e["refused"]]
            if pts:
                px, py = zip(*pts, strict=True)
                ax.plot(px, py, "o-", color=color, label=name.replace("_", " "))
        for x, e in zip(xs, entries, strict=True):
            if e["refused"]:
                ax.axvline(x, color="0.5", lw=6, alpha=0.3)
                ax.text(x, 0.5, "refused", rotation=90, ha="center", va="center", fontsize=8)
        good = [x for x, e in zip(xs, entries, strict=True)
                if not e["refused"] and e["inside_fraction"] >= 0.95]
        if good:
            ax.axvspan(min(good), max(good), color="tab:green", alpha=0.08,
                       label="feasible window (>= 95 % inside)")
        if not numeric:
            ax.set_xticks(xs, [str(v) for v in values])
        ax.set_xlabel(key)
        ax.set_ylabel("fraction of plants")
        ax.set_ylim(-0.02, 1.05)
        ax.grid(alpha=0.3, which="both")
        ax.legend(fontsize=8)
    else:
        (k1, v1), (k2, v2) = (axes[0]["key"], axes[0]["values"]), (axes[1]["key"],
                                                                  axes[1]["values"])
        Z = np.full((len(v1), len(v2)), np.nan)
        for idx, e in enumerate(entries):
            if not e["refused"]:
                Z[idx // len(v2), idx % len(v2)] = e["inside_fraction"]
        fig, ax = plt.subplots(figsize=(7, 5), constrained_layout=True)
        im = ax.imshow(Z, origin="lower", cmap="RdYlGn", vmin=0, vmax=1, aspect="auto")
        for i in range(len(v1)):
            for j in range(len(v2)):
                txt = "refused" if np.isnan(Z[i, j]) else f"{100 * Z[i, j]:.0f}%"
                ax.text(j, i, txt, ha="center", va="center", fontsize=8)
        ax.set_xticks(range(len(v2)), [str(v) for v in v2])
        ax.set_yticks(range(len(v1)), [str(v) for v in v1])
        ax.set_xlabel(k2)
        ax.set_ylabel(k1)
        fig.colorbar(im, ax=ax, label="inside fraction")
    fig.suptitle("corral sweep grid: where the bound holds", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
