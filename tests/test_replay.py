"""What-if replay (`corral replay`): the reader, the re-run, the fit, the re-checked rules.

The recorded runs are made here by the dry run (and, when it exists, the
real-time loop) from the demo config, shortened; the demo's tuning is read
from the file, never copied into the tests. Where a test relies on the demo
behaving a certain way (the barrier law holding, the standard law breaking
the bound) it first asserts that, so a retuned demo fails loudly, not
silently.
"""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from runtime.config import load_config
from runtime.method.design import design_from_config
from runtime.offline.dryrun import dry_run, read_run_file, write_run_file
from runtime.review.replay import (
    RunFileError,
    config_with_overrides,
    fit_plant,
    read_recording,
    replay,
)

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "configs" / "pedestal-sim.toml"
SHORT = ["commands.duration=6"]  # the demo's first slews; ~6000 ticks
QUIET = ["plant.sensors.angle_noise=0", "plant.sensors.rate_noise=0",
         "plant.sensors.angle_resolution=0"]
# A truth away from the config's own (all inside [plant.ranges]) for the fit test.
KNOWN_TRUTH = {"gravity_el": 2.6, "visc_az": 0.5, "visc_el": 1.1, "coulomb_az": 0.45,
               "coulomb_el": 0.8, "spring_az": 1.3, "coupling": 0.2, "bias_az": 0.25,
               "bias_el": -0.55, "lam_az": 0.85, "lam_el": 0.65}


def _record(folder: Path, name: str, overrides: list[str]) -> Path:
    cfg = load_config(DEMO, overrides)
    return write_run_file(dry_run(cfg), folder / f"{name}.run", cfg)


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("replay-runs")
    return {
        "barrier": _record(folder, "barrier", SHORT),
        "standard": _record(folder, "standard", [*SHORT, "adaptation.law=standard"]),
        # an azimuth step big enough to pin the drive at its limit for a while
        "step": _record(folder, "step", ["commands.duration=3",
                                         'commands.az=[{at=0.5, kind="step", to=0.6}]']),
        "quiet": _record(folder, "quiet", ["commands.duration=8", *QUIET,
                                           *(f"plant.truth.{k}={v}"
                                             for k, v in KNOWN_TRUTH.items())]),
    }


def _demo_levels() -> tuple[float, float]:
    raw = tomllib.loads(DEMO.read_text())
    wd = raw.get("watchdog", {})
    from runtime.guard.watchdog import DEFAULTS

    return (float(wd.get("margin_warning", DEFAULTS["margin_warning"])),
            float(wd.get("margin_trip", DEFAULTS["margin_trip"])))


# ---------------------------------------------------------------- reading
def test_reader_matches_the_dry_runs_own_reader(runs):
    rec = read_recording(runs["barrier"])
    header, cols = read_run_file(runs["barrier"])  # the writer's own reader, as reference
    assert rec.kind == "dry-run" and not rec.torn
    assert rec.ticks == cols["t"].size
    np.testing.assert_array_equal(rec.t, cols["t"])
    np.testing.assert_array_equal(rec.c, cols["c"])
    np.testing.assert_array_equal(rec.y, cols["y"])  # measured state = the dry run's y
    np.testing.assert_array_equal(rec.u, cols["u"])
    np.testing.assert_array_equal(rec.ratio, cols["ratio"])
    assert rec.config == header["config"]
    assert rec.period == pytest.approx(header["config"]["loop"]["period"])
    assert rec.window() == (0, rec.ticks, rec.ticks)  # a dry run is engaged throughout


def test_torn_run_file_still_replays(runs, tmp_path):
    data = runs["barrier"].read_bytes()
    torn = tmp_path / "torn.run"
    torn.write_bytes(data[:-7])  # cut inside the last tick's record, as a crash would
    rec = read_recording(torn)
    whole = read_recording(runs["barrier"])
    assert rec.torn and rec.ticks == whole.ticks - 1
    res = replay(rec)
    assert res.columns["ratio"].size == rec.ticks
    np.testing.assert_allclose(res.columns["ratio"], whole.ratio[:-1], rtol=0, atol=1e-12)


