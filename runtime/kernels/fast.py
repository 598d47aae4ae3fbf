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
compiled per rig (`runtime.kernels.rigloops`) and the batch sweep kernel's pieces. The
wrappers, `pack_law`, `out_size` and `law_tick` are still importable from here. There is one
law tick (`law_tick_sized`, behind `law_tick`): the dry run, the sweep and the live loop all
step it.

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
from runtime.kernels.lawpack import (  # noqa: F401 - re-exported: callers step and pack here
    FastLaw,
    FastTick,
    ModifierSettings,
    pack_law,
    warm_up,
)
from runtime.kernels.lawtick import (  # noqa: F401 - the templates call these by name
    F_TS,
    I_M,
    I_N,
    I_NREG,
    I_OUMAX,
    O_CLAMPED,
    O_EFF_RATE,
    O_PHI_D,
    O_RATIO,
    O_S,
    O_STEP_GAIN,
    OUT_HEADER,
    law_tick,
    law_tick_sized,
    out_size,
)
from sim_rigs.kernel import LANES, plant_measure, work_width  # noqa: F401 - templates

_over = numba.njit(cache=True, inline="always")(over)
"""The watchdog's one rule comparison, compiled for the sweep kernel."""

Array = NDArray[np.float64]


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
RIG_N = 1
"""Placeholder: the rig's number of states (a compile-time constant in the rig's module)."""
RIG_M = 1
"""Placeholder: the rig's number of inputs (a compile-time constant in the rig's module)."""


def law_tick_rig(x: Array, c: Array, eps: float, ic: Any, fc: Array, st: Array,
                 out: Array) -> None:  # pragma: no cover - jit
    """`law_tick` with the rig's sizes as compile-time constants (`law_tick_sized` with
    RIG_N, RIG_M and p = RIG_M commands: `runtime.method.design` gives C as many rows as
    inputs), compiled per rig; the dry-run loop and the sweep kernel call it."""
    law_tick_sized(x, c, eps, ic, fc, st, out, RIG_N, RIG_M, RIG_M)


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
    n = RIG_N
    m = RIG_M
    nreg = ic[I_NREG]
    dt = fc[F_TS]
    o_u = OUT_HEADER
    o_uraw = o_u + m
    o_e = o_uraw + 2 * m
    for k in range(k0, k1):
        y = meas[k - delay] if k >= delay else meas[0]
        law_tick_rig(y, cmd[k], eps_t[k], ic, fc, st, out)
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
# Compiled per rig like the dry-run loop: the one law tick (`law_tick_rig`) with the rig's
# sizes as constants, the rig's generated lane step, and the watchdog's rules as the rule book
# gives them (`runtime.guard.watchdog.sweep_rules`: comparison, threshold, on-delay in ticks).
SWEEP_RULES = ("margin", "clamp", "nonfinite", "saturation", "breach", "diverged", "weights")
"""Columns of the sweep kernel's `first` output: first tick of each rule per plant."""
(R_MARGIN, R_CLAMP, R_NONFINITE, R_SATURATION, R_BREACH, R_DIVERGED, R_WEIGHTS) = range(7)
HELD_RULES = ("margin", "clamp", "breach", "saturation")
"""The rules whose condition the sweep kernel counts in ticks held (order of `levels` for the
first three, of `delays` for all four)."""
DIVERGENCE_EVERY = 64
"""The sweep checks the true state for divergence after ticks 63, 127, ... and the last."""
NOISE_OFF, NOISE_STREAM, NOISE_GIVEN = 0, 1, 2
"""Sensor noise of the sweep kernel: none, each plant's own stream, or pre-drawn."""

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = np.uint64(30), np.uint64(27), np.uint64(31), np.uint64(11)


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
                 ic: Any, fc: Array, levels: Array, delays: Any, sat_ticks: float,
                 bound: Array, w_limit: float, first: Any,
                 max_ratio: Array) -> None:  # pragma: no cover - jit
    """N plants x T ticks of the closed loop, each plant on its own.

    prange over groups of `sim_rigs.kernel.LANES` plants (a short last group repeats its
    last plant and discards the copies), stepped together by the rig's generated
    `plant_step_lanes` (no faults). Per plant b: its parameters prm[b], start x0, law
    state x_r = first reading, W = 0; each tick the law (`law_tick_rig`) on the reading
    `delay` ticks old, the saturated input applied `latency` ticks late, then the next
    reading (`plant_measure`). Noise: `noise_mode` NOISE_OFF, NOISE_STREAM (plant_ids[b]'s
    own splitmix64 stream under `seed`, one normal per noisy channel a reading, in channel
    order, drawn in pairs) or NOISE_GIVEN (`given[b, reading, :]`, standard normals of the
    noisy channels). Nothing is recorded per tick: `first[b, SWEEP_RULES]` gets the tick
    each rule tripped (-1: never) and `max_ratio[b]` the largest finite margin ratio (from 0).

    The rules, as `runtime.guard.watchdog` defines them (`over`, thresholds and on-delays
    from `sweep_rules`): margin (signal: the ratio), clamp (the ratio while the phi_d clamp
    is engaged, else 0), breach (the ratio against 1) at `levels[0..2]`; saturation (a raw
    input beyond its limit for `sat_ticks` ticks in a row). Each trips on the tick its
    condition has held for `delays[HELD_RULES]` ticks after the first (the on-delay);
    nonfinite at once; diverged: |x_i| > bound_i or non-finite after ticks 63, 127, ... and
    the last; weights: the weight norm non-finite or beyond `w_limit` at the same ticks.
    """
    N = prm.shape[0]
    T = cmd.shape[0]
    n = RIG_N
    m = RIG_M
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
    lv_margin = levels[0]
    lv_clamp = levels[1]
    lv_breach = levels[2]
    d_margin = delays[0]
    d_clamp = delays[1]
    d_breach = delays[2]
    d_sat = delays[3]
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
        held = np.zeros((L, 4), dtype=np.int64)
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
                    h = held[ln]
                    law_tick_rig(y, cmd[k], eps_t[k], ic, fc, st[ln], o)
                    ratio = o[O_RATIO]
                    if ratio > mr[ln]:
                        mr[ln] = ratio
                    h[0] = h[0] + 1 if _over(ratio, lv_margin) else 0
                    h[1] = h[1] + 1 if _over(ratio if o[O_CLAMPED] != 0.0 else 0.0,
                                             lv_clamp) else 0
                    h[2] = h[2] + 1 if _over(ratio, lv_breach) else 0
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
                    h[3] = h[3] + 1 if sat else 0
                    if h[0] > d_margin and f[R_MARGIN] < 0:
                        f[R_MARGIN] = k
                    if h[1] > d_clamp and f[R_CLAMP] < 0:
                        f[R_CLAMP] = k
                    if h[2] > d_breach and f[R_BREACH] < 0:
                        f[R_BREACH] = k
                    if h[3] > d_sat and f[R_SATURATION] < 0:
                        f[R_SATURATION] = k
                    if not fin and f[R_NONFINITE] < 0:
                        f[R_NONFINITE] = k
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
