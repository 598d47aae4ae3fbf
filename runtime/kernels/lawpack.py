"""Packing a design into the law kernel's flat buffers, and the wrappers that step it.

`pack_law(design, modifiers)` fills ``ic``/``fc``/``st`` (layout in `runtime.kernels.fast`);
`FastLaw` steps `runtime.kernels.lawtick.law_tick` with them and hands back a `FastTick`;
`ModifierSettings` carries the weight modifiers read from the config; `warm_up()` compiles.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runtime.kernels.lawtick import (
    BARRIER_CODES,
    BASIS_OPS,
    F_CAP,
    F_CLAMP,
    F_DEAD_ZONE,
    F_EPS,
    F_EPS_P,
    F_GAMMA_MAX,
    F_LAM_BPB,
    F_MU,
    F_SIGMA0,
    F_TANH_W,
    F_TS,
    FC_HEADER,
    I_AUGMENT,
    I_BARRIER,
    I_FROZEN,
    I_LAW,
    I_LEAK,
    I_M,
    I_N,
    I_NCODE,
    I_NRBF,
    I_NREG,
    I_OADT,
    I_OBDT,
    I_OCODES,
    I_OGAMMA,
    I_OK1T,
    I_OK2T,
    I_OP,
    I_OPB,
    I_ORBFC,
    I_ORBFS,
    I_ORBFW,
    I_OTHETA,
    I_OUMAX,
    I_OUSCALE,
    I_P,
    I_PROJ,
    IC_HEADER,
    LAWS,
    LEAKAGES,
    O_CAPPED,
    O_CLAMPED,
    O_EFF_RATE,
    O_PHI_D,
    O_RATIO,
    O_S,
    O_STEP_GAIN,
    OUT_HEADER,
    law_tick,
    out_size,
)
from runtime.method.design import Design
from runtime.method.law import LawState

Array = NDArray[np.float64]


# ------------------------------------------------------------------ packing
@dataclass(frozen=True)
class ModifierSettings:
    """Weight modifiers of section 2a, as the fast kernel applies them.

    Applied to the weight derivative in this order: leakage, dead zone (no
    adaptation at all while s < dead_zone), projection (column by column).
    After the Euler step a column that overshot ||W[:, j]|| <= theta_max[j]
    (the set Proj keeps invariant in continuous time) is scaled back onto it:
    without that, a large step lands where f >> 1, the projected derivative
    overshoots the other way and the weights diverge (seen in tests).
    """

    leakage: str = "none"
    """"none", "sigma" (sigma-modification) or "e" (e-modification)."""
    sigma0: float = 0.0
    """sigma-modification gain (1/s)."""
    mu: float = 0.0
    """e-modification gain (1)."""
    dead_zone: float = 0.0
    """No adaptation while ||e||_P is below this (||e||_P units); 0 = off."""
    projection: bool = False
    """Project the weight derivative, column by column."""
    theta_max: tuple[float, ...] = ()
    """Projection radius per input column (one value is broadcast)."""
    projection_eps: float = 0.1
    """Width of the projection's transition band (eps_p)."""

    @classmethod
    def from_config(cls, cfg: Any, design: Design) -> ModifierSettings:
        """The settings `[adaptation]` asks for: `leakage`, `sigma0`, `mu`, `dead_zone`,
        `projection`, `theta_max`, `projection_eps` (all optional; absent = off).

        Parsed and checked by `runtime.method.modifiers.modifiers_from_config`, so both
        engines refuse the same configs with the same messages.
        """
        from runtime.method.modifiers import modifiers_from_config

        return cls.from_modifiers(modifiers_from_config(cfg, design), design.rig.m)

    @classmethod
    def from_modifiers(cls, modifiers: Any, m: int) -> ModifierSettings:
        """The settings equivalent to a list of `runtime.method.modifiers` objects.

        Raises ValueError for a modifier the kernel does not know, or for an
        order other than leakage, dead zone, projection.
        """
        from runtime.method.modifiers import DeadZone, EModification, Projection, SigmaModification

        rank = {SigmaModification: 0, EModification: 0, DeadZone: 1, Projection: 2}
        kw: dict[str, Any] = {}
        last = -1
        for mod in modifiers:
            kind = type(mod)
            if kind not in rank or rank[kind] < last or (rank[kind] == 0 and "leakage" in kw):
                raise ValueError(f"the compiled law cannot apply {kind.__name__} here; it knows "
                                 "one leakage, a dead zone and projection, in that order.")
            last = rank[kind]
            if kind is SigmaModification:
                kw.update(leakage="sigma", sigma0=mod.sigma0)
            elif kind is EModification:
                kw.update(leakage="e", mu=mod.mu)
            elif kind is DeadZone:
                kw.update(dead_zone=mod.threshold)
            else:
                theta = np.broadcast_to(np.asarray(mod.theta_max, dtype=float), (m,))
                kw.update(projection=True, theta_max=tuple(theta.tolist()),
                          projection_eps=mod.eps_p)
        return cls(**kw)


