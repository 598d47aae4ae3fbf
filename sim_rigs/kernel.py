"""The compiled plant: ONE numba kernel that interprets a rig's term table.

`pack_rig(spec)` codes a rig (`sim_rigs.rigfile.RigSpec`) into two flat arrays,
the way `runtime.kernels.fast` codes a basis:

- ``code`` (int64): header [n, m, T, F, nA, nB, o_terms, o_lam, o_A, o_B, NU, o_fac]
  (states, inputs, terms, factors per term at most, non-zeros of A and B, distinct
  factors, offsets), then per term [row, param index (-1: none), factor count, the
  indices of its factors among the distinct ones], per input the effectiveness
  parameter index (-1: 1), per input the driven row, the (i, j) of A's and B's
  non-zeros, and per distinct factor (kind, state, width parameter index (-1: the
  literal));
- ``mat`` (float64): A's and B's non-zero values, per term its coef, per distinct
  factor (k, literal width).

`plant_prepare` turns a plant's parameters into constants once a step (coef *
param per term, k or 1 / width per distinct factor, Lambda_j), so the derivative
divides nothing; each distinct factor (tanh of a rate, say, shared by a Coulomb
and a stick-slip term) is evaluated once, and a term whose coefficient is zero (a
switched-off friction) costs nothing.

`pack_params(spec, params)` gives the parameter vector(s) in `spec.params`
order. `plant_deriv`, `plant_step` (RK4 with substeps, input saturated) and
`plant_measure` (noise pre-drawn, then quantised) are the equations of
`sim_rigs.plant.RigPlant`; `tests/test_rig_plant.py` checks them against it with
every term kind non-zero. The dry run, the sweep, the in-process link and the
served device all step plants through these functions.
"""

from __future__ import annotations

import math
from typing import Any

import numba
import numpy as np
from numpy.typing import NDArray

from sim_rigs.rigfile import FACTOR_KINDS, RigSpec

Array = NDArray[np.float64]
K_X, K_SIN, K_COS, K_TANH, K_GAUSS, K_ABS = range(6)
HEADER = 12


def pack_rig(spec: RigSpec) -> tuple[NDArray[np.int64], Array]:
    """(code, mat) of a rig: see the module docstring."""
    n, m, T = spec.n, spec.m, len(spec.terms)
    F = max([len(t.factors) for t in spec.terms] + [1])
    names = list(spec.params)
    a_nz = [(i, j) for i in range(n) for j in range(n) if spec.A[i, j] != 0.0]
    b_nz = [(i, j) for i in range(n) for j in range(m) if spec.B[i, j] != 0.0]
    unique: list[tuple[int, int, int, float, float]] = []  # kind, state, width param, k, width
    term_fac: list[list[int]] = []
    for term in spec.terms:
        idx = []
        for f in term.factors:
            key = (FACTOR_KINDS.index(f.kind), f.state,
                   names.index(f.width) if isinstance(f.width, str) else -1, float(f.k),
                   0.0 if isinstance(f.width, str) else float(f.width))
            if key not in unique:
                unique.append(key)
            idx.append(unique.index(key))
        term_fac.append(idx)
    NU = len(unique)
    o_terms = HEADER
    o_lam = o_terms + T * (3 + F)
    o_a = o_lam + 2 * m
    o_b = o_a + 2 * len(a_nz)
    o_fac = o_b + 2 * len(b_nz)
    code = np.full(o_fac + 3 * NU, -1, dtype=np.int64)
    code[:HEADER] = (n, m, T, F, len(a_nz), len(b_nz), o_terms, o_lam, o_a, o_b, NU, o_fac)
    mat = np.zeros(len(a_nz) + len(b_nz) + T + 2 * NU)
    for q, (i, j) in enumerate(a_nz):
        code[o_a + 2 * q:o_a + 2 * q + 2] = (i, j)
        mat[q] = spec.A[i, j]
    for q, (i, j) in enumerate(b_nz):
        code[o_b + 2 * q:o_b + 2 * q + 2] = (i, j)
        mat[len(a_nz) + q] = spec.B[i, j]
    oT = len(a_nz) + len(b_nz)
    for t, term in enumerate(spec.terms):
        c = o_terms + t * (3 + F)
        code[c] = term.row
        code[c + 1] = names.index(term.param) if term.param is not None else -1
        code[c + 2] = len(term.factors)
        code[c + 3:c + 3 + len(term_fac[t])] = term_fac[t]
        mat[oT + t] = term.coef
    for u, (kind, state, wi, k, w) in enumerate(unique):
        code[o_fac + 3 * u:o_fac + 3 * u + 3] = (kind, state, wi)
        mat[oT + T + 2 * u] = k
        mat[oT + T + 2 * u + 1] = w
    for j in range(m):
        e = spec.effectiveness[j]
        code[o_lam + j] = names.index(e) if e is not None else -1
        code[o_lam + m + j] = spec.drives[j]
    return code, mat


