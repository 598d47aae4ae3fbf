"""`corral design CONFIG`: the design report (human-readable or --json)."""

from __future__ import annotations

import argparse
import json

from runtime.cli.common import common_config_args
from runtime.config import load_config
from runtime.method.design import design_from_config
from runtime.method.design_report import format_design
from runtime.method.modifiers import modifiers_from_config
from runtime.offline.verdict import decide


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral design`."""
    common_config_args(parser)
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--closed-form", action="store_true",
                        help="skip the verdict's nominal dry run (the verdict is then "
                             "UNVERIFIED unless the closed form refuses)")


def main(args: argparse.Namespace) -> int:
    """Print the design and the verdict; exit 1 when the verdict is a refusal."""
    cfg = load_config(args.config, args.overrides)
    d = design_from_config(cfg)
    # The weight modifiers are read by the law, not the design; check them here too so a
    # bad adaptation.leakage is refused before a run, not at its start.
    modifiers_from_config(cfg, d)
    v = decide(cfg, d, simulate=not args.closed_form)
    if args.json:
        out = d.to_json()
        out.update(v.to_json())
        out["feasible"] = not v.refused
        print(json.dumps(out, indent=2))
    else:
        print(format_design(d, v))
    return 1 if v.refused else 0