def test_reader_refuses_what_is_not_a_run_file(tmp_path):
    with pytest.raises(RunFileError, match="no such run file"):
        read_recording(tmp_path / "missing.run")
    toml = tmp_path / "cfg.run"
    toml.write_text(DEMO.read_text())
    with pytest.raises(RunFileError, match="not a corral run file"):
        read_recording(toml)


# ---------------------------------------------------------------- re-running
def test_replay_without_overrides_reproduces_the_recorded_margin(runs):
    rec = read_recording(runs["barrier"])
    res = replay(rec)
    # Same config, same noise seed, same initial state, same commands: the same
    # closed loop, so the margin trace must come back (up to float rounding).
    np.testing.assert_allclose(res.columns["ratio"], rec.ratio, rtol=0, atol=1e-9)
    assert res.replayed.max_margin_ratio == pytest.approx(float(np.max(rec.ratio)), abs=1e-9)
    assert res.recorded.max_margin_ratio == pytest.approx(float(np.max(rec.ratio)), abs=0)
    assert res.replayed.rms_pointing_error == pytest.approx(res.recorded.rms_pointing_error,
                                                            rel=1e-9)
    assert res.replayed.check.trip is None and res.recorded.check.trip is None
    assert not res.would_trip and res.plant == "config" and res.overrides == []


def test_standard_law_trips_where_the_barrier_held(runs):
    rec = read_recording(runs["barrier"])
    _, trip_level = _demo_levels()
    assert float(np.max(rec.ratio)) < trip_level, "precondition: the demo's barrier run holds"
    res = replay(rec, ["adaptation.law=standard"])
    assert res.design.law == "standard"
    assert res.would_trip and res.recorded.check.trip is None
    first = res.replayed.check.trip
    assert first["rule"] in ("margin", "predicted_crossing", "clamp")
    # The first-out comes no later than the first tick at the trip level (margin rule, no
    # on-delay) and the replayed run does break the bound the barrier law keeps.
    ratio = res.columns["ratio"]
    at_level = res.t[int(np.argmax(ratio >= trip_level))]
    assert first["t"] <= at_level + 1e-12
    assert res.replayed.breach_time is not None and res.replayed.max_margin_ratio > 1.0


def test_barrier_replay_avoids_the_standard_laws_trip(runs):
    rec = read_recording(runs["standard"])
    res = replay(rec, ["adaptation.law=barrier"])
    assert res.recorded.check.trip is not None
    assert not res.would_trip
    assert res.to_json()["trip_avoided"] is True


def test_overridden_period_resamples_the_recorded_commands(runs):
    rec = read_recording(runs["barrier"])
    res = replay(rec, ["loop.period=0.002"])
    assert res.design.Ts == pytest.approx(0.002)
    assert res.t.size == rec.ticks // 2
    # commands on the new clock are the recorded ones at the same instants
    np.testing.assert_allclose(res.columns["c"][::5], rec.c[::10], atol=1e-12)


# ---------------------------------------------------------------- the watchdog
def test_lower_margin_trip_finds_a_trip_the_recorded_run_did_not_have(runs):
    rec = read_recording(runs["barrier"])
    peak = float(np.max(rec.ratio))
    level = round(0.8 * peak, 4)
    res = replay(rec, [f"watchdog.margin_trip={level}", f"watchdog.margin_warning={level / 2}"])
    assert res.recorded.check.trip is None
    trip = res.rechecked.check.trip
    assert trip is not None and trip["rule"] == "margin"
    # No on-delay: it trips on the first recorded tick with ratio >= level.
    k = int(np.argmax(rec.ratio >= level))
    assert trip["t"] == pytest.approx(rec.t[k]) and trip["threshold"] == pytest.approx(level)
    warn = res.rechecked.check.warning
    assert warn is not None and warn["t"] == pytest.approx(rec.t[int(np.argmax(
        rec.ratio >= level / 2))])