def pack_law(design: Design, modifiers: ModifierSettings | None = None,
             ) -> tuple[NDArray[np.int64], Array]:
    """The (ic, fc) buffers the kernels read for this design and modifier settings."""
    d = design
    mods = modifiers or ModifierSettings()
    n, m = d.rig.n, d.rig.m
    p = d.K2.shape[1]
    basis = d.basis
    codes = list(basis.codes)
    centres = getattr(basis, "rbf_centres", None)
    widths = getattr(basis, "rbf_widths", None)
    rbf_scale = getattr(basis, "rbf_scale", None)
    if centres is None or widths is None:
        centres = widths = None
    scale = np.ones(n) if rbf_scale is None else np.asarray(rbf_scale, dtype=float)
    n_rbf = 0 if centres is None else int(np.asarray(centres).shape[0])
    if len(codes) + n_rbf != basis.size:
        raise ValueError(
            f"the basis has {basis.size} terms but {len(codes)} op codes and {n_rbf} radial "
            "terms; the compiled path needs a code for every term (use engine='reference')."
        )
    if d.barrier not in BARRIER_CODES:
        raise ValueError(f"barrier {d.barrier!r} has no compiled form; "
                         f"the fast path knows {', '.join(BARRIER_CODES)}.")
    if mods.leakage not in LEAKAGES:
        raise ValueError(f"leakage {mods.leakage!r}: choose one of {', '.join(LEAKAGES)}.")
    n_reg = d.n_regressors
    gamma = np.broadcast_to(np.asarray(d.gamma, dtype=float), (n_reg,))
    theta = np.ones(m)
    if mods.projection:
        theta = np.broadcast_to(np.asarray(mods.theta_max, dtype=float), (m,)).astype(float)

    blocks: list[Array] = []
    offsets: list[int] = []
    pos = FC_HEADER
    for M in (d.P, d.PB, d.K1.T, d.K2.T, d.A_d.T, d.B_d.T, gamma,
              np.asarray(d.rig.input_limits, dtype=float), theta,
              np.zeros((0,)) if centres is None else np.asarray(centres, dtype=float),
              np.zeros((0,)) if widths is None else np.asarray(widths, dtype=float),
              scale, np.asarray(d.regressor_scale, dtype=float)):
        flat = np.ascontiguousarray(M, dtype=float).ravel()
        offsets.append(pos)
        blocks.append(flat)
        pos += flat.size
    head = np.zeros(FC_HEADER)
    head[F_TS] = d.Ts
    head[F_GAMMA_MAX] = float(np.max(d.gamma))
    head[F_CLAMP] = d.clamp_margin
    head[F_LAM_BPB] = d.lam_max_BPB
    head[F_CAP] = d.step_gain_cap
    head[F_SIGMA0] = mods.sigma0
    head[F_MU] = mods.mu
    head[F_DEAD_ZONE] = mods.dead_zone
    head[F_EPS_P] = mods.projection_eps
    head[F_TANH_W] = basis.tanh_width
    head[F_EPS] = d.eps
    fc = np.concatenate([head, *blocks])

    ic = np.zeros(IC_HEADER + 3 * len(codes), dtype=np.int64)
    ic[I_N], ic[I_M], ic[I_P] = n, m, p
    ic[I_NCODE], ic[I_NRBF], ic[I_NREG] = len(codes), n_rbf, n_reg
    ic[I_LAW] = LAWS.index(d.law)
    ic[I_BARRIER] = BARRIER_CODES.index(d.barrier)
    ic[I_AUGMENT] = int(d.augment)
    ic[I_LEAK] = LEAKAGES.index(mods.leakage)
    ic[I_PROJ] = int(mods.projection)
    ic[I_FROZEN] = 0
    (ic[I_OP], ic[I_OPB], ic[I_OK1T], ic[I_OK2T], ic[I_OADT], ic[I_OBDT], ic[I_OGAMMA],
     ic[I_OUMAX], ic[I_OTHETA], ic[I_ORBFC], ic[I_ORBFW], ic[I_ORBFS], ic[I_OUSCALE]) = offsets
    ic[I_OCODES] = IC_HEADER
    for k, (op, i, j) in enumerate(codes):
        ic[IC_HEADER + 3 * k: IC_HEADER + 3 * k + 3] = (BASIS_OPS.index(op), i, j)
    return ic, fc


