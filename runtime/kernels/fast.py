"""The compiled fast path: the law tick, the pedestal and the dry-run loop for ONE plant.

Why numba: the numpy reference (`runtime.method.law.AdaptiveLaw`, `sim_rigs.pedestal`)
is written for batches, and for one plant its cost is almost all call
overhead: a 30 s dry run at 1 kHz took ~11 s wall (~370 us a tick). Compiled
loops over the same formulas, measured on a shared 2-core VM: law tick median
~1.1 us (N_bar = 8) and ~1.4 us (N_bar = 50) through `FastLaw.step`, against
~27 and ~54 us for `AdaptiveLaw.step` on one plant (`bench/bench_law.py`);
the recorded demo dry run at 230-770x real time, against ~1-3x for the numpy
engine (`bench/bench_dryrun.py`). Cost: ~3-5 s of compilation on a cold
cache (more on a loaded machine), ~0.2-0.6 s to load from the cache. The
numpy reference stays the source of truth: `tests/test_fast.py` checks these
kernels against it tick by tick.

Layout. To keep the per-call dispatch cost low, a law carries four flat
buffers instead of dozens of arguments:

- ``ic`` (int64): sizes, switches and offsets (the ``I_*`` indices), then the
  basis op codes as (op, i, j) triples;
- ``fc`` (float64): scalar settings (the ``F_*`` indices), then the matrices
  P, PB, K1', K2', A_d', B_d', gamma, u_max, theta_max, the radial-basis
  centres, widths and scale, and the input regressor scale, each row-major at
  the offset stored in ``ic``;
- ``st`` (float64): the law state, x_r (n) then W (N_bar x m, row-major);
- ``out`` (float64): the tick's results (the ``O_*`` scalars, then u, u_raw,
  u_n, e, sigma_bar and scratch).

The kernels allocate nothing per tick. Compilation happens on first use and
is cached on disk (``cache=True``).

Where the parts live: the codes, the basis evaluator and `law_tick` in
`runtime.kernels.lawtick`; packing (`pack_law`, `ModifierSettings`) and the wrappers
(`FastLaw`, `FastTick`, `warm_up`) in `runtime.kernels.lawpack`; here, the loop templates
compiled per rig (`runtime.kernels.rigloops`) and the batch sweep kernel's pieces. Every
name above is still importable from here.

What does not live here: the batched reference (`runtime.method.law`), the plant's
physics documentation (`sim_rigs.pedestal`), the dry-run bookkeeping
(`runtime.offline.dryrun`).
"""

from __future__ import annotations

import math
from typing import Any

import numba
import numpy as np
from numpy.typing import NDArray

from runtime.guard.watchdog import over
from runtime.kernels.lawpack import (
    FastLaw,
    FastTick,
    ModifierSettings,
    pack_law,
    warm_up,
)
from runtime.kernels.lawtick import (  # re-exported: the templates and callers use them
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
    OP_ABS,
    OP_BIAS,
    OP_COS,
    OP_MUL,
    OP_SIN,
    OP_TANH,
    OP_X,
    OUT_HEADER,
    basis_eval,
    law_tick,
    out_size,
)
from sim_rigs.kernel import LANES, plant_measure, work_width  # noqa: F401 - templates

_over = numba.njit(cache=True, inline="always")(over)
"""The watchdog's one rule comparison, compiled for the sweep kernel."""

Array = NDArray[np.float64]


