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

from runtime.config import KEY_ALIASES, Config, ConfigError, check_config
from runtime.method.commands import RMS_ERROR_FINAL_AGAINST, rms_error_final

Array = NDArray[np.float64]

RUN_FORMATS = ("corral-run", "corral-runlog")
# in the order of runtime.guard.supervisor.MODES
MODES = ("idle", "settling", "engaged", "fallback", "stopped")
ENGAGED = MODES.index("engaged")

#: Override keys accepted under another name (the first is what the watchdog reads).

#: Rules a recording has no signal for: they depend on the link and the host
#: clock, which neither the run file nor the simulated replay carries.
UNRECORDED_RULES = {
    "stale": "sample freshness is a property of the link, not of the recorded ticks",
    "seq_gap": "sequence numbers are not recorded",
    "link_loss": "link state is not recorded",
    "jump": "the estimator's innovation is not recorded",
    "overrun": "deadline misses belong to the host clock, not replayable",
    "weight_rate": "the weight matrix per tick is not recorded (only its norm)",
    "internal": "an exception inside the tick is a software fault, not a replayable signal",
}

#: The loop filters d(ratio)/dt with a 20 Hz first-order low-pass (runtime.realtime.loop.TickCore).
RATIO_RATE_CUTOFF_HZ = 20.0


class RunFileError(Exception):
    """A file that is not a readable corral run (missing, wrong format, no ticks)."""


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------

@dataclass
class Recording:
    """A recorded run, normalised: every array has one row per recorded tick."""

    path: Path
    kind: str
    """"dry-run" (corral-run file) or "runtime" (corral-runlog)."""
    header: dict[str, Any]
    config: dict[str, Any]
    period: float
    t: Array
    tick: Array
    c: Array
    """Commands (N, p)."""
    y: Array
    """Measured state (N, n): the dry run's y, the loop's estimated x."""
    u: Array
    """Applied input (N, m)."""
    u_cmd: Array
    """Input the law asked for before saturation (N, m)."""
    ratio: Array
    engaged: NDArray[np.bool_]
    outputs_on: NDArray[np.bool_]
    latched: NDArray[np.bool_]
    w_norm: Array
    mode: list[str] | None = None
    x_true: Array | None = None
    """True plant state (dry runs only)."""
    clamped: Array | None = None
    torn: bool = False

    @property
    def ticks(self) -> int:
        """Number of complete recorded ticks."""
        return int(self.t.size)

    def window(self) -> tuple[int, int, int]:
        """(start, engaged_end, stop): the first engaged stretch and the replay window.

        The window starts where the adaptive law first engaged. It ends where
        the law stopped for another reason than a trip (disarm, stop), or at
        the next engagement, or at the end of the record; after a trip it
        continues, since the question is what the law would have done.
        """
        idx = np.flatnonzero(self.engaged)
        if idx.size == 0:
            raise RunFileError(f"{self.path}: the adaptive law never engaged in this run "
                               "(nothing to replay)")
        start = int(idx[0])
        off = np.flatnonzero(~self.engaged[start:])
        if off.size == 0:
            return start, self.ticks, self.ticks
        engaged_end = start + int(off[0])
        if not self.latched[engaged_end]:
            return start, engaged_end, engaged_end
        again = np.flatnonzero(self.engaged[engaged_end:])
        stop = engaged_end + int(again[0]) if again.size else self.ticks
        return start, engaged_end, stop


def _read_stream(path: Path) -> tuple[dict[str, Any] | None, list[Any], bool]:
    from runtime.records.logs import LogReadError, read_stream

    try:
        header, records, torn = read_stream(path)
    except LogReadError as exc:
        raise RunFileError(str(exc)) from None
    if header is None and records and isinstance(records[0], dict):
        header = records.pop(0)  # the dry run's header has no "type" key
    return header, records, torn


def _split(header: dict[str, Any], rows: list[Any]) -> dict[str, Array]:
    names = [str(n) for n in header["fields"]]
    widths = [int(w) for w in header.get("widths") or [1] * len(names)]
    total = sum(widths)
    good = [r for r in rows if isinstance(r, (list, tuple)) and len(r) == total]
    if not good:
        return {n: np.zeros((0,) if w == 1 else (0, w)) for n, w in zip(names, widths, strict=True)}
    flat = np.array([[math.nan if v is None else v for v in r] for r in good], dtype=float)
    out: dict[str, Array] = {}
    col = 0
    for name, w in zip(names, widths, strict=True):
        out[name] = flat[:, col] if w == 1 else flat[:, col:col + w]
        col += w
    return out


