"""Shared pytest fixtures.

Each block below belongs to one group of tests; add new fixtures in their own
block rather than editing another's.
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

# ---------------------------------------------------------------------------
# Numeric core (tests/test_design.py, test_law_theory.py, test_config.py,
# test_cli_core.py): a small explicit rig, so tests do not depend on the demo's tuning.
# ---------------------------------------------------------------------------

SMALL_RIG_TOML = """\
# A 2-state test rig: a double integrator with explicit A, B, C.
[rig]
name = "small"
A = [[0.0, 1.0], [0.0, 0.0]]
B = [[0.0], [1.0]]
C = [[1.0, 0.0]]
states = ["pos", "vel"]
state_units = ["m", "m/s"]
inputs = ["force"]
input_units = ["N"]
input_limits = [1000.0]

[basis]
terms = ["bias", "pos", "vel", "sin:pos"]

[design]
Q = [10.0, 1.0]
R_u = [1.0]
R = [1.0, 1.0]
limits = [0.05, 0.2]
state_range = [1.0, 1.0]

[adaptation]
law = "barrier"
barrier = "rational"
gamma = 5.0
eps = "from_limits"
clamp_margin = 0.02
unknown_effectiveness = false
step_gain_cap = 1.0

[loop]
period = 0.001

[commands]
duration = 2.0
pos = [{ at = 0.5, kind = "step", to = 0.1 }]
"""


@pytest.fixture
def small_rig_toml(tmp_path: Path) -> Path:
    """The small explicit rig written to a TOML file in a temp folder."""
    path = tmp_path / "small.toml"
    path.write_text(SMALL_RIG_TOML)
    return path


@pytest.fixture
def small_rig_raw() -> dict:
    """The small explicit rig as a fresh nested dict (safe to mutate)."""
    return tomllib.loads(SMALL_RIG_TOML)


@dataclass
class CliResult:
    """What one `corral` invocation returned."""

    code: int
    stdout: str
    stderr: str


def _corral_command() -> list[str]:
    script = Path(sys.executable).with_name("corral")
    return [str(script)] if script.exists() else [sys.executable, "-m", "runtime.cli.main"]


@pytest.fixture
def corral(tmp_path: Path) -> Callable[..., CliResult]:
    """Run the installed `corral` console script (a real process) from the repo root."""
    root = Path(__file__).resolve().parent.parent

    def run(*args: str, timeout: float = 120.0) -> CliResult:
        proc = subprocess.run([*_corral_command(), *map(str, args)], cwd=root,
                              capture_output=True, text=True, timeout=timeout)
        return CliResult(proc.returncode, proc.stdout, proc.stderr)

    return run

# ------------------------------------------------------- end of the numeric-core block
