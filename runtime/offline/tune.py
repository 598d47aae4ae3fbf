"""Tuning inside the limits: adaptation gains, clamp margin, eps and (optionally) the
sample period searched over the config's uncertainty.

`tune(cfg)` asks a seeded optimiser (optuna's TPE sampler with constraints) for candidate
settings; each candidate is judged exactly as the rest of corral judges a config:

1. the design (`runtime.method.design.design_from_config`) must be feasible;
2. the design verdict (`runtime.offline.verdict.decide`, the nominal dry run) must not
   refuse it, and its dry run must stay below the watchdog's trip level; that dry run's
   ``rms_error_final`` (the tracked outputs against the command) is the tracking figure the
   search minimises;
3. a sweep (`runtime.offline.sweep.run_sweep`, the same engine as `corral sweep` and preflight) over
   `plants` plants drawn from the config's ranges with a fixed seed must end with every plant
   inside: zero trips, zero divergence, the bound held.

Constraints (optuna's convention, feasible when every value <= 0): predicted trip rate,
fraction of plants that broke the bound, worst margin ratio minus the trip level. Among the
feasible candidates the lowest tracking error wins; the winner is confirmed by a sweep over
`preflight.plants` plants (what `corral preflight` runs) and, when that sweep trips more than
`preflight.max_trip_rate`, the next feasible candidate is confirmed instead.

eps is searched as a fraction of what the limits allow (`design.eps_from_limits`), never
wider. Gains are one scalar or one value per regressor group (named terms, radial-basis
block, input regressor).

What does not live here: the command line (`runtime.cli.cmd_tune`), the law comparison
(`runtime.offline.compare`), writing the tuned file (`write_tuned`, below, is text surgery only).
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runtime.config import Config, ConfigError
from runtime.method.design import Design, design_from_config

GAMMA_SPAN = 64.0
"""Gains are searched within [gamma / GAMMA_SPAN, gamma * GAMMA_SPAN] of the config's."""
CLAMP_RANGE = (0.005, 0.08)
EPS_FRACTION = (0.5, 1.0)
PERIOD_FACTORS = (0.5, 1.0, 2.0)
CONFIRM_TRIES = 3
Line = Callable[[str], None]


@dataclass
class Candidate:
    """One tried setting and what the rig said of it."""

    number: int
    settings: dict[str, Any]
    overrides: list[str]
    feasible: bool = False
    why: str = ""
    tracking_error: float | None = None
    trip_rate: float | None = None
    bound_held_fraction: float | None = None
    worst_margin_ratio: float | None = None
    nominal_margin_ratio: float | None = None
    seconds: float = 0.0

    def row(self) -> dict[str, Any]:
        """The candidate as a JSON row."""
        return {"trial": self.number, "settings": self.settings, "feasible": self.feasible,
                "why": self.why, "tracking_error": self.tracking_error,
                "trip_rate": self.trip_rate, "bound_held_fraction": self.bound_held_fraction,
                "worst_margin_ratio": self.worst_margin_ratio,
                "nominal_margin_ratio": self.nominal_margin_ratio,
                "seconds": self.seconds}


@dataclass
class TuneResult:
    """The search and its winner (None when no candidate was feasible)."""

    candidates: list[Candidate]
    best: Candidate | None
    confirm: dict[str, Any] | None
    plants: int
    seed: int
    wall_seconds: float
    groups: list[tuple[str, int, int]]
    notes: list[str] = field(default_factory=list)


def _round(v: float, digits: int = 4) -> float:
    """`v` to `digits` significant digits, so the tuned file holds what was judged."""
    return float(f"{v:.{digits}g}")


def _fmt_vec(v: np.ndarray) -> str:
    if np.all(v == v[0]):
        return repr(float(v[0]))
    return "[" + ", ".join(repr(float(x)) for x in v) + "]"


def regressor_groups(design: Design) -> list[tuple[str, int, int]]:
    """(name, start, stop) of each regressor group: named terms, radial-basis block, inputs."""
    basis = design.basis
    n = int(np.asarray(design.gamma).size)
    named = len(basis.terms)
    size = int(basis.size)
    out = [("terms", 0, named), ("rbf", named, size), ("inputs", size, n)]
    return [g for g in out if g[2] > g[1]]


def _trip_level(cfg: Config) -> float:
    return float(cfg.number("watchdog.margin_trip"))


