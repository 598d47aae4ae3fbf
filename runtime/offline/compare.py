"""An honest comparison of the barrier law with the standard law over the same plants.

Rows (`compare(cfg)`), every one swept over the same plants (same seed, same count, the
sweep engine of `corral sweep`):

- ``barrier @ gamma``: the config as written;
- ``standard @ gamma``: the standard law at the same gamma. The barrier law's gain at zero
  error is gamma * phi_d(0) = gamma / eps, so at the same gamma the standard law learns
  eps times slower (about 1/20 on the pedestal demos): this row shows the laws at the same
  *setting*, not at the same learning rate;
- ``standard @ gamma/eps``: the standard law at the matched gain, the barrier law's
  learning rate at zero error;
- ``barrier tuned`` and ``standard tuned``: each law after `runtime.offline.tune.tune` with the same
  budget (the standard law's search covers gamma only, around the matched gain: it has no
  barrier to shape). When a search finds no candidate that keeps every plant inside, the row
  is named ``... (none found)`` and shows the closest candidate it swept.

Columns: fraction of plants keeping the bound (ratio < 1 throughout), fraction tripping
(a watchdog rule fired, or diverged), worst margin ratio (from the sweep); tracking error
(``rms_error_final`` of the dry run: tracked outputs against the command) and largest weight
norm, as the mean over dry runs of the first `dry_runs` plants of the same draw (the sweep
engine keeps no per-tick arrays, so these two come from individual dry runs of those plants).

What does not live here: the command line (`runtime.cli.cmd_compare`), the search
(`runtime.offline.tune`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runtime.config import Config, ConfigError
from runtime.method.design import design_from_config

Line = Callable[[str], None]


@dataclass
class Row:
    """One law at one setting, over the plants."""

    name: str
    overrides: list[str]
    gamma: float
    bound_held_fraction: float | None = None
    trip_fraction: float | None = None
    worst_margin_ratio: float | None = None
    tracking_error: float | None = None
    max_weight_norm: float | None = None
    per_plant: list[dict[str, Any]] = field(default_factory=list)
    note: str = ""

    def to_json(self) -> dict[str, Any]:
        """The row as JSON."""
        return {k: getattr(self, k) for k in (
            "name", "overrides", "gamma", "bound_held_fraction", "trip_fraction",
            "worst_margin_ratio", "tracking_error", "max_weight_norm", "per_plant", "note")}


def _num(v: Any) -> float | None:
    return None if v is None or not math.isfinite(float(v)) else float(v)


def _fmt(v: float) -> str:
    return repr(float(f"{v:.4g}"))


def plant_overrides(truth: dict[str, np.ndarray], i: int) -> list[str]:
    """`--set` items that make a dry run's plant the sweep's plant `i`."""
    return [f"plant.truth.{k}={float(v[i])!r}" for k, v in truth.items()]


def dry_run_plant(cfg: Config, truth: dict[str, np.ndarray], i: int) -> dict[str, Any]:
    """The dry run of plant `i` of a draw: its tracking error, margin and weight norm."""
    from runtime.offline.dryrun import dry_run

    s = dry_run(cfg.with_overrides(plant_overrides(truth, i))).summary
    return {"plant": i, "tracking_error": _num(s["rms_error_final"]),
            "max_margin_ratio": _num(s["max_margin_ratio"]),
            "max_weight_norm": _num(s["max_weight_norm"]),
            "breach_time": s["breach_time"]}


def run_row(cfg: Config, name: str, overrides: list[str], plants: int, dry_runs: int,
            note: str = "") -> Row:
    """Sweep `plants` plants and dry-run the first `dry_runs` of them at `overrides`."""
    from runtime.offline.sweep import SweepSettings, draw_plants, run_sweep

    c = cfg.with_overrides(overrides)
    design = design_from_config(c)
    row = Row(name, list(overrides), float(np.max(design.gamma)), note=note)
    if not design.feasible:
        row.note = (note + " " if note else "") + "design refused: " + "; ".join(design.reasons)
        return row
    s = run_sweep(c, plants=plants).summary
    row.bound_held_fraction = s["bound_held_fraction"]
    row.trip_fraction = s["trip_fraction"] + s["diverged_fraction"]
    row.worst_margin_ratio = _num(s["worst_margin_ratio"])
    seed = SweepSettings.from_config(c, plants).seed
    truth = draw_plants(c, plants, seed)
    row.per_plant = [dry_run_plant(c, truth, i) for i in range(min(dry_runs, plants))]
    errs = [p["tracking_error"] for p in row.per_plant]
    norms = [p["max_weight_norm"] for p in row.per_plant]
    row.tracking_error = (float(np.mean(errs)) if errs and None not in errs else None)
    row.max_weight_norm = (float(np.max(norms)) if norms and None not in norms else None)
    return row


def _gamma_value(cfg: Config, factor: float) -> str:
    g = np.asarray(design_from_config(cfg).gamma, dtype=float) * factor
    if np.all(g == g[0]):
        return _fmt(g[0])
    return "[" + ", ".join(_fmt(v) for v in g) + "]"


def compare(cfg: Config, *, plants: int = 100, dry_runs: int = 8, tune_trials: int = 0,
            tune_plants: int = 24, seed: int = 1, progress: Line | None = None,
            ) -> list[Row]:
    """The rows of the module docstring; `tune_trials` 0 leaves out the tuned rows."""
    design = design_from_config(cfg.with_overrides(["adaptation.law=barrier"]))
    eps = float(design.eps)
    gamma = f"adaptation.gamma={_gamma_value(cfg, 1.0)}"
    matched = f"adaptation.gamma={_gamma_value(cfg, 1.0 / eps)}"
    specs: list[tuple[str, list[str], str]] = [
        ("barrier @ gamma", ["adaptation.law=barrier", gamma], "the config's setting"),
        ("standard @ gamma", ["adaptation.law=standard", gamma],
         f"same setting; learns {eps:.3g} x as fast as the barrier law at zero error"),
        ("standard @ gamma/eps", ["adaptation.law=standard", matched],
         "matched gain: the barrier law's gamma * phi_d(0)"),
    ]
    if tune_trials > 0:
        from runtime.offline.tune import tune

        for law, start, kw in (("barrier", gamma, {}),
                               ("standard", matched, {"tune_eps": False, "tune_clamp": False})):
            if progress:
                progress(f"tuning the {law} law ({tune_trials} trials)")
            base = cfg.with_overrides([f"adaptation.law={law}", start])
            res = tune(base, trials=tune_trials, plants=tune_plants, seed=seed,
                       progress=progress, **kw)
            if res.best is not None:
                specs.append((f"{law} tuned", [f"adaptation.law={law}", *res.best.overrides],
                              ", ".join(f"{k} {v:.4g}" for k, v in res.best.settings.items())))
                continue
            swept = [c for c in res.candidates if c.trip_rate is not None]
            if not swept:
                specs.append((f"{law} tuned (none found)", [f"adaptation.law={law}", start],
                              f"no candidate of {len(res.candidates)} passed the verdict; "
                              "shown at the search's start"))
                continue
            close = min(swept, key=lambda c: (c.trip_rate, c.worst_margin_ratio or math.inf))
            specs.append((f"{law} tuned (none found)", [f"adaptation.law={law}",
                                                        *close.overrides],
                          f"no candidate of {len(res.candidates)} kept every plant inside; "
                          "the closest shown"))
    rows = []
    for name, ov, note in specs:
        if progress:
            progress(f"sweeping {name} over {plants} plants")
        try:
            rows.append(run_row(cfg, name, ov, plants, dry_runs, note))
        except ConfigError as exc:
            rows.append(Row(name, ov, float("nan"), note=f"{note}; {exc}"))
    return rows


def table(rows: list[Row]) -> list[str]:
    """Markdown table rows (the README quotes it)."""

    def pct(v: float | None) -> str:
        return "-" if v is None else f"{100 * v:.0f} %"

    def num(v: float | None, f: str) -> str:
        return "-" if v is None else format(v, f)

    out = ["| law and setting | gamma | bound kept | tripped | worst margin | "
           "tracking error (rad) | max weight norm |",
           "| --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        out.append(f"| {r.name} | {r.gamma:.4g} | {pct(r.bound_held_fraction)} | "
                   f"{pct(r.trip_fraction)} | {num(r.worst_margin_ratio, '.3f')} | "
                   f"{num(r.tracking_error, '.3g')} | {num(r.max_weight_norm, '.3g')} |")
    return out


def plot_compare(rows: list[Row], path: Path, title: str) -> Path:
    """Bars: bound kept and tripped (fractions), worst margin ratio, tracking error."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = [r.name for r in rows]
    x = np.arange(len(rows))
    fig, axes = plt.subplots(1, 3, figsize=(13, 4))
    kept = [r.bound_held_fraction or 0.0 for r in rows]
    trip = [r.trip_fraction or 0.0 for r in rows]
    axes[0].bar(x - 0.2, kept, 0.4, label="bound kept", color="tab:green")
    axes[0].bar(x + 0.2, trip, 0.4, label="tripped", color="tab:red")
    axes[0].set_ylabel("fraction of plants")
    axes[0].legend(fontsize=8)
    worst = [min(r.worst_margin_ratio, 3.0) if r.worst_margin_ratio is not None else 3.0
             for r in rows]
    axes[1].bar(x, worst, color="tab:blue")
    axes[1].axhline(1.0, color="black", lw=0.8)
    axes[1].set_ylabel("worst margin ratio (capped at 3)")
    err = [r.tracking_error if r.tracking_error is not None else np.nan for r in rows]
    axes[2].bar(x, err, color="tab:purple")
    axes[2].set_yscale("log")
    axes[2].set_ylabel("tracking error, mean of dry runs (rad)")
    for ax in axes:
        ax.set_xticks(x, names, rotation=30, ha="right", fontsize=8)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
