"""The design verdict: will this config keep the bound on this rig at this sample period?

`decide(cfg)` answers in two steps (docs/sampled-data.md):

1. The closed form (`runtime.method.design`): dimension checks, the time-varying bound's rate
   limit, and the sampled-data stability of the tick the law runs (update with e_k, then
   u_k from the new weights). It can refuse for certain (an unstable one-tick map), but
   it cannot certify: whether the learning is fast enough for the rig's uncertainty, and
   how the runtime guard (`adaptation.step_gain_cap`) and the clamp shape the transient,
   depend on the plant and the commands.
2. Where the closed form cannot decide, the simulated rig does: a nominal dry run of the
   config's own commands (at most `VERDICT_MAX_SECONDS` of them). The bound held on every
   tick: FEASIBLE. It broke: REFUSED, with a fix found by asking the simulated rig again
   (gamma scaled up or down until the bound holds).

A rig without a simulated stand-in gets UNVERIFIED when the closed form passes: nothing
refuses it, nothing vouches for it. Pure: no files, no printing (the dry run here keeps
its ticks in memory; the commands write run files).

What does not live here: the design math (`runtime.method.design`), the dry run itself
(`runtime.offline.dryrun`), the sweep preflight adds on top (`runtime.offline.preflight`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from runtime.config import Config, ConfigError
from runtime.method.design import Design, design_from_config

FEASIBLE, REFUSED, UNVERIFIED = "FEASIBLE", "REFUSED", "UNVERIFIED"
VERDICT_MAX_SECONDS = 120.0
"""Longest stretch of the config's commands the verdict's dry run simulates (s)."""
GAMMA_FACTORS = (2.0, 0.5, 4.0, 0.25, 8.0, 0.125, 16.0, 1 / 16, 32.0, 1 / 32, 64.0, 1 / 64)
"""Scalings of adaptation.gamma the fix search tries, nearest first."""


@dataclass
class Verdict:
    """The answer, how it was reached, and what to change when it is a refusal."""

    verdict: str
    """FEASIBLE, REFUSED or UNVERIFIED."""
    basis: str
    """"closed form" or "dry run" (what decided)."""
    reason: str
    fix: str = ""
    dry_run: dict[str, Any] | None = None
    """Figures of the verdict's dry run (None when none ran)."""
    result: Any = field(default=None, repr=False)
    """The verdict's `DryRunResult` (reusable by `corral dry-run`), not serialised."""

    @property
    def refused(self) -> bool:
        """True for REFUSED."""
        return self.verdict == REFUSED

    def to_json(self) -> dict[str, Any]:
        """The verdict keys of the design, dry-run and sweep JSON."""
        return {"verdict": self.verdict, "verdict_basis": self.basis,
                "verdict_reason": self.reason, "verdict_fix": self.fix,
                "verdict_dry_run": self.dry_run}

    def line(self) -> str:
        """One line for the top of a report."""
        text = f"verdict: {self.verdict} ({self.basis}): {self.reason}"
        return text + (f" Fix: {self.fix}" if self.fix else "")


def _nominal_run(cfg: Config, max_seconds: float) -> tuple[Any, float] | None:
    """The dry run of `cfg` (first `max_seconds` of its commands); None without a simulated rig."""
    from runtime.method.commands import schedule_from_config, tracked_names
    from runtime.offline.dryrun import dry_run

    design = design_from_config(cfg)
    duration = schedule_from_config(
        cfg, tracked_names(design.rig.C, design.rig.states)).duration
    run_cfg = cfg
    if duration > max_seconds:
        run_cfg = cfg.with_overrides([f"commands.duration={max_seconds!r}"])
        duration = max_seconds
    try:
        return dry_run(run_cfg), duration
    except ConfigError as exc:
        if exc.field == "rig.sim":
            return None
        raise


def _figures(result: Any, duration: float) -> dict[str, Any]:
    """What the verdict reports of its dry run."""
    s = result.summary
    d: Design = result.design
    cols = result.columns
    ratio = float(s["max_margin_ratio"])
    return {
        "sim_seconds": duration,
        "max_margin_ratio": ratio if np.isfinite(ratio) else None,
        "breach_time": s["breach_time"],
        "cap_fraction": float(np.mean(cols["step_gain"] > d.step_gain_cap)),
        "clamp_ticks": int(s["clamp_ticks"]),
        "saturation_fraction": float(s["saturation_fraction"]),
        "diverged": bool(s.get("diverged", False)),
    }