def evaluate(cfg: Config, overrides: list[str], plants: int,
             number: int = 0, settings: dict[str, Any] | None = None) -> Candidate:
    """Judge one setting: design, verdict (nominal dry run), sweep over `plants` plants."""
    from runtime.offline.sweep import run_sweep
    from runtime.offline.verdict import decide

    t0 = time.perf_counter()
    cand = Candidate(number, settings or {}, list(overrides))
    try:
        trial = cfg.with_overrides(overrides)
        design = design_from_config(trial)
        if not design.feasible:
            cand.why = "design refused: " + "; ".join(design.reasons)
            return cand
        verdict = decide(trial, design, suggest=False)
        fig = verdict.dry_run or {}
        cand.nominal_margin_ratio = fig.get("max_margin_ratio")
        if verdict.result is not None:
            err = verdict.result.summary.get("rms_error_final")
            cand.tracking_error = None if err is None or not math.isfinite(err) else float(err)
        if verdict.refused:
            cand.why = f"verdict refused: {verdict.reason}"
            return cand
        nominal = cand.nominal_margin_ratio
        if nominal is None or nominal >= _trip_level(trial):
            cand.why = "the nominal dry run reaches the trip level"
            return cand
        s = run_sweep(trial, plants=plants).summary  # the config's sweep seed: same plants
        cand.trip_rate = float(s["trip_fraction"] + s["diverged_fraction"])
        cand.bound_held_fraction = float(s["bound_held_fraction"])
        w = s["worst_margin_ratio"]
        cand.worst_margin_ratio = None if w is None or not math.isfinite(w) else float(w)
        cand.feasible = (cand.trip_rate == 0.0 and cand.bound_held_fraction == 1.0
                         and cand.worst_margin_ratio is not None
                         and cand.worst_margin_ratio < _trip_level(trial)
                         and cand.tracking_error is not None)
        if not cand.feasible:
            cand.why = (f"{100 * cand.trip_rate:.0f} % of {plants} plants tripped, bound "
                        f"held on {100 * cand.bound_held_fraction:.0f} %")
        return cand
    except ConfigError as exc:
        cand.why = str(exc)
        return cand
    finally:
        cand.seconds = time.perf_counter() - t0


def _constraints(cand: Candidate, trip: float) -> list[float]:
    """optuna constraints, feasible when all <= 0; graded so the sampler learns the edge."""
    big = 10.0
    rate = big if cand.trip_rate is None else cand.trip_rate
    held = big if cand.bound_held_fraction is None else 1.0 - cand.bound_held_fraction
    ratio = cand.worst_margin_ratio if cand.worst_margin_ratio is not None else (
        cand.nominal_margin_ratio if cand.nominal_margin_ratio is not None else big)
    margin = ratio - trip + 1e-6
    if not cand.feasible and rate <= 0 and held <= 0 and margin <= 0:
        margin = 1e-3  # refused for another reason (e.g. no tracking figure)
    return [rate, held, margin]


