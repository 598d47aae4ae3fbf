"""Preflight: a go / no-go verdict before arming hardware.

`run_preflight(cfg)` asks for the design verdict (`runtime.offline.verdict`: the closed
form, then a nominal dry run; a refusal is a no-go with its reason and fix), then
sweeps the config's uncertainty (`[plant.ranges]`)
through the simulated stand-in of the rig with the configured sample period,
sensor noise and command latency (`runtime.offline.sweep`), and compares the
predicted trip rate (tripped + diverged fraction) with
`preflight.max_trip_rate`. The result is written as JSON into log.dir
(`preflight-<rig>-<stamp>.json`) so the run's record can reference it.

A go is a statement about the simulated plants the config admits, not about
the hardware: the device-side command timeout and the watchdog stay the
safety net. What does not live here: the CLI (`runtime.cli.cmd_preflight`), the
real-time loop that calls this before arming (`runtime.cli.cmd_run`).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

from runtime.config import Config, ConfigError, rig_name
from runtime.method.design import design_from_config
from runtime.offline.sweep import Progress, run_sweep


def run_preflight(cfg: Config, plants: int | None = None, progress: Progress | None = None,
                  write: bool = True) -> dict[str, Any]:
    """Design checks, then a sweep; returns {"go", "predicted_trip_rate", "reasons", ...}.

    Keys: go (bool), predicted_trip_rate (float or None when no sweep ran),
    max_trip_rate, reasons (list of str: why no-go, or what the go rests on),
    design {feasible, reasons, warnings}, sweep (the sweep summary or None),
    worst_cases, record (path of the JSON written into log.dir, or None).
    """
    max_rate = cfg.number("preflight.max_trip_rate")
    n = plants if plants is not None else int(cfg.number("preflight.plants"))
    duration = (cfg.number("preflight.duration")
                if cfg.has("preflight.duration") else None)
    out: dict[str, Any] = {
        "go": False, "predicted_trip_rate": None, "max_trip_rate": max_rate, "reasons": [],
        "plants": n, "config_hash": cfg.hash(), "rig": rig_name(cfg),
        "design": None, "sweep": None, "worst_cases": [], "record": None,
        "created_wall": time.time(),
    }
    from runtime.records.runinfo import iso_time

    out["created_iso"] = iso_time(out["created_wall"])
    reasons: list[str] = out["reasons"]
    try:
        design = design_from_config(cfg)
    except ConfigError as exc:
        out["design"] = {"feasible": False, "reasons": [str(exc)], "warnings": []}
        reasons.append(f"design failed: {exc}")
        return _finish(cfg, out, write)
    out["design"] = {"feasible": design.feasible, "reasons": list(design.reasons),
                     "warnings": list(design.warnings), "eps": design.eps, "law": design.law,
                     "gamma_max": float(max(design.gamma))}
    if not design.feasible:
        reasons.extend(f"design refused: {r}" for r in design.reasons)
        return _finish(cfg, out, write)
    from runtime.offline.verdict import decide

    verdict = decide(cfg, design)
    out["design"].update(verdict.to_json())
    if verdict.refused:
        reasons.append(f"design refused ({verdict.basis}): {verdict.reason}"
                       + (f" Fix: {verdict.fix}" if verdict.fix else ""))
        return _finish(cfg, out, write)
    if design.rig.spec is None:
        reasons.append("no simulated stand-in for this rig (rig.sim unset, no [plant] terms), "
                       "so the trip rate cannot be predicted; set rig.sim to a rig file "
                       "describing it (README, 'Your own rig').")
        return _finish(cfg, out, write)
    if not cfg.get("plant.ranges", {}) and not design.rig.spec.ranges:
        reasons.append("note: no uncertainty ranges (rig file or [plant.ranges]), so every "
                       "plant is the nominal truth; "
                       "the prediction covers only sensor noise.")
    result = run_sweep(cfg, plants=n, progress=progress,
                       duration=None if duration is None else float(duration))
    s = result.summary
    rate = s["trip_fraction"] + s["diverged_fraction"]
    out["predicted_trip_rate"] = rate
    out["sweep"] = {k: v for k, v in s.items() if k != "worst_cases"}
    out["worst_cases"] = s["worst_cases"]
    trips = int(round(rate * s["plants"]))
    prediction = (f"predicted trip rate {100 * rate:.1f} % ({trips} of {s['plants']} plants over "
               f"{s['duration']:g} s, latency {s['latency_ticks']} ticks, noise "
               f"{'on' if s['noise'] else 'off'})")
    if rate > max_rate:
        reasons.append(f"{prediction} exceeds preflight.max_trip_rate {100 * max_rate:.1f} %.")
        rules = ", ".join(f"{k} {v}" for k, v in s["trips_by_rule"].items() if v)
        if rules:
            reasons.append(f"first-out rules: {rules}.")
        if s["diverged_fraction"] > 0:
            reasons.append(f"{100 * s['diverged_fraction']:.1f} % of plants diverged.")
        worst = s["worst_cases"][0] if s["worst_cases"] else None
        if worst:
            reasons.append("worst plant: " + ", ".join(
                f"{k}={v:.3g}" for k, v in worst["params"].items()) + ".")
        reasons.append("fix: narrow adaptation.gamma to the window `corral sweep --grid "
                       "adaptation.gamma=...` shows, widen design.limits, or check "
                       "[plant.ranges].")
    else:
        out["go"] = True
        reasons.append(f"{prediction} is within preflight.max_trip_rate {100 * max_rate:.1f} %.")
    return _finish(cfg, out, write)


def _finish(cfg: Config, out: dict[str, Any], write: bool) -> dict[str, Any]:
    if write:
        folder = Path(str(cfg.get("log.dir")))
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:  # a file in the way, no permission: name the field
            why = ("a file is in the way" if isinstance(exc, FileExistsError | NotADirectoryError)
                   else exc.strerror or str(exc))
            raise ConfigError("log.dir", f"cannot create the folder '{folder}' for the "
                              f"preflight record ({why}).",
                              "set log.dir to a folder you can write to.") from None
        stamp = time.strftime("%Y%m%d-%H%M%S")
        # The rig in the name too, so records of several rigs in one folder tell apart.
        rig = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in out["rig"])
        path = folder / f"preflight-{rig}-{stamp}.json"
        k = 1
        while path.exists():
            path = folder / f"preflight-{rig}-{stamp}-{k}.json"
            k += 1
        out["record"] = str(path)
        path.write_text(json.dumps(out, indent=2))
    return out