def pack_params(spec: RigSpec, params: dict[str, Any]) -> Array:
    """Parameter values in `spec.params` order: (P,) for scalars, (batch, P) for arrays."""
    cols = [np.asarray(params[k], dtype=float) for k in spec.params]
    if all(c.ndim == 0 for c in cols):
        return np.array([float(c) for c in cols])
    return np.ascontiguousarray(np.stack([np.ravel(c) for c in cols], axis=1))


@numba.njit(cache=True)
def plant_prepare(code: Any, mat: Array, prm: Array, lsc: Array,
                  tc: Array) -> None:  # pragma: no cover - jit
    """The per-plant constants `plant_deriv` reads, into tc: per input Lambda_j lsc_j, per
    term coef * param, per distinct factor k (sin, cos) or 1 / width (tanh, gauss) and
    whether any term with a non-zero coefficient needs it."""
    m = code[1]
    T = code[2]
    F = code[3]
    o_terms = code[6]
    o_lam = code[7]
    NU = code[10]
    o_fac = code[11]
    oT = code[4] + code[5]
    for j in range(m):
        li = code[o_lam + j]
        tc[j] = (prm[li] if li >= 0 else 1.0) * lsc[j]
    for u in range(NU):
        kind = code[o_fac + 3 * u]
        if kind == K_TANH or kind == K_GAUSS:
            wi = code[o_fac + 3 * u + 2]
            tc[m + T + u] = 1.0 / (prm[wi] if wi >= 0 else mat[oT + T + 2 * u + 1])
        else:
            tc[m + T + u] = mat[oT + T + 2 * u]
        tc[m + T + NU + u] = 0.0
    for t in range(T):
        c = o_terms + t * (3 + F)
        pi = code[c + 1]
        val = mat[oT + t] * (prm[pi] if pi >= 0 else 1.0)
        tc[m + t] = val
        if val != 0.0:
            for q in range(code[c + 2]):
                tc[m + T + NU + code[c + 3 + q]] = 1.0


@numba.njit(cache=True, inline="always")
def plant_deriv(x: Array, v: Array, code: Any, mat: Array, tc: Array, dist: Array,
                dx: Array) -> None:  # pragma: no cover - jit
    """dx = f(x, v) for one plant: A x + B (Lambda lsc v) + terms + disturbance, with the
    constants of `plant_prepare` in tc: each distinct factor evaluated once (and only when
    a term with a non-zero coefficient needs it), then each term a product."""
    n = code[0]
    m = code[1]
    T = code[2]
    F = code[3]
    nA = code[4]
    nB = code[5]
    o_terms = code[6]
    o_lam = code[7]
    o_a = code[8]
    o_b = code[9]
    NU = code[10]
    o_fac = code[11]
    o_k = m + T
    o_need = o_k + NU
    o_val = o_need + NU
    for u in range(NU):
        if tc[o_need + u] == 0.0:
            continue
        kind = code[o_fac + 3 * u]
        xs = x[code[o_fac + 3 * u + 1]]
        if kind == K_X:
            f = xs
        elif kind == K_TANH:
            z = xs * tc[o_k + u]
            f = 1.0 if z > 20.0 else (-1.0 if z < -20.0 else math.tanh(z))
        elif kind == K_COS:
            f = math.cos(tc[o_k + u] * xs)
        elif kind == K_SIN:
            f = math.sin(tc[o_k + u] * xs)
        elif kind == K_GAUSS:
            z = xs * tc[o_k + u]
            f = math.exp(-(z * z))
        else:
            f = abs(xs)
        tc[o_val + u] = f
    for i in range(n):
        dx[i] = 0.0
    for q in range(nA):
        dx[code[o_a + 2 * q]] += mat[q] * x[code[o_a + 2 * q + 1]]
    for q in range(nB):
        j = code[o_b + 2 * q + 1]
        dx[code[o_b + 2 * q]] += mat[nA + q] * (tc[j] * v[j])
    for j in range(m):
        dx[code[o_lam + m + j]] += dist[j]
    for t in range(T):
        val = tc[m + t]
        if val == 0.0:
            continue
        c = o_terms + t * (3 + F)
        for q in range(code[c + 2]):
            val *= tc[o_val + code[c + 3 + q]]
        dx[code[c]] += val