def _held(result: Any) -> bool:
    return bool(result.summary["breach_time"] is None
                and not result.summary.get("diverged", False)
                and np.isfinite(result.summary["max_margin_ratio"])
                and np.all(np.isfinite(result.columns["w_norm"])))


def _fix_by_gamma(cfg: Config, design: Design, max_seconds: float) -> str:
    """Ask the simulated rig for a gamma that holds the bound (nearest scaling first)."""
    gamma = design.gamma
    for f in GAMMA_FACTORS:
        new = gamma * f
        value = (f"{float(new[0])!r}" if np.all(new == new[0])
                 else "[" + ", ".join(repr(float(v)) for v in new) + "]")
        try:
            trial = cfg.with_overrides([f"adaptation.gamma={value}"])
            if not design_from_config(trial).feasible:
                continue
            got = _nominal_run(trial, max_seconds)
        except ConfigError:
            continue
        if got is not None and _held(got[0]):
            ratio = got[0].summary["max_margin_ratio"]
            return (f"adaptation.gamma = {value} held the bound in the same dry run "
                    f"(max ratio {ratio:.3f}).")
    return ("no scaling of adaptation.gamma within x64 held the bound in the dry run; widen "
            "design.limits, add basis terms for what the nominal model omits, or shorten "
            "loop.period.")


def decide(cfg: Config, design: Design | None = None, *, simulate: bool = True,
           max_seconds: float = VERDICT_MAX_SECONDS, suggest: bool = True) -> Verdict:
    """The verdict for `cfg` (see the module docstring). `simulate=False`: closed form only."""
    design = design_from_config(cfg) if design is None else design
    if not design.feasible:
        return Verdict(REFUSED, "closed form", " ".join(design.reasons))
    closed = (f"the sampled loop is stable at this period (one-tick map spectral radius "
              f"{design.sampled_radius:.4f} < 1)")
    if not simulate:
        return Verdict(UNVERIFIED, "closed form", closed + "; the closed form cannot say "
                       "whether learning outpaces the rig's uncertainty: no dry run asked.")
    got = _nominal_run(cfg, max_seconds)
    if got is None:
        return Verdict(UNVERIFIED, "closed form", closed + "; there is no simulated rig to "
                       "ask whether the bound holds (rig.sim unset, no [plant] terms).",
                       "give the rig a simulated stand-in (a rig file in rig.sim) to get a "
                       "verdict.")
    result, duration = got
    fig = _figures(result, duration)
    trip = cfg.number("watchdog.margin_trip")
    if _held(result):
        reason = (f"the nominal dry run ({duration:g} s of the config's commands) held the "
                  f"bound: max margin ratio {fig['max_margin_ratio']:.3f}.")
        if fig["max_margin_ratio"] >= trip:
            reason += (f" It passes the watchdog's trip level {trip:g}: a live run would "
                       "trip.")
        return Verdict(FEASIBLE, "dry run", reason, "", fig, result)
    ratio = fig["max_margin_ratio"]
    where = ("non-finite" if ratio is None else f"max margin ratio {ratio:.3f}")
    when = (f" at t = {fig['breach_time']:.3f} s" if fig["breach_time"] is not None else "")
    reason = f"the nominal dry run ({duration:g} s) broke the bound{when} ({where})."
    if fig["diverged"] and result.summary["breach_time"] is None:
        reason = (f"the nominal dry run ({duration:g} s) diverged (weights or states past "
                  "their limits) though the ratio stayed below 1.")
    if fig["cap_fraction"] > 0.5:
        reason += (f" The runtime guard adaptation.step_gain_cap limited learning on "
                   f"{100 * fig['cap_fraction']:.0f} % of ticks; the sampled loop's own "
                   f"limit at this period is g < {4.0 / design.Ts:.3g}.")
    fix = _fix_by_gamma(cfg, design, max_seconds) if suggest else ""
    return Verdict(REFUSED, "dry run", reason, fix, fig, result)
