"""The adaptive law behind four calls (`LawAdapter`), so the tick can swap its implementation."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.design import Design

if TYPE_CHECKING:  # the implementations are imported where the chosen one is built
    from runtime.kernels.lawpack import FastLaw, FastTick
    from runtime.method.law import AdaptiveLaw, LawState, TickOut

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
        self._fast: FastLaw | None = None
        self._law: AdaptiveLaw | None = None
        if impl == "fast":
            # Deferred: numba and the compiled kernels load only when this law is chosen.
            from runtime.kernels.fast import FastLaw, ModifierSettings

            try:
                mods = (ModifierSettings.from_config(cfg, design) if cfg is not None
                        else None)
                fast = FastLaw(design, mods)
            except ValueError as exc:
                raise ConfigError("loop.law", f"the compiled law cannot run this config: {exc}",
                                  'set loop.law = "reference" (the numpy law).') from None
            # Compile (or load) the kernels now, not on the first engaged tick.
            fast.init_state(np.zeros(self.n))
            fast.step(np.zeros(self.n), np.zeros(design.K2.shape[1]))
            fast.init_state(np.zeros(self.n))
            self._fast = fast
        else:
            from runtime.method.law import AdaptiveLaw, law_from_config

            self._law = law_from_config(cfg, design) if cfg is not None else AdaptiveLaw(design)
        self._state: LawState | None = None
        self.out: FastTick | TickOut | None = None

    def _reference(self) -> tuple[AdaptiveLaw, LawState]:
        """The numpy law and its state (the reference implementation, engaged)."""
        if self._law is None or self._state is None:
            raise RuntimeError("the reference law has not been engaged")
        return self._law, self._state

    def engage(self, x: Array) -> None:
        """x_r = x, weights zero, adaptation on."""
        if self._fast is not None:
            self._fast.init_state(x)
        elif self._law is not None:
            self._state = self._law.init_state(x)
        self.frozen = False

    @property
    def frozen(self) -> bool:
        """Adaptation held (a fallback is active)."""
        impl = self._fast or self._law
        return bool(impl is not None and impl.frozen)

    @frozen.setter
    def frozen(self, value: bool) -> None:
        impl = self._fast or self._law
        if impl is not None:
            impl.frozen = bool(value)

    @property
    def xr(self) -> Array:
        """Reference state (live)."""
        if self._fast is not None:
            return self._fast.xr
        return self._reference()[1].xr

    @property
    def W(self) -> Array:
        """Weights (live)."""
        if self._fast is not None:
            return self._fast.W
        return self._reference()[1].W

    def step(self, x: Array, c: Array, eps: float | None = None) -> FastTick | TickOut:
        """One adaptive tick under bound eps (None: the design's constant eps).

        The result has u, u_raw, e, s, ratio, phi_d, eff_rate, step_gain, clamped.
        """
        out: FastTick | TickOut
        if self._fast is not None:
            out = self._fast.step(x, c, eps)
        else:
            law, state = self._reference()
            out = law.step(state, x, c, eps)
        self.out = out
        return out