def read_recording(path: str | Path) -> Recording:
    """Read a dry-run run file or a runtime run log (a torn tail is skipped)."""
    path = Path(path)
    if not path.exists():
        raise RunFileError(f"no such run file: {path}")
    if path.is_dir():
        raise RunFileError(f"{path} is a folder; give one .run file")
    header, records, torn = _read_stream(path)
    fmt = header.get("format") if isinstance(header, dict) else None
    if fmt not in RUN_FORMATS:
        what = f"format {fmt!r}" if fmt else "no run header"
        raise RunFileError(f"{path} is not a corral run file ({what}); give a .run file "
                           "written by 'corral dry-run' or 'corral run'")
    assert header is not None
    if not isinstance(header.get("fields"), list) or not isinstance(header.get("config"), dict):
        raise RunFileError(f"{path}: the run header lacks its fields or config")
    cols = _split(header, records)
    n_rows = cols["t"].shape[0]
    if n_rows == 0:
        raise RunFileError(f"{path}: no complete ticks in the run file")
    period = header.get("period")
    if not isinstance(period, (int, float)) or period <= 0:
        loop = header["config"].get("loop", {})
        period = loop.get("period") if isinstance(loop, dict) else None
    if not isinstance(period, (int, float)) or period <= 0:
        steps = np.diff(cols["t"])
        period = float(np.median(steps)) if steps.size else 0.001

    def need(name: str) -> Array:
        if name not in cols:
            raise RunFileError(f"{path}: the run file has no '{name}' field")
        return cols[name]

    ones = np.ones(n_rows, dtype=bool)
    if fmt == "corral-run":
        u = need("u")
        rec = Recording(
            path=path, kind=str(header.get("kind", "dry-run")), header=header,
            config=header["config"], period=float(period), t=need("t"),
            tick=np.arange(n_rows, dtype=float), c=need("c"), y=need("y"), u=u,
            u_cmd=cols.get("u_raw", u), ratio=need("ratio"), engaged=ones,
            outputs_on=ones.copy(), latched=np.zeros(n_rows, dtype=bool),
            w_norm=cols.get("w_norm", np.zeros(n_rows)), x_true=cols.get("x"),
            clamped=cols.get("clamped"), torn=torn)
    else:
        code = need("mode")
        modes = [MODES[int(v)] if np.isfinite(v) and 0 <= int(v) < len(MODES) else "unknown"
                 for v in code]
        u = need("u")
        rec = Recording(
            path=path, kind="runtime", header=header, config=header["config"],
            period=float(period), t=need("t"),
            tick=cols.get("tick", np.arange(n_rows, dtype=float)),
            c=need("c"), y=need("x"), u=u, u_cmd=cols.get("u_cmd", u), ratio=need("ratio"),
            engaged=code == ENGAGED,
            outputs_on=cols["outputs_on"] > 0.5 if "outputs_on" in cols else ones.copy(),
            latched=cols["latched"] > 0.5 if "latched" in cols else np.zeros(n_rows, dtype=bool),
            w_norm=cols.get("w_norm", np.zeros(n_rows)), mode=modes, torn=torn)
    return rec


def config_with_overrides(rec: Recording, overrides: list[str]) -> tuple[Config, list[str]]:
    """The recorded config with `key=value` overrides applied, and the overrides as
    applied (aliases written under the key the modules read, `runtime.config.KEY_ALIASES`)."""
    items = []
    for item in overrides:
        key, sep, value = item.partition("=")
        key = KEY_ALIASES.get(key.strip(), key.strip())
        items.append(f"{key}{sep}{value}")
    base = Config(raw=copy.deepcopy(rec.config), path=None)
    merged = base.with_overrides(items)
    # Only what the overrides touch: the recorded config was accepted when it ran.
    check_config(merged.raw, "--set", keys=[i.partition("=")[0].strip() for i in items])
    return merged, items


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


