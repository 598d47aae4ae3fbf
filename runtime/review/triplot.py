"""The trip plot: one PNG a reviewer reads a trip from.

`plot_trip(trip, path)` draws the pre/post capture around the trip instant:
the margin ratio with its warning and trip levels, tracking per axis
(command, reference model, measured), inputs with their limits, the
effective learning rate and the weight norm, the supervisor mode as shading,
the trip instant as a vertical line, the first-out rule in the title. Fields
missing from the capture are simply left out.

What does not live here: reading logs (`runtime.records.logs`), exports
(`runtime.review.comtrade_export`), the command line (`runtime.cli.cmd_trips`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from runtime.records.logs import Trip
from runtime.records.runinfo import RULE_SIGNALS, iso_time, say_value

_MODE_COLOURS = {"settling": "#e8e8e8", "fallback": "#fde3c8", "stopped": "#f6c9c9"}
_MODE_NAMES = {"settling": "grey", "fallback": "orange", "stopped": "red"}


def _fmt(v: Any) -> str:
    return f"{v:.4g}" if isinstance(v, (int, float)) else str(v)


def rule_series(trip: Trip, rule: str) -> tuple[np.ndarray, float | None, str, str] | None:
    """What `rule` judged over the capture, in display units: (values, threshold, what it
    is, unit), or None when the capture does not hold it.

    Logs since the per-rule capture have a ``sig_<rule>`` field. Older logs: the margin
    rules read the ``ratio`` field and the stale rule the ``sample_age_ms`` field.
    """
    cap = trip.capture()
    word, unit, scale = RULE_SIGNALS.get(rule, (rule, "", 1.0))
    entry = trip.rec.first_out if rule == trip.rule else next(
        (r for r in trip.rec.later if r.rule == rule), None)
    thr: Any = entry.threshold if entry is not None else None
    if not isinstance(thr, (int, float)):
        thr = next((r.get("threshold") for r in trip.header.get("watchdog") or []
                    if isinstance(r, dict) and r.get("rule") == rule), None)
    thr_d = float(thr) * scale if isinstance(thr, (int, float)) else None
    col = cap.numeric(f"sig_{rule}")
    if col is not None and col.ndim == 1:
        return col * scale, thr_d, word, unit
    ratio = cap.numeric("ratio")
    if rule in ("margin", "margin_warning", "clamp") and ratio is not None:
        return ratio, thr_d, word, unit
    age = cap.numeric("sample_age_ms")
    if rule == "stale" and age is not None:
        return age * (scale / 1e3), thr_d, word, unit
    return None


def plot_trip(trip: Trip, path: str | Path, dpi: int = 110) -> Path:
    """Draw the trip's capture to a PNG at `path`; returns the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    cap = trip.capture()
    names = trip.names()
    t_ms = cap.t * 1e3
    c, x, xr = cap.numeric("c"), cap.numeric("x"), cap.numeric("xr")
    u = cap.numeric("u")
    u_raw = cap.numeric("u_raw")
    if u_raw is None:
        u_raw = cap.numeric("u_cmd")
    age, late = cap.numeric("sample_age_ms"), cap.numeric("lateness_us")
    ratio, eff, wn = cap.numeric("ratio"), cap.numeric("eff_rate"), cap.numeric("w_norm")
    states = names.get("states") or []
    units = names.get("state_units") or []
    tracked = names.get("tracked") or []

    # which state each tracked axis is: by name when known, else the first p states
    axes_idx: list[int] = []
    if x is not None:
        n_track = c.shape[1] if c is not None and c.ndim == 2 else min(2, x.shape[1])
        for j in range(n_track):
            name = tracked[j] if j < len(tracked) else None
            axes_idx.append(states.index(name) if name in states else j)

    panels: list[str] = []
    # The first-out rule's own signal first, its threshold drawn; later rules' signals as
    # fractions of their thresholds (so one axis holds them all, the limit at 1).
    first = rule_series(trip, trip.rule)
    panels.append("first")
    later = []
    for entry in trip.rec.later:
        r = entry.rule
        ser = rule_series(trip, r)
        if ser is not None and ser[1]:
            later.append((r, ser))
    if later:
        panels.append("later")
    if ratio is not None:
        panels.append("ratio")
    panels += [f"track{j}" for j in range(len(axes_idx))]
    if u is not None or u_raw is not None:
        panels.append("u")
    if eff is not None:
        panels.append("eff")
    if wn is not None:
        panels.append("w")
    if age is not None or late is not None:
        panels.append("timing")
    if not panels:
        panels.append("empty")
    fig, axes = plt.subplots(len(panels), 1, figsize=(10, 1.9 * len(panels) + 1.0),
                             sharex=True, constrained_layout=True, squeeze=False)
    axes = axes[:, 0]
    levels = trip.levels()
    for ax, panel in zip(axes, panels, strict=True):
        if panel == "first":
            word, unit, scale = RULE_SIGNALS.get(trip.rule, (trip.rule, "", 1.0))
            delay = trip.rec.first_out.on_delay_s
            if first is not None:
                vals, thr, word, unit = first
                ax.plot(t_ms, vals, color="tab:red", lw=1.3, label=f"{trip.rule}: {word}")
            else:
                thr = (float(trip.threshold) * scale
                       if isinstance(trip.threshold, (int, float)) else None)
                if isinstance(trip.value, (int, float)):
                    ax.plot([0.0], [float(trip.value) * scale], "o", color="tab:red",
                            label=f"{trip.rule}: {word} at the trip (not captured per tick "
                                  "in this log)")
            if thr is not None:
                ax.axhline(thr, color="k", ls="--", lw=1,
                           label=f"threshold {thr:.4g} {unit}".rstrip()
                           + (f", on-delay {delay:g} s" if isinstance(delay, (int, float))
                              and delay > 0 else ""))
            ax.set_ylabel(f"first out\n[{unit}]" if unit else "first out")
        elif panel == "later":
            for r, (vals, thr, word, _unit) in later:
                ax.plot(t_ms, vals / thr, lw=1, label=f"{r}: {word} / limit")
            ax.axhline(1.0, color="k", ls="--", lw=1, label="limit")
            ax.set_ylabel("later rules\n[x limit]")
        elif panel == "ratio":
            ax.plot(t_ms, ratio, color="tab:purple", lw=1.2, label="||e||_P / eps")
            ax.axhline(levels["warning"], color="tab:orange", ls="--", lw=1,
                       label=f"warning {levels['warning']:g}")
            ax.axhline(levels["trip"], color="tab:red", ls="--", lw=1,
                       label=f"trip {levels['trip']:g}")
            ax.axhline(1.0, color="k", lw=0.8, alpha=0.5, label="bound")
            ax.set_ylabel("margin ratio")
        elif panel.startswith("track"):
            j = int(panel[5:])
            i = axes_idx[j]
            label = states[i] if i < len(states) else f"x{i}"
            unit = units[i] if i < len(units) else cap.unit("x", i)
            if c is not None and c.ndim == 2 and j < c.shape[1]:
                ax.plot(t_ms, c[:, j], color="0.55", lw=1, label="command")
            if xr is not None and xr.ndim == 2 and i < xr.shape[1]:
                ax.plot(t_ms, xr[:, i], color="tab:blue", lw=1.2, label="reference model")
            if x is not None and x.ndim == 2 and i < x.shape[1]:
                ax.plot(t_ms, x[:, i], color="tab:orange", lw=1, ls="--", label="measured")
            ax.set_ylabel(f"{label} [{unit}]" if unit else label)
        elif panel == "u":
            inputs = names.get("inputs") or []
            for col, style in ((u, "-"), (u_raw, ":")):
                if col is None:
                    continue
                col2 = col if col.ndim == 2 else col[:, None]
                for k in range(col2.shape[1]):
                    nm = inputs[k] if k < len(inputs) else f"u{k}"
                    ax.plot(t_ms, col2[:, k], ls=style, lw=1,
                            label=nm + (" (law's command)" if style == ":" else " (applied)"))
            lims = [float(v) for v in names.get("input_limits") or []]
            for lim in sorted(set(lims)):
                ax.axhline(lim, color="tab:red", lw=0.8, alpha=0.6)
                ax.axhline(-lim, color="tab:red", lw=0.8, alpha=0.6)
            unit = (names.get("input_units") or [cap.unit("u", 0)])[0]
            ax.set_ylabel(f"inputs [{unit}]" if unit else "inputs")
        elif panel == "eff":
            assert eff is not None  # the panel is listed only when the column is there
            ax.plot(t_ms, eff, color="tab:green", lw=1, label="gamma * phi_d")
            ax.set_ylabel("learning rate")
            if np.nanmax(np.abs(eff)) > 0 and np.nanmin(eff) > 0:
                ax.set_yscale("log")
        elif panel == "w":
            ax.plot(t_ms, wn, color="tab:brown", lw=1, label="||W||")
            ax.set_ylabel("weight norm")
        elif panel == "timing":
            if age is not None:
                ax.plot(t_ms, age, color="tab:cyan", lw=1, label="sample age [ms]")
            if late is not None:
                ax.plot(t_ms, late * 1e-3, color="tab:gray", lw=0.8,
                        label="tick lateness [ms]")
            ax.set_ylabel("timing [ms]")
        else:
            ax.text(0.5, 0.5, "no captured signals", transform=ax.transAxes, ha="center")
        _shade_modes(ax, trip.modes(), t_ms)
        ax.axvline(0.0, color="tab:red", lw=1.5)
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="upper left", fontsize=7, ncol=4)
    shown = [m for m in _MODE_COLOURS if m in set(trip.modes())]
    axes[-1].set_xlabel("time from the trip [ms]" + (
        "   (shaded: " + ", ".join(f"{m} {_MODE_NAMES[m]}" for m in shown) + ")"
        if shown else ""))
    axes[0].annotate("trip", xy=(0.0, 1.0), xycoords=("data", "axes fraction"),
                     color="tab:red", fontsize=8, ha="left", va="bottom")
    fo = trip.rec.first_out
    when = iso_time(trip.t_wall)
    title = (f"{trip.rig} trip {trip.id}: first out {trip.rule} "
             f"({say_value(trip.rule, trip.value, trip.threshold, fo.on_delay_s)})"
             f" -> {trip.action}")
    sub = f"{when}, tick {trip.tick}, config {trip.config_hash}"
    if trip.rec.later:
        sub += ", later: " + ", ".join(r.rule for r in trip.rec.later)
    if trip.cut_short:
        sub += "  [log cut short]"
    fig.suptitle(title + "\n" + sub, fontsize=10)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path


def _shade_modes(ax: Any, modes: list[str], t_ms: np.ndarray) -> None:
    """Shade the spans where the supervisor was not engaged (fallback, stopped, settling)."""
    if len(modes) != len(t_ms) or len(t_ms) < 2:
        return
    start = 0
    for i in range(1, len(modes) + 1):
        if i == len(modes) or modes[i] != modes[start]:
            colour = _MODE_COLOURS.get(modes[start])
            if colour:
                ax.axvspan(t_ms[start], t_ms[min(i, len(t_ms) - 1)], color=colour, lw=0,
                           zorder=0)
            start = i
