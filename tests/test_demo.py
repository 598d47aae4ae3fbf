"""The shipped demo keeps its promise: the barrier law holds the bound, the
standard law with the same gamma breaks it (the theorem of set-theoretic MRAC
says the barrier-modified law keeps ||e||_P < eps when it starts inside; the
standard law carries no such guarantee)."""

from pathlib import Path

import pytest

from runtime.config import load_config
from runtime.offline.dryrun import dry_run

DEMO = Path(__file__).resolve().parents[1] / "configs" / "pedestal-sim.toml"


@pytest.mark.slow
def test_demo_barrier_law_keeps_the_bound():
    result = dry_run(load_config(DEMO))
    assert result.summary["law"] == "barrier"
    assert result.summary["breach_time"] is None
    assert result.summary["max_margin_ratio"] < 1.0


@pytest.mark.slow
def test_demo_standard_law_with_same_gamma_breaks_the_bound():
    result = dry_run(load_config(DEMO, ["adaptation.law=standard"]))
    assert result.summary["max_margin_ratio"] > 1.0
    assert result.summary["breach_time"] is not None


def test_demo_uncertainty_ranges_are_honest():
    """Issue contract: every uncertain parameter spans at least +-50 % around its
    truth, and the motor effectiveness goes down to 0.6."""
    cfg = load_config(DEMO)
    truth = cfg.get("plant.truth")
    ranges = cfg.get("plant.ranges")
    assert set(truth) <= set(ranges), "every uncertain truth parameter needs a range"
    for name, (lo, hi) in ranges.items():
        value = truth[name]
        if name.startswith("lam_"):
            assert lo <= 0.6 and hi >= value
            continue
        assert lo <= value - 0.5 * abs(value) + 1e-12, name
        assert hi >= value + 0.5 * abs(value) - 1e-12, name
