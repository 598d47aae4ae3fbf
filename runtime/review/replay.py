"""What-if replay: re-run a recorded run with other settings, re-check its ticks.

Lives here:
- `read_recording(path)`: one reader for both run formats (the dry run's
  ``corral-run`` file and the real-time loop's ``corral-runlog``), normalised
  to arrays (t, c, y measured, u applied, u_cmd, ratio, mode, ...). A torn
  tail (a crash mid-write) is skipped.
- `fit_plant(rec, cfg)` (formerly `fit_pedestal`): least squares of the measured derivatives
  (finite differences of the measured rates) against the simulated
  rig's own model (`sim_rigs.plant.RigPlant`, any rig), for the parameters it is linear in.
- `check_watchdog(cfg, series, ...)`: the runtime's own rules
  (`runtime.guard.watchdog.Watchdog`) fed tick by tick from recorded columns.
- `replay(rec, overrides, plant)`: the recorded commands and initial state
  through the simulated plant with the new settings; verdicts side by side.
- `plot_replay(result, path)`: margin (levels and bound) and tracking.

What does not live here: the command line (`runtime.cli.cmd_replay`), the
simulation kernels (`runtime.offline.dryrun`, `runtime.kernels.fast`), the rules themselves
(`runtime.guard.watchdog`).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config
from runtime.method.commands import RMS_ERROR_FINAL_AGAINST, rms_error_final
from runtime.review.plantfit import PlantFit, fit_pedestal, fit_plant
from runtime.review.recheck import (
    RATIO_RATE_CUTOFF_HZ,
    UNRECORDED_RULES,
    Series,
    WatchdogCheck,
    check_watchdog,
)
from runtime.review.recording import (
    ENGAGED,
    MODES,
    RUN_FORMATS,
    Recording,
    RunFileError,
    config_with_overrides,
    read_recording,
)

Array = NDArray[np.float64]

__all__ = [
    "ENGAGED", "MODES", "RATIO_RATE_CUTOFF_HZ", "RUN_FORMATS", "UNRECORDED_RULES",
    "PlantFit", "Recording", "ReplayResult", "RunFileError", "Series", "Verdict",
    "WatchdogCheck", "check_watchdog", "config_with_overrides", "fit_pedestal", "fit_plant",
    "plot_replay", "read_recording", "replay", "replay_marks", "simulate", "write_replay_file",
]


# ---------------------------------------------------------------------------
# Replay
# ---------------------------------------------------------------------------

@dataclass
class Verdict:
    """One side of the comparison."""

    max_margin_ratio: float
    rms_pointing_error: float
    breach_time: float | None
    check: WatchdogCheck
    rms_error_final: float = math.nan
    """`runtime.method.commands.rms_error_final` over the engaged stretch (the dry run's
    definition)."""

    def to_json(self) -> dict[str, Any]:
        """Plain numbers for --json."""
        return {"max_margin_ratio": self.max_margin_ratio, "trip": self.check.trip,
                "rms_pointing_error": self.rms_pointing_error, "breach_time": self.breach_time,
                "rms_error_final": _finite(self.rms_error_final),
                "rms_error_final_against": RMS_ERROR_FINAL_AGAINST,
                "first_warning": self.check.warning, "later_trips": self.check.trips[1:],
                "levels": self.check.levels}


@dataclass
class ReplayResult:
    """Recorded and replayed runs side by side."""

    rec: Recording
    cfg: Config
    overrides: list[str]
    plant: str
    design: Any
    window: tuple[int, int, int]
    t: Array
    columns: dict[str, Array]
    recorded: Verdict
    rechecked: Verdict
    replayed: Verdict
    original_levels: dict[str, float]
    engine: str
    commands: dict[str, int]
    fit: PlantFit | None = None
    logged_trip: dict[str, Any] | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def would_trip(self) -> bool:
        """True when the replayed run trips under the new settings."""
        return self.replayed.check.trip is not None

    def to_json(self) -> dict[str, Any]:
        """The machine-readable comparison (see docs/replay.md)."""
        start, engaged_end, stop = self.window
        rec = self.recorded.to_json()
        rec["trip_source"] = "watchdog re-evaluated on the recorded ticks"
        if self.rec.kind == "runtime":
            rec["logged_trip"] = self.logged_trip
            if self.logged_trip is not None:  # what the loop really did comes first
                rec["reevaluated_trip"] = rec["trip"]
                rec["trip"] = self.logged_trip
                rec["trip_source"] = "the run's trip log"
        return {
            "run_file": str(self.rec.path), "kind": self.rec.kind,
            "rig": self.design.rig.name, "torn": self.rec.torn,
            "overrides": self.overrides, "plant": self.plant, "engine": self.engine,
            "window": {"start_t": float(self.rec.t[start]), "ticks": stop - start,
                       "engaged_ticks": engaged_end - start, **self.commands},
            "recorded": rec,
            "recorded_rechecked": self.rechecked.to_json(),
            "replayed": self.replayed.to_json(),
            "would_trip": self.would_trip,
            # None (unknown) when the recorded first-out is a rule the record holds no
            # signal for: the replay cannot show such a trip, so it cannot claim it avoided.
            "trip_avoided": (None if rec["trip"] is not None
                             and rec["trip"].get("rule") in UNRECORDED_RULES
                             else rec["trip"] is not None and not self.would_trip),
            "watchdog": {"implementation": "runtime.guard.watchdog.Watchdog, signals rebuilt from "
                                           "the recorded columns",
                         "not_evaluated": UNRECORDED_RULES},
            "fit": self.fit.to_json() if self.fit is not None else None,
            "notes": self.notes,
            "marks": [{k: v for k, v in m.items() if k not in ("colour", "style")}
                      for m in replay_marks(self)["marks"]],
        }


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _tracked_index(design: Any) -> NDArray[np.intp]:
    return np.argmax(design.rig.C != 0, axis=1)


def _verdict(series: Series, check: WatchdogCheck, idx: NDArray[np.intp]) -> Verdict:
    on = series.engaged
    ratio = series.ratio[on]
    breach = np.flatnonzero(~(ratio < 1.0))
    err = series.y[on][:, idx] - series.c[on]
    rms = float(np.sqrt(np.mean(np.sum(err**2, axis=1)))) if err.size else math.nan
    return Verdict(max_margin_ratio=float(np.max(ratio)) if ratio.size else 0.0,
                   rms_pointing_error=rms,
                   rms_error_final=rms_error_final(series.t[on], series.y[on][:, idx],
                                                   series.c[on]),
                   breach_time=float(series.t[on][breach[0]]) if breach.size else None,
                   check=check)


def _recorded_series(rec: Recording, design: Any, start: int, stop: int) -> Series:
    sl = slice(start, stop)
    if rec.clamped is not None:
        clamped = rec.clamped[sl] > 0.5
    elif design.law == "barrier":
        clamped = ~(rec.ratio[sl] <= 1.0 - design.clamp_margin)  # the law's clamp condition
    else:
        clamped = ~(rec.ratio[sl] < 1.0)
    return Series(t=rec.t[sl], tick=rec.tick[sl], engaged=rec.engaged[sl], ratio=rec.ratio[sl],
                  clamped=clamped, u_cmd=rec.u_cmd[sl], outputs_on=rec.outputs_on[sl],
                  w_norm=rec.w_norm[sl], y=rec.y[sl], u=rec.u[sl], c=rec.c[sl])


def _commands(rec: Recording, cfg: Config, design: Any, window: tuple[int, int, int],
              ticks: int) -> tuple[Array, dict[str, int]]:
    """Recorded commands over the engaged stretch, then the config's schedule (same clock)."""
    from runtime.method.commands import schedule_from_config, tracked_names

    start, engaged_end, _ = window
    Ts = design.Ts
    tau = np.arange(ticks) * Ts
    rec_tau = rec.t[start:engaged_end] - rec.t[start]
    recorded = rec.c[start:engaged_end]
    if abs(Ts - rec.period) < 1e-9 * Ts:
        cmd = np.empty((ticks, recorded.shape[1]))
        n_rec = min(ticks, recorded.shape[0])
        cmd[:n_rec] = recorded[:n_rec]
    else:  # another period: resample the recorded commands onto the new clock
        n_rec = int(np.sum(tau <= rec_tau[-1] + 1e-12))
        cmd = np.empty((ticks, recorded.shape[1]))
        for j in range(recorded.shape[1]):
            cmd[:n_rec, j] = np.interp(tau[:n_rec], rec_tau, recorded[:, j])
    if n_rec < ticks:
        schedule = schedule_from_config(cfg, tracked_names(design.rig.C, design.rig.states))
        cmd[n_rec:] = schedule.evaluate(tau[n_rec:])
    return np.ascontiguousarray(cmd), {"recorded_commands": n_rec,
                                       "scheduled_commands": ticks - n_rec}


