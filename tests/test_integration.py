"""The runtime wired to the parts around it: law with modifiers and eps(t), run-log
contents, key aliases, MQTT telemetry, the dashboard process, preflight before arming.

Unpaced runs (`Runner.run_ticks`) execute every real decision of the tick
without the clock; the MQTT tests run against a real mosquitto broker; the
dashboard lifecycle runs `corral run` as a subprocess.
"""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import numpy as np
import pytest

from runtime.config import load_config
from runtime.loop import Runner, RunSettings
from runtime.records import read_run_log, read_trip_log
from tests.runtime_helpers import BASE, DEMO, ROOT

NARROWING = ROOT / "configs" / "pedestal-narrowing.toml"


def _runner(config: Path, tmp_path: Path, overrides: list[str] = (), faults: list[str] = (),
            arm: bool = True) -> Runner:
    cfg = load_config(config, [*BASE, f"log.dir={tmp_path}", *overrides])
    return Runner(cfg, RunSettings(auto_arm=arm, faults=list(faults), echo_trips=False))


def _unpaced(r: Runner, seconds: float) -> dict:
    return asyncio.run(r.run_ticks(int(round(seconds / r.design.Ts))))


# ------------------------------------------------------------------ 1. law in the loop
def test_narrowing_bound_reaches_law_run_log_and_telemetry(tmp_path):
    r = _runner(NARROWING, tmp_path)
    assert r.core.law.impl == "fast"  # the default law is the compiled one
    summary = _unpaced(r, 2.5)
    _, cols = read_run_log(summary["run_log"])
    engaged = cols["mode"] == 2  # MODE_CODE["engaged"]
    assert engaged.sum() > 1000
    k0 = int(cols["tick"][engaged][0])
    t_since = (cols["tick"][engaged] - k0) * r.design.Ts
    eps_log = cols["eps"][engaged]
    # The schedule's closed form, eps_inf + (eps0 - eps_inf) exp(-alpha t) (runtime/bound.py
    # docstring), from the config's own numbers; eps0 defaults to the design's eps.
    raw = load_config(NARROWING, []).raw["adaptation"]["bound"]
    eps0, eps_inf, alpha = r.design.eps, raw["eps_inf"], raw["alpha"]
    expect = eps_inf + (eps0 - eps_inf) * np.exp(-alpha * t_since)
    np.testing.assert_allclose(eps_log, expect, rtol=1e-9)
    assert np.all(np.diff(eps_log) < 0) and eps_log[-1] < eps0 * (1 - 1e-3)
    # The law used eps_k: its margin ratio is ||e||_P / eps_k, not ||e||_P / eps0.
    s, ratio = cols["s"][engaged], cols["ratio"][engaged]
    live = s > 1e-6
    np.testing.assert_allclose(s[live] / ratio[live], eps_log[live], rtol=1e-9)
    # Telemetry carries eps(t), the hello the starting bound and the schedule.
    tel = r.core.telemetry_record()
    assert tel["eps"] == pytest.approx(eps_log[-1], rel=1e-3)
    hello = r.core.hello()
    assert hello["eps"] == pytest.approx(eps0) and hello["bound"]["kind"] == "exponential"


def test_constant_bound_run_log_eps_is_the_design_eps(tmp_path):
    r = _runner(DEMO, tmp_path)
    summary = _unpaced(r, 1.0)
    _, cols = read_run_log(summary["run_log"])
    assert np.all(cols["eps"] == r.design.eps)


def test_fast_law_carries_the_config_modifiers(tmp_path):
    r = _runner(DEMO, tmp_path, ["adaptation.leakage=sigma", "adaptation.sigma0=0.5"])
    assert r.core.law._fast.modifiers.leakage == "sigma"
    assert r.core.law._fast.modifiers.sigma0 == 0.5
    ref = _runner(DEMO, tmp_path, ["loop.law=reference", "adaptation.leakage=sigma",
                                   "adaptation.sigma0=0.5"])
    assert [type(m).__name__ for m in ref.core.law._law.modifiers] == ["SigmaModification"]


def test_fast_and_reference_loops_agree(tmp_path):
    """The same unpaced run through both law engines gives the same inputs (to rounding)."""
    cols = []
    for law in ("fast", "reference"):
        r = _runner(NARROWING, tmp_path / law, [f"loop.law={law}"])
        summary = _unpaced(r, 1.2)
        cols.append(read_run_log(summary["run_log"])[1])
    np.testing.assert_allclose(cols[0]["u"], cols[1]["u"], atol=1e-8)
    np.testing.assert_allclose(cols[0]["ratio"], cols[1]["ratio"], atol=1e-8)
    assert math.isfinite(float(cols[0]["ratio"].max()))