#: Moved to `runtime.kernels.lawtick` and `runtime.kernels.lawpack`; still importable from here.
__all__ = [
    'BARRIER_CODES', 'basis_eval', 'BASIS_OPS', 'F_CAP', 'F_CLAMP', 'F_DEAD_ZONE', 'F_EPS',
    'F_EPS_P', 'F_GAMMA_MAX', 'F_LAM_BPB', 'F_MU', 'F_SIGMA0', 'F_TANH_W', 'F_TS', 'FastLaw',
    'FastTick', 'FC_HEADER', 'I_AUGMENT', 'I_BARRIER', 'I_FROZEN', 'I_LAW', 'I_LEAK', 'I_M',
    'I_N', 'I_NCODE', 'I_NRBF', 'I_NREG', 'I_OADT', 'I_OBDT', 'I_OCODES', 'I_OGAMMA', 'I_OK1T',
    'I_OK2T', 'I_OP', 'I_OPB', 'I_ORBFC', 'I_ORBFS', 'I_ORBFW', 'I_OTHETA', 'I_OUMAX',
    'I_OUSCALE', 'I_P', 'I_PROJ', 'IC_HEADER', 'law_tick', 'LAWS', 'LEAKAGES',
    'ModifierSettings', 'O_CAPPED', 'O_CLAMPED', 'O_EFF_RATE', 'O_PHI_D', 'O_RATIO', 'O_S',
    'O_STEP_GAIN', 'OP_ABS', 'OP_BIAS', 'OP_COS', 'OP_MUL', 'OP_SIN', 'OP_TANH', 'OP_X',
    'OUT_HEADER', 'out_size', 'pack_law', 'warm_up',
]

# ------------------------------------------------------------------ the loop templates
# `dry_run_loop` and `sweep_kernel` below are templates, not compiled here: each rig gets
# its own straight-line `plant_step` generated from its term table, and these two are
# compiled against it in the rig's generated module (`runtime.kernels.rigloops.compiled`,
# which adds the numba decorators). Call them from there.
def plant_step(x: Array, u: Array, code: Any, mat: Array, prm: Array, limits: Array,
               dt: float, substeps: int, lsc: Array, dist: Array,
               work: Array) -> None:  # pragma: no cover - placeholder
    """Placeholder for the rig's generated step (see `sim_rigs.kernel.step_source`)."""
    raise RuntimeError("use sim_rigs.kernel.compiled(spec).plant_step")


def plant_step_lanes(X: Array, U: Array, K: Array, limits: Array, dt: float,
                     substeps: int) -> None:  # pragma: no cover - placeholder
    """Placeholder for the rig's generated lane step (see `sim_rigs.kernel.step_source`)."""
    raise RuntimeError("use sim_rigs.kernel.compiled(spec).plant_step_lanes")


def plant_setup_lanes(P: Array, lanes: Any, K: Array) -> None:  # pragma: no cover
    """Placeholder for the rig's generated lane constants (`sim_rigs.kernel.setup_source`)."""
    raise RuntimeError("use sim_rigs.kernel.compiled(spec).plant_setup_lanes")


N_KONST = 1
"""Placeholder: the number of per-plant constants of the rig's generated lane step."""


def dry_run_loop(k0: int, k1: int, cmd: Array, eps_t: Array, dist: Array, lsc: Array,
                 xp: Array, pcode: Any, pmat: Array, prm: Array, limits: Array, substeps: int,
                 noise: Array, resolution: Array, delay: int, meas: Array, ic: Any, fc: Array,
                 st: Array, out: Array, work: Array, rec_x: Array, rec_y: Array,
                 rec_e: Array, rec_s: Array, rec_ratio: Array, rec_phi_d: Array,
                 rec_eff: Array, rec_gain: Array, rec_u: Array, rec_uraw: Array,
                 rec_wnorm: Array, rec_clamped: Array) -> None:  # pragma: no cover - jit
    """Ticks k0..k1-1 of the closed loop: law tick on the measurement, record, plant step.

    `meas[j]` is the j-th raw sensor reading (meas[0] taken before tick 0);
    the law sees meas[max(0, k - delay)] at tick k. `xp` is the true plant
    state, advanced in place by `sim_rigs.kernel.plant_step` (the rig coded as
    pcode, pmat, its parameters prm); readings by `sim_rigs.kernel.plant_measure`.
    """
    n = ic[I_N]
    m = ic[I_M]
    nreg = ic[I_NREG]
    dt = fc[F_TS]
    o_u = OUT_HEADER
    o_uraw = o_u + m
    o_e = o_uraw + 2 * m
    for k in range(k0, k1):
        y = meas[k - delay] if k >= delay else meas[0]
        law_tick(y, cmd[k], eps_t[k], ic, fc, st, out)
        for i in range(n):
            rec_x[k, i] = xp[i]
            rec_y[k, i] = y[i]
            rec_e[k, i] = out[o_e + i]
        rec_s[k] = out[O_S]
        rec_ratio[k] = out[O_RATIO]
        rec_phi_d[k] = out[O_PHI_D]
        rec_eff[k] = out[O_EFF_RATE]
        rec_gain[k] = out[O_STEP_GAIN]
        rec_clamped[k] = out[O_CLAMPED]
        for j in range(m):
            rec_u[k, j] = out[o_u + j]
            rec_uraw[k, j] = out[o_uraw + j]
        w2 = 0.0
        for i in range(n, n + nreg * m):
            w2 += st[i] * st[i]
        rec_wnorm[k] = math.sqrt(w2)
        plant_step(xp, out[o_u:o_u + m], pcode, pmat, prm, limits, dt, substeps, lsc[k],
                   dist[k], work)
        plant_measure(xp, resolution, noise[k + 1], meas[k + 1])


