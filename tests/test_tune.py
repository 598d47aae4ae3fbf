"""corral tune and corral compare, held against the sweep and the dry run they are built on.

References: the feasible gain window comes from a grid sweep (`runtime.offline.sweep.run_grid`,
the engine `corral sweep --grid` runs, independent of the optimiser); the comparison's
figures from individual `run_sweep` and `dry_run` calls on the same plants. The matched
gain gamma / eps is phi_d(0) = 1/eps of the rational barrier (exact formula, docs/method.md §2.1).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from runtime.config import load_config
from runtime.method.design import design_from_config
from runtime.offline.compare import compare, dry_run_plant
from runtime.offline.sweep import SweepSettings, draw_plants, run_grid, run_sweep
from runtime.offline.tune import tune, write_tuned

ROOT = Path(__file__).resolve().parent.parent
PITCH = ROOT / "configs" / "pitch-stand.toml"
SMALL = ["commands.duration=8.0", "sweep.plants=8"]
GRID = [0.03, 0.05, 0.2, 0.8, 3.0, 12.0, 48.0]


def _inside(summary: dict) -> bool:
    trip = summary["trip_fraction"] + summary["diverged_fraction"]
    return trip == 0 and summary["bound_held_fraction"] == 1.0


def test_tuner_finds_the_window_a_grid_sweep_shows(tmp_path: Path) -> None:
    cfg = load_config(PITCH, [*SMALL, f"log.dir={tmp_path}"])
    grid = run_grid(cfg, [("adaptation.gamma", GRID)])
    cells = grid["grid"]
    ok = {g: _inside(c) for g, c in zip(GRID, cells, strict=True)}
    assert not all(ok.values()) and any(ok.values()), ok  # the grid shows an edge
    low_bad = max(g for g, v in ok.items() if not v and g < min(k for k in ok if ok[k]))
    high_ok = min(g for g, v in ok.items() if v)
    res = tune(cfg, trials=10, plants=8, seed=3, tune_eps=False, tune_clamp=False)
    assert len(res.candidates) == 10  # the trial budget
    assert res.best is not None and res.best.feasible
    assert res.best.settings["gamma_all"] > low_bad  # inside the grid's window
    for c in res.candidates:
        g = c.settings["gamma_all"]
        if g <= low_bad:
            assert not c.feasible, (g, c.why)
        if high_ok <= g <= max(GRID) and ok[high_ok] and all(ok[k] for k in GRID if k >= g):
            # every grid point from here up held: the tuner's sweep of the same plants agrees
            assert c.trip_rate == 0.0, (g, c.why)
    # the winner was confirmed by the sweep preflight runs, and that sweep agrees
    assert res.confirm is not None and res.confirm["ok"]
    again = run_sweep(cfg.with_overrides(res.best.overrides),
                      plants=int(cfg.number("preflight.plants"))).summary
    assert again["trip_fraction"] + again["diverged_fraction"] == res.confirm["trip_rate"]


def test_time_budget_stops_the_search(tmp_path: Path) -> None:
    cfg = load_config(PITCH, [*SMALL, f"log.dir={tmp_path}"])
    res = tune(cfg, trials=1000, seconds=0.01, plants=2, tune_eps=False, tune_clamp=False)
    assert 1 <= len(res.candidates) < 1000


def test_tuned_file_keeps_the_original_and_comments_the_changes(tmp_path: Path) -> None:
    src = ROOT / "configs" / "pedestal-sim.toml"
    out = write_tuned(src, ["adaptation.gamma=12.5", "adaptation.eps=0.05",
                            "adaptation.dead_zone=0.001"], tmp_path / "t.toml")
    text = out.read_text()
    assert "gamma = 12.5  # tuned by corral tune: was 8.0" in text
    assert "# tuned by corral tune: was \"from_limits\"" in text
    assert "dead_zone = 0.001  # tuned by corral tune: was unset" in text
    cfg = load_config(out)
    assert cfg.get("adaptation.gamma") == 12.5 and cfg.get("adaptation.dead_zone") == 0.001
    before = src.read_text().splitlines()
    after = text.splitlines()
    assert len(after) == len(before) + 1  # one line added, the rest replaced in place


def test_comparison_agrees_with_individual_sweeps_and_dry_runs(tmp_path: Path) -> None:
    cfg = load_config(PITCH, [*SMALL, f"log.dir={tmp_path}"])
    rows = compare(cfg, plants=6, dry_runs=2)
    names = [r.name for r in rows]
    assert names == ["barrier @ gamma", "standard @ gamma", "standard @ gamma/eps"]
    design = design_from_config(cfg)
    # the matched gain: gamma * phi_d(0) = gamma / eps for the rational barrier
    assert rows[2].gamma == pytest.approx(rows[0].gamma / design.eps, rel=1e-3)
    for row in rows:
        c = cfg.with_overrides(row.overrides)
        s = run_sweep(c, plants=6).summary
        assert row.bound_held_fraction == s["bound_held_fraction"]
        assert row.trip_fraction == s["trip_fraction"] + s["diverged_fraction"]
        assert row.worst_margin_ratio == pytest.approx(s["worst_margin_ratio"])
        truth = draw_plants(c, 6, SweepSettings.from_config(c, 6).seed)
        by_hand = [dry_run_plant(c, truth, i) for i in range(2)]
        assert row.per_plant == by_hand
        assert row.tracking_error == pytest.approx(
            sum(p["tracking_error"] for p in by_hand) / 2)


def test_tune_cli_json_and_tuned_file_passes_preflight(tmp_path: Path) -> None:
    out = tmp_path / "tuned.toml"
    cmd = [sys.executable, "-m", "runtime.cli", "tune", str(PITCH), "--trials", "4",
           "--plants", "4", "--keep-eps", "--out", str(out), "--json",
           "--set", "commands.duration=8.0", "--set", f"log.dir={tmp_path}"]
    got = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    assert got.returncode == 0, got.stderr[-2000:]
    import json

    report = json.loads(got.stdout)
    for key in ("best", "trials", "predicted_trip_rate", "worst_margin_ratio", "out"):
        assert key in report
    assert report["out"] == str(out) and Path(report["plot"]).exists()
    assert "trial 1/4" in got.stderr  # progress
    pre = subprocess.run([sys.executable, "-m", "runtime.cli", "preflight", str(out),
                          "--plants", "20"], capture_output=True, text=True, cwd=ROOT)
    assert pre.returncode == 0, pre.stdout[-2000:]


def test_regressor_groups_follow_the_config() -> None:
    # configs/pedestal-rbf.toml: 8 named terms, a 7 x 7 radial-basis grid, 2 inputs
    # (unknown_effectiveness augments the regressor with one entry per input)
    design = design_from_config(load_config(ROOT / "configs" / "pedestal-rbf.toml"))
    from runtime.offline.tune import regressor_groups

    assert regressor_groups(design) == [("terms", 0, 8), ("rbf", 8, 57), ("inputs", 57, 59)]
