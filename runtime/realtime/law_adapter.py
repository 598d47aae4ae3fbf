"""The adaptive law behind four calls (`LawAdapter`), so the tick can swap its implementation."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.design import Design

Array = NDArray[np.float64]


# ------------------------------------------------------------------ the law adapter
class LawAdapter:
    """The adaptive law behind four calls, so the implementation can be swapped.

    ``impl = "fast"`` (the default, ``loop.law``) uses the compiled
    `runtime.kernels.fast.FastLaw` with the config's weight modifiers
    (`runtime.kernels.fast.ModifierSettings.from_config`), compiled (or loaded from
    the cache) here, before the clock starts; ``"reference"`` uses the numpy
    `runtime.method.law.AdaptiveLaw` with the same modifiers (`runtime.method.law.law_from_config`).
    Both see the saturated applied input only through their own clipping (u is
    clipped to the input limits before it is applied and fed back through u_n).
    `step` takes the bound eps_k of this tick (the time-varying bound).

    The fast law's results are views of a buffer it reuses every tick: callers
    copy what they keep.
    """

    def __init__(self, design: Design, impl: str = "fast", cfg: Config | None = None) -> None:
        self.impl = impl
        self.n, self.m = design.rig.n, design.rig.m
        if impl == "fast":
            from runtime.kernels.fast import FastLaw, ModifierSettings

            try:
                mods = (ModifierSettings.from_config(cfg, design) if cfg is not None
                        else None)
                self._fast: Any = FastLaw(design, mods)
            except ValueError as exc:
                raise ConfigError("loop.law", f"the compiled law cannot run this config: {exc}",
                                  'set loop.law = "reference" (the numpy law).') from None
            self._law: Any = None
            # Compile (or load) the kernels now, not on the first engaged tick.
            self._fast.init_state(np.zeros(self.n))
            self._fast.step(np.zeros(self.n), np.zeros(design.K2.shape[1]))
            self._fast.init_state(np.zeros(self.n))
        else:
            from runtime.method.law import AdaptiveLaw, law_from_config

            self._law = law_from_config(cfg, design) if cfg is not None else AdaptiveLaw(design)
            self._fast = None
        self._state: Any = None
        self.out: Any = None

    def engage(self, x: Array) -> None:
        """x_r = x, weights zero, adaptation on."""
        if self._fast is not None:
            self._fast.init_state(x)
        else:
            self._state = self._law.init_state(x)
        self.frozen = False

    @property
    def frozen(self) -> bool:
        """Adaptation held (a fallback is active)."""
        return bool((self._fast or self._law).frozen)

    @frozen.setter
    def frozen(self, value: bool) -> None:
        (self._fast or self._law).frozen = bool(value)

    @property
    def xr(self) -> Array:
        """Reference state (live)."""
        return self._fast.xr if self._fast is not None else self._state.xr

    @property
    def W(self) -> Array:
        """Weights (live)."""
        return self._fast.W if self._fast is not None else self._state.W

    def step(self, x: Array, c: Array, eps: float | None = None) -> Any:
        """One adaptive tick under bound eps (None: the design's constant eps).

        The result has u, u_raw, e, s, ratio, phi_d, eff_rate, step_gain, clamped.
        """
        if self._fast is not None:
            self.out = self._fast.step(x, c, eps)
        else:
            self.out = self._law.step(self._state, x, c, eps)
        return self.out
