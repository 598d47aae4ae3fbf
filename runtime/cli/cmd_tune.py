"""`corral tune CONFIG [--out TUNED.toml] [--json]`: search gains, clamp margin, eps (and
optionally the period) for the best tracking with every swept plant inside the bound.

Prints progress on stderr, the chosen settings, a trade-off table of the candidates and
where the tuned config and the feasible-window PNG went; `--json` prints one object with
`best`, `trials`, `predicted_trip_rate`, `worst_margin_ratio`, `out`, `plot`, `confirm`,
`tracking_error`, `candidates`, `wall_seconds`. Exit 0 when a tuned config was written,
1 when no candidate held the bound. The search lives in `runtime.offline.tune`.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from runtime.cli.common import UserError, common_config_args, output_folder
from runtime.config import ConfigError, load_config
from runtime.method.design import design_from_config
from runtime.offline.tune import plot_window, tradeoff_table, tune, write_tuned


def _say(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral tune`."""
    common_config_args(parser)
    parser.add_argument("--out", type=Path, default=None,
                        help="tuned config to write (default log.dir/tune/NAME-tuned.toml); "
                             "the feasible-window PNG goes beside it")
    parser.add_argument("--trials", type=int, default=40, help="candidates to try (default 40)")
    parser.add_argument("--seconds", type=float, default=None,
                        help="stop trying new candidates after this wall time")
    parser.add_argument("--plants", type=int, default=32,
                        help="plants each candidate is swept over (default 32); the winner "
                             "is confirmed over preflight.plants")
    parser.add_argument("--seed", type=int, default=1,
                        help="optimiser seed (the plants keep the config's sweep seed)")
    parser.add_argument("--per-group", action="store_true",
                        help="one gain per regressor group (named terms, radial-basis "
                             "block, input regressor) instead of one scale")
    parser.add_argument("--period", action="store_true",
                        help="also try half and double the sample period")
    parser.add_argument("--keep-eps", action="store_true", help="do not tune adaptation.eps")
    parser.add_argument("--keep-clamp", action="store_true",
                        help="do not tune adaptation.clamp_margin")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def main(args: argparse.Namespace) -> int:
    """Run the search, write the tuned config and the PNG, print the report."""
    if args.trials < 1:
        raise UserError("--trials must be at least 1. Fix: e.g. --trials 40.")
    if args.plants < 1:
        raise UserError("--plants must be at least 1. Fix: e.g. --plants 32.")
    cfg = load_config(args.config, args.overrides)
    design = design_from_config(cfg)
    if not design.feasible:
        raise ConfigError("adaptation.gamma", "the design is refused: "
                          + "; ".join(design.reasons), "fix the design first (corral design).")
    stem = Path(args.config).stem
    out = args.out if args.out is not None else (
        Path(str(cfg.get("log.dir"))) / "tune" / f"{stem}-tuned.toml")
    output_folder(out.parent, "--out")
    result = tune(cfg, trials=args.trials, seconds=args.seconds, plants=args.plants,
                  seed=args.seed, per_group=args.per_group, tune_period=args.period,
                  tune_eps=not args.keep_eps, tune_clamp=not args.keep_clamp, progress=_say)
    trip = float(cfg.number("watchdog.margin_trip"))
    plot = plot_window(result, out.with_suffix(".png"), trip)
    best = result.best
    written = None
    if best is not None:
        written = write_tuned(Path(args.config), list(args.overrides) + best.overrides, out)
        check = load_config(written)  # the file must read back as what was judged
        for o in best.overrides:
            key = o.partition("=")[0]
            if check.get(key) != cfg.with_overrides([o]).get(key):
                raise UserError(f"the tuned file {written} does not read back {key}. Fix: "
                                f"set it by hand: {o}.")
    report = {
        "best": None if best is None else best.settings,
        "overrides": None if best is None else best.overrides,
        "trials": len(result.candidates),
        "feasible_trials": sum(c.feasible for c in result.candidates),
        "predicted_trip_rate": None if result.confirm is None else result.confirm["trip_rate"],
        "worst_margin_ratio": (None if result.confirm is None
                               else result.confirm["worst_margin_ratio"]),
        "tracking_error": None if best is None else best.tracking_error,
        "confirm": result.confirm,
        "out": None if written is None else str(written),
        "plot": str(plot),
        "plants_per_trial": result.plants,
        "seed": result.seed,
        "wall_seconds": result.wall_seconds,
        "notes": result.notes,
        "candidates": [c.row() for c in result.candidates],
    }
    if args.json:
        print(json.dumps(report, indent=2))
        return 0 if written else 1
    print(f"corral tune: {stem}: {len(result.candidates)} trials in "
          f"{result.wall_seconds:.0f} s, {report['feasible_trials']} kept every one of "
          f"{result.plants} plants inside the bound")
    for line in tradeoff_table(result):
        print("  " + line)
    for note in result.notes:
        print(f"  note: {note}")
    if best is None:
        print("  no candidate held the bound on every plant: widen design.limits, add basis "
              "terms for what the nominal model omits, or raise --trials.")
        print(f"  window plot: {plot}")
        return 1
    assert result.confirm is not None
    print("  best: " + ", ".join(f"{k} {v:.4g}" for k, v in best.settings.items())
          + f" (tracking error {best.tracking_error:.3g} in the nominal dry run)")
    print(f"  confirmed over {result.confirm['plants']} plants: predicted trip rate "
          f"{100 * result.confirm['trip_rate']:.1f} %, worst margin ratio "
          f"{result.confirm['worst_margin_ratio']:.3f}")
    print(f"  tuned config: {written}  (check it: corral preflight {written})")
    print(f"  window plot: {plot}")
    return 0
