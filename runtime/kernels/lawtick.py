"""The compiled law tick for ONE plant: the flat-buffer codes, the basis evaluator and
`law_tick` (the numba twin of `runtime.method.law.AdaptiveLaw.step`).

The buffer layout (``ic``, ``fc``, ``st``, ``out``) is described in `runtime.kernels.fast`;
packing a design into it lives in `runtime.kernels.lawpack`. `tests/test_fast.py` checks
these kernels against the numpy reference tick by tick.
"""

from __future__ import annotations

import math
from typing import Any

import numba
import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

# ------------------------------------------------------------------ codes
BASIS_OPS = ("bias", "x", "sin", "cos", "abs", "tanh", "mul")
OP_BIAS, OP_X, OP_SIN, OP_COS, OP_ABS, OP_TANH, OP_MUL = range(7)
LAWS = ("standard", "barrier")
BARRIER_CODES = ("rational", "log")
LEAKAGES = ("none", "sigma", "e")

# ic: integer layout
(I_N, I_M, I_P, I_NCODE, I_NRBF, I_NREG, I_LAW, I_BARRIER, I_AUGMENT, I_LEAK,
 I_PROJ, I_FROZEN, I_OP, I_OPB, I_OK1T, I_OK2T, I_OADT, I_OBDT, I_OGAMMA, I_OUMAX,
 I_OTHETA, I_ORBFC, I_ORBFW, I_ORBFS, I_OCODES, I_OUSCALE) = range(26)
IC_HEADER = 26

# fc: scalar settings at the head
(F_TS, F_GAMMA_MAX, F_CLAMP, F_LAM_BPB, F_CAP, F_SIGMA0, F_MU, F_DEAD_ZONE, F_EPS_P,
 F_TANH_W, F_EPS) = range(11)
FC_HEADER = 11

# out: scalar results at the head, vectors after
O_S, O_RATIO, O_PHI_D, O_EFF_RATE, O_STEP_GAIN, O_CLAMPED, O_CAPPED = range(7)
OUT_HEADER = 7

def out_size(n: int, m: int, n_reg: int) -> int:
    """Length of the `out` buffer for n states, m inputs and N_bar regressors."""
    return OUT_HEADER + 4 * m + 2 * n + n_reg


# ------------------------------------------------------------------ law kernel
@numba.njit(cache=True, inline="always")
def basis_eval(x: Array, ic: Any, fc: Array, sig: Array) -> None:  # pragma: no cover - jit
    """sigma(x) into sig[:N]: the coded terms first, then the radial-basis block

    exp(-||scale * (x - c_k)||^2 / (2 w_k^2)) (as `runtime.method.rbf.rbf_evaluate`).
    Inlined into the law tick: no call a tick, and the state loop of the radial-basis block
    unrolls where the tick's sizes are constants (`law_tick_rig`).
    """
    n = ic[I_N]
    oc = ic[I_OCODES]
    tw = fc[F_TANH_W]
    for k in range(ic[I_NCODE]):
        op = ic[oc + 3 * k]
        i = ic[oc + 3 * k + 1]
        if op == OP_BIAS:
            v = 1.0
        elif op == OP_X:
            v = x[i]
        elif op == OP_SIN:
            v = math.sin(x[i])
        elif op == OP_COS:
            v = math.cos(x[i])
        elif op == OP_ABS:
            v = abs(x[i])
        elif op == OP_TANH:
            z = x[i] / tw  # math.tanh, without the library call where it rounds to +-1
            v = 1.0 if z > 20.0 else (-1.0 if z < -20.0 else math.tanh(z))
        else:
            v = x[i] * x[ic[oc + 3 * k + 2]]
        sig[k] = v
    base = ic[I_NCODE]
    oc_c = ic[I_ORBFC]
    oc_w = ic[I_ORBFW]
    oc_s = ic[I_ORBFS]
    for k in range(ic[I_NRBF]):
        d2 = 0.0
        for i in range(n):
            d = (x[i] - fc[oc_c + k * n + i]) * fc[oc_s + i]
            d2 += d * d
        w = fc[oc_w + k]
        sig[base + k] = math.exp(-d2 / (2.0 * w * w))


