"""The zero-order hold and the sampled-data closed form of the semi-implicit tick.

`zoh` (exact discretisation), `SAMPLED_LIMIT` and `sampled_spectral_radius` (the
one-tick error map; docs/sampled-data.md). What does not live here: the design that
applies them to a config (`runtime.method.design`).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
from numpy.typing import NDArray

Array = NDArray[np.float64]


def zoh(A: Array, B: Array, T: float) -> tuple[Array, Array]:
    """Exact zero-order-hold discretisation via the block matrix exponential.

    expm([[A, B], [0, 0]] T) = [[A_d, B_d], [0, I]].
    """
    n, m = B.shape
    M = np.zeros((n + m, n + m))
    M[:n, :n] = A
    M[:n, n:] = B
    E = sla.expm(M * T)
    return E[:n, :n], E[:n, n:]


SAMPLED_LIMIT = 4.0
"""Limit of Ts^2 gamma phi_d ||sigma_bar||^2 lambda_max(Lambda B'PB) for the semi-implicit tick
(symplectic Euler on the adaptive loop's oscillation; docs/sampled-data.md)."""


def sampled_spectral_radius(Phi: Array, Gam: Array, K1: Array, PB: Array, kappa: float,
                            Lam: Array | None = None) -> float:
    """Spectral radius of the one-tick error map of the semi-implicit sampled law.

    With the regressor frozen over a tick, v = W_tilde' sigma_bar and
    kappa = Ts gamma phi_d ||sigma_bar||^2, one tick (update the weights with e_k,
    u_k from the new weights, plant input held: x+ = Phi x + Gam Lam u) maps (e, v) as

        v+ = v + kappa (PB)' e
        e+ = (Phi - Gam K1) e - Gam Lam v+

    Below 1 the sampled loop is stable near e = 0; at or above 1 it is not. The
    uncertainty itself (W*' sigma, the ZOH mismatch of the reference model) enters
    this map as an input, so a radius below 1 says nothing on how far e goes.
    """
    n, m = Gam.shape
    L = np.eye(m) if Lam is None else np.asarray(Lam, dtype=float)
    GL = Gam @ L
    top = np.hstack((Phi - Gam @ K1 - kappa * GL @ PB.T, -GL))
    bottom = np.hstack((kappa * PB.T, np.eye(m)))
    return float(np.max(np.abs(np.linalg.eigvals(np.vstack((top, bottom))))))
