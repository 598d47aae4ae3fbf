"""Barrier families (runtime.method.barrier): exact values, the properties the theory needs,
the clamp."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.method.barrier import BARRIERS, RationalBarrier, clamped_phi_d, get_barrier

FAMILIES = sorted(BARRIERS)
eps_values = st.floats(min_value=1e-3, max_value=1e3, allow_nan=False)
fractions = st.floats(min_value=1e-6, max_value=1.0 - 1e-6, allow_nan=False)


# Source: exact evaluation of the published example phi(s) = s^2/(eps - s),
# phi_d(s) = (2 eps - s)/(2 (eps - s)^2) at eps = 1 (docs/method.md §2.1; the family is
# the set-theoretic MRAC example of Arabi et al. 2018, from memory):
# s = 0.9: phi = 0.81/0.1 = 8.1, phi_d = 1.1/(2*0.01) = 55;
# s = 0.99: phi = 0.9801/0.01 = 98.01, phi_d = 1.01/(2*1e-4) = 5050.
@pytest.mark.parametrize(
    ("s", "phi_d", "phi"),
    [(0.0, 1.0, 0.0), (0.5, 3.0, 0.5), (0.9, 55.0, 8.1), (0.99, 5050.0, 98.01)],
)
def test_rational_barrier_exact_values_at_eps_one(s, phi_d, phi):
    bar = get_barrier("rational")
    assert isinstance(bar, RationalBarrier)
    assert float(bar.phi_d(s, 1.0)) == pytest.approx(phi_d, rel=1e-12)
    assert float(bar.phi(s, 1.0)) == pytest.approx(phi, rel=1e-12, abs=1e-15)


def test_barrier_functions_broadcast_over_arrays():
    # Same exact values as above, evaluated as one array with a per-element eps.
    bar = get_barrier("rational")
    s = np.array([[0.0, 0.5], [0.9, 0.99]])
    eps = np.array([1.0, 1.0])
    np.testing.assert_allclose(bar.phi_d(s, eps), [[1.0, 3.0], [55.0, 5050.0]], rtol=1e-12)
    np.testing.assert_allclose(bar.phi(s, eps), [[0.0, 0.5], [8.1, 98.01]], rtol=1e-12)


def test_unknown_barrier_name_lists_the_choices():
    with pytest.raises(KeyError, match="rational"):
        get_barrier("no-such-barrier")


# Properties a barrier Lyapunov function must have for the set-theoretic law
# (docs/method.md §2.1, after Tee, Ge and Tay, Automatica 2009): phi(0) = 0,
# phi > 0 on (0, eps), phi -> infinity at eps, phi_d = d phi / d(s^2) > 0 and phi_d(0) = 1/eps.
@pytest.mark.parametrize("name", FAMILIES)
@settings(max_examples=60, deadline=None)
@given(eps=eps_values, frac=fractions)
def test_barrier_is_zero_at_origin_positive_inside_with_positive_phi_d(name, eps, frac):
    bar = BARRIERS[name]
    assert float(bar.phi(0.0, eps)) == 0.0
    s = frac * eps
    assert float(bar.phi(s, eps)) > 0.0
    assert float(bar.phi_d(s, eps)) > 0.0
    assert bool(bar.valid(s, eps))
    assert not bool(bar.valid(eps, eps))
    assert not bool(bar.valid(1.5 * eps, eps))
    assert not bool(bar.valid(-0.1 * eps, eps))


@pytest.mark.parametrize("name", FAMILIES)
@settings(max_examples=30, deadline=None)
@given(eps=eps_values)
def test_phi_d_at_zero_is_one_over_eps(name, eps):
    # Brief section 2: phi_d(0) = 1/eps for the published family; every family here
    # is documented to share it (so the nominal step gain does not depend on the family).
    assert float(BARRIERS[name].phi_d(0.0, eps)) == pytest.approx(1.0 / eps, rel=1e-12)


@pytest.mark.parametrize("name", FAMILIES)
@settings(max_examples=30, deadline=None)
@given(eps=eps_values)
def test_phi_and_phi_d_grow_without_bound_toward_eps(name, eps):
    # Definition of a barrier: phi -> infinity as s -> eps. Finite proxy: over the decades
    # s = eps (1 - 10^-k), k = 1..12, phi strictly increases and every decade adds at least
    # half of what the first one added (so the sum diverges at least like k, i.e. like
    # log(1 / (eps - s))); phi_d exceeds any fixed multiple of 1/eps close enough to eps.
    bar = BARRIERS[name]
    s = eps * (1.0 - 10.0 ** -np.arange(0, 13))  # s[0] = 0
    phi = bar.phi(s, eps)
    steps = np.diff(phi)
    assert np.all(steps > 0)
    assert np.all(steps[1:] >= 0.5 * steps[0])
    assert float(bar.phi_d(eps * (1 - 1e-8), eps)) > 1e6 / eps
    assert np.all(np.diff(bar.phi_d(s, eps)) > 0)


@pytest.mark.parametrize("name", FAMILIES)
@settings(max_examples=60, deadline=None)
@given(eps=eps_values, frac=st.floats(min_value=0.05, max_value=0.95))
def test_phi_d_is_the_derivative_of_phi_with_respect_to_s_squared(name, eps, frac):
    # Chain rule: d phi / d(s^2) = (d phi / ds) / (2 s); checked with a central difference.
    bar = BARRIERS[name]
    s = frac * eps
    h = 1e-6 * eps
    dphi_ds = (float(bar.phi(s + h, eps)) - float(bar.phi(s - h, eps))) / (2 * h)
    assert float(bar.phi_d(s, eps)) == pytest.approx(dphi_ds / (2 * s), rel=1e-5)


@pytest.mark.parametrize("name", FAMILIES)
@settings(max_examples=80, deadline=None)
@given(
    eps=eps_values,
    margin=st.floats(min_value=1e-4, max_value=0.5),
    s_rel=st.one_of(
        st.floats(min_value=0.0, max_value=1e6, allow_nan=False),
        st.sampled_from([float("inf"), float("nan")]),
    ),
)
def test_clamp_is_always_finite_and_flags_past_the_margin(name, eps, margin, s_rel):
    # Brief 2b: never evaluate phi_d at s >= eps; the clamp keeps the value finite and
    # positive and flags every s beyond (1 - margin) eps, and NaN, for the watchdog.
    bar = BARRIERS[name]
    s = s_rel * eps
    phi_d, engaged = clamped_phi_d(bar, s, eps, margin)
    s_max = (1.0 - margin) * eps
    assert np.isfinite(phi_d) and float(phi_d) > 0
    assert float(phi_d) <= float(bar.phi_d(s_max, eps)) * (1 + 1e-12)
    if math.isnan(s) or s > s_max * (1 + 1e-12):
        assert bool(engaged)
    elif s < s_max:
        assert not bool(engaged)
        assert float(phi_d) == pytest.approx(float(bar.phi_d(s, eps)), rel=1e-12)


@pytest.mark.parametrize("name", FAMILIES)
def test_clamp_flags_exactly_at_the_bound_and_beyond_in_an_array(name):
    bar = BARRIERS[name]
    eps, margin = 2.0, 0.1
    s = np.array([0.0, 1.0, 1.7, 1.85, 2.0, 3.0, np.inf, np.nan])
    phi_d, engaged = clamped_phi_d(bar, s, eps, margin)
    assert engaged.tolist() == [False, False, False, True, True, True, True, True]
    assert np.all(np.isfinite(phi_d))
    np.testing.assert_allclose(phi_d[3:], bar.phi_d(1.8, eps))