# ------------------------------------------------------------------ the batch sweep kernel
# Specialised for the pedestal (n = 4 states, m = 2 inputs, p = 2 commands): fixed-size loops
# the compiler unrolls, the plant's state in registers, and the elevation trigonometry inside
# a tick by the angle-addition formula. `tests/test_fast.py` checks each piece against the
# general kernels above (`law_tick`, `pedestal_step`), which stay the single source of truth.
SWEEP_RULES = ("margin", "clamp", "nonfinite", "saturation", "breach", "diverged", "weights")
"""Columns of the sweep kernel's `first` output: first tick of each rule per plant."""
(R_MARGIN, R_CLAMP, R_NONFINITE, R_SATURATION, R_BREACH, R_DIVERGED, R_WEIGHTS) = range(7)
DIVERGENCE_EVERY = 64
"""The sweep checks the true state for divergence after ticks 63, 127, ... and the last."""
NOISE_OFF, NOISE_STREAM, NOISE_GIVEN = 0, 1, 2
"""Sensor noise of the sweep kernel: none, each plant's own stream, or pre-drawn."""

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = np.uint64(30), np.uint64(27), np.uint64(31), np.uint64(11)


def sweep_law_fits(ic: NDArray[np.int64]) -> bool:
    """True when `law_tick_pedestal` computes this law (4 states, 2 inputs, 2 commands,
    no weight modifiers, not frozen); otherwise the sweep kernel calls `law_tick`."""
    return bool(ic[I_N] == 4 and ic[I_M] == 2 and ic[I_P] == 2 and ic[I_LEAK] == 0
                and ic[I_PROJ] == 0 and ic[I_FROZEN] == 0)


