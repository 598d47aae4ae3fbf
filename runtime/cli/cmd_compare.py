"""`corral compare CONFIG`: the barrier law against the standard law over the same plants.

Prints a table (markdown, so the README can quote it) and writes a PNG; `--json` prints one
object with `rows` (each: name, overrides, gamma, bound_held_fraction, trip_fraction,
worst_margin_ratio, tracking_error, max_weight_norm, per_plant, note), `plants`, `plot`.
The rows and what each means live in `runtime.offline.compare`.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from runtime.cli.common import UserError, common_config_args, output_folder
from runtime.config import load_config, rig_name
from runtime.offline.compare import compare, plot_compare, table


def _say(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral compare`."""
    common_config_args(parser)
    parser.add_argument("--plants", type=int, default=100,
                        help="plants each row is swept over (default 100, the same for all)")
    parser.add_argument("--dry-runs", type=int, default=8,
                        help="plants of the same draw dry-run one by one for the tracking "
                             "error and weight norm (default 8)")
    parser.add_argument("--tune-trials", type=int, default=0,
                        help="also tune each law with this many trials (default 0: no "
                             "tuned rows)")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the PNG (default log.dir/compare)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def main(args: argparse.Namespace) -> int:
    """Run the rows, print the table, write the PNG."""
    if args.plants < 1 or args.dry_runs < 0 or args.tune_trials < 0:
        raise UserError("--plants must be >= 1, --dry-runs and --tune-trials >= 0. Fix: e.g. "
                        "--plants 100 --dry-runs 8.")
    cfg = load_config(args.config, args.overrides)
    folder = output_folder(args.out if args.out is not None else
                           Path(str(cfg.get("log.dir"))) / "compare", "--out")
    rows = compare(cfg, plants=args.plants, dry_runs=args.dry_runs,
                   tune_trials=args.tune_trials, progress=_say)
    name = rig_name(cfg)
    plot = plot_compare(rows, folder / f"compare-{Path(args.config).stem}.png",
                        f"{name}: barrier law against the standard law, {args.plants} plants "
                        f"(tracking error: mean of {args.dry_runs} dry runs)")
    if args.json:
        print(json.dumps({"rows": [r.to_json() for r in rows], "plants": args.plants,
                          "dry_runs": args.dry_runs, "plot": str(plot)}, indent=2))
        return 0
    print(f"corral compare: {name}: {args.plants} plants per row, the same draw for every row")
    for line in table(rows):
        print(line)
    for r in rows:
        if r.note:
            print(f"  {r.name}: {r.note}")
    print(f"  plot: {plot}")
    return 0
