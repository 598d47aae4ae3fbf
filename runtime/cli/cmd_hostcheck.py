"""`corral hostcheck CONFIG`: can this computer hold the config's period?

Measures the runtime clock's timer lateness and worst stall for ``--seconds``
(default 3) at ``loop.period``, reads the real-time priority rights, memory
locking, CPU frequency governor, load and cores, and says whether the host can
hold the period with the configured stale and overrun thresholds, and what to
change if not. Exit 0 when it can, 1 when it cannot, 2 on a bad config or
argument. ``--json`` prints one object (at least ok, lateness_p99_us,
worst_stall_ms, realtime, advice). Progress goes to stderr while it measures.

The measurement and the verdict live in `runtime.realtime.hostcheck`.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time

from runtime.cli.common import UserError, common_config_args
from runtime.config import load_config, rig_name
from runtime.realtime.hostcheck import (
    DEFAULT_SECONDS,
    report_lines,
    run_hostcheck,
    thresholds_from_config,
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral hostcheck`."""
    common_config_args(parser)
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS, metavar="S",
                        help=f"how long to measure (default {DEFAULT_SECONDS:g} s)")
    parser.add_argument("--link", default=None, metavar="SPEC",
                        help="judge for this link instead of rig.link (a real link is "
                             "rig-clocked: host stalls age its samples and the stale rule "
                             "counts)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.epilog = "exit status: 0 the host can hold the period, 1 it cannot, 2 bad input"


class Progress:
    """Seconds measured so far, on stderr: a live counter on a terminal, else a line a second."""

    def __init__(self) -> None:
        self.tty = sys.stderr.isatty()
        self.last = -1

    def __call__(self, elapsed: float, total: float) -> None:
        if self.tty:
            width = 30
            frac = elapsed / total if total > 0 else 1.0
            bar = "#" * int(width * frac) + "." * (width - int(width * frac))
            print(f"\r  measuring [{bar}] {elapsed:4.1f}/{total:g} s", end="", file=sys.stderr,
                  flush=True)
            if elapsed >= total:
                print("\r" + " " * 60 + "\r", end="", file=sys.stderr, flush=True)
        elif int(elapsed) > self.last and elapsed < total:
            self.last = int(elapsed)
            print(f"  measuring ... {elapsed:.0f}/{total:g} s", file=sys.stderr, flush=True)


def main(args: argparse.Namespace) -> int:
    """Measure, judge, print; exit 0 when the host can hold the period, 1 when not."""
    if not (0 < args.seconds <= 600) or not math.isfinite(args.seconds):
        raise UserError("--seconds must be a number of seconds above 0 and at most 600, "
                        "e.g. --seconds 3")
    cfg = load_config(args.config, args.overrides)

    period = thresholds_from_config(cfg).period_s  # a bad period fails here, before measuring
    print(f"corral hostcheck: measuring this computer's timing for {args.seconds:g} s at "
          f"{period * 1e3:g} ms ({1 / period:g} Hz) ...", file=sys.stderr, flush=True)
    t0 = time.monotonic()
    res = run_hostcheck(cfg, args.seconds, progress=Progress(), link=args.link)
    res["wall_seconds"] = time.monotonic() - t0
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        rig = rig_name(cfg)
        print("\n".join(report_lines(res, rig)))
    return 0 if res["ok"] else 1