@numba.njit(cache=True)
def law_tick_pedestal(x: Array, c: Array, eps: float, ic: Any, fc: Array, st: Array,
                      out: Array) -> None:  # pragma: no cover - jit
    """`law_tick` for n = 4, m = 2, p = 2 without modifiers (same buffers, same results).

    The dead zone is still honoured (it needs no state). Checked against `law_tick`
    in tests/test_fast.py.
    """
    nreg = ic[I_NREG]
    oP = ic[I_OP]
    oPB = ic[I_OPB]
    oK1 = ic[I_OK1T]
    oK2 = ic[I_OK2T]
    oAd = ic[I_OADT]
    oBd = ic[I_OBDT]
    oG = ic[I_OGAMMA]
    oU = ic[I_OUMAX]
    o_u = OUT_HEADER
    o_uraw = o_u + 2
    o_un = o_uraw + 2
    o_e = o_un + 2
    o_sig = o_e + 4
    e0 = x[0] - st[0]
    e1 = x[1] - st[1]
    e2 = x[2] - st[2]
    e3 = x[3] - st[3]
    out[o_e] = e0
    out[o_e + 1] = e1
    out[o_e + 2] = e2
    out[o_e + 3] = e3
    q = 0.0
    for i in range(4):
        r = oP + 4 * i
        acc = fc[r] * e0 + fc[r + 1] * e1 + fc[r + 2] * e2 + fc[r + 3] * e3
        q += out[o_e + i] * acc
    if q < 0.0:
        q = 0.0
    s = math.sqrt(q)
    if ic[I_LAW] == 1:
        s_max = (1.0 - fc[F_CLAMP]) * eps
        clamped = not (s <= s_max)
        se = s_max if clamped else s
        if ic[I_BARRIER] == 0:
            gap = eps - se
            phi_d = (2.0 * eps - se) / (2.0 * gap * gap)
        else:
            phi_d = eps / (eps * eps - se * se)
    else:
        phi_d = 1.0
        clamped = not (s < eps)
    un0 = (c[0] * fc[oK2] + c[1] * fc[oK2 + 2]) - (
        x[0] * fc[oK1] + x[1] * fc[oK1 + 2] + x[2] * fc[oK1 + 4] + x[3] * fc[oK1 + 6])
    un1 = (c[0] * fc[oK2 + 1] + c[1] * fc[oK2 + 3]) - (
        x[0] * fc[oK1 + 1] + x[1] * fc[oK1 + 3] + x[2] * fc[oK1 + 5] + x[3] * fc[oK1 + 7])
    out[o_un] = un0
    out[o_un + 1] = un1
    basis_eval(x, ic, fc, out[o_sig:])
    nb = ic[I_NCODE] + ic[I_NRBF]
    if ic[I_AUGMENT] == 1:
        oS = ic[I_OUSCALE]
        out[o_sig + nb] = un0 / fc[oS]
        out[o_sig + nb + 1] = un1 / fc[oS + 1]
    sig_sq = 0.0
    for i in range(nreg):
        sig_sq += out[o_sig + i] * out[o_sig + i]
    g = fc[F_TS] * fc[F_GAMMA_MAX] * phi_d * sig_sq * fc[F_LAM_BPB]
    cap = fc[F_CAP]
    capped = g > cap
    scale = cap / (g if g > 1e-300 else 1e-300) if capped else 1.0
    rate = phi_d * scale
    ts = fc[F_TS]
    if not (fc[F_DEAD_ZONE] > 0.0 and s < fc[F_DEAD_ZONE]):
        p0 = e0 * fc[oPB] + e1 * fc[oPB + 2] + e2 * fc[oPB + 4] + e3 * fc[oPB + 6]
        p1 = e0 * fc[oPB + 1] + e1 * fc[oPB + 3] + e2 * fc[oPB + 5] + e3 * fc[oPB + 7]
        for i in range(nreg):
            a = fc[oG + i] * (rate * out[o_sig + i])
            st[4 + 2 * i] += ts * (a * p0)
            st[5 + 2 * i] += ts * (a * p1)
    a0 = 0.0
    a1 = 0.0
    for i in range(nreg):
        a0 += st[4 + 2 * i] * out[o_sig + i]
        a1 += st[5 + 2 * i] * out[o_sig + i]
    u0 = un0 - a0
    u1 = un1 - a1
    out[o_uraw] = u0
    out[o_uraw + 1] = u1
    lim = fc[oU]
    out[o_u] = lim if u0 > lim else (-lim if u0 < -lim else u0)
    lim = fc[oU + 1]
    out[o_u + 1] = lim if u1 > lim else (-lim if u1 < -lim else u1)
    r0 = st[0]
    r1 = st[1]
    r2 = st[2]
    r3 = st[3]
    for j in range(4):
        st[j] = (r0 * fc[oAd + j] + r1 * fc[oAd + 4 + j] + r2 * fc[oAd + 8 + j]
                 + r3 * fc[oAd + 12 + j]) + (c[0] * fc[oBd + j] + c[1] * fc[oBd + 4 + j])
    out[O_S] = s
    out[O_RATIO] = s / eps
    out[O_PHI_D] = phi_d
    out[O_EFF_RATE] = fc[F_GAMMA_MAX] * rate
    out[O_STEP_GAIN] = g
    out[O_CLAMPED] = 1.0 if clamped else 0.0
    out[O_CAPPED] = 1.0 if capped else 0.0


@numba.njit(cache=True, inline="always")
def _mix64(z: np.uint64) -> np.uint64:  # pragma: no cover - jit
    """The splitmix64 output function (Steele, Lea and Flood, OOPSLA 2014)."""
    z = (z ^ (z >> _S30)) * _MIX1
    z = (z ^ (z >> _S27)) * _MIX2
    return z ^ (z >> _S31)


