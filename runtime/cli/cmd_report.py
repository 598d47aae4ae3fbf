"""`corral report RUNLOG [--out FILE.html]`: one self-contained HTML file per run.

The report (`runtime.review.report`) holds the run, how it ended, the config, the design verdict,
the preflight and host check, the margin over the whole run, every trip with its capture
plot, the operator events and the link and loop statistics; its plots are embedded, so the
one file opens anywhere without a network.

What does not live here: what the report contains (`runtime.review.report`).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from runtime.cli.common import UserError
from runtime.records.logs import LogReadError
from runtime.review.report import build_report, report_data


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral report`."""
    parser.epilog = "example: corral report runs/pedestal-sim-20261204-101500.run --out run.html"
    parser.add_argument("runlog", type=Path, metavar="RUNLOG",
                        help="a run log (*.run) written by 'corral run'; its trip log "
                             "(*.trips, same name) is read too")
    parser.add_argument("--out", type=Path, default=None,
                        help="the HTML file to write (default: RUNLOG with .html)")
    parser.add_argument("--json", action="store_true",
                        help="print what was written and the run's figures as JSON")


def main(args: argparse.Namespace) -> int:
    """Write the report; exit 0, or 2 with one line on a bad input."""
    path = Path(args.runlog)
    if path.is_dir():
        raise UserError(f"{path} is a folder; give one run log (*.run), e.g. "
                        f"{path}/RIG-STAMP.run")
    if not path.exists():
        raise UserError(f"no run log at {path}; give a *.run file written by 'corral run' "
                        "(see log.dir)")
    try:
        text = build_report(path)
        data = report_data(path)
    except LogReadError as exc:
        raise UserError(f"{exc}. Give a *.run file written by 'corral run'.") from None
    out = args.out or path.with_suffix(".html")
    if out.suffix.lower() not in (".html", ".htm"):
        raise UserError(f"--out '{out}': the report is HTML; end the name with .html")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise UserError(f"--out: cannot write '{out}' ({exc.strerror}); give a path in a "
                        "folder you can write to") from None
    if args.json:
        plain = {k: v for k, v in data.items() if not k.startswith("_")}
        print(json.dumps({"written": str(out), **plain}, indent=2, default=str))
    else:
        print(f"wrote {out} ({len(data['trips'])} trip(s); the run "
              f"{data['ended'].get('how_text', data['ended'].get('how'))})")
    return 0
