"""`corral replay RUNLOG`: would other settings have avoided (or caused) the trip?

Reads a recorded run (a dry-run run file or a real-time run log), re-runs its
commands and initial state through the simulated plant with `--set`
overrides, re-checks the recorded ticks against the (new) watchdog levels,
and prints both sides; a PNG, the replayed ticks as a run file, and `--json`.
The work lives in `runtime.review.replay`; this module is only the command line.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np

from runtime.cli.common import UserError
from runtime.review.replay import (
    RunFileError,
    plot_replay,
    read_recording,
    replay,
    write_replay_file,
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral replay`."""
    parser.add_argument("runlog", type=Path,
                        help="a .run file from 'corral dry-run' or 'corral run'")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="KEY=VALUE",
                        help="change a setting of the recorded config, e.g. "
                             "--set adaptation.gamma=2 or --set watchdog.margin_trip=0.7 "
                             "(repeatable)")
    parser.add_argument("--plant", choices=("config", "fitted"), default="config",
                        help="simulated plant: the config's plant.truth (default) or the "
                             "rig fitted to the recorded data")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the PNG and the replayed run file "
                             "(default: <run file folder>/replays)")
    parser.add_argument("--no-plot", action="store_true", help="skip the PNG")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def _trip(tr: dict[str, Any] | None) -> str:
    if tr is None:
        return "no trip"
    v = tr["value"]
    val = f"{v:.3f}" if isinstance(v, float) else str(v)
    return f"TRIP {tr['rule']} at t = {tr['t']:.3f} s ({val} >= {tr['threshold']:.3g})"


def _num(v: float | None, fmt: str) -> str:
    return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else format(v, fmt)


def _print_text(out: dict[str, Any]) -> None:
    rec, chk, rep = out["recorded"], out["recorded_rechecked"], out["replayed"]
    w = out["window"]
    print(f"corral replay: {out['run_file']} ({out['kind']}, rig {out['rig']})"
          + ("  [torn tail skipped]" if out["torn"] else ""))
    print(f"  overrides: {', '.join(out['overrides']) or 'none'};  plant: {out['plant']};  "
          f"{w['ticks']} ticks from t = {w['start_t']:.3f} s")
    rows = [
        ("", "recorded", "recorded, new levels", "replayed"),
        ("first-out", _trip(rec["trip"]), _trip(chk["trip"]), _trip(rep["trip"])),
        ("max margin ratio", _num(rec["max_margin_ratio"], ".3f"), "(same ticks)",
         _num(rep["max_margin_ratio"], ".3f")),
        ("rms pointing error [mrad]", _num(rec["rms_pointing_error"] * 1e3, ".3f"),
         "(same ticks)", _num(rep["rms_pointing_error"] * 1e3, ".3f")),
        ("rms_error_final [mrad]", _num(_milli(rec["rms_error_final"]), ".3f"), "(same ticks)",
         _num(_milli(rep["rms_error_final"]), ".3f")),
        ("trip / warning level", f"{rec['levels']['trip']:g} / {rec['levels']['warning']:g}",
         f"{chk['levels']['trip']:g} / {chk['levels']['warning']:g}",
         f"{rep['levels']['trip']:g} / {rep['levels']['warning']:g}"),
        ("bound broken at", _num(rec["breach_time"], ".3f"), "", _num(rep["breach_time"], ".3f")),
    ]
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    for r in rows:
        print("  " + "  ".join(c.ljust(widths[i]) for i, c in enumerate(r)).rstrip())
    if out["recorded"].get("logged_trip"):
        print(f"  recorded first-out is from the run's trip log; re-evaluated on the recorded "
              f"ticks: {_trip(out['recorded'].get('reevaluated_trip'))}")
    for m in out.get("marks") or []:
        lv = m["levels"]
        print(f"  marked: {m['kind'].replace('_', ' ')} trip {m['rule']} at {m['t']:.3f} s "
              f"({m['source']}; trip level {lv['trip']:g}, warning {lv['warning']:g})")
    verdict = ("would trip" if out["would_trip"] else "would not trip")
    if out["trip_avoided"]:
        verdict += " (the recorded trip is avoided)"
    elif out["trip_avoided"] is None:
        verdict += (f" on the rules it can check; the recorded {out['recorded']['trip']['rule']}"
                    " trip is not re-checked (no signal for it in the record)")
    print(f"  with these settings the run {verdict}.")
    fit = out.get("fit")
    if fit:
        print(f"  fitted plant ({fit['samples']} samples, residual rms "
              f"{fit['residual_rms'][0]:.3g} / {fit['residual_rms'][1]:.3g} rad/s^2 az / el, "
              f"relative {fit['relative_residual'][0]:.2%} / {fit['relative_residual'][1]:.2%}):")
        for name, p in fit["parameters"].items():
            cfg_v = p["config"]
            print(f"    {name:<14} {p['value']:>9.4f} +- {p['stderr']:.2g}"
                  + (f"   (config {cfg_v:g})" if cfg_v is not None else ""))
    print("  rules not re-evaluated (no signal in a record): "
          + ", ".join(out["watchdog"]["not_evaluated"]))
    for note in out["notes"]:
        print(f"  note: {note}")
    for key in ("plot", "replay_file"):
        if key in out:
            print(f"  {key.replace('_', ' ')}: {out[key]}")


def _milli(x: float | None) -> float | None:
    return None if x is None else x * 1e3


def main(args: argparse.Namespace) -> int:
    """Replay; exit 0 when the replayed run would not trip, 1 when it would."""
    try:
        rec = read_recording(args.runlog)
        result = replay(rec, args.overrides, plant=args.plant)
    except RunFileError as exc:
        raise UserError(str(exc)) from None
    out = result.to_json()
    folder = args.out or rec.path.parent / "replays"
    stem = f"{rec.path.stem}-replay"
    try:
        out["replay_file"] = str(write_replay_file(result, folder / f"{stem}.run"))
        if not args.no_plot:
            out["plot"] = str(plot_replay(result, folder / f"{stem}.png"))
    except OSError as exc:
        raise UserError(f"cannot write to {folder}: {exc.strerror}; choose another --out") \
            from None
    if args.json:
        print(json.dumps(out, indent=2, default=_plain))
    else:
        _print_text(out)
    if result.rec.torn and not args.json:
        print("corral: note: the run file was cut short; its last incomplete tick was skipped",
              file=sys.stderr)
    return 1 if result.would_trip else 0


def _plain(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)
