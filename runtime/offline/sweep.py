"""Monte Carlo sweeps: many uncertain plants through the closed loop at once.

`run_sweep(cfg)` draws N plants from the config's `[plant.ranges]` (each
ranged parameter uniform in [lo, hi], `sim_rigs.plant.draw_truth`), runs
them in chunks spread over the machine's cores, and evaluates offline the
watchdog rules a simulation can see (contract rule ids): ``margin``
(ratio >= watchdog.margin_trip), ``clamp`` (phi_d clamp engaged, ratio >=
1 - clamp_margin), ``nonfinite`` and
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
the same signals, thresholds, comparisons and on-delays, through `sweep_levels`).
Divergence covers the weights too: a plant whose weight norm is non-finite or beyond
``sweep.weight_norm_limit`` (default: the watchdog's ``weight_norm_max``) has diverged.

Runs are reproducible: plant i's parameters depend on (seed, plants) only.
Sensor noise: in the compiled engine plant i's noise is its own stream keyed
by (seed, i), so results do not depend on the thread count or the slicing;
in the reference engine it depends on (seed, chunk layout). With
the noise off a plant's result depends on neither.

The parts: settings, plants and the result record in `runtime.offline.sweep_settings`; the
per-process setup, the rule bookkeeping and both engines in `runtime.offline.sweep_engines`;
the pictures in `runtime.offline.sweep_plots`; here the summary, `run_sweep` and the grid
(and every name the callers import from here).

What does not live here: the CLI (`runtime.cli.cmd_sweep`), the go / no-go
verdict (`runtime.offline.preflight`), the live watchdog (`runtime.guard.watchdog`).
"""

from __future__ import annotations

import itertools
import json
import math
import time
from collections.abc import Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from typing import Any

import numpy as np

from runtime.config import Config, ConfigError, check_config, parse_value
from runtime.method.design import Design, design_from_config
from runtime.offline.sweep_engines import (
    _compiled_threads,
    _Rules,
    _run_compiled,
    _setup,
    run_chunk,
    sweep_compiled,
)
from runtime.offline.sweep_plots import plot_grid, plot_sweep
from runtime.offline.sweep_settings import (
    ENGINES,
    MAX_PLANTS,
    MAX_TICKS,
    OUTCOMES,
    RULES,
    Columns,
    Progress,
    SweepResult,
    SweepSettings,
    default_substeps,
    draw_plants,
)

__all__ = [  # the sweep's public face; the parts live in sweep_settings, sweep_engines, sweep_plots
    "ENGINES", "MAX_PLANTS", "MAX_TICKS", "OUTCOMES", "RULES", "Columns", "Progress",
    "SweepResult", "SweepSettings", "_Rules", "_run_compiled", "_setup", "check_grid_keys",
    "classify", "default_substeps", "draw_plants", "parse_grid", "plot_grid", "plot_sweep",
    "run_chunk", "run_grid", "run_sweep", "summarise",
]


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
        results, cs, wall, compile_s = sweep_compiled(setup, truth, progress)
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
