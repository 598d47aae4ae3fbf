"""`corral dry-run CONFIG`: the closed loop in simulated time, a run file, a PNG report."""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

from runtime.cli.common import common_config_args, force_arg, output_folder, verdict_gate
from runtime.config import Config, load_config
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.offline.dryrun import dry_run, plot_report, write_run_file
from runtime.offline.verdict import decide


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral dry-run`."""
    common_config_args(parser)
    parser.add_argument("--json", action="store_true", help="print one JSON summary object")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the run file and report (default: log.dir/dry-runs)")
    parser.add_argument("--no-plot", action="store_true", help="skip the PNG report")
    parser.add_argument("--engine", choices=("fast", "reference"), default="fast",
                        help="compiled kernel (default) or the numpy reference implementation")
    force_arg(parser)


def _progress(k: int, total: int) -> None:
    if sys.stderr.isatty():
        width = 30
        done = int(width * k / max(total, 1))
        line = f"  simulating [{'#' * done}{'.' * (width - done)}] {100 * k // total:3d} %"
        print("\r" + line.ljust(88), end="", file=sys.stderr, flush=True)


def _duration(result: Any, cfg: Config) -> float:
    """The config's command duration (s), to tell whether the verdict's run covered it."""
    rig = result.design.rig
    return float(schedule_from_config(cfg, tracked_names(rig.C, rig.states)).duration
                 ) - 0.5 * result.design.Ts


def main(args: argparse.Namespace) -> int:
    """Run, record, plot, summarise. Exit 0 when the bound held, 1 when it broke."""
    cfg = load_config(args.config, args.overrides)
    if sys.stderr.isatty() and args.engine == "fast":
        print("  preparing the compiled kernels (compiled once per machine, then cached) ...",
              end="", file=sys.stderr, flush=True)
    verdict = decide(cfg, suggest=not args.force)
    if sys.stderr.isatty():
        print("\r" + " " * 90 + "\r", end="", file=sys.stderr)
    if not verdict_gate(verdict, args.force, args.json):
        return 1
    result = verdict.result
    full = result is not None and result.t.size * result.design.Ts >= _duration(result, cfg)
    if not (full and args.engine == "fast"):  # the verdict's run covers this one: reuse it
        result = dry_run(cfg, progress=_progress, engine=args.engine)
    if sys.stderr.isatty():
        print("\r" + " " * 90 + "\r", end="", file=sys.stderr)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    out = output_folder(args.out or Path(str(cfg.get("log.dir"))) / "dry-runs",
                        "--out" if args.out else "log.dir")
    stem = f"{result.design.rig.name}-{result.design.law}-{stamp}"
    run_file = write_run_file(result, out / f"{stem}.run", cfg)
    summary = dict(result.summary)
    summary.update(verdict.to_json())
    summary["run_file"] = str(run_file)
    if not args.no_plot:
        summary["report"] = str(plot_report(result, out / f"{stem}.png"))
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        s = summary
        held = s["breach_time"] is None
        print(f"corral dry run: {s['rig']}, {s['law']} law, eps = {s['eps']:.4g}")
        print(f"  simulated {s['sim_seconds']:.1f} s ({s['ticks']} ticks) in "
              f"{s['wall_seconds']:.2f} s wall ({s['realtime_factor']:.1f}x real time, "
              f"{s.get('engine', args.engine)} engine)")
        print(f"  max margin ratio ||e||_P/eps = {s['max_margin_ratio']:.3f}  -> "
              + ("the bound held" if held else f"BOUND BROKEN at t = {s['breach_time']:.3f} s"))
        if s.get("weights_diverged_time") is not None:
            print(f"  WEIGHTS DIVERGED at t = {s['weights_diverged_time']:.3f} s (||W|| beyond "
                  f"{s['weight_norm_limit']:g} or non-finite; sweep.weight_norm_limit)")
        if s.get("states_diverged_time") is not None:
            print(f"  STATES DIVERGED at t = {s['states_diverged_time']:.3f} s (beyond "
                  "sweep.divergence_factor x design.state_range)")
        print(f"  rms_error_final = {s['rms_error_final'] * 1e3:.3f} mrad "
              f"({s['rms_error_final_against']})")
        print(f"  weight norm = {s['weight_norm']:.4g}, peak learning rate gamma*phi_d = "
              f"{s['max_eff_rate']:.4g}")
        print(f"  peak step gain before the cap = {s['max_step_gain']:.3g}, applied "
              f"{s['max_step_gain_applied']:.3g} (cap {s['step_gain_cap']:g})")
        print(f"  run file: {run_file}")
        if "report" in s:
            print(f"  report:   {s['report']}")
    # exit 1 when the bound broke or anything diverged (states or weights), 0 otherwise
    ok = result.summary["breach_time"] is None and not result.summary.get("diverged")
    return 0 if ok else 1
