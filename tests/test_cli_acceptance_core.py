"""Acceptance checks of bad input to `corral design`, `dry-run`, `sweep`, `preflight`, `replay`
and `trips`: each case a user can hit ends with one clear stderr line naming the field or file
and the fix, exit status 2, and no traceback. Run as real processes (`python -m runtime.cli.main`).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DEMO = "configs/pedestal-sim.toml"


def corral(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "runtime.cli.main", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=900)


def refused(res: subprocess.CompletedProcess[str], *words: str) -> str:
    """Exit 2, one stderr line starting 'corral:' that holds every word, no traceback."""
    assert "Traceback" not in res.stderr, res.stderr
    lines = res.stderr.strip().splitlines()
    assert res.returncode == 2, (res.returncode, res.stderr)
    assert len(lines) == 1 and lines[0].startswith("corral: "), res.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


def test_config_that_is_not_utf8_is_refused(tmp_path):
    bad = tmp_path / "latin1.toml"
    bad.write_bytes(b"\xff\xfe name = 1\n")
    refused(corral("design", str(bad)), "latin1.toml", "UTF-8")


def test_config_path_that_is_a_folder_says_so(tmp_path):
    refused(corral("design", str(tmp_path)), str(tmp_path), "folder")


@pytest.mark.parametrize("override", ["plant.truth=1", "commands=[]", "design=1"])
def test_a_table_overridden_by_a_value_is_refused(tmp_path, override):
    key = override.partition("=")[0]
    refused(corral("dry-run", DEMO, "--no-plot", "--set", f"log.dir={tmp_path}",
                   "--set", override), f"'{key}'", "table")


@pytest.mark.parametrize("override", ["commands.duration=1e9", "loop.period=1e-9"])
def test_dry_run_too_long_to_record_names_duration_and_period(tmp_path, override):
    refused(corral("dry-run", DEMO, "--no-plot", "--set", f"log.dir={tmp_path}",
                   "--set", override), "commands.duration", "loop.period")


def test_dry_run_output_folder_that_is_a_file(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    refused(corral("dry-run", DEMO, "--no-plot", "--out", str(blocker)), "--out", "afile")
    refused(corral("dry-run", DEMO, "--no-plot", "--set", f"log.dir={blocker}"), "log.dir")


@pytest.mark.parametrize("grid, words", [
    ("nosuch.key=1,2", ("nosuch.key", "not a section")),
    ("adaptation.gama=1,2", ("adaptation.gama", "did you mean adaptation.gamma")),
    ("plant.truth=1,2", ("'plant.truth'", "table")),
])
def test_sweep_refuses_a_grid_key_that_changes_nothing(tmp_path, grid, words):
    refused(corral("sweep", DEMO, "--plants", "2", "--duration", "0.1", "--no-plot",
                   "--set", f"log.dir={tmp_path}", "--grid", grid), *words)


@pytest.mark.parametrize("args, field", [
    (("--seed", "-1"), "sweep.seed"),
    (("--plants", "100000000000"), "sweep.plants"),
    (("--duration", "inf"), "commands.duration"),
    (("--duration", "1e9"), "commands.duration"),
])
def test_sweep_bad_numbers_name_their_field(tmp_path, args, field):
    refused(corral("sweep", DEMO, "--plants", "2", "--duration", "0.1", "--no-plot",
                   "--set", f"log.dir={tmp_path}", *args), field)


def test_sweep_output_folder_that_is_a_file(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    refused(corral("sweep", DEMO, "--plants", "2", "--duration", "0.1", "--no-plot",
                   "--out", str(blocker)), "--out", "afile")


def test_preflight_record_folder_blocked_by_a_file(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    refused(corral("preflight", DEMO, "--plants", "2", "--set", "preflight.duration=0.1",
                   "--set", f"log.dir={blocker}"), "log.dir", "file is in the way")


def test_preflight_duration_that_is_not_a_number(tmp_path):
    refused(corral("preflight", DEMO, "--plants", "2", "--set", "preflight.duration=abc",
                   "--set", f"log.dir={tmp_path}"), "preflight.duration")


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> Path:
    """A short dry run of the demo: a real run file to replay and to cut."""
    out = tmp_path_factory.mktemp("run")
    res = corral("dry-run", DEMO, "--no-plot", "--out", str(out), "--set", "commands.duration=3")
    assert res.returncode == 0, res.stderr
    return next(out.glob("*.run"))


@pytest.mark.parametrize("override, words", [
    ("nosuch.x=1", ("'nosuch.x'", "section")),
    ("plant.truth=1", ("'plant.truth'", "table")),
])
def test_replay_refuses_overrides_that_no_module_can_use(tmp_path, demo_run, override, words):
    refused(corral("replay", str(demo_run), "--no-plot", "--out", str(tmp_path),
                   "--set", override), *words)


def test_replay_of_a_run_file_cut_in_the_header_is_refused(tmp_path, demo_run):
    cut = tmp_path / "cut.run"
    cut.write_bytes(demo_run.read_bytes()[:300])  # like `head -c 300`
    refused(corral("replay", str(cut), "--no-plot", "--out", str(tmp_path)), "cut.run",
            "not a corral run file")


@pytest.fixture(scope="module")
def trip_log(tmp_path_factory) -> Path:
    """A real trip log: the simulated rig in real time with a rehearsed jump at 2.5 s (the
    law engages after about 1.2 s of settling, so the run log has engaged ticks to replay)."""
    logs = tmp_path_factory.mktemp("trips")
    # The host's timing rules are widened: on a loaded machine an overrun trip before the
    # spike would leave no engaged stretch to replay (the timing rules have their own tests).
    res = corral("run", DEMO, "--arm", "--headless", "--duration", "3.5",
                 "--fault", "spike@2.5:axis=az,size=0.2", "--set", f"log.dir={logs}",
                 "--set", "watchdog.rules.overrun.enabled=false",
                 "--set", "watchdog.stale_periods=50")
    assert "Traceback" not in res.stderr, res.stderr
    path = next(logs.glob("*.trips"))
    assert corral("trips", str(path), "--show", "1").returncode == 0
    return path


def test_trips_in_an_empty_folder_is_an_error(tmp_path):
    refused(corral("trips", str(tmp_path)), str(tmp_path), "*.trips")


def test_trips_folder_listing_skips_files_that_are_not_trip_logs(tmp_path, trip_log):
    (tmp_path / "good.trips").write_bytes(trip_log.read_bytes())
    (tmp_path / "latin1.trips").write_bytes(b"\xff\xfe\x00 garbage")
    res = corral("trips", str(tmp_path))
    assert res.returncode == 0 and "Traceback" not in res.stderr
    assert "skipped" in res.stderr and "latin1.trips" in res.stderr
    assert "good.trips:1" in res.stdout
    assert "latin1" not in res.stdout  # not listed as a log cut short


def test_trips_export_into_a_folder_uses_the_default_name(tmp_path, trip_log):
    for flag, suffix in (("--plot", ".png"), ("--csv", ".csv"), ("--comtrade", ".cfg")):
        res = corral("trips", str(trip_log), flag, "1", "--out", str(tmp_path))
        assert res.returncode == 0, res.stderr
        assert (tmp_path / f"{trip_log.stem}-trip1{suffix}").is_file()


def test_trips_export_to_a_bad_place_is_one_line(tmp_path, trip_log):
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    refused(corral("trips", str(trip_log), "--csv", "1", "--out", str(blocker / "t.csv")),
            "--out", "file is in the way")
    refused(corral("trips", str(trip_log), "--comtrade", "1", "--out", str(blocker / "t")),
            "--out", "file is in the way")
    refused(corral("trips", str(trip_log), "--plot", "1", "--out", str(tmp_path / "t.txt")),
            "--out", ".txt", ".png")


@pytest.mark.parametrize("cmd, override, field", [
    ("dry-run", "plant.truth.lam_az=0", "plant.truth.lam_az"),
    ("dry-run", "plant.truth.lam_el=-1", "plant.truth.lam_el"),
    ("sweep", "plant.ranges.lam_az=[-1,0]", "plant.ranges.lam_az"),
])
def test_non_positive_motor_effectiveness_is_refused(tmp_path, cmd, override, field):
    # The method assumes the input gain's sign is known (Lambda positive diagonal; Lavretsky
    # and Wise, Robust and Adaptive Control, 2013, ch. 9 (from memory)).
    extra = ["--plants", "2", "--duration", "0.1"] if cmd == "sweep" else []
    refused(corral(cmd, DEMO, "--no-plot", *extra, "--set", f"log.dir={tmp_path}",
                   "--set", override), field, "positive")


def test_a_real_key_read_with_a_default_gets_no_misspelling_note(tmp_path):
    # adaptation.leakage is a documented key the demo file leaves at its default; the note
    # used to call it a misspelling of adaptation.law and then the real error followed.
    res = corral("dry-run", DEMO, "--no-plot", "--set", f"log.dir={tmp_path}",
                 "--set", "adaptation.leakage=foo")
    refused(res, "adaptation.leakage", "sigma")
    res = corral("design", DEMO, "--set", "adaptation.clamp_margn=0.1")
    assert "did you mean adaptation.clamp_margin?" in res.stderr  # a real typo still noted


@pytest.mark.parametrize("flag", ["--show", "--plot"])
def test_trips_empty_id_is_a_bad_id_not_the_list(trip_log, flag):
    refused(corral("trips", str(trip_log), flag, ""), "trip id ''", "available")


def test_replay_does_not_claim_a_trip_it_cannot_see_was_avoided(tmp_path, trip_log):
    # The rehearsed spike trips the jump rule, whose signal (the estimator's innovation) a
    # run log does not hold; an unchanged replay must not report that trip as avoided.
    run = trip_log.with_suffix(".run")
    res = corral("replay", str(run), "--no-plot", "--json", "--out", str(tmp_path))
    assert "Traceback" not in res.stderr, res.stderr
    out = json.loads(res.stdout)
    assert out["recorded"]["trip"]["rule"] == "jump"
    assert out["trip_avoided"] is None
    text = corral("replay", str(run), "--no-plot", "--out", str(tmp_path)).stdout
    assert "avoided" not in text and "jump trip is not re-checked" in text


@pytest.mark.parametrize("cmd", ["dry-run", "sweep"])
@pytest.mark.parametrize("value", ["abc", "[1,2]", "nan", "true"])
def test_plant_truth_that_is_not_a_finite_number_is_a_config_error(tmp_path, cmd, value):
    extra = ["--plants", "2", "--duration", "0.1"] if cmd == "sweep" else []
    refused(corral(cmd, DEMO, "--no-plot", *extra, "--set", f"log.dir={tmp_path}",
                   "--set", f"plant.truth.visc_az={value}"), "plant.truth.visc_az",
            "finite number")


def test_a_command_segment_starting_before_zero_is_refused(tmp_path):
    refused(corral("dry-run", DEMO, "--no-plot", "--set", f"log.dir={tmp_path}", "--set",
                   'commands.az=[{at=-1,kind="step",to=0.1}]'), "commands.az[0].at", ">= 0")
