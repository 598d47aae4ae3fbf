"""The dry run: the closed loop against the simulated rig in simulated time.

`dry_run(cfg)` builds the design, the law and the simulated plant from a
config, runs every tick as fast as the machine allows, keeps every tick in
preallocated arrays, and returns a `DryRunResult`. `write_run_file` stores
the ticks as a msgpack run file (one schema header, then positional
records); `plot_report` draws the PNG report.

What does not live here: the real-time loop and the watchdog (`runtime.realtime.loop`,
`runtime.guard.watchdog`), which reuse the same law.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.commands import (
    RMS_ERROR_FINAL_AGAINST,
    rms_error_final,
    schedule_from_config,
    tracked_names,
)
from runtime.method.design import Design, design_from_config
from runtime.method.law import AdaptiveLaw

RUN_FORMAT = "corral-run"
RUN_VERSION = 1


@dataclass
class DryRunResult:
    """Every tick of a dry run, plus the summary figures."""

    design: Design
    t: NDArray[np.float64]
    columns: dict[str, NDArray[np.float64]]
    units: dict[str, str]
    summary: dict[str, Any] = field(default_factory=dict)


def check_effectiveness(where: str, value: Any, spec: Any = None) -> None:
    """Motor effectiveness (a rig's `effectiveness` parameters) must be positive: the method
    assumes the sign of the input gain is known (Lambda positive diagonal), so zero or a
    negative value is a config mistake, not a plant to simulate."""
    key = where.rsplit(".", 1)[-1]
    names = ([e for e in spec.effectiveness if e is not None] if spec is not None
             else [key] if key.startswith("lam_") else [])
    if key not in names:
        return
    vals = value if isinstance(value, list) else [value]
    for v in vals:
        if isinstance(v, int | float) and not isinstance(v, bool) and not v > 0:
            raise ConfigError(where, f"motor effectiveness must be positive, got {value!r}.",
                              "give a value greater than zero (1 = as nominal, 0.6 = 40 % "
                              "weaker).")


def check_truth_value(where: str, value: Any, spec: Any = None) -> None:
    """One `plant.truth` entry: a finite number (and a positive one for effectiveness)."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not np.isfinite(value):
        raise ConfigError(where, f"must be a finite number, got {value!r}.",
                          f"write e.g. {where.rsplit('.', 1)[-1]} = 0.5 under [plant.truth].")
    check_effectiveness(where, value, spec)


def plant_from_config(cfg: Config, design: Design, batch: int = 1,
                      truth: dict[str, Any] | None = None) -> Any:
    """The simulated plant a config describes: its rig (`rig.sim` or inline terms) with the
    config's `[plant]` truth and sensor overrides (`sim_rigs.plant.RigPlant`)."""
    from runtime.method.rig import as_config_error, sensor_overrides
    from sim_rigs import builtin_names
    from sim_rigs.plant import RigPlant, SensorModel
    from sim_rigs.rigfile import RigFileError

    spec = design.rig.spec
    if spec is None:
        raise ConfigError("rig.sim", "this needs a simulated rig to stand in for the plant.",
                          f"set rig.sim to a built-in rig ({', '.join(builtin_names())}) or "
                          "a rig file (see README, 'Your own rig'), or give [plant] terms.")
    from_config = truth is None
    truth = dict(cfg.get("plant.truth") or {}) if truth is None else truth
    for key in truth:
        if key not in spec.params:
            raise ConfigError(f"plant.truth.{key}", "is not a parameter of this rig.",
                              f"use one of: {', '.join(spec.params)}.")
        if from_config:  # a caller's truth (a fitted plant, say) is not the user's input
            check_truth_value(f"plant.truth.{key}", truth[key], spec)
    try:
        sensors = SensorModel.for_rig(spec, sensor_overrides(cfg))
    except RigFileError as exc:
        raise as_config_error(exc) from None
    x0 = cfg.vector("plant.x0", design.rig.n)
    seed = int(cfg.number("plant.seed"))
    substeps = int(cfg.number("plant.substeps"))
    return RigPlant.create(spec, truth, batch=batch, x0=x0, sensors=sensors, substeps=substeps,
                           rng=np.random.default_rng(seed),
                           limits=np.asarray(design.rig.input_limits, dtype=float))


def weight_norm_limit(cfg: Config) -> float:
    """||W||_F beyond which a dry run or a sweep calls the weights diverged:
    `sweep.weight_norm_limit`, default the watchdog's `watchdog.weight_norm_max` (100)."""
    return float(cfg.number("sweep.weight_norm_limit", cfg.number("watchdog.weight_norm_max")))


ENGINES = ("fast", "reference")
MAX_TICKS = 3_000_000  # 50 min at 1 kHz


def eps_schedule(cfg: Config, design: Design, t: NDArray[np.float64]) -> NDArray[np.float64]:
    """eps per tick from `[adaptation.bound]` (constant design.eps when absent)."""
    from runtime.method.bound import schedule_from_config

    schedule = schedule_from_config(cfg, design)
    return np.broadcast_to(np.asarray(schedule.eps(t), dtype=float), t.shape).copy()


_eps_schedule = eps_schedule  # the old private name, kept for existing callers


def dry_run(cfg: Config, progress: Any = None, engine: str = "fast") -> DryRunResult:
    """Run the closed loop for `commands.duration` seconds of simulated time.

    `engine="fast"` runs the compiled single-plant kernels (`runtime.kernels.fast`);
    `engine="reference"` runs the batched numpy law and plant tick by tick (slow,
    the source of truth for cross-checks). Both fill the same columns and summary.
    """
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {', '.join(ENGINES)}, got {engine!r}")
    from runtime.kernels.fast import ModifierSettings
    from runtime.method.modifiers import modifiers_from_config

    design = design_from_config(cfg)
    plant = plant_from_config(cfg, design)
    rig = design.rig
    modifiers = modifiers_from_config(cfg, design)
    tracked = tracked_names(rig.C, rig.states)
    schedule = schedule_from_config(cfg, tracked)
    Ts = design.Ts
    ticks = int(round(schedule.duration / Ts))
    # Every tick is recorded (about 40 floats); refuse a run that cannot fit in memory
    # with the two fields that set its length, instead of failing inside numpy.
    if ticks > MAX_TICKS:
        raise ConfigError("commands.duration",
                          f"{schedule.duration:g} s at loop.period = {Ts:g} s is {ticks:,} "
                          f"ticks; a dry run records at most {MAX_TICKS:,} (about 1 GB).",
                          "shorten commands.duration or lengthen loop.period.")
    t = np.arange(ticks, dtype=np.float64) * Ts
    cmd = np.ascontiguousarray(schedule.evaluate(t), dtype=float)
    eps_t = eps_schedule(cfg, design, t)
    n, m, p = rig.n, rig.m, len(tracked)

    cols: dict[str, NDArray[np.float64]] = {
        "c": np.empty((ticks, p)), "x": np.empty((ticks, n)), "y": np.empty((ticks, n)),
        "xr": np.empty((ticks, n)), "e": np.empty((ticks, n)), "s": np.empty(ticks),
        "ratio": np.empty(ticks), "phi_d": np.empty(ticks), "eff_rate": np.empty(ticks),
        "step_gain": np.empty(ticks), "u": np.empty((ticks, m)), "u_raw": np.empty((ticks, m)),
        "w_norm": np.empty(ticks), "clamped": np.empty(ticks),
    }
    su = tuple(rig.state_units)
    units = {"t": "s", "c": ",".join(su[i] for i in np.argmax(rig.C != 0, axis=1)),
             "x": ",".join(su), "y": ",".join(su), "xr": ",".join(su), "e": ",".join(su),
             "s": "1", "ratio": "1", "phi_d": "1", "eff_rate": "1", "step_gain": "1",
             "u": ",".join(rig.input_units), "u_raw": ",".join(rig.input_units),
             "w_norm": "1", "clamped": "1"}

    compile_s = 0.0
    if engine == "fast" and rig.spec is not None:
        settings = ModifierSettings.from_modifiers(modifiers, rig.m)
        wall, compile_s = _run_fast(design, settings, plant, cmd, eps_t, cols, progress)
    else:
        engine = "reference"
        law = AdaptiveLaw(design, modifiers)
        wall = _run_reference(law, plant, cmd, eps_t, cols, progress)
    cols["c"][:] = cmd
    cols["xr"][:] = cols["y"] - cols["e"]  # the reference state the tick compared against

    ratio = cols["ratio"]
    breach = np.flatnonzero(~(ratio < 1.0))
    # divergence, as the sweep counts it: the true state beyond sweep.divergence_factor x
    # design.state_range (or non-finite), the weight norm non-finite or beyond
    # sweep.weight_norm_limit (default: the watchdog's weight_norm_max)
    w_limit = weight_norm_limit(cfg)
    bound = cfg.number("sweep.divergence_factor") * design.state_range
    x_bad = np.flatnonzero(~np.all(np.abs(cols["x"]) <= bound, axis=1))
    w_bad = np.flatnonzero(~(cols["w_norm"] <= w_limit))
    out_idx = np.argmax(rig.C != 0, axis=1)
    summary = {
        "law": design.law,
        "rig": rig.name,
        "eps": design.eps,
        "max_margin_ratio": float(np.max(ratio)),
        "breach_time": float(t[breach[0]]) if breach.size else None,
        "rms_error_final": rms_error_final(t, cols["y"][:, out_idx], cmd),
        "rms_error_final_against": RMS_ERROR_FINAL_AGAINST,
        "weight_norm": float(cols["w_norm"][-1]),
        "max_weight_norm": float(np.max(cols["w_norm"])),
        "weight_norm_limit": w_limit,
        "weights_diverged_time": float(t[w_bad[0]]) if w_bad.size else None,
        "states_diverged_time": float(t[x_bad[0]]) if x_bad.size else None,
        "diverged": bool(w_bad.size or x_bad.size),
        "ticks": ticks,
        "sim_seconds": float(ticks * Ts),
        "wall_seconds": wall,
        "realtime_factor": float(ticks * Ts / wall) if wall > 0 else float("inf"),
        "max_eff_rate": float(np.max(cols["eff_rate"])),
        # g_k before the cap (`LawOutput.step_gain`); the law applies min(g_k, cap).
        "max_step_gain": float(np.max(cols["step_gain"])),
        "max_step_gain_applied": float(min(np.max(cols["step_gain"]), design.step_gain_cap)),
        "step_gain_cap": float(design.step_gain_cap),
        "clamp_ticks": int(np.sum(cols["clamped"])),
        "saturation_fraction": float(np.mean(np.any(np.abs(cols["u_raw"])
                                                    > rig.input_limits, axis=1))),
        "engine": engine,
        "compile_seconds": compile_s,
        "eps_min": float(np.min(eps_t)),
    }
    return DryRunResult(design=design, t=t, columns=cols, units=units, summary=summary)


def _run_reference(law: AdaptiveLaw, plant: Any, cmd: NDArray[np.float64],
                   eps_t: NDArray[np.float64], cols: dict[str, NDArray[np.float64]],
                   progress: Any) -> float:
    """The numpy loop, tick by tick; returns wall seconds."""
    ticks = len(cmd)
    Ts = law.Ts
    y0 = plant.measure()[0]
    state = law.init_state(y0)
    wall0 = time.perf_counter()
    report_every = max(1, ticks // 100)
    y = y0
    for k in range(ticks):
        out = law.step(state, y, cmd[k], eps_t[k])
        cols["x"][k] = plant.x[0]
        cols["y"][k] = y
        cols["e"][k] = out.e
        cols["s"][k] = out.s
        cols["ratio"][k] = out.ratio
        cols["phi_d"][k] = out.phi_d
        cols["eff_rate"][k] = out.eff_rate
        cols["step_gain"][k] = out.step_gain
        cols["u"][k] = out.u
        cols["u_raw"][k] = out.u_raw
        cols["w_norm"][k] = np.sqrt(np.sum(state.W * state.W))
        cols["clamped"][k] = float(out.clamped)
        plant.step(out.u, Ts)
        y = plant.measure()[0]
        if progress is not None and k % report_every == 0:
            progress(k, ticks)
    return time.perf_counter() - wall0


def _sensor_noise(plant: Any, readings: int) -> NDArray[np.float64]:
    """Pre-drawn, pre-scaled sensor noise (readings, n), in the order `RigPlant.measure` draws it.

    measure() draws one block of standard normals (batch, noisy channels) a reading,
    so one (readings, noisy channels) block reproduces the reference run's noise exactly.
    """
    s = plant.sensors
    noise = np.zeros((readings, plant.spec.n))
    idx = s.noisy
    if idx.size:
        noise[:, idx] = s.noise[idx] * plant.rng.standard_normal((readings, idx.size))
    return noise


def _run_fast(design: Design, settings: Any, plant: Any, cmd: NDArray[np.float64],
              eps_t: NDArray[np.float64], cols: dict[str, NDArray[np.float64]],
              progress: Any) -> tuple[float, float]:
    """The compiled loop (`runtime.kernels.fast.dry_run_loop`); returns (wall, compile) seconds."""
    from runtime.kernels import fast, rigloops
    from sim_rigs import kernel

    ticks = len(cmd)
    ic, fc = fast.pack_law(design, settings)
    n, m, n_reg = design.rig.n, design.rig.m, design.n_regressors
    st = np.zeros(n + n_reg * m)
    out = np.zeros(fast.out_size(n, m, n_reg))
    spec = plant.spec
    work = kernel.work_buffer(spec)
    pcode, pmat = kernel.pack_rig(spec)
    loop = rigloops.compiled(spec).dry_run_loop
    prm = kernel.pack_params(spec, {k: np.ravel(v)[0] for k, v in plant.params.items()})
    limits = np.ascontiguousarray(plant.limits, dtype=float)
    xp = np.array(plant.x[0], dtype=float)
    dist = np.zeros((ticks, m))
    if plant.disturbance is not None:
        dist[:] = plant.disturbance[0]
    lsc = np.ones((ticks, m))
    if plant.lam_scale is not None:
        lsc[:] = plant.lam_scale[0]
    noise = _sensor_noise(plant, ticks + 1)
    meas = np.zeros((ticks + 1, n))
    res = np.ascontiguousarray(plant.sensors.resolution, dtype=float)
    delay = int(plant.sensors.delay_ticks)
    substeps = int(plant.substeps)
    rec = (cols["x"], cols["y"], cols["e"], cols["s"], cols["ratio"], cols["phi_d"],
           cols["eff_rate"], cols["step_gain"], cols["u"], cols["u_raw"], cols["w_norm"],
           cols["clamped"])

    def run(k0: int, k1: int) -> None:
        loop(k0, k1, cmd, eps_t, dist, lsc, xp, pcode, pmat, prm, limits,
                          substeps, noise, res, delay, meas, ic, fc, st, out, work, *rec)

    c0 = time.perf_counter()
    kernel.plant_measure(xp, res, noise[0], meas[0])
    run(0, 0)  # compile or load the cached kernels before the clock starts
    compile_s = time.perf_counter() - c0
    st[:n] = meas[0]
    wall0 = time.perf_counter()
    chunk = max(1, ticks // 100) if progress is not None else max(ticks, 1)
    for k0 in range(0, ticks, chunk):
        run(k0, min(ticks, k0 + chunk))
        if progress is not None:
            progress(k0, ticks)
    wall = time.perf_counter() - wall0
    plant.x[0] = xp
    return wall, compile_s


def write_run_file(result: DryRunResult, path: Path, cfg: Config) -> Path:
    """Store every tick: a schema header, then one positional record per tick."""
    path.parent.mkdir(parents=True, exist_ok=True)
    names = ["t", *result.columns]
    widths = [1] + [1 if v.ndim == 1 else v.shape[1] for v in result.columns.values()]
    header = {
        "format": RUN_FORMAT, "version": RUN_VERSION, "kind": "dry-run",
        "fields": names, "widths": widths, "units": [result.units.get(n, "") for n in names],
        "states": list(result.design.rig.states), "inputs": list(result.design.rig.inputs),
        "config": cfg.raw, "config_hash": cfg.hash(), "summary": result.summary,
        "eps": result.design.eps,
    }
    flat = np.column_stack([result.t] + [v.reshape(len(result.t), -1)
                                         for v in result.columns.values()])
    packer = msgpack.Packer()
    with open(path, "wb") as fh:
        fh.write(packer.pack(header))
        for row in flat.tolist():
            fh.write(packer.pack(row))
    return path


def read_run_file(path: Path) -> tuple[dict[str, Any], dict[str, NDArray[np.float64]]]:
    """Read a run file back: the header and one array per field (a torn tail is skipped)."""
    with open(path, "rb") as fh:
        unpacker = msgpack.Unpacker(fh, raw=False, strict_map_key=False)
        header = next(unpacker)
        rows = [r for r in unpacker if isinstance(r, list)]
    flat = np.array(rows, dtype=float).reshape(len(rows), -1)
    out: dict[str, NDArray[np.float64]] = {}
    col = 0
    for name, w in zip(header["fields"], header["widths"], strict=True):
        out[name] = flat[:, col] if w == 1 else flat[:, col:col + w]
        col += w
    return header, out


def plot_report(result: DryRunResult, path: Path, title: str = "") -> Path:
    """The dry-run report: tracking, margin, learning rate, inputs, weights."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    d = result.design
    rig = d.rig
    t = result.t
    c = result.columns
    p = c["c"].shape[1]
    idx = np.argmax(rig.C != 0, axis=1)
    fig, axes = plt.subplots(3 + p, 1, figsize=(10, 2.3 * (3 + p)), sharex=True,
                             constrained_layout=True)
    for j in range(p):
        ax = axes[j]
        name, unit = rig.states[idx[j]], rig.state_units[idx[j]]
        ax.plot(t, c["c"][:, j], color="0.6", lw=1, label="command")
        ax.plot(t, c["xr"][:, idx[j]], color="tab:blue", lw=1.2, label="reference model")
        ax.plot(t, c["x"][:, idx[j]], color="tab:orange", lw=1, ls="--", label="measured")
        ax.set_ylabel(f"{name} [{unit}]")
        ax.legend(loc="upper right", fontsize=8, ncol=3)
        ax.grid(alpha=0.3)
    ax = axes[p]
    ax.plot(t, c["ratio"], color="tab:purple", lw=1, label="||e||_P / eps")
    ax.axhline(1.0, color="tab:red", lw=1.5, label="bound")
    ax.axhline(0.9, color="tab:red", lw=0.8, ls=":", label="trip level 0.9")
    ax.axhline(0.8, color="tab:olive", lw=0.8, ls=":", label="warning 0.8")
    ax.set_ylabel("margin ratio [1]")
    ax.set_ylim(0, max(1.1, float(np.nanmax(c["ratio"])) * 1.05))
    ax.legend(loc="upper right", fontsize=8, ncol=4)
    ax.grid(alpha=0.3)
    ax = axes[p + 1]
    ax.semilogy(t, np.maximum(c["eff_rate"], 1e-12), color="tab:green", lw=1)
    ax.set_ylabel("gamma * phi_d [1]")
    ax.grid(alpha=0.3, which="both")
    ax = axes[p + 2]
    for j in range(rig.m):
        ax.plot(t, c["u"][:, j], lw=1, label=f"{rig.inputs[j]}")
    lim = float(np.max(rig.input_limits))
    ax.axhline(lim, color="k", lw=0.8, ls="--")
    ax.axhline(-lim, color="k", lw=0.8, ls="--", label="limit")
    ax.set_ylabel(f"input [{rig.input_units[0]}]")
    ax2 = ax.twinx()
    ax2.plot(t, c["w_norm"], color="tab:brown", lw=1, label="||W_hat||")
    ax2.set_ylabel("weight norm [1]", color="tab:brown")
    ax.legend(loc="upper left", fontsize=8, ncol=3)
    ax.set_xlabel("time [s]")
    ax.grid(alpha=0.3)
    s = result.summary
    verdict = ("inside the bound" if s["breach_time"] is None
               else f"BOUND BROKEN at t = {s['breach_time']:.3f} s")
    fig.suptitle(title or f"corral dry run: {rig.name}, {d.law} law, eps = {d.eps:.4g}, "
                 f"max margin ratio {s['max_margin_ratio']:.3f} ({verdict})", fontsize=10)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
