"""The `corral` command line.

Each subcommand lives in its own module exposing ``add_arguments(parser)``
and ``main(args) -> int``; this file only lists them, parses, and turns
expected errors (bad config, missing file, refused design) into one clear
line on stderr with exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import tempfile
import time
import traceback
from collections.abc import Sequence

from runtime import __version__
from runtime.cli.common import UserError, common_config_args, output_folder
from runtime.config import ConfigError

__all__ = ["UserError", "common_config_args", "output_folder", "main", "COMMANDS"]

# name -> (module, one-line help). Modules are imported lazily so a slow or
# missing optional part never breaks the others.
COMMANDS: dict[str, tuple[str, str]] = {
    "design": ("runtime.cli.cmd_design", "compute gains, P, eps and the sampled-data verdict"),
    "dry-run": ("runtime.cli.cmd_dryrun", "run the closed loop against the simulated rig, fast"),
    "run": ("runtime.cli.cmd_run", "run the loop in real time against a rig (guarded)"),
    "trips": ("runtime.cli.cmd_trips", "list, show, plot and export watchdog trips"),
    "rig": ("runtime.cli.cmd_rig", "serve the simulated rig as a device (serial or MQTT)"),
    "watch": ("runtime.cli.cmd_watch", "open the live dashboard on a running rig"),
    "sweep": ("runtime.cli.cmd_sweep", "run many uncertain plants, report the bound statistics"),
    "preflight": ("runtime.cli.cmd_preflight", "go / no-go checks before arming hardware"),
    "tune": ("runtime.cli.cmd_tune",
             "search gains, clamp and eps that keep every swept plant inside"),
    "compare": ("runtime.cli.cmd_compare",
                "barrier law against the standard law over the same plants"),
    "hostcheck": ("runtime.cli.cmd_hostcheck", "can this computer hold the loop's period?"),
    "replay": ("runtime.cli.cmd_replay", "re-run a recorded run with other settings"),
    "config": ("runtime.cli.cmd_config",
               "print the resolved config: every key, its unit and source"),
    "report": ("runtime.cli.cmd_report", "one self-contained HTML report of a run"),
}


def build_parser() -> argparse.ArgumentParser:
    """The full parser, with every available subcommand."""
    parser = argparse.ArgumentParser(
        prog="corral",
        description="Barrier-bounded adaptive control for bench rigs: design, dry-run, run, "
                    "guard, watch and review.",
    )

    parser.add_argument("--version", action="version", version=f"corral {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module, help_text) in COMMANDS.items():
        try:
            mod = importlib.import_module(module)
        except ModuleNotFoundError as exc:
            if exc.name != module:
                raise
            continue
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod.add_arguments(p)
        p.set_defaults(_module=mod)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `corral` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_module", None):
        parser.print_help()
        return 2
    try:
        return int(args._module.main(args) or 0)
    except ConfigError as exc:
        print(f"corral: {exc}", file=sys.stderr)
        return 2
    except UserError as exc:
        print(f"corral: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("corral: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (e.g. `| head`): not an error of ours.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except Exception as exc:  # noqa: BLE001 - the last line of defence, see below
        # A bug of ours, not a mistake of the user's: keep the screen to one line and
        # the details in a file the user can attach to a report. CORRAL_DEBUG=1 re-raises.
        if os.environ.get("CORRAL_DEBUG"):
            raise
        report = _write_crash_report(exc)
        print(f"corral: unexpected error ({type(exc).__name__}: {exc}). This is a bug in "
              f"corral, not in your input; the details are in {report}.", file=sys.stderr)
        return 70


def _write_crash_report(exc: BaseException) -> str:
    """Write the traceback to a temporary file and return its path."""
    text = (f"corral {__version__}, python {sys.version.split()[0]}\n"
            f"argv: {sys.argv}\n\n" + "".join(traceback.format_exception(exc)))
    fd, path = tempfile.mkstemp(prefix=f"corral-crash-{time.strftime('%Y%m%d-%H%M%S')}-",
                                suffix=".txt")
    with open(fd, "w") as fh:
        fh.write(text)
    return path


if __name__ == "__main__":
    # Run through the imported module so `UserError` raised by a subcommand is the
    # same class this handler catches (as __main__, this file is a second copy).
    from runtime.cli.main import main as _main

    sys.exit(_main())