@numba.njit(cache=True)
def plant_step(x: Array, u: Array, code: Any, mat: Array, prm: Array, limits: Array,
               dt: float, substeps: int, lsc: Array, dist: Array,
               work: Array) -> None:  # pragma: no cover - jit
    """Advance one plant by dt holding u (saturated here); RK4 with substeps.

    `work` is scratch from `work_buffer`; the applied inputs end up in work[5, :m].
    """
    n = code[0]
    m = code[1]
    v = work[5]
    tc = work[6]
    plant_prepare(code, mat, prm, lsc, tc)
    for j in range(m):
        uj = u[j]
        if uj > limits[j]:
            uj = limits[j]
        elif uj < -limits[j]:
            uj = -limits[j]
        v[j] = uj
    h = dt / substeps
    k1 = work[0]
    k2 = work[1]
    k3 = work[2]
    k4 = work[3]
    tmp = work[4]
    for _ in range(substeps):
        plant_deriv(x, v, code, mat, tc, dist, k1)
        for i in range(n):
            tmp[i] = x[i] + 0.5 * h * k1[i]
        plant_deriv(tmp, v, code, mat, tc, dist, k2)
        for i in range(n):
            tmp[i] = x[i] + 0.5 * h * k2[i]
        plant_deriv(tmp, v, code, mat, tc, dist, k3)
        for i in range(n):
            tmp[i] = x[i] + h * k3[i]
        plant_deriv(tmp, v, code, mat, tc, dist, k4)
        for i in range(n):
            x[i] = x[i] + (h / 6.0) * (k1[i] + 2 * k2[i] + 2 * k3[i] + k4[i])


@numba.njit(cache=True)
def plant_measure(x: Array, resolution: Array, noise: Array,
                  y: Array) -> None:  # pragma: no cover - jit
    """Sensor reading: each state plus its pre-drawn, pre-scaled noise, then quantised."""
    for i in range(x.shape[0]):
        a = x[i] + noise[i]
        if resolution[i] > 0.0:
            a = np.rint(a / resolution[i]) * resolution[i]
        y[i] = a


@numba.njit(cache=True)
def work_width(code: Any) -> int:  # pragma: no cover - jit
    """Row length of `plant_step`'s scratch for a coded rig."""
    n, m, T, NU = code[0], code[1], code[2], code[10]
    return max(n, m + T + 3 * NU)


def work_buffer(spec: RigSpec) -> Array:
    """Scratch for `plant_step`: (7, work_width)."""
    code, _ = pack_rig(spec)
    return np.zeros((7, int(work_width(code))))


class CompiledPlant:
    """One plant of a `sim_rigs.plant.RigPlant` stepped by the compiled kernel.

    The state lives in ``plant.x[0]`` (the same array the rest of the program reads);
    the fault hooks ``plant.disturbance`` and ``plant.lam_scale`` are honoured.
    """

    def __init__(self, plant: Any) -> None:
        self.plant = plant
        self.code, self.mat = pack_rig(plant.spec)
        self.prm = pack_params(plant.spec, {k: np.ravel(v)[0] for k, v in plant.params.items()})
        self.limits = np.ascontiguousarray(np.ravel(plant.limits), dtype=float)
        self.work = work_buffer(plant.spec)
        self._ones = np.ones(plant.spec.m)
        self._zeros = np.zeros(plant.spec.m)
        self._u = np.zeros(plant.spec.m)

    def step(self, u: Any, dt: float) -> tuple[float, ...]:
        """Advance by dt holding u (saturated); returns the inputs applied."""
        p = self.plant
        m = p.spec.m
        for j in range(m):
            self._u[j] = float(u[j])
        lsc = self._ones if p.lam_scale is None else np.ascontiguousarray(p.lam_scale[0],
                                                                         dtype=float)
        dist = self._zeros if p.disturbance is None else np.ascontiguousarray(
            p.disturbance[0], dtype=float)
        x = np.ascontiguousarray(p.x[0], dtype=float)
        plant_step(x, self._u, self.code, self.mat, self.prm, self.limits, float(dt),
                   int(p.substeps), lsc, dist, self.work)
        p.x[0] = x
        return tuple(float(v) for v in self.work[5, :m])