def simulate(cfg: Config, design: Any, cmd: Array, x0: Array,
             truth: dict[str, float] | None = None) -> tuple[dict[str, Array], str]:
    """The closed loop over the given commands from true state x0; (columns, engine).

    Same machinery as the dry run (compiled kernels for a simulated rig, the numpy
    law otherwise), same sensor noise seed (`plant.seed`), same bound schedule.
    """
    from runtime.method.bound import schedule_from_config
    from runtime.method.law import AdaptiveLaw
    from runtime.method.modifiers import modifiers_from_config
    from runtime.offline import dryrun

    rig = design.rig
    plant = dryrun.plant_from_config(cfg, design, truth=truth)
    plant.x[0] = np.asarray(x0, dtype=float)
    modifiers = modifiers_from_config(cfg, design)
    ticks = cmd.shape[0]
    t = np.arange(ticks) * design.Ts
    eps_t = np.broadcast_to(np.asarray(schedule_from_config(cfg, design).eps(t), dtype=float),
                            t.shape).copy()
    n, m, p = rig.n, rig.m, cmd.shape[1]
    cols: dict[str, Array] = {
        "c": np.empty((ticks, p)), "x": np.empty((ticks, n)), "y": np.empty((ticks, n)),
        "xr": np.empty((ticks, n)), "e": np.empty((ticks, n)), "s": np.empty(ticks),
        "ratio": np.empty(ticks), "phi_d": np.empty(ticks), "eff_rate": np.empty(ticks),
        "step_gain": np.empty(ticks), "u": np.empty((ticks, m)), "u_raw": np.empty((ticks, m)),
        "w_norm": np.empty(ticks), "clamped": np.empty(ticks),
    }
    engine = "reference"
    if rig.spec is not None:
        from runtime.kernels.fast import ModifierSettings

        try:
            settings = ModifierSettings.from_modifiers(modifiers, m)
            engine = "fast"
        except ValueError:
            settings = None
        if settings is not None:
            dryrun._run_fast(design, settings, plant, cmd, eps_t, cols, None)
    if engine == "reference":
        dryrun._run_reference(AdaptiveLaw(design, modifiers), plant, cmd, eps_t, cols, None)
    cols["c"][:] = cmd
    cols["xr"][:] = cols["y"] - cols["e"]
    return cols, engine


