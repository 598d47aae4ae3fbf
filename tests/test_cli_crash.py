"""An unexpected error (a bug, not bad input) still ends with one line and a crash
report file, never a bare traceback on the operator's screen (common practice for
command-line tools used by non-developers)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# A subcommand that fails with an internal error: run `corral` in-process with a
# module whose main raises, through the real entry point.
SCRIPT = """
import sys, types
import runtime.cli.main as cli
mod = types.ModuleType("runtime.cmd_boom")
mod.add_arguments = lambda p: None
def main(args):
    raise ZeroDivisionError("simulated bug")
mod.main = main
sys.modules["runtime.cmd_boom"] = mod
cli.COMMANDS["boom"] = ("runtime.cmd_boom", "raises")
sys.exit(cli.main(["boom"]))
"""


def test_internal_error_is_one_line_with_a_report(tmp_path):
    proc = subprocess.run([sys.executable, "-c", SCRIPT], cwd=ROOT, capture_output=True,
                          text=True, timeout=60, env={"PATH": "/usr/bin:/bin",
                                                      "TMPDIR": str(tmp_path)})
    assert proc.returncode == 70
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert "ZeroDivisionError: simulated bug" in lines[0]
    reports = list(tmp_path.glob("corral-crash-*.txt"))
    assert len(reports) == 1
    assert "Traceback" in reports[0].read_text()


def test_debug_switch_lets_the_traceback_through(tmp_path):
    proc = subprocess.run([sys.executable, "-c", SCRIPT], cwd=ROOT, capture_output=True,
                          text=True, timeout=60, env={"PATH": "/usr/bin:/bin",
                                                      "TMPDIR": str(tmp_path),
                                                      "CORRAL_DEBUG": "1"})
    assert proc.returncode == 1
    assert "Traceback" in proc.stderr
