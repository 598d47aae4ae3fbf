"""The sweep's pictures: the worst-ratio histogram of one sweep and the grid's fractions.

matplotlib is imported inside each function: it is heavy and only these need it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from runtime.offline.sweep_settings import OUTCOMES, SweepResult


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