# ------------------------------------------------------------------ the wrapper
class FastTick:
    """One tick's results: live views of the law's output buffer (overwritten next tick).

    Same fields as `runtime.method.law.TickOut`; vectors are array views, scalars floats.
    """

    __slots__ = ("_out", "u", "u_raw", "u_n", "e", "sigma_bar")

    def __init__(self, out: Array, n: int, m: int, n_reg: int) -> None:
        self._out = out
        o = OUT_HEADER
        self.u = out[o:o + m]
        self.u_raw = out[o + m:o + 2 * m]
        self.u_n = out[o + 2 * m:o + 3 * m]
        self.e = out[o + 3 * m:o + 3 * m + n]
        self.sigma_bar = out[o + 3 * m + n:o + 3 * m + n + n_reg]

    @property
    def s(self) -> float:
        """||e||_P."""
        return float(self._out[O_S])

    @property
    def ratio(self) -> float:
        """Margin ratio ||e||_P / eps."""
        return float(self._out[O_RATIO])

    @property
    def phi_d(self) -> float:
        """Barrier factor used this tick (1 for the standard law)."""
        return float(self._out[O_PHI_D])

    @property
    def eff_rate(self) -> float:
        """Effective learning rate gamma_max * phi_d after the cap."""
        return float(self._out[O_EFF_RATE])

    @property
    def step_gain(self) -> float:
        """Per-step adaptation gain before the cap."""
        return float(self._out[O_STEP_GAIN])

    @property
    def clamped(self) -> bool:
        """True when the phi_d clamp engaged."""
        return bool(self._out[O_CLAMPED])

    @property
    def capped(self) -> bool:
        """True when the step-gain cap limited the update."""
        return bool(self._out[O_CAPPED])


class FastLaw:
    """The compiled law for one plant: same tick as `AdaptiveLaw.step`, no allocation.

    Example:
        >>> law = FastLaw(design)                    # doctest: +SKIP
        >>> law.init_state(y0)                       # doctest: +SKIP
        >>> out = law.step(y, c); out.u, out.ratio   # doctest: +SKIP
    """

    def __init__(self, design: Design, modifiers: ModifierSettings | None = None) -> None:
        self.design = design
        self.modifiers = modifiers or ModifierSettings()
        self.ic, self.fc = pack_law(design, self.modifiers)
        self.n, self.m = design.rig.n, design.rig.m
        self.n_reg = design.n_regressors
        self.eps = design.eps
        self.st = np.zeros(self.n + self.n_reg * self.m)
        self.out = np.zeros(out_size(self.n, self.m, self.n_reg))
        self.tick = FastTick(self.out, self.n, self.m, self.n_reg)
        self._x = np.zeros(self.n)
        self._c = np.zeros(design.K2.shape[1])

    @property
    def xr(self) -> Array:
        """Reference-model state (view of the live state)."""
        return self.st[:self.n]

    @property
    def W(self) -> Array:
        """Weight estimate (N_bar, m) (view of the live state)."""
        return self.st[self.n:].reshape(self.n_reg, self.m)

    @property
    def frozen(self) -> bool:
        """When True the weights are held (a fallback is active)."""
        return bool(self.ic[I_FROZEN])

    @frozen.setter
    def frozen(self, value: bool) -> None:
        self.ic[I_FROZEN] = int(bool(value))

    def init_state(self, x0: ArrayLike, W0: ArrayLike | None = None) -> LawState:
        """Engage: x_r = x0, weights zero (or W0); returns views of the live state."""
        self.st[:self.n] = np.asarray(x0, dtype=float).reshape(self.n)
        self.st[self.n:] = 0.0 if W0 is None else np.asarray(W0, dtype=float).ravel()
        return LawState(xr=self.xr, W=self.W)

    def step(self, x: ArrayLike, c: ArrayLike, eps: float | None = None) -> FastTick:
        """One tick; returns the live `FastTick` (copy what you keep)."""
        xa = x if type(x) is np.ndarray and x.dtype == np.float64 else np.asarray(x, float)
        ca = c if type(c) is np.ndarray and c.dtype == np.float64 else np.asarray(c, float)
        law_tick(xa, ca, self.eps if eps is None else float(eps), self.ic, self.fc,
                 self.st, self.out)
        return self.tick


def warm_up() -> float:
    """Compile (or load from the cache) every kernel on a tiny problem; returns seconds."""
    import time

    t0 = time.perf_counter()
    n, m, nreg = 1, 1, 1
    ic = np.zeros(IC_HEADER + 3, dtype=np.int64)
    ic[I_N] = ic[I_M] = ic[I_P] = 1
    ic[I_NCODE] = ic[I_NREG] = 1
    fc = np.ones(FC_HEADER + 16)
    for k, idx in enumerate((I_OP, I_OPB, I_OK1T, I_OK2T, I_OADT, I_OBDT, I_OGAMMA,
                             I_OUMAX, I_OTHETA, I_ORBFC, I_ORBFW, I_ORBFS, I_OUSCALE)):
        ic[idx] = FC_HEADER + k
    ic[I_OCODES] = IC_HEADER
    st = np.zeros(n + nreg * m)
    out = np.zeros(out_size(n, m, nreg))
    law_tick(np.zeros(1), np.zeros(1), 1.0, ic, fc, st, out)
    return time.perf_counter() - t0