def test_saturation_time_is_reevaluated_on_the_recorded_inputs(runs):
    rec = read_recording(runs["step"])
    limits = np.asarray(design_from_config(load_config(DEMO)).rig.input_limits, dtype=float)
    sat = np.abs(rec.u_cmd) >= limits  # per input, as the loop counts
    assert sat.any(), "precondition: the step run reaches the input limit"
    # Seconds held at the limit after each tick, per input (the loop adds one period per
    # saturated tick and restarts at zero), computed independently with numpy.
    held = np.zeros(sat.shape)
    for j in range(sat.shape[1]):
        run = 0
        for k in range(sat.shape[0]):
            run = run + 1 if sat[k, j] else 0
            held[k, j] = run * rec.period
    longest = float(np.max(held))
    level = (round(0.5 * longest / rec.period) + 0.5) * rec.period  # between two ticks' counts
    res = replay(rec, [f"watchdog.saturation_time={level}"])  # alias of saturation_s
    assert res.overrides[0].startswith("watchdog.saturation_s=")
    trips = [t for t in res.rechecked.check.trips if t["rule"] == "saturation"]
    assert trips, "a hold of half the longest saturated stretch must trip"
    k = int(np.argmax(np.max(held, axis=1) >= level))
    assert trips[0]["t"] == pytest.approx(rec.t[k])
    res = replay(rec, [f"watchdog.saturation_s={longest + 1.0}"])
    assert not [t for t in res.rechecked.check.trips if t["rule"] == "saturation"]


# ---------------------------------------------------------------- the fitted plant
def test_fit_recovers_a_known_truth_from_a_noise_free_run(runs):
    rec = read_recording(runs["quiet"])
    cfg, _ = config_with_overrides(rec, [])
    fit = fit_plant(rec, cfg)
    ranges = cfg.get("plant.ranges")
    assert set(fit.params) == set(ranges), fit.skipped  # every uncertain parameter fitted
    for name, value in fit.params.items():
        # Noise-free data: only the trapezoid rule's O(Ts^2) error remains.
        assert value == pytest.approx(KNOWN_TRUTH[name], abs=2e-3), name
    assert max(fit.residual_rms) < 1e-3  # rad/s^2
    res = replay(rec, plant="fitted")
    assert res.replayed.max_margin_ratio == pytest.approx(float(np.max(rec.ratio)), rel=1e-3)


def test_fit_on_noisy_data_lies_within_its_standard_errors(runs):
    rec = read_recording(runs["barrier"])
    cfg, _ = config_with_overrides(rec, [])
    fit = fit_plant(rec, cfg)
    truth = cfg.get("plant.truth")
    assert fit.params
    for name, value in fit.params.items():
        # 4 standard errors: a chance miss has odds below 1e-4 per parameter.
        assert abs(value - truth[name]) < 4 * fit.stderr[name] + 1e-6, name


# ---------------------------------------------------------------- the command line
JSON_KEYS = {"recorded", "replayed", "would_trip", "overrides", "plant", "fit"}
SIDE_KEYS = {"max_margin_ratio", "trip", "rms_pointing_error"}


def test_cli_json_contract_and_exit_codes(corral, runs, tmp_path):
    res = corral("replay", runs["barrier"], "--set", "adaptation.law=standard",
                 "--out", tmp_path, "--json")
    assert "Traceback" not in res.stderr
    out = json.loads(res.stdout)
    assert JSON_KEYS <= set(out)
    assert SIDE_KEYS <= set(out["recorded"]) and SIDE_KEYS <= set(out["replayed"])
    assert out["overrides"] == ["adaptation.law=standard"] and out["plant"] == "config"
    assert out["would_trip"] is True and res.code == 1
    assert out["recorded"]["trip"] is None
    assert {"rule", "t"} <= set(out["replayed"]["trip"])
    assert out["fit"] is None
    png = Path(out["plot"])
    assert png.parent == tmp_path and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the replayed ticks are themselves a run file the reader takes back
    again = read_recording(out["replay_file"])
    assert again.ticks == read_recording(runs["barrier"]).ticks


def test_cli_fitted_plant_reports_the_fit(corral, runs, tmp_path):
    res = corral("replay", runs["barrier"], "--plant", "fitted", "--out", tmp_path,
                 "--no-plot", "--json")
    out = json.loads(res.stdout)
    assert res.code == 0 and out["plant"] == "fitted" and out["would_trip"] is False
    fit = out["fit"]
    assert fit["parameters"] and len(fit["residual_rms"]) == 2
    assert all(math.isfinite(p["value"]) for p in fit["parameters"].values())