# ---------------------------------------------------------------------------
# The watchdog over a series of ticks
# ---------------------------------------------------------------------------

@dataclass
class Series:
    """What the watchdog and the summary need of a run of ticks."""

    t: Array
    tick: Array
    engaged: NDArray[np.bool_]
    ratio: Array
    clamped: NDArray[np.bool_]
    u_cmd: Array
    outputs_on: NDArray[np.bool_]
    w_norm: Array
    y: Array
    u: Array
    c: Array


@dataclass
class WatchdogCheck:
    """The rules' verdict over a series: first-out trip, later trips, first warning."""

    trip: dict[str, Any] | None
    trips: list[dict[str, Any]]
    warning: dict[str, Any] | None
    levels: dict[str, float]


def check_watchdog(cfg: Config, series: Series, period: float, clamp_margin: float,
                   input_limits: Array) -> WatchdogCheck:
    """Run the runtime's `Watchdog` over recorded (or replayed) ticks.

    Signals are rebuilt from the columns exactly as `runtime.realtime.loop.TickCore`
    fills them: ratio and clamp only while engaged, d(ratio)/dt through the
    loop's 20 Hz low-pass, saturation time accumulated while outputs are on.
    The rules in `UNRECORDED_RULES` are disabled (no signal in a record).
    """
    from runtime.guard.watchdog import Signals, Watchdog

    wd = Watchdog.from_config(cfg, period, clamp_margin)
    for rule in wd.rules:
        if rule.id in UNRECORDED_RULES:
            rule.enabled = False
    sig = Signals()
    alpha = math.exp(-2 * math.pi * RATIO_RATE_CUTOFF_HZ * period)
    u_max = np.asarray(input_limits, dtype=float)
    sat_time = np.zeros(u_max.size)
    ratio_prev = ratio_rate = 0.0
    was_engaged = False
    trips: list[dict[str, Any]] = []
    warning = None
    finite_rows = (np.all(np.isfinite(series.y), axis=1) & np.all(np.isfinite(series.u), axis=1)
                   & (np.isfinite(series.w_norm) | ~series.engaged)
                   & (np.isfinite(series.ratio) | ~series.engaged))
    sat_rows = np.abs(series.u_cmd) >= u_max
    for k in range(series.t.size):
        engaged = bool(series.engaged[k])
        if engaged and not was_engaged:
            ratio_prev = ratio_rate = 0.0  # the loop resets both when it engages
        was_engaged = engaged
        ratio = float(series.ratio[k]) if engaged else 0.0
        if engaged:
            ratio_rate = alpha * ratio_rate + (1 - alpha) * (ratio - ratio_prev) / period
            ratio_prev = ratio
        if series.outputs_on[k]:
            sat_time = np.where(sat_rows[k], sat_time + period, 0.0)
        else:
            sat_time[:] = 0.0
        sig.t = float(series.t[k])
        sig.tick = int(series.tick[k])
        sig.engaged = engaged
        sig.ratio = ratio
        sig.ratio_rate = ratio_rate if engaged else 0.0
        sig.clamped = bool(series.clamped[k]) and engaged
        sig.nonfinite = not bool(finite_rows[k])
        sig.sat_time = float(np.max(sat_time)) if sat_time.size else 0.0
        sig.w_norm = float(series.w_norm[k]) if engaged else 0.0
        tripped = wd.check(sig)
        if warning is None and wd.warning:
            warning = _describe(wd.by_id["margin_warning"], sig)
        for rule in tripped:
            trips.append(_describe(rule, sig))
    margin_w = wd.by_id["margin_warning"].threshold
    margin_t = wd.by_id["margin"].threshold
    return WatchdogCheck(trip=trips[0] if trips else None, trips=trips[:50], warning=warning,
                         levels={"warning": float(margin_w), "trip": float(margin_t)})


def _describe(rule: Any, sig: Any) -> dict[str, Any]:
    d = rule.describe()
    d.update(t=float(sig.t), tick=int(sig.tick), reaction=rule.reaction)
    return d


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
    from runtime.records.logs import LogReadError, read_trip_log

    try:
        _, trips, _, _ = read_trip_log(path)
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


fit_pedestal = fit_plant
"""The older name (it fitted only the pedestal)."""