@numba.njit(cache=True)
def stream_key(seed: int, plant: int) -> np.uint64:  # pragma: no cover - jit
    """The starting state of plant `plant`'s noise stream under `seed`."""
    return _mix64(_mix64(np.uint64(seed) * _GOLDEN + _GOLDEN) ^ np.uint64(plant))


@numba.njit(cache=True)
def stream_normals(state: Array, out: Array) -> None:  # pragma: no cover - jit
    """Fill `out` with standard normal draws from the splitmix64 stream at state[0].

    `state` is a one-element uint64 array, advanced in place. Normals by the
    Marsaglia polar method (Marsaglia and Bray, SIAM Review 1964) on 53-bit
    uniforms; `out` must have even length.
    """
    s = state[0]
    scale = 1.0 / 9007199254740992.0  # 2^-53
    for k in range(0, out.shape[0], 2):
        while True:
            s = s + _GOLDEN
            a = 2.0 * (float(_mix64(s) >> _S11) * scale) - 1.0
            s = s + _GOLDEN
            b = 2.0 * (float(_mix64(s) >> _S11) * scale) - 1.0
            r = a * a + b * b
            if r < 1.0 and r > 0.0:
                break
        f = math.sqrt(-2.0 * math.log(r) / r)
        out[k] = a * f
        out[k + 1] = b * f
    state[0] = s