def replay(rec: Recording, overrides: list[str] | None = None,
           plant: str = "config") -> ReplayResult:
    """Re-run `rec` with the overrides; check recorded and replayed ticks against the rules."""
    from runtime.method.design import design_from_config

    if plant not in ("config", "fitted"):
        raise ValueError(f"plant must be 'config' or 'fitted', got {plant!r}")
    overrides = list(overrides or [])
    original = Config(raw=copy.deepcopy(rec.config))
    cfg, applied = config_with_overrides(rec, overrides)
    design0 = design_from_config(original)
    design = design_from_config(cfg)
    notes: list[str] = []
    if not design.feasible:
        notes.append("the new settings fail the design checks: " + "; ".join(design.reasons))
    window = start, engaged_end, stop = rec.window()
    ticks_rec = stop - start
    ticks = int(round(ticks_rec * rec.period / design.Ts))
    cmd, counts = _commands(rec, cfg, design, window, ticks)
    if counts["scheduled_commands"]:
        notes.append(f"commands after the recorded engaged stretch come from the config's "
                     f"schedule ({counts['scheduled_commands']} ticks)")

    faults = rec.header.get("faults") or cfg.get("faults")
    if faults:
        notes.append("the recorded run had injected faults; the replay does not inject them, "
                     "so a trip they caused will not recur")
    fit = None
    truth = None
    if plant == "fitted":
        fit = fit_plant(rec, cfg)
        truth = fit.truth()
    if rec.x_true is not None:
        x0 = rec.x_true[start]
    else:
        x0 = np.nan_to_num(rec.y[start])
        notes.append("initial plant state: the measured state at engagement (true state not "
                     "recorded); sensor noise is redrawn from plant.seed")
    cols, engine = simulate(cfg, design, cmd, x0, truth)
    t = rec.t[start] + np.arange(ticks) * design.Ts
    idx = _tracked_index(design)

    rec_series = _recorded_series(rec, design0, start, stop)
    lim0 = np.asarray(design0.rig.input_limits, dtype=float)
    recorded_check = check_watchdog(original, rec_series, rec.period, design0.clamp_margin, lim0)
    rechecked = check_watchdog(cfg, _recorded_series(rec, design, start, stop), rec.period,
                               design.clamp_margin, lim0)
    rep_series = Series(t=t, tick=np.arange(ticks, dtype=float) + rec.tick[start],
                        engaged=np.ones(ticks, dtype=bool), ratio=cols["ratio"],
                        clamped=cols["clamped"] > 0.5, u_cmd=cols["u_raw"],
                        outputs_on=np.ones(ticks, dtype=bool), w_norm=cols["w_norm"],
                        y=cols["y"], u=cols["u"], c=cols["c"])
    replayed_check = check_watchdog(cfg, rep_series, design.Ts, design.clamp_margin,
                                    np.asarray(design.rig.input_limits, dtype=float))
    return ReplayResult(
        rec=rec, cfg=cfg, overrides=applied, plant=plant, design=design, window=window,
        t=t, columns=cols,
        recorded=_verdict(rec_series, recorded_check, _tracked_index(design0)),
        rechecked=_verdict(rec_series, rechecked, _tracked_index(design0)),
        replayed=_verdict(rep_series, replayed_check, idx),
        original_levels=recorded_check.levels, engine=engine, commands=counts, fit=fit,
        logged_trip=_logged_trip(rec), notes=notes)


