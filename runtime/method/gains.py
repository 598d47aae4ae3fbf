"""Baseline gains, the reference model's Lyapunov matrix and eps from the limits.

Plain functions on numpy arrays: `lqr` (K1), `controllability_rank`,
`tracking_gain` (K2), `lyapunov` (P) and `eps_from_limits`. What does not live
here: the zero-order hold and the sampled-data closed form (`runtime.method.sampled`),
tying them together for a config (`runtime.method.design`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.linalg as sla
from numpy.typing import NDArray

Array = NDArray[np.float64]
Poles = NDArray[np.inexact[Any]]
"""Eigenvalues: real or complex, as numpy returns them."""


def lqr(A: Array, B: Array, Q: Array, R: Array) -> tuple[Array, Array, Poles]:
    """Continuous-time LQR: gain K (m x n), Riccati solution X, closed-loop poles.

    Minimises the integral of x'Qx + u'Ru for x' = Ax + Bu with u = -Kx.

    Example:
        >>> K, X, poles = lqr(np.array([[0., 1.], [0., 0.]]), np.array([[0.], [1.]]),
        ...                   np.eye(2), np.eye(1))
        >>> np.round(K, 4).tolist()
        [[1.0, 1.7321]]
    """
    A, B, Q, R = (np.atleast_2d(np.asarray(M, dtype=float)) for M in (A, B, Q, R))
    n, m = B.shape
    _check_shape("A", A, (n, n))
    _check_shape("Q", Q, (n, n))
    _check_shape("R", R, (m, m))
    X = sla.solve_continuous_are(A, B, Q, R)
    K = np.linalg.solve(R, B.T @ X)
    poles = np.linalg.eigvals(A - B @ K)
    return K, X, poles


def controllability_rank(A: Array, B: Array) -> int:
    """Rank of the controllability matrix [B, AB, ..., A^(n-1) B]."""
    n = A.shape[0]
    blocks = [B]
    for _ in range(n - 1):
        blocks.append(A @ blocks[-1])
    return int(np.linalg.matrix_rank(np.hstack(blocks)))


def tracking_gain(A_r: Array, B: Array, C: Array) -> Array:
    """K2 = -(C A_r^-1 B)^-1: unit DC gain from command c to tracked outputs C x."""
    dc = C @ np.linalg.solve(A_r, B)
    return -np.linalg.inv(dc)


def lyapunov(A_r: Array, R: Array) -> Array:
    """P solving A_r' P + P A_r + R = 0 (symmetric, positive definite for Hurwitz A_r)."""
    P = sla.solve_continuous_lyapunov(A_r.T, -R)
    sym: Array = 0.5 * (P + P.T)
    return sym


def eps_from_limits(P: Array, limits: Array) -> tuple[float, int, Array]:
    """Largest eps whose ellipsoid e'Pe <= eps^2 fits the box |e_i| <= limits_i.

    The support function of the ellipsoid along axis i is eps sqrt((P^-1)_ii),
    so eps = min_i limits_i / sqrt((P^-1)_ii). Returns eps, the binding state
    index and the guaranteed per-state envelope eps sqrt((P^-1)_ii).
    """
    spread = np.sqrt(np.diag(np.linalg.inv(P)))
    ratios = np.asarray(limits, dtype=float) / spread
    i = int(np.argmin(ratios))
    eps = float(ratios[i])
    return eps, i, eps * spread



def _check_shape(name: str, M: Array, shape: tuple[int, int]) -> None:
    if M.shape != shape:
        raise ValueError(f"{name} has shape {M.shape}, expected {shape}")