def sweep_kernel(cmd: Array, eps_t: Array, x0: Array, pcode: Any, pmat: Array, prm: Array,
                 plant_ids: Any, seed: int, substeps: int, limits: Array, resolution: Array,
                 noise_sd: Array, delay: int, latency: int, noise_mode: int, given: Array,
                 ic: Any, fc: Array, special: bool, levels: Array, sat_ticks: float,
                 bound: Array, w_limit: float, first: Any,
                 max_ratio: Array) -> None:  # pragma: no cover - jit
    """N plants x T ticks of the closed loop, each plant on its own.

    prange over groups of `sim_rigs.kernel.LANES` plants (a short last group repeats its
    last plant and discards the copies), stepped together by the rig's generated
    `plant_step_lanes` (no faults). Per plant b: its parameters prm[b], start x0, law
    state x_r = first reading, W = 0; each tick the law (`law_tick_pedestal` when
    `special`, else `law_tick`) on the reading `delay` ticks old, the saturated input
    applied `latency` ticks late, then the next reading (`plant_measure`). Noise:
    `noise_mode` NOISE_OFF, NOISE_STREAM (plant_ids[b]'s own splitmix64 stream under
    `seed`, one normal per noisy channel a reading, in channel order, drawn in pairs) or
    NOISE_GIVEN (`given[b, reading, :]`, standard normals of the noisy channels). Nothing
    is recorded per tick: `first[b, SWEEP_RULES]` gets the first tick each rule fired
    (-1: never; levels = margin, clamp, breach ratios, compared as
    `runtime.guard.watchdog.RULE_BOOK` says; saturation: a raw input beyond its limit for
    `sat_ticks` ticks in a row, the live rule's on-delay; diverged: |x_i| > bound_i or
    non-finite after ticks 63, 127, ... and the last; weights: the weight norm non-finite
    or beyond `w_limit` at the same ticks) and `max_ratio[b]` the largest finite margin
    ratio (from 0).
    """
    N = prm.shape[0]
    T = cmd.shape[0]
    n = ic[I_N]
    m = ic[I_M]
    nreg = ic[I_NREG]
    nst = n + nreg * m
    nout = OUT_HEADER + 4 * m + 2 * n + nreg
    oU = ic[I_OUMAX]
    L = LANES
    groups = (N + L - 1) // L
    nz = 0
    for i in range(n):
        if noise_sd[i] > 0.0:
            nz += 1
    nz2 = nz + (nz % 2)
    NR = len(SWEEP_RULES)
    for g in numba.prange(groups):
        lanes = np.empty(L, dtype=np.int64)
        for ln in range(L):
            lanes[ln] = min(g * L + ln, N - 1)
        konst = np.zeros((L, N_KONST))
        plant_setup_lanes(prm, lanes, konst)
        st = np.zeros((L, nst))
        out = np.zeros((L, nout))
        X = np.empty((L, n))
        U = np.zeros((L, m))
        meas = np.empty((L, delay + 1, n))
        ubuf = np.zeros((L, latency + 1, m))
        z = np.zeros(max(nz2, 2))
        ns = np.zeros(n)
        rs = np.zeros((L, 1), dtype=np.uint64)
        fb = np.full((L, NR), -1, dtype=np.int64)
        run = np.zeros((L, m), dtype=np.int64)
        mr = np.zeros(L)
        for ln in range(L):
            for i in range(n):
                X[ln, i] = x0[i]
            rs[ln, 0] = stream_key(seed, plant_ids[lanes[ln]])
        for r in range(T + 1):
            if r > 0:
                k = r - 1
                ys = (k - delay) % (delay + 1) if k >= delay else 0
                us = k % (latency + 1)
                ua_s = (k - latency) % (latency + 1)
                for ln in range(L):
                    y = meas[ln, ys]
                    o = out[ln]
                    f = fb[ln]
                    if special:
                        law_tick_pedestal(y, cmd[k], eps_t[k], ic, fc, st[ln], o)
                    else:
                        law_tick(y, cmd[k], eps_t[k], ic, fc, st[ln], o)
                    ratio = o[O_RATIO]
                    if ratio > mr[ln]:
                        mr[ln] = ratio
                    if f[R_MARGIN] < 0 and _over(ratio, levels[0]):
                        f[R_MARGIN] = k
                    if f[R_CLAMP] < 0 and _over(ratio, levels[1]):
                        f[R_CLAMP] = k
                    if f[R_BREACH] < 0 and _over(ratio, levels[2]):
                        f[R_BREACH] = k
                    fin = math.isfinite(ratio)
                    sat = False
                    for j in range(m):
                        ur = o[OUT_HEADER + m + j]
                        if not math.isfinite(ur):
                            fin = False
                        run[ln, j] = run[ln, j] + 1 if _over(abs(ur), fc[oU + j]) else 0
                        if _over(run[ln, j] + 1e-9, sat_ticks):
                            sat = True
                        ubuf[ln, us, j] = o[OUT_HEADER + j]
                    if f[R_NONFINITE] < 0 and not fin:
                        f[R_NONFINITE] = k
                    if f[R_SATURATION] < 0 and sat:
                        f[R_SATURATION] = k
                    if k >= latency:
                        for j in range(m):
                            U[ln, j] = ubuf[ln, ua_s, j]
                plant_step_lanes(X, U, konst, limits, fc[F_TS], substeps)
                if (k + 1) % DIVERGENCE_EVERY == 0 or k == T - 1:
                    for ln in range(L):
                        for i in range(n):
                            if fb[ln, R_DIVERGED] < 0 and not (abs(X[ln, i]) <= bound[i]):
                                fb[ln, R_DIVERGED] = k
                        if fb[ln, R_WEIGHTS] < 0:
                            w2 = 0.0
                            for i in range(n, nst):
                                w2 += st[ln, i] * st[ln, i]
                            if not (math.sqrt(w2) <= w_limit):
                                fb[ln, R_WEIGHTS] = k
            # the sensors: reading r
            rslot = r % (delay + 1)
            for ln in range(L):
                if noise_mode == NOISE_STREAM:
                    stream_normals(rs[ln], z[:nz2])
                q = 0
                for i in range(n):
                    if noise_sd[i] > 0.0 and noise_mode != NOISE_OFF:
                        zi = z[q] if noise_mode == NOISE_STREAM else given[lanes[ln], r, q]
                        ns[i] = noise_sd[i] * zi
                        q += 1
                    else:
                        ns[i] = 0.0
                yr = meas[ln, rslot]
                plant_measure(X[ln], resolution, ns, yr)
                if r == 0:
                    for i in range(n):
                        st[ln, i] = yr[i]
        for ln in range(L):
            b = g * L + ln
            if b < N:
                for j in range(NR):
                    first[b, j] = fb[ln, j]
                max_ratio[b] = mr[ln]