@numba.njit(cache=True)
def law_tick(x: Array, c: Array, eps: float, ic: Any, fc: Array, st: Array,
             out: Array) -> None:  # pragma: no cover - jit
    """One tick of `AdaptiveLaw.step` for one plant; updates st, fills out.

    Order (semi-implicit, as the reference): e_k and s; clamped phi_d; the
    capped Euler weight update with the modifiers; u_k from the new weights;
    x_r advanced by the exact zero-order hold.
    """
    law_tick_sized(x, c, eps, ic, fc, st, out, ic[I_N], ic[I_M], ic[I_P])


@numba.njit(cache=True, inline="always")
def law_tick_sized(x: Array, c: Array, eps: float, ic: Any, fc: Array, st: Array, out: Array,
                   n: int, m: int, p: int) -> None:  # pragma: no cover - jit
    """`law_tick` with the plant's n states, m inputs and p commands given (they must equal
    ic[I_N], ic[I_M] and ic[I_P]). The one law tick: `law_tick` passes them from ``ic``;
    `law_tick_rig`, compiled per rig (`runtime.kernels.rigloops`), passes the rig's sizes as
    compile-time constants (p = m: a design tracks as many outputs as the rig has inputs), so
    the compiler unrolls the small loops over states, inputs and commands (the same
    operations in the same order: the same results to the bit). Inlined into those two small
    wrappers (not into the loops, whose compile time it would lengthen)."""
    nreg = ic[I_NREG]
    oP = ic[I_OP]
    oPB = ic[I_OPB]
    oK1 = ic[I_OK1T]
    oK2 = ic[I_OK2T]
    oAd = ic[I_OADT]
    oBd = ic[I_OBDT]
    oG = ic[I_OGAMMA]
    oU = ic[I_OUMAX]
    oTh = ic[I_OTHETA]
    o_u = OUT_HEADER
    o_uraw = o_u + m
    o_un = o_uraw + m
    o_e = o_un + m
    o_sig = o_e + n
    o_xr = o_sig + nreg
    o_epb = o_xr + n
    W0 = n  # W starts after x_r in st

    # 1. error and its P-norm
    for i in range(n):
        out[o_e + i] = x[i] - st[i]
    q = 0.0
    for i in range(n):
        acc = 0.0
        for j in range(n):
            acc += fc[oP + i * n + j] * out[o_e + j]
        q += out[o_e + i] * acc
    if q < 0.0:
        q = 0.0
    s = math.sqrt(q)

    # 2. phi_d with the clamp (never evaluated at s >= eps)
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

    # 3. nominal input and regressor
    for j in range(m):
        a = 0.0
        for i in range(p):
            a += c[i] * fc[oK2 + i * m + j]
        b = 0.0
        for i in range(n):
            b += x[i] * fc[oK1 + i * m + j]
        out[o_un + j] = a - b
    basis_eval(x, ic, fc, out[o_sig:])
    nb = ic[I_NCODE] + ic[I_NRBF]
    if ic[I_AUGMENT] == 1:
        for j in range(m):
            out[o_sig + nb + j] = out[o_un + j] / fc[ic[I_OUSCALE] + j]
    sig_sq = 0.0
    for i in range(nreg):
        sig_sq += out[o_sig + i] * out[o_sig + i]
    g = fc[F_TS] * fc[F_GAMMA_MAX] * phi_d * sig_sq * fc[F_LAM_BPB]
    cap = fc[F_CAP]
    capped = g > cap
    if capped:
        scale = cap / (g if g > 1e-300 else 1e-300)
    else:
        scale = 1.0
    rate = phi_d * scale

    # 4. weight update: W += Ts * modified(gamma * rate * sigma_bar (e' P B))
    if ic[I_FROZEN] == 0:
        epb_sq = 0.0
        for j in range(m):
            a = 0.0
            for i in range(n):
                a += out[o_e + i] * fc[oPB + i * m + j]
            out[o_epb + j] = a
            epb_sq += a * a
        leak = ic[I_LEAK]
        leak_gain = 0.0
        if leak == 1:
            leak_gain = fc[F_SIGMA0]
        elif leak == 2:
            leak_gain = fc[F_MU] * math.sqrt(epb_sq)
        dead = fc[F_DEAD_ZONE] > 0.0 and s < fc[F_DEAD_ZONE]
        proj = ic[I_PROJ] == 1
        eps_p = fc[F_EPS_P]
        ts = fc[F_TS]
        if not proj:
            # row by row, all columns of a regressor at once (each weight's own update, so
            # the order between weights changes nothing)
            if not dead:
                for i in range(nreg):
                    gi = fc[oG + i]
                    a = gi * (rate * out[o_sig + i])
                    for j in range(m):
                        idx = W0 + i * m + j
                        y = a * out[o_epb + j]
                        if leak != 0:
                            y = y - gi * leak_gain * st[idx]
                        st[idx] += ts * y
        else:
            for j in range(m):
                # column j: theta = W[:, j], y = dW[:, j]; computed twice (cheap, no scratch)
                ty = 0.0
                tt = 0.0
                f = 0.0
                if not dead:
                    th_max = fc[oTh + j]
                    for i in range(nreg):
                        gi = fc[oG + i]
                        y = (gi * (rate * out[o_sig + i])) * out[o_epb + j]
                        if leak != 0:
                            y = y - gi * leak_gain * st[W0 + i * m + j]
                        th = st[W0 + i * m + j]
                        ty += th * y
                        tt += th * th
                    f = ((1.0 + eps_p) * tt - th_max * th_max) / (eps_p * th_max * th_max)
                do_proj = f > 0.0 and ty > 0.0
                k_proj = ty * f / tt if do_proj else 0.0
                for i in range(nreg):
                    if dead:
                        continue
                    gi = fc[oG + i]
                    idx = W0 + i * m + j
                    y = (gi * (rate * out[o_sig + i])) * out[o_epb + j]
                    if leak != 0:
                        y = y - gi * leak_gain * st[idx]
                    if do_proj:
                        y = y - st[idx] * k_proj
                    st[idx] += ts * y
                # the Euler step may overshoot the ball Proj keeps invariant (f <= 1, i.e.
                # ||theta|| <= theta_max): pull the column back radially onto it
                nn = 0.0
                for i in range(nreg):
                    nn += st[W0 + i * m + j] * st[W0 + i * m + j]
                th_max = fc[oTh + j]
                if nn > th_max * th_max:
                    shrink = th_max / math.sqrt(nn)
                    for i in range(nreg):
                        st[W0 + i * m + j] *= shrink

    # 5. control from the new weights, saturation: two columns a pass over the regressor
    # (two independent sums, each in the same order as one column alone)
    for j0 in range(0, m, 2):
        j1 = j0 + 1 if j0 + 1 < m else j0
        a0 = 0.0
        a1 = 0.0
        for i in range(nreg):
            si = out[o_sig + i]
            a0 += st[W0 + i * m + j0] * si
            a1 += st[W0 + i * m + j1] * si
        for j in range(j0, j1 + 1):
            ur = out[o_un + j] - (a0 if j == j0 else a1)
            out[o_uraw + j] = ur
            lim = fc[oU + j]
            if ur > lim:
                ur = lim
            elif ur < -lim:
                ur = -lim
            out[o_u + j] = ur

    # 6. reference model by exact zero-order hold
    for j in range(n):
        a = 0.0
        for i in range(n):
            a += st[i] * fc[oAd + i * n + j]
        b = 0.0
        for i in range(p):
            b += c[i] * fc[oBd + i * n + j]
        out[o_xr + j] = a + b
    for j in range(n):
        st[j] = out[o_xr + j]

    out[O_S] = s
    out[O_RATIO] = s / eps
    out[O_PHI_D] = phi_d
    out[O_EFF_RATE] = fc[F_GAMMA_MAX] * rate
    out[O_STEP_GAIN] = g
    out[O_CLAMPED] = 1.0 if clamped else 0.0
    out[O_CAPPED] = 1.0 if capped else 0.0