def _logged_trip(rec: Recording) -> dict[str, Any] | None:
    """The first trip the real run wrote to its trip log (same stem, .trips), if any."""
    if rec.kind != "runtime":
        return None
    path = rec.path.with_suffix(".trips")
    if not path.exists():
        return None
    from runtime.records.logs import LogReadError, read_trip_records

    try:
        trips = read_trip_records(path).trips
    except LogReadError:
        return None
    if not trips:
        return None
    tr = trips[0]
    return {"rule": tr.rule, "tick": tr.tick, "t": tr.tick * rec.period, "value": tr.value,
            "threshold": tr.threshold, "action": tr.action, "trip_log": str(path)}


# ---------------------------------------------------------------------------
# Plot
# ---------------------------------------------------------------------------

def replay_marks(result: ReplayResult) -> dict[str, Any]:
    """What the replay plot and text mark: the recorded trip (the trip log's when the run
    wrote one, else the watchdog re-evaluated on the recorded ticks), the recorded ticks
    re-checked at the new levels, the replayed trip; each with the levels in force.

    The recorded run's label never says "no trip" when its trip log holds one.
    """
    lv0 = result.original_levels
    lv = result.replayed.check.levels
    logged = result.logged_trip
    rec_trip = result.recorded.check.trip
    marks: list[dict[str, Any]] = []

    def lv_text(levels: dict[str, float]) -> str:
        return f"trip level {levels['trip']:g}, warning {levels['warning']:g}"

    if logged is not None:
        rec_label = (f"tripped: {logged['rule']} at {logged['t']:.3f} s, from its trip log; "
                     f"{lv_text(lv0)}")
        marks.append({"kind": "recorded", "t": float(logged["t"]), "rule": logged["rule"],
                      "levels": lv0, "source": "trip log", "colour": "0.25", "style": "-",
                      "text": f"recorded trip: {logged['rule']}"})
    elif rec_trip is not None:
        rec_label = f"trips: {rec_trip['rule']} at {rec_trip['t']:.3f} s; {lv_text(lv0)}"
        marks.append({"kind": "recorded", "t": float(rec_trip["t"]), "rule": rec_trip["rule"],
                      "levels": lv0, "source": "watchdog on the recorded ticks",
                      "colour": "0.25", "style": "-",
                      "text": f"recorded trip: {rec_trip['rule']}"})
    else:
        rec_label = f"no trip; {lv_text(lv0)}"
    chk = result.rechecked.check.trip
    if chk is not None and lv != lv0:
        marks.append({"kind": "recorded_new_levels", "t": float(chk["t"]), "rule": chk["rule"],
                      "levels": lv, "source": "watchdog on the recorded ticks, new levels",
                      "colour": "0.55", "style": ":",
                      "text": f"recorded ticks at new levels: {chk['rule']}"})
    rep_trip = result.replayed.check.trip
    if rep_trip is not None:
        marks.append({"kind": "replayed", "t": float(rep_trip["t"]), "rule": rep_trip["rule"],
                      "levels": lv, "source": "watchdog on the replayed ticks",
                      "colour": "tab:purple", "style": "--",
                      "text": f"replayed trip: {rep_trip['rule']}"})
        rep_label = f"trips: {rep_trip['rule']} at {rep_trip['t']:.3f} s; {lv_text(lv)}"
    else:
        rep_label = f"no trip; {lv_text(lv)}"
    return {"recorded_label": rec_label, "replayed_label": rep_label, "marks": marks}


