"""Barrier Lyapunov functions for the set-theoretic update law.

A barrier family maps the weighted error norm s = ||e||_P on [0, eps) to
phi(s) >= 0 with phi(0) = 0 and phi -> infinity as s -> eps, and supplies
phi_d(s) = d phi / d(s^2) > 0, the factor that scales the update law.

What lives here: the families (pure numpy, broadcasting over any shape) and
the clamp used by the sampled law. What does not: the law itself
(`runtime.method.law`) and the watchdog that trips when the clamp engages.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray


class BarrierFamily(Protocol):
    """A pluggable barrier: phi, phi_d = d phi / d(s^2), and its domain check."""

    @property
    def name(self) -> str:
        """The family's name in configs (`adaptation.barrier`)."""
        ...

    def phi(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        """Barrier value at weighted error norm s for bound eps."""
        ...

    def phi_d(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        """d phi / d(s^2): the update-law scale factor."""
        ...

    def valid(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.bool_]:
        """True where s lies inside the barrier's domain 0 <= s < eps."""
        ...


@dataclass(frozen=True)
class RationalBarrier:
    """phi(s) = s^2 / (eps - s), the published example family.

    phi_d(s) = (2 eps - s) / (2 (eps - s)^2): positive, 1/eps at s = 0, and
    unbounded as s -> eps.
    """

    name: str = "rational"

    def phi(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        s = np.asarray(s, dtype=float)
        out: NDArray[np.float64] = s * s / (np.asarray(eps, dtype=float) - s)
        return out

    def phi_d(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        s = np.asarray(s, dtype=float)
        e = np.asarray(eps, dtype=float)
        gap = e - s
        out: NDArray[np.float64] = (2.0 * e - s) / (2.0 * gap * gap)
        return out

    def valid(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.bool_]:
        s = np.asarray(s, dtype=float)
        return (s >= 0.0) & (s < eps)


@dataclass(frozen=True)
class LogBarrier:
    """phi(s) = -eps log(1 - s^2 / eps^2), a milder second family.

    phi_d(s) = eps / (eps^2 - s^2): 1/eps at s = 0 like the rational family,
    unbounded at eps, but growing more slowly near the bound. It exists so the
    law is demonstrably pluggable.
    """

    name: str = "log"

    def phi(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        s = np.asarray(s, dtype=float)
        eps = np.asarray(eps, dtype=float)
        out: NDArray[np.float64] = -eps * np.log1p(-(s / eps) ** 2)
        return out

    def phi_d(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.float64]:
        s = np.asarray(s, dtype=float)
        eps = np.asarray(eps, dtype=float)
        out: NDArray[np.float64] = eps / (eps * eps - s * s)
        return out

    def valid(self, s: ArrayLike, eps: ArrayLike) -> NDArray[np.bool_]:
        s = np.asarray(s, dtype=float)
        return (s >= 0.0) & (s < eps)


BARRIERS: dict[str, BarrierFamily] = {
    "rational": RationalBarrier(),
    "log": LogBarrier(),
}


def get_barrier(name: str) -> BarrierFamily:
    """Look up a barrier family by its config name."""
    try:
        return BARRIERS[name]
    except KeyError:
        raise KeyError(
            f"unknown barrier {name!r}; choose one of {', '.join(sorted(BARRIERS))}"
        ) from None


def clamped_phi_d(
    barrier: BarrierFamily, s: ArrayLike, eps: ArrayLike, clamp_margin: float
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """phi_d evaluated at min(s, (1 - clamp_margin) eps), and where the clamp engaged.

    The sampled law must never evaluate phi_d at s >= eps (it stays positive
    past the bound and would fail silently); the clamp keeps the value finite
    and the flag tells the watchdog to trip.
    """
    s = np.asarray(s, dtype=float)
    eps = np.asarray(eps, dtype=float)
    s_max = (1.0 - clamp_margin) * eps
    engaged = ~(s <= s_max)  # NaN counts as engaged
    s_eval = np.where(engaged, s_max, s)
    return barrier.phi_d(s_eval, eps), engaged
