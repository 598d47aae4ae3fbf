"""Preflight: NO-GO outside the feasible gamma window, GO on a benign config, the record file."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import pytest

from runtime.config import load_config
from runtime.offline.preflight import run_preflight

DEMO = "configs/pedestal-sim.toml"

# A benign config of our own (not the demo's tuning): gentle slews, modest gamma,
# narrow uncertainty around the pedestal's default truth.
BENIGN = """\
[rig]
name = "benign"
sim = "pedestal"
[basis]
terms = ["bias", "az", "el", "az_rate", "el_rate", "cos:el", "tanh:az_rate", "tanh:el_rate"]
tanh_width = 0.02
[design]
Q = [400.0, 400.0, 4.0, 4.0]
R_u = [1.0, 1.0]
R = [1.0, 1.0, 1.0, 1.0]
limits = [0.05, 0.05, 0.5, 0.5]
state_range = [1.6, 1.0, 1.0, 1.0]
[adaptation]
law = "barrier"
gamma = 2.0
unknown_effectiveness = true
[loop]
period = 0.001
[commands]
duration = 3.0
az = [{ at = 0.5, kind = "slew", to = 0.2, duration = 1.5 }]
el = [{ at = 0.5, kind = "slew", to = 0.1, duration = 1.5 }]
[plant]
truth = { gravity_el = 0.5, bias_az = 0.1, bias_el = -0.1, lam_az = 0.95, lam_el = 0.95 }
[plant.ranges]
gravity_el = [0.3, 0.7]
lam_az = [0.9, 1.0]
lam_el = [0.9, 1.0]
[preflight]
plants = 6
"""


@pytest.fixture
def benign(tmp_path):
    path = tmp_path / "benign.toml"
    path.write_text(BENIGN)
    return load_config(path, [f"log.dir={tmp_path / 'logs'}"])


def test_go_on_a_benign_config_and_the_record_is_written(benign, tmp_path):
    res = run_preflight(benign)
    assert res["go"] is True, res["reasons"]
    assert res["predicted_trip_rate"] == 0.0
    record = Path(res["record"])
    assert record.parent == tmp_path / "logs" and record.name.startswith("preflight-")
    saved = json.loads(record.read_text())
    assert saved["go"] is True and saved["sweep"]["plants"] == 6


def test_no_go_when_the_design_refuses_the_gamma(benign):
    # gamma so large, with the runtime guard lifted, that the sampled loop is unstable
    # (Ts * g past 4, docs/sampled-data.md): the design refuses it.
    res = run_preflight(benign.with_overrides(["adaptation.gamma=1e7",
                                               "adaptation.step_gain_cap=1e12"]), write=False)
    assert res["go"] is False and res["predicted_trip_rate"] is None
    assert any(r.startswith("design refused") for r in res["reasons"])


def test_no_go_when_gamma_is_too_small_to_hold_the_bound(benign):
    # gamma = 0.01 with the demo's tight limits: adaptation is too slow, and the sweep
    # really breaks the bound (a case that fails in simulation, not by a rule of thumb).
    cfg = benign.with_overrides([
        "adaptation.gamma=0.01", "design.limits=[0.02, 0.02, 0.5, 0.5]",
        "plant.truth.gravity_el=2.0", "plant.ranges.gravity_el=[1.5, 2.5]"])
    res = run_preflight(cfg, plants=4, write=False)
    assert res["go"] is False
    # the nominal plant already breaks it: the verdict's dry run refuses before the sweep,
    # and says which gamma the simulated rig held instead
    assert res["design"]["verdict"] == "REFUSED"
    assert res["design"]["verdict_basis"] == "dry run"
    assert res["design"]["verdict_dry_run"]["breach_time"] is not None
    assert any("adaptation.gamma" in r for r in res["reasons"])


def test_cli_json_contract_and_exit_codes(benign, tmp_path, capsys):
    from runtime.cli.main import main

    path = tmp_path / "benign.toml"
    rc = main(["preflight", str(path), "--json", "--set", f"log.dir={tmp_path}"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["go"] is True
    assert isinstance(out["predicted_trip_rate"], float) and isinstance(out["reasons"], list)
    rc = main(["preflight", str(path), "--json", "--set", "adaptation.gamma=1e7",
               "--set", "adaptation.step_gain_cap=1e12", "--set", f"log.dir={tmp_path}"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 1 and out["go"] is False and out["reasons"]


def test_the_demo_config_passes_preflight(tmp_path):
    # Reads the shipped demo as it is (its tuning may change); a short horizon keeps it fast.
    with open(DEMO, "rb") as fh:
        tomllib.load(fh)  # the file parses
    cfg = load_config(DEMO, [f"log.dir={tmp_path}", "commands.duration=8"])
    res = run_preflight(cfg, plants=8)
    assert res["go"] is True, res["reasons"]