def test_cli_errors_are_one_clear_line(corral, runs, tmp_path):
    res = corral("replay", tmp_path / "nope.run")
    assert res.code == 2 and "Traceback" not in res.stderr
    assert "no such run file" in res.stderr and len(res.stderr.strip().splitlines()) == 1
    res = corral("replay", DEMO)
    assert res.code == 2 and "not a corral run file" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1
    res = corral("replay", runs["barrier"], "--set", "adaptation.gamma", "--no-plot")
    assert res.code == 2 and "key=value" in res.stderr and "Traceback" not in res.stderr


# ---------------------------------------------------------------- a real-time run log
def test_replays_a_real_time_run_log(corral, tmp_path):
    # The replay re-checks the recorded ticks against the margin rules; a loaded machine
    # must not add a loop-timing trip (overrun, stale sample) that no replay can see.
    run = corral("run", DEMO, "--headless", "--duration", "3", "--arm", "--json",
                 "--set", f"log.dir={tmp_path}", "--set", "watchdog.overrun_misses=100000",
                 "--set", "watchdog.stale_periods=50")
    assert run.code == 0, run.stderr
    summary = json.loads(run.stdout)
    rec = read_recording(summary["run_log"])
    assert rec.kind == "runtime" and rec.mode is not None and "engaged" in rec.mode
    start, _, stop = rec.window()
    assert 0 < start < stop  # the loop settles before it engages
    # The recorded side agrees with what the loop itself reported.
    res = replay(rec)
    assert res.recorded.max_margin_ratio == pytest.approx(summary["max_margin_ratio"],
                                                          rel=1e-9)
    assert (res.recorded.check.trip is None) == (not summary["trips"])
    # Other sensor noise, same commands and plant: the margin comes back closely.
    assert res.replayed.max_margin_ratio == pytest.approx(res.recorded.max_margin_ratio,
                                                          rel=0.2)
    std = replay(rec, ["adaptation.law=standard"])
    assert std.would_trip


def test_a_logged_trip_is_the_recorded_first_out(corral, tmp_path):
    # A disturbance torque far beyond what the law can absorb makes the loop trip.
    run = corral("run", DEMO, "--headless", "--duration", "3", "--arm", "--json",
                 "--fault", "disturbance_step@2.5:axis=el,size=40",
                 "--set", f"log.dir={tmp_path}")
    summary = json.loads(run.stdout)
    assert summary["trips"], "precondition: the injected disturbance trips the loop"
    res = corral("replay", summary["run_log"], "--no-plot", "--json", "--out", tmp_path)
    out = json.loads(res.stdout)
    first = summary["trips"][0]
    assert out["recorded"]["trip_source"] == "the run's trip log"
    assert out["recorded"]["trip"]["rule"] == first["rule"]
    assert out["recorded"]["trip"]["t"] == pytest.approx(first["t"])


def test_the_plot_and_text_mark_the_recorded_trip_the_replayed_one_and_their_levels(tmp_path):
    """The reported case: a run that tripped (here on a sensor spike, a rule the replay
    cannot re-check from the record) must never be labelled "recorded (no trip)"."""
    from runtime_helpers import run_unpaced

    from runtime.review.replay import plot_replay, replay_marks

    _, summary = run_unpaced(tmp_path, 2.5, faults=["spike@1.6"])  # engaged at ~0.93 s
    first = summary["trips"][0]
    assert first["rule"] == "jump"
    res = replay(read_recording(summary["run_log"]),
                 ["watchdog.margin_trip=0.05", "watchdog.margin_warning=0.03"])
    marks = replay_marks(res)
    assert "no trip" not in marks["recorded_label"]
    assert "jump" in marks["recorded_label"] and "trip log" in marks["recorded_label"]
    rec = next(m for m in marks["marks"] if m["kind"] == "recorded")
    assert rec["t"] == pytest.approx(first["t"]) and rec["levels"]["trip"] == 0.9
    # The replay at a margin trip level of 0.05 trips, and is marked with its own levels.
    replayed = next(m for m in marks["marks"] if m["kind"] == "replayed")
    assert replayed["levels"]["trip"] == 0.05 and replayed["levels"]["warning"] == 0.03
    assert "0.05" in marks["replayed_label"]
    assert res.to_json()["marks"][0]["rule"] == "jump"
    png = plot_replay(res, tmp_path / "replay.png")
    assert png.stat().st_size > 0