def plot_replay(result: ReplayResult, path: Path) -> Path:
    """Margin ratio (levels, bound, trips marked) and tracking per axis, recorded vs replayed."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rec = result.rec
    start, _, stop = result.window
    tr = rec.t[start:stop]
    d = result.design
    idx = _tracked_index(d)
    p = len(idx)
    fig, axes = plt.subplots(1 + p, 1, figsize=(10, 2.6 * (1 + p)), sharex=True,
                             constrained_layout=True)
    ax = axes[0]
    eng = rec.engaged[start:stop]
    ratio_rec = np.where(eng, rec.ratio[start:stop], np.nan)
    marks = replay_marks(result)
    ax.plot(tr, ratio_rec, color="0.35", lw=1, label=f"recorded ({marks['recorded_label']})")
    ax.plot(result.t, result.columns["ratio"], color="tab:purple", lw=1,
            label=f"replayed ({marks['replayed_label']})")
    ax.axhline(1.0, color="tab:red", lw=1.5, label="bound")
    lv, lv0 = result.replayed.check.levels, result.original_levels
    same = lv0 == lv
    ax.axhline(lv["trip"], color="tab:red", lw=0.9, ls=":",
               label=f"trip level {lv['trip']:g} ("
               + ("recorded run and replay)" if same else "replay)"))
    ax.axhline(lv["warning"], color="tab:olive", lw=0.9, ls=":",
               label=f"warning {lv['warning']:g} ("
               + ("recorded run and replay)" if same else "replay)"))
    if not same:
        ax.axhline(lv0["trip"], color="0.5", lw=0.8, ls="--",
                   label=f"trip level {lv0['trip']:g} (recorded run)")
        ax.axhline(lv0["warning"], color="0.6", lw=0.8, ls="-.",
                   label=f"warning {lv0['warning']:g} (recorded run)")
    for m in marks["marks"]:
        ax.axvline(m["t"], color=m["colour"], lw=1.2, ls=m["style"])
        ax.annotate(m["text"], xy=(m["t"], 1.0), xycoords=("data", "axes fraction"),
                    rotation=90, fontsize=7, color=m["colour"], ha="right", va="top")
    top = np.nanmax(np.concatenate([ratio_rec[np.isfinite(ratio_rec)], [1.0],
                                    result.columns["ratio"][np.isfinite(result.columns["ratio"])]]))
    ax.set_ylim(0, min(max(1.1, 1.05 * top), 3.0))
    ax.set_ylabel("||e||_P / eps [1]")
    ax.legend(loc="upper right", fontsize=7, ncol=3)
    ax.grid(alpha=0.3)
    for j in range(p):
        ax = axes[1 + j]
        name, unit = d.rig.states[idx[j]], d.rig.state_units[idx[j]]
        ax.plot(result.t, result.columns["c"][:, j], color="0.6", lw=1, label="command")
        ax.plot(tr, rec.y[start:stop, idx[j]], color="0.2", lw=1, label="recorded (measured)")
        ax.plot(result.t, result.columns["y"][:, idx[j]], color="tab:orange", lw=1, ls="--",
                label="replayed (measured)")
        ax.set_ylabel(f"{name} [{unit}]")
        ax.legend(loc="best", fontsize=7, ncol=3)
        ax.grid(alpha=0.3)
    axes[-1].set_xlabel("time [s]")
    sets = ", ".join(result.overrides) if result.overrides else "no overrides"
    fig.suptitle(f"corral replay: {rec.path.name} ({rec.kind}), {sets}, plant: {result.plant}; "
                 f"would trip: {'yes' if result.would_trip else 'no'}", fontsize=9)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def write_replay_file(result: ReplayResult, path: Path) -> Path:
    """Store the replayed ticks as a dry-run style run file (kind "replay"; replayable too)."""
    from runtime.offline.dryrun import DryRunResult, write_run_file

    t0 = result.t - result.t[0]
    summary = {"replay_of": str(result.rec.path), "overrides": result.overrides,
               "plant": result.plant, "max_margin_ratio": result.replayed.max_margin_ratio,
               "trip": result.replayed.check.trip}
    rig = result.design.rig
    su, iu = ",".join(rig.state_units), ",".join(rig.input_units)
    units = {"t": "s", "x": su, "y": su, "xr": su, "e": su, "u": iu, "u_raw": iu}
    dr = DryRunResult(design=result.design, t=t0, columns=result.columns, units=units,
                      summary=summary)
    write_run_file(dr, path, result.cfg)
    return path