def tune(cfg: Config, *, trials: int = 40, seconds: float | None = None, plants: int = 32,
         seed: int = 1, per_group: bool = False, tune_period: bool = False,
         tune_eps: bool = True, tune_clamp: bool = True,
         progress: Line | None = None) -> TuneResult:
    """Search the settings (see the module docstring); `seconds` bounds the search's wall time."""
    import optuna

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    design = design_from_config(cfg)
    gamma0 = np.asarray(design.gamma, dtype=float)
    groups = regressor_groups(design) if per_group else [("all", 0, gamma0.size)]
    eps_lim = float(design.eps_from_limits)
    Ts0 = float(design.Ts)
    trip = _trip_level(cfg)
    candidates: list[Candidate] = []

    def objective(trial: Any) -> float:
        settings: dict[str, Any] = {}
        gamma = gamma0.copy()
        for name, a, b in groups:
            ref = float(np.max(gamma0[a:b]))
            g = trial.suggest_float(f"gamma_{name}", ref / GAMMA_SPAN, ref * GAMMA_SPAN,
                                    log=True)
            g = _round(g)
            gamma[a:b] = [_round(v) for v in gamma0[a:b] * (g / ref)]
            settings[f"gamma_{name}"] = g
        overrides = [f"adaptation.gamma={_fmt_vec(gamma)}"]
        if tune_clamp:
            c = _round(trial.suggest_float("clamp_margin", *CLAMP_RANGE))
            settings["clamp_margin"] = c
            overrides.append(f"adaptation.clamp_margin={c!r}")
        if tune_eps:
            f = trial.suggest_float("eps_fraction", *EPS_FRACTION)
            e = _round(f * eps_lim)
            while e > eps_lim:  # rounding never widens the bound past the limits
                e = _round(e * (1 - 1e-4))
            settings["eps"] = e
            overrides.append(f"adaptation.eps={e!r}")
        if tune_period:
            p = trial.suggest_categorical("period_factor", list(PERIOD_FACTORS))
            settings["period"] = _round(p * Ts0)
            overrides.append(f"loop.period={settings['period']!r}")
        cand = evaluate(cfg, overrides, plants, trial.number + 1, settings)
        candidates.append(cand)
        for name, value in zip(("trip_rate", "bound_broken", "margin_over_trip"),
                               _constraints(cand, trip), strict=True):
            trial.set_constraint(name, value)
        if progress:
            done = sum(c.feasible for c in candidates)
            progress(f"trial {cand.number}/{trials}: "
                     + ", ".join(f"{k} {v:.4g}" for k, v in settings.items())
                     + (f" -> tracking {cand.tracking_error:.3g}" if cand.tracking_error
                        is not None else " ->")
                     + (f", worst ratio {cand.worst_margin_ratio:.3f}"
                        if cand.worst_margin_ratio is not None else "")
                     + (" FEASIBLE" if cand.feasible else f" ({cand.why[:70]})")
                     + f" [{done} feasible, {cand.seconds:.1f} s]")
        err = cand.tracking_error
        return float(err) if err is not None else 1e6

    sampler = optuna.samplers.TPESampler(
        seed=seed, n_startup_trials=min(10, max(3, trials // 4)))
    study = optuna.create_study(direction="minimize", sampler=sampler)
    # the config's own settings first: the search never ends worse than the start
    first: dict[str, Any] = {f"gamma_{n}": float(np.max(gamma0[a:b])) for n, a, b in groups}
    if tune_clamp:
        first["clamp_margin"] = min(max(float(cfg.number("adaptation.clamp_margin")),
                                        CLAMP_RANGE[0]), CLAMP_RANGE[1])
    if tune_eps:
        first["eps_fraction"] = min(max(float(design.eps) / eps_lim, EPS_FRACTION[0]), 1.0)
    if tune_period:
        first["period_factor"] = 1.0
    study.enqueue_trial(first)
    t0 = time.perf_counter()
    study.optimize(objective, n_trials=trials, timeout=seconds)
    result = TuneResult(candidates, None, None, plants, seed, 0.0, groups)
    ranked = sorted((c for c in candidates if c.feasible),
                    key=lambda c: (c.tracking_error, c.worst_margin_ratio))
    for cand in ranked[:CONFIRM_TRIES]:
        conf = confirm(cfg, cand)
        if progress:
            progress(f"confirm trial {cand.number}: {conf['plants']} plants, trip rate "
                     f"{100 * conf['trip_rate']:.1f} % -> {'ok' if conf['ok'] else 'refused'}")
        if conf["ok"]:
            result.best, result.confirm = cand, conf
            break
        result.notes.append(f"trial {cand.number} tripped {100 * conf['trip_rate']:.1f} % of "
                            f"{conf['plants']} plants in the confirming sweep")
    result.wall_seconds = time.perf_counter() - t0
    return result


def confirm(cfg: Config, cand: Candidate) -> dict[str, Any]:
    """The sweep `corral preflight` runs (preflight.plants, its duration), on the candidate."""
    from runtime.offline.sweep import run_sweep

    trial = cfg.with_overrides(cand.overrides)
    n = int(trial.number("preflight.plants"))
    duration = (trial.number("preflight.duration") if trial.has("preflight.duration")
                else None)
    s = run_sweep(trial, plants=n, duration=None if duration is None else float(duration)).summary
    rate = float(s["trip_fraction"] + s["diverged_fraction"])
    return {"plants": n, "trip_rate": rate, "worst_margin_ratio": s["worst_margin_ratio"],
            "bound_held_fraction": s["bound_held_fraction"],
            "ok": rate <= float(trial.number("preflight.max_trip_rate"))}


# ------------------------------------------------------------------ the tuned file
def _toml_value(v: Any) -> str:
    """A parsed --set value written back as TOML."""
    import json

    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    return json.dumps(str(v))


def _override_pairs(overrides: list[str]) -> list[tuple[str, str]]:
    from runtime.config import parse_value

    return [(o.partition("=")[0].strip(), _toml_value(parse_value(o.partition("=")[2].strip())))
            for o in overrides]


def write_tuned(source: Path, overrides: list[str], out: Path) -> Path:
    """A copy of `source` with each overridden key's value replaced in place (commented
    ``tuned by corral tune: was X``), or added to its table when the file did not set it."""
    lines = source.read_text().splitlines()
    for key, value in _override_pairs(overrides):
        table, _, name = key.rpartition(".")
        section = None
        start = end = None
        done = False
        for i, line in enumerate(lines):
            head = re.match(r"\s*\[([^\]]+)\]\s*(#.*)?$", line)
            if head:
                if section == table and end is None:
                    end = i
                section = head.group(1).strip()
                if section == table:
                    start = i
                continue
            m = re.match(rf"(\s*){re.escape(name)}\s*=\s*(.*)$", line)
            if section == table and m:
                was = m.group(2).split("#")[0].strip()
                lines[i] = f"{m.group(1)}{name} = {value}  # tuned by corral tune: was {was}"
                done = True
                break
        if done:
            continue
        if start is None:
            lines += ["", f"[{table}]"]
            lines.append(f"{name} = {value}  # tuned by corral tune: was unset")
        else:
            at = end if end is not None else len(lines)
            while at > start + 1 and not lines[at - 1].strip():
                at -= 1
            lines.insert(at, f"{name} = {value}  # tuned by corral tune: was unset")
    out.write_text("\n".join(lines) + "\n")
    return out


# ------------------------------------------------------------------ figures
def plot_window(result: TuneResult, path: Path, trip: float) -> Path:
    """The feasible gamma window: each trial's largest gain against its worst margin ratio."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    key = f"gamma_{result.groups[0][0]}" if len(result.groups) == 1 else None
    fig, ax = plt.subplots(figsize=(7, 4))
    xs_ok: list[float] = []
    ys_ok: list[float] = []
    xs_no: list[float] = []
    ys_no: list[float] = []
    for c in result.candidates:
        g = (c.settings.get(key) if key else
             max(v for k, v in c.settings.items() if k.startswith("gamma_")))
        y = c.worst_margin_ratio if c.worst_margin_ratio is not None else c.nominal_margin_ratio
        y = 1.5 if y is None or not math.isfinite(y) else min(y, 1.5)
        (xs_ok if c.feasible else xs_no).append(float(g or 0.0))
        (ys_ok if c.feasible else ys_no).append(y)
    ax.scatter(xs_no, ys_no, marker="x", color="tab:red", label="trips or breaks the bound")
    ax.scatter(xs_ok, ys_ok, marker="o", color="tab:green", label="every plant inside")
    if xs_ok:
        ax.axvspan(min(xs_ok), max(xs_ok), color="tab:green", alpha=0.12,
                   label=f"feasible gains tried: {min(xs_ok):.3g} .. {max(xs_ok):.3g}")
    if result.best is not None:
        b = result.best
        gb = (b.settings.get(key) if key else
              max(v for k, v in b.settings.items() if k.startswith("gamma_")))
        ax.scatter([float(gb or 0.0)], [float(b.worst_margin_ratio or 0.0)], s=160,
                   facecolors="none", edgecolors="black", label="chosen")
    ax.axhline(trip, color="tab:orange", ls="--", label=f"trip level {trip:g}")
    ax.axhline(1.0, color="black", lw=0.8, label="bound")
    ax.set_xscale("log")
    ax.set_xlabel("adaptation gain gamma (largest entry)")
    ax.set_ylabel("worst margin ratio over the plants")
    ax.set_title(f"corral tune: feasible gain window ({result.plants} plants, seed {result.seed})")
    ax.legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def tradeoff_table(result: TuneResult, limit: int = 15) -> list[str]:
    """Text rows of the candidates, feasible first by tracking error, then the rest."""
    rows = sorted(result.candidates, key=lambda c: (
        not c.feasible, c.tracking_error if c.tracking_error is not None else math.inf))
    keys = sorted({k for c in result.candidates for k in c.settings})
    head = (f"{'trial':>5} " + " ".join(f"{k:>13}" for k in keys)
            + f" {'trip %':>7} {'worst':>6} {'tracking':>9}  verdict")
    out = [head]
    for c in rows[:limit]:
        out.append(
            f"{c.number:>5} " + " ".join(f"{c.settings.get(k, float('nan')):>13.4g}"
                                         for k in keys)
            + (f" {100 * c.trip_rate:>7.1f}" if c.trip_rate is not None else f" {'-':>7}")
            + (f" {c.worst_margin_ratio:>6.3f}" if c.worst_margin_ratio is not None
               else f" {'-':>6}")
            + (f" {c.tracking_error:>9.3g}" if c.tracking_error is not None else f" {'-':>9}")
            + ("  feasible" if c.feasible else f"  {c.why[:48]}"))
    if len(rows) > limit:
        out.append(f"  ... {len(rows) - limit} more in --json")
    return out
