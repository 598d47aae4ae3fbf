"""Misspelt config sections and override keys are caught, not silently ignored
(common practice for configuration loaders: fail loudly on unknown top-level keys)."""

import subprocess
import sys
from pathlib import Path

import pytest

from runtime.config import ConfigError, load_config

DEMO = Path(__file__).resolve().parents[1] / "configs" / "pedestal-sim.toml"


def test_unknown_section_in_a_file_names_it_and_suggests_the_right_one(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(DEMO.read_text().replace("[adaptation]", "[adaptaton]"))
    with pytest.raises(ConfigError) as err:
        load_config(bad)
    assert err.value.field == "adaptaton"
    assert "did you mean [adaptation]" in str(err.value)


def test_override_of_a_misspelt_key_is_flagged_on_stderr():
    proc = subprocess.run(
        [sys.executable, "-m", "runtime.cli", "design", str(DEMO), "--set", "adaptation.gama=3"],
        capture_output=True, text=True, timeout=900)
    assert "did you mean adaptation.gamma?" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_override_of_an_existing_key_is_silent():
    proc = subprocess.run(
        [sys.executable, "-m", "runtime.cli", "design", str(DEMO), "--set", "adaptation.gamma=3"],
        capture_output=True, text=True, timeout=900)
    assert proc.stderr == ""
    assert proc.returncode == 0


def test_faults_are_a_list_of_tables_and_load(tmp_path):
    good = tmp_path / "faulty.toml"
    good.write_text(DEMO.read_text() + '\n[[faults]]\nkind = "spike"\nat = 1.2\n')
    cfg = load_config(good)
    assert cfg.get("faults") == [{"kind": "spike", "at": 1.2}]
    bad = tmp_path / "bad.toml"
    bad.write_text('faults = 3\n' + DEMO.read_text())  # top level, before any [table]
    with pytest.raises(ConfigError) as err:
        load_config(bad)
    assert err.value.field == "faults" and "list of tables" in str(err.value)


def test_an_alias_reaches_every_reader_under_the_one_key():
    """watchdog.saturation_time (the brief's spelling) lands on watchdog.saturation_s,
    which the live watchdog, the sweep and the replay all read."""
    cfg = load_config(DEMO, ["watchdog.saturation_time=0.2"])
    assert cfg.get("watchdog.saturation_s") == 0.2
    assert cfg.get("watchdog.saturation_time", None) is None
    from runtime.guard.watchdog import Watchdog

    wd = Watchdog.from_config(cfg, 0.001, 0.02)
    rules = {r["rule"]: r for r in wd.settings()}
    assert rules["saturation"]["threshold"] == 0.2
    with pytest.raises(ConfigError) as err:
        load_config(DEMO, ["watchdog.saturation_time=0.2", "watchdog.saturation_s=0.3"])
    assert err.value.field == "watchdog.saturation_time"
