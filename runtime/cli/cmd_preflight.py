"""`corral preflight CONFIG`: design checks plus a sweep, then a clear GO or NO-GO.

Exit 0 on go, 1 on no-go. `--json` prints one object with at least go,
predicted_trip_rate and reasons. The verdict lives in `runtime.offline.preflight`.
"""

from __future__ import annotations

import argparse
import json

from runtime.cli.cmd_sweep import ProgressBar
from runtime.cli.common import common_config_args
from runtime.config import load_config
from runtime.offline.preflight import run_preflight


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral preflight`."""
    common_config_args(parser)
    parser.add_argument("--plants", type=int, default=None,
                        help="plants to sweep (default preflight.plants or 200)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def main(args: argparse.Namespace) -> int:
    """Run the checks; print the verdict; exit 0 on go, 1 on no-go."""
    cfg = load_config(args.config, args.overrides)
    result = run_preflight(cfg, plants=args.plants, progress=ProgressBar())
    if args.json:
        print(json.dumps(result, indent=2))
        return 0 if result["go"] else 1
    print(f"corral preflight: {result['rig']}: " + ("GO" if result["go"] else "NO-GO"))
    rate = result["predicted_trip_rate"]
    if rate is not None:
        print(f"  predicted trip rate {100 * rate:.1f} % (limit "
              f"{100 * result['max_trip_rate']:.1f} %)")
    for r in result["reasons"]:
        print(f"  - {r}")
    for c in result["worst_cases"][:3]:
        ratio = "non-finite" if c["max_margin_ratio"] is None else f"{c['max_margin_ratio']:.3f}"
        print(f"  worst: plant {c['plant']} ratio {ratio} ({c['outcome']}"
              + (f", {c['first_rule']} at {c['trip_time']:.3f} s" if c["first_rule"] else "")
              + ")")
    if result["record"]:
        print(f"  record: {result['record']}")
    print("  A go covers the simulated plants the config admits, not the hardware: the "
          "device's command timeout and the watchdog remain the safety net.")
    return 0 if result["go"] else 1
