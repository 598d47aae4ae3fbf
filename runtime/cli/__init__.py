"""The `corral` command line: `main` parses and dispatches; one module per subcommand
(`cmd_*.py`, each with `add_arguments` and `main`); `common` holds what they share.
"""

from __future__ import annotations

from collections.abc import Sequence


def main(argv: Sequence[str] | None = None) -> int:
    """The `corral` console script (pyproject's entry point `runtime.cli:main`)."""
    # Deferred on purpose: every subcommand module imports `runtime.cli.common`, which runs
    # this package file first; importing `runtime.cli.main` here at the top would load the
    # parser and the command table for each of them.
    from runtime.cli.main import main as run

    return run(argv)
