"""The `corral design` and `corral dry-run` command-line contracts, run as real processes."""

from __future__ import annotations

import json
import re
import tomllib
from pathlib import Path

import control
import numpy as np
import pytest
import scipy.linalg as sla

DEMO = "configs/pedestal-sim.toml"
ROOT = Path(__file__).resolve().parent.parent

DESIGN_KEYS = {"A", "B", "C", "K1", "K2", "A_r", "P", "R", "Q", "R_u", "limits", "eps",
               "binding_state", "envelope", "poles", "c_bar", "step_gain", "feasible",
               "warnings", "verdict", "verdict_basis", "verdict_reason", "sampled_radius"}
DRY_RUN_KEYS = {"max_margin_ratio", "breach_time", "rms_error_final", "weight_norm", "ticks",
                "sim_seconds", "wall_seconds", "law"}


def test_design_json_has_the_documented_keys_and_consistent_numbers(corral):
    res = corral("design", DEMO, "--json")
    assert "Traceback" not in res.stderr
    d = json.loads(res.stdout)  # exactly one JSON object on stdout
    assert DESIGN_KEYS <= set(d)
    assert res.code == (0 if d["feasible"] else 1)
    A, B = np.array(d["A"]), np.array(d["B"])
    Q, R_u, R = np.array(d["Q"]), np.array(d["R_u"]), np.array(d["R"])
    A_r, P = np.array(d["A_r"]), np.array(d["P"])
    # K1 is python-control's LQR gain for (A, B, Q, R_u); A_r = A - B K1.
    K_pc, _, poles_pc = control.lqr(A, B, Q, R_u)
    np.testing.assert_allclose(d["K1"], K_pc, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(A_r, A - B @ np.array(d["K1"]), atol=1e-9)
    poles = np.array([complex(re_, im) for re_, im in d["poles"]])
    np.testing.assert_allclose(np.sort_complex(poles), np.sort_complex(poles_pc), rtol=1e-6)
    # P solves A_r'P + P A_r + R = 0 (scipy reference, transposed convention).
    np.testing.assert_allclose(P, sla.solve_continuous_lyapunov(A_r.T, -R), rtol=1e-6,
                               atol=1e-12)
    # eps from limits via the ellipsoid support function (the demo uses eps = "from_limits").
    with open(ROOT / DEMO, "rb") as fh:
        demo = tomllib.load(fh)
    if demo["adaptation"].get("eps", "from_limits") == "from_limits":
        spread = np.sqrt(np.diag(np.linalg.inv(P)))
        limits = np.array(d["limits"])
        assert d["eps"] == pytest.approx(float(np.min(limits / spread)), rel=1e-9)
        i = d["states"].index(d["binding_state"])
        assert d["envelope"][i] == pytest.approx(limits[i], rel=1e-9)
        assert np.all(np.array(d["envelope"]) <= limits * (1 + 1e-9))
    assert d["c_bar"] == pytest.approx(
        float(np.min(np.linalg.eigvalsh(R)) / np.max(np.linalg.eigvalsh(P))), rel=1e-9)


def test_design_refuses_a_gamma_too_large_and_its_suggestion_works(corral):
    # With the runtime guard lifted, gamma 1e6 puts Ts * g far past the sampled loop's
    # limit 4 (docs/sampled-data.md): the closed form refuses it without a dry run.
    lifted = ("--set", "adaptation.step_gain_cap=1e9")
    res = corral("design", DEMO, "--json", "--set", "adaptation.gamma=1e6", *lifted)
    assert res.code == 1 and "Traceback" not in res.stderr
    d = json.loads(res.stdout)
    assert d["feasible"] is False
    assert d["verdict"] == "REFUSED" and d["verdict_basis"] == "closed form"
    assert d["sampled_radius"] >= 1.0
    match = re.search(r"adaptation\.gamma to about ([0-9.eE+-]+)", d["verdict_reason"])
    assert match, d["verdict_reason"]
    suggested = float(match.group(1).rstrip("."))
    assert 0 < suggested < 1e6
    again = corral("design", DEMO, "--json", "--closed-form", "--set",
                   f"adaptation.gamma={suggested}", *lifted)
    d2 = json.loads(again.stdout)
    assert d2["sampled_radius"] < 1.0
    assert d2["verdict"] == "UNVERIFIED" and d2["feasible"] is True and again.code == 0


def test_design_text_report_shows_the_verdict(corral):
    res = corral("design", DEMO, "--set", "adaptation.gamma=1e6", "--set",
                 "adaptation.step_gain_cap=1e9")
    assert res.code == 1
    assert "REFUSED" in res.stdout and "adaptation.gamma" in res.stdout


def test_dry_run_json_contract(corral, tmp_path):
    res = corral("dry-run", DEMO, "--json", "--set", "commands.duration=3", "--no-plot",
                 "--out", tmp_path)
    assert "Traceback" not in res.stderr
    s = json.loads(res.stdout)  # exactly one JSON object
    assert isinstance(s, dict)
    assert DRY_RUN_KEYS <= set(s)
    with open(ROOT / DEMO, "rb") as fh:
        demo = tomllib.load(fh)
    period = demo["loop"]["period"]
    assert s["ticks"] == round(3 / period)
    assert s["sim_seconds"] == pytest.approx(3.0)
    assert s["law"] == demo["adaptation"]["law"]
    assert s["wall_seconds"] > 0
    assert s["max_margin_ratio"] >= 0 and s["weight_norm"] >= 0 and s["rms_error_final"] >= 0
    # exit status follows the bound: 0 when it held, 1 when it broke
    assert res.code == (0 if s["breach_time"] is None else 1)
    if s["breach_time"] is not None:
        assert s["max_margin_ratio"] >= 1.0
    else:
        assert s["max_margin_ratio"] < 1.0
    files = sorted(p.suffix for p in tmp_path.iterdir())
    assert files == [".run"]  # --no-plot: the run file only, no PNG


def test_dry_run_with_the_standard_law_reports_it(corral, tmp_path):
    res = corral("dry-run", DEMO, "--json", "--set", "commands.duration=0.5",
                 "--set", "adaptation.law=standard", "--no-plot", "--out", tmp_path, "--force")
    s = json.loads(res.stdout)
    assert s["law"] == "standard" and s["ticks"] > 0 and "verdict" in s


def test_cli_without_a_command_prints_help_and_exits_2(corral):
    res = corral()
    assert res.code == 2
    assert "design" in res.stdout and "dry-run" in res.stdout


def test_python_dash_m_entry_reports_user_errors_in_one_line(tmp_path):
    # `python -m runtime.cli.main` must behave like the `corral` script (no traceback, exit 2).
    import subprocess
    import sys

    missing = tmp_path / "nothing.toml"
    proc = subprocess.run([sys.executable, "-m", "runtime.cli.main", "design", str(missing)],
                          cwd=ROOT, capture_output=True, text=True, timeout=900)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and str(missing) in lines[0]
