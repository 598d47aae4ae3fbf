"""Leakage (sigma- and e-modification) and the dead zone in the sampled law.

Source: the parameter drift phenomenon (Ioannou and Sun, Robust Adaptive
Control, 1996, sec. 8.3, from memory): with a persistent bounded disturbance
and no persistent excitation the plain gradient law lets the weights grow
without bound; sigma-modification (Ioannou and Kokotovic) and e-modification
(Narendra and Annaswamy, IEEE TAC 1987) keep them bounded. Scenario: the
one-state plant x' = -x + u + d with d = 0.5 constant, command 0, basis
sigma = [x]: the steady error makes W' = gamma phi_d x (x P B) > 0 for ever
(W grows like t^(1/3) as the gain rises and x shrinks).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest

from runtime.config import Config
from runtime.method.design import design_from_config, zoh
from runtime.method.law import AdaptiveLaw, law_from_config
from runtime.method.modifiers import DeadZone, EModification, SigmaModification

D = 0.5


def _cfg(**adapt: object) -> Config:
    raw = {
        "rig": {"name": "scalar", "A": [[-1.0]], "B": [[1.0]], "C": [[1.0]],
                "input_limits": [100.0]},
        "basis": {"terms": ["x0"]},
        "design": {"Q": [1.0], "R_u": [1.0], "R": [1.0], "limits": [5.0], "state_range": [2.0]},
        "adaptation": {"law": "barrier", "gamma": 20.0, **adapt},
        "loop": {"period": 0.02},
    }
    return Config(raw=raw)


def _run(law: AdaptiveLaw, seconds: float) -> np.ndarray:
    """Weight history (one value per second) of the closed loop with a constant disturbance."""
    d = law.design
    Ad, Bd = zoh(d.A, d.rig.B, d.Ts)
    state = law.init_state(np.zeros(1))
    x = np.zeros(1)
    per_s = int(round(1 / d.Ts))
    hist = []
    for k in range(int(seconds * per_s)):
        out = law.step(state, x, np.zeros(1))
        x = Ad @ x + Bd @ (out.u + D)
        if k % per_s == per_s - 1:
            hist.append(float(state.W[0, 0]))
    return np.array(hist)


@functools.lru_cache(maxsize=1)
def _drift() -> np.ndarray:
    return _run(AdaptiveLaw(design_from_config(_cfg())), 300.0)


def test_unmodified_law_drifts():
    # The drift: W keeps growing (t^(1/3)-like) while the error stays small and bounded.
    w = _drift()
    assert w[-1] > 1.4 * w[39]  # from 40 s to 300 s (t^(1/3) would give 1.96x)
    assert np.all(np.diff(w) > 0)


@pytest.mark.parametrize("adapt", [
    {"leakage": "sigma", "sigma0": 0.5},
    {"leakage": "e", "mu": 2.0},
])
def test_leakage_keeps_the_weights_bounded(adapt):
    law = law_from_config(_cfg(**adapt))
    assert len(law.modifiers) == 1
    w = _run(law, 300.0)
    # settled: the last 200 s move by less than 1 % and stay below the drifting value
    assert np.ptp(w[100:]) <= 0.01 * np.max(np.abs(w))
    drift = _drift()
    assert np.max(np.abs(w)) < 0.5 * drift[-1]


def test_leakage_formulas():
    # W' = gamma (phi_d sigma e'PB - sigma0 W) (Ioannou and Kokotovic) and
    # gamma (... - mu ||e'PB|| W) (Narendra and Annaswamy 1987); docs/method.md §4.
    rng = np.random.default_rng(0)
    W, dW = rng.normal(size=(3, 4, 2)), rng.normal(size=(3, 4, 2))
    ePB = rng.normal(size=(3, 2))
    gamma = np.array([1.0, 2.0, 3.0, 4.0])
    got = SigmaModification(0.3, gamma).apply(W, dW, None, ePB, None, None)
    np.testing.assert_allclose(got, dW - gamma[:, None] * 0.3 * W)
    got = EModification(0.7, gamma).apply(W, dW, None, ePB, None, None)
    norm = np.linalg.norm(ePB, axis=1)
    np.testing.assert_allclose(got, dW - gamma[:, None] * 0.7 * norm[:, None, None] * W)


def test_dead_zone_stops_adaptation_below_the_threshold():
    design = design_from_config(_cfg())
    law = AdaptiveLaw(design, [DeadZone(0.05)])
    state = law.init_state(np.zeros(1))
    P = float(design.P[0, 0])
    below = np.array([0.04 / np.sqrt(P)])  # ||e||_P = 0.04 < 0.05
    for _ in range(50):
        state.xr[:] = 0.0
        out = law.step(state, below, np.zeros(1))
        assert out.s < 0.05
    assert np.all(state.W == 0.0)
    above = np.array([0.06 / np.sqrt(P)])
    state.xr[:] = 0.0
    law.step(state, above, np.zeros(1))
    assert np.all(state.W != 0.0)


def test_dead_zone_config_must_sit_below_the_bound():
    from runtime.config import ConfigError

    design = design_from_config(_cfg())
    with pytest.raises(ConfigError) as err:
        law_from_config(_cfg(dead_zone=design.eps * 2), design)
    assert err.value.field == "adaptation.dead_zone"
