"""What every `corral` subcommand module shares with the command line: the
user-error type and the common arguments. Its own module so the subcommands
(`runtime/cmd_*.py`) never import `runtime.cli.main`, which loads them: no cycle.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any


class UserError(Exception):
    """An expected, user-fixable problem that is not a config field (a missing log, say)."""


def common_config_args(parser: argparse.ArgumentParser) -> None:
    """CONFIG plus repeatable --set KEY=VALUE overrides."""
    parser.add_argument("config", help="TOML config, e.g. configs/pedestal-sim.toml")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="KEY=VALUE",
                        help="override a config key, e.g. --set adaptation.gamma=8 (repeatable)")


def force_arg(parser: argparse.ArgumentParser) -> None:
    """--force: run a design the verdict refuses."""
    parser.add_argument("--force", action="store_true",
                        help="run even when the design verdict is REFUSED")


def verdict_gate(verdict: Any, force: bool, quiet: bool) -> bool:
    """Print the verdict first (stderr when `quiet`, i.e. stdout carries JSON); False when a
    refusal stops the command (one line with the reason and the fix)."""
    if verdict.refused and not force:
        fix = f" Fix: {verdict.fix}" if verdict.fix else ""
        print(f"corral: design refused ({verdict.basis}): {verdict.reason}{fix} "
              "Or add --force to run it anyway.", file=sys.stderr)
        return False
    print(verdict.line() + (" (--force: running anyway)" if verdict.refused else ""),
          file=sys.stderr if quiet else sys.stdout, flush=True)
    return True


def output_folder(path: Path, what: str) -> Path:
    """Create the output folder `path` (named in messages as `what`, e.g. '--out') or raise
    UserError with the reason: a file in the way, no permission, a missing parent."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise UserError(f"{what} '{path}' is a file, not a folder. Fix: give a folder path "
                        f"(it is created if missing).") from None
    except OSError as exc:
        raise UserError(f"{what} '{path}': cannot create the folder ({exc.strerror}). Fix: "
                        f"give a folder you can write to.") from None
    return path
