"""The projection operator (runtime.method.modifiers.Projection) by property tests.

Source of the properties: Pomet and Praly, IEEE TAC 1992, and Lavretsky and
Wise, Robust and Adaptive Control (2013), the projection-operator lemma
(from memory): with the convex f of docs/method.md §4, (1) a column starting in
{f <= 1} = {||theta|| <= theta_max} never leaves it, (2) (theta - theta*)'
(Proj(theta, y) - y) <= 0 for every theta* in {f <= 0}, (3) Proj is
continuous (locally Lipschitz) in theta.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from runtime.method.modifiers import Projection

N, M = 5, 2
floats = st.floats(-10.0, 10.0, allow_nan=False, allow_infinity=False)
vec = st.lists(floats, min_size=N * M, max_size=N * M).map(
    lambda v: np.array(v, dtype=float).reshape(N, M))
eps_p = st.floats(0.02, 1.0)
tmax = st.floats(0.5, 5.0)


def _inside(W: np.ndarray, radius: float) -> np.ndarray:
    """Scale each column of W into the ball of the given radius (keeps direction)."""
    norm = np.linalg.norm(W, axis=0)
    return W * np.where(norm > radius, radius / np.maximum(norm, 1e-300), 1.0)


@settings(max_examples=60, deadline=None)
@given(W0=vec, tm=tmax, ep=eps_p, seed=st.integers(0, 2**31 - 1),
       dt=st.floats(1e-4, 0.05))
def test_weights_never_leave_the_ball(W0, tm, ep, seed, dt):
    # Lemma property (1), sampled: Euler steps of the projected derivative,
    # followed by the documented rescale, never leave ||theta|| <= theta_max.
    proj = Projection([tm, tm], ep)
    W = _inside(W0, tm)
    rng = np.random.default_rng(seed)
    for _ in range(200):
        Y = rng.normal(scale=50.0, size=(N, M))
        W = W + dt * proj.project(W, Y)
        proj.after_step(W)
        assert np.all(np.linalg.norm(W, axis=0) <= tm * (1 + 1e-12))


@settings(max_examples=200, deadline=None)
@given(W=vec, Y=vec, tm=tmax, ep=eps_p)
def test_boundary_is_not_crossed_in_continuous_time(W, Y, tm, ep):
    # Lemma property (1), continuous: where f >= 1 (on or outside the ball),
    # d/dt ||theta||^2 = 2 theta' Proj(theta, y) <= 0, so the ball is invariant.
    proj = Projection([tm, tm], ep)
    f = proj.f(W)
    rate = np.sum(W * proj.project(W, Y), axis=0)
    scale = np.linalg.norm(W, axis=0) * np.linalg.norm(Y, axis=0)
    assert np.all(rate[f >= 1] <= 1e-9 * scale[f >= 1])


@settings(max_examples=300, deadline=None)
@given(W=vec, Y=vec, S=vec, tm=tmax, ep=eps_p)
def test_inner_product_inequality(W, Y, S, tm, ep):
    # Lemma property (2): (theta - theta*)'(Proj(theta, y) - y) <= 0 for theta* with f <= 0.
    proj = Projection([tm, tm], ep)
    star = _inside(S, tm / np.sqrt(1 + ep))
    assert np.all(proj.f(star) <= 1e-12)
    lhs = np.sum((W - star) * (proj.project(W, Y) - Y), axis=0)
    scale = (np.linalg.norm(W, axis=0) + tm) * np.linalg.norm(Y, axis=0) * (1 + np.abs(proj.f(W)))
    assert np.all(lhs <= 1e-9 * scale)


@settings(max_examples=300, deadline=None)
@given(W=vec, Y=vec, D=vec, tm=tmax, ep=eps_p)
def test_small_change_of_theta_gives_small_change_of_proj(W, Y, D, tm, ep):
    # Lemma property (3): on the ball Proj is Lipschitz in theta with constant at most
    # ||y|| (2 sqrt(1 + eps_p) + 2 (1 + eps_p) / eps_p) / theta_max (our bound on the
    # derivative of theta theta' y f / ||theta||^2 where the correction is active).
    proj = Projection([tm, tm], ep)
    W = _inside(W, tm)
    norm_d = np.linalg.norm(D, axis=0)
    delta = D / np.maximum(norm_d, 1e-300) * 1e-7 * tm
    W2 = _inside(W + delta, tm)
    change = np.linalg.norm(proj.project(W2, Y) - proj.project(W, Y), axis=0)
    lip = np.linalg.norm(Y, axis=0) * (2 * np.sqrt(1 + ep) + 2 * (1 + ep) / ep) / tm
    moved = np.linalg.norm(W2 - W, axis=0)
    assert np.all(change <= 1.01 * lip * moved + 1e-12 * (1 + np.linalg.norm(Y, axis=0)))


def test_projection_is_identity_inside_and_cuts_the_outward_part_at_the_boundary():
    # Direct check of the formula: inside {f <= 0} nothing changes; on the boundary
    # ||theta|| = theta_max (f = 1) the outward component of y is removed exactly.
    proj = Projection([2.0], 0.1)
    W = np.array([[0.5], [0.5], [0.0]])
    Y = np.array([[1.0], [2.0], [3.0]])
    np.testing.assert_allclose(proj.project(W, Y), Y)
    W = np.array([[2.0], [0.0], [0.0]])
    out = proj.project(W, Y)
    np.testing.assert_allclose(out[:, 0], [0.0, 2.0, 3.0], atol=1e-12)
