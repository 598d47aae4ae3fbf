"""The compiled plant: numba code generated from a rig's term table, once per rig.

`step_source(spec)` writes the rig's RK4 step as straight-line Python (each distinct factor
evaluated once a stage, each term a multiply-add into its row, A's and B's non-zeros
unrolled, scalar locals, no interpretation at run time); `step_source(spec, LANES)` the same
for LANES plants interleaved, with `setup_source` for their per-plant constants. `compiled(spec)`
puts these and the dry-run loop and sweep kernel templates of `runtime.kernels.fast` into one module
file named by a hash of its text and of the sources its compiled code depends on, imports it
and lets numba cache it on disk (so a stale kernel is never loaded after an edit). The term
table stays the single source: `sim_rigs.plant.RigPlant` (numpy) is the reference,
`tests/test_rig_plant.py` holds the generated code to it with every term kind non-zero, on
both built-in rigs and on seeded random term tables.

Speed tricks, all exact to rounding: tanh skipped where it rounds to +-1 (`fast_tanh`); sin
and cos of an angle from their values at the start of the step by angle addition
(`trig_near`), and of its double or triple by the multiple-angle formulas; a factor whose
terms the rig file switches off (stick-slip friction) computed only when one of them is on,
every other factor with no test (`_switched_off`); one reciprocal per width, so the
derivative divides nothing; linear and constant terms folded into A's coefficients and the
row's input term once a step, each row's cheap parts summed before its tanh / exp terms, a
factor shared by several terms multiplied once (`_row_sum`).

`pack_rig(spec)` codes a rig's shape into flat arrays (the loops read its sizes, `work_width`);
`pack_params(spec, params)` gives the parameter vector(s) in `spec.params` order;
`plant_measure` is the sensor reading (noise pre-drawn, then quantised), inlined.
"""

from __future__ import annotations

import hashlib
import importlib.util
import math
import os
import sys
from pathlib import Path
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


@numba.njit(cache=True, inline="always")
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


# ------------------------------------------------------------------ the generated plant
LANES = 4
"""Plants the sweep kernel steps together (`step_source` with lanes)."""
TAYLOR_LIMIT = 0.02
"""Largest in-step change of an angle k x_s (rad) `trig_near`'s series handles (else exact)."""


@numba.njit(cache=True, inline="always")
def fast_tanh(z: float) -> float:  # pragma: no cover - jit
    """math.tanh(z), skipping the library call where tanh rounds to +-1 in double precision
    (|z| > 20: 1 - tanh|z| < 1e-17, below half an ulp of 1)."""
    if z > 20.0:
        return 1.0
    if z < -20.0:
        return -1.0
    return math.tanh(z)


@numba.njit(cache=True, inline="always")
def trig_near(a: float, a0: float, c0: float, s0: float) -> tuple[float, float]:
    """cos(a), sin(a) from c0 = cos(a0), s0 = sin(a0): angle addition with a Taylor series
    in d = a - a0 (truncation < 1e-18 for |d| <= TAYLOR_LIMIT), exact beyond."""
    d = a - a0
    if abs(d) > TAYLOR_LIMIT:
        return math.cos(a), math.sin(a)
    d2 = d * d
    cd = 1.0 + d2 * (-0.5 + d2 * (1.0 / 24.0 - d2 / 720.0))
    sd = d * (1.0 + d2 * (-1.0 / 6.0 + d2 * (1.0 / 120.0 - d2 / 5040.0)))
    return c0 * cd - s0 * sd, s0 * cd + c0 * sd
_SOURCES = ("sim_rigs/kernel.py",)
_COMPILED: dict[str, Any] = {}


def _lit(v: float) -> str:
    return repr(float(v))


def _plant_constants(spec: RigSpec, s: str, prm: str, fac: dict[tuple[Any, ...], int],
                     ang: dict[tuple[int, float], int], fusers: dict[int, list[int]],
                     ausers: dict[int, list[int]]) -> list[tuple[str, str, bool]]:
    """(name, expression, is flag) of a plant's constants: Lambda_j, coef * param per term,
    whether each factor / angle is needed, one reciprocal per width."""
    names = list(spec.params)
    out: list[tuple[str, str, bool]] = []
    for j, e in enumerate(spec.effectiveness):
        out.append((f"lam{j}{s}", f"{prm}[{names.index(e)}]" if e is not None else "1.0", False))
    for t, term in enumerate(spec.terms):
        pv = f" * {prm}[{names.index(term.param)}]" if term.param is not None else ""
        out.append((f"p{t}{s}", f"{_lit(term.coef)}{pv}", False))

    def need(ts: list[int]) -> str:
        if _switched_off(spec, ts):
            return " or ".join(f"p{t}{s} != 0.0" for t in ts)
        return "True"

    linear, bias = _folded_terms(spec)
    for (i, j), ts in linear.items():
        a_ij = [_lit(spec.A[i, j])] if spec.A[i, j] != 0.0 else []
        out.append((f"c{i}_{j}{s}", " + ".join(a_ij + [f"p{t}{s}" for t in ts]), False))
    for i, ts in bias.items():
        out.append((f"b{i}{s}", " + ".join(f"p{t}{s}" for t in ts), False))
    for u in fac.values():
        out.append((f"need{u}{s}", need(fusers[u]), True))
    for a in ang.values():
        out.append((f"nt{a}{s}", need(ausers[a]), True))
    recip: dict[Any, str] = {}
    for (kind, _state, width), u in fac.items():
        if kind in ("tanh", "gauss"):
            if width in recip:  # one reciprocal per width
                out.append((f"r{u}{s}", recip[width], False))
                continue
            wv = f"{prm}[{names.index(width)}]" if isinstance(width, str) else _lit(width)
            cond = " or ".join(f"need{o}{s}" for (k2, _s2, w2), o in fac.items()
                               if w2 == width and k2 in ("tanh", "gauss"))
            out.append((f"r{u}{s}", f"1.0 / {wv} if {cond} else 0.0", False))
            recip[width] = f"r{u}{s}"
    return out


def _switched_off(spec: RigSpec, ts: list[int]) -> bool:
    """Whether the factor used by terms `ts` is computed only when one of their parameters
    is non-zero: when they all have parameters and the rig file sets them all to 0 (a term
    switched off by default, such as stick-slip friction). Otherwise it is computed every
    stage, with no test: a parameter set to 0 then multiplies it away (the same sum), and a
    factor in use is not held up by a branch."""
    return all(spec.terms[t].param is not None for t in ts) and all(
        spec.params[str(spec.terms[t].param)].value == 0.0 for t in ts)


def _folded_terms(spec: RigSpec) -> tuple[dict[tuple[int, int], list[int]], dict[int, list[int]]]:
    """The terms folded into constants of the step: linear ones (one factor, a state j, on
    row i) by (i, j), added to A[i, j] once a step; constant ones (no factor) by row, added
    to the row's input term once a step. Terms with a zero coefficient are left out."""
    linear: dict[tuple[int, int], list[int]] = {}
    bias: dict[int, list[int]] = {}
    for t, term in enumerate(spec.terms):
        if term.coef == 0.0:
            continue
        if not term.factors:
            bias.setdefault(term.row, []).append(t)
        elif len(term.factors) == 1 and term.factors[0].kind == "x":
            linear.setdefault((term.row, term.factors[0].state), []).append(t)
    return linear, bias


def _row_sum(cheap: list[str], costly: list[list[str]], slow: set[str]) -> str:
    """One row of the derivative: the cheap parts (states, the input term, products of
    states) summed first, then the terms with a library-function factor (``costly``: each
    its coefficient then its factors), a factor in ``slow`` shared by several of them
    taken out once (p1 f + p2 g f as (p1 + p2 g) f): the cheap sum does not wait for tanh
    and exp, and fewer operations wait on them."""
    rest = [list(c) for c in costly]
    groups: list[str] = []
    while True:
        count: dict[str, int] = {}
        for c in rest:
            for f in dict.fromkeys(c[1:]):
                if f in slow:
                    count[f] = count.get(f, 0) + 1
        shared = [f for f, k in count.items() if k > 1]
        if not shared:
            break
        f = max(shared, key=count.__getitem__)
        taken = [c for c in rest if f in c[1:]]
        rest = [c for c in rest if f not in c[1:]]
        inner = []
        for c in taken:
            c.remove(f)
            inner.append(" * ".join(c))
        groups.append(f"{f} * ({' + '.join(inner)})")
    parts = [" * ".join(c) for c in rest] + groups
    if not parts:
        return " + ".join(cheap) if cheap else "0.0"
    if not cheap:
        return " + ".join(parts)
    return f"({' + '.join(cheap)}) + ({' + '.join(parts)})"


def _factor_tables(spec: RigSpec) -> tuple[Any, ...]:
    """Distinct factors (tanh, gauss, abs) and angles (sin, cos of k x_s) of the term table,
    the terms using each, and each term's factor references."""
    fac: dict[tuple[Any, ...], int] = {}
    ang: dict[tuple[int, float], int] = {}
    fusers: dict[int, list[int]] = {}
    ausers: dict[int, list[int]] = {}
    term_fac: list[list[str]] = []
    for t, term in enumerate(spec.terms):
        refs = []
        for f in term.factors:
            if f.kind == "x":
                refs.append(f"S{f.state}")
            elif f.kind in ("sin", "cos"):
                a = ang.setdefault((f.state, float(f.k)), len(ang))
                ausers.setdefault(a, []).append(t)
                refs.append(f"{'si' if f.kind == 'sin' else 'co'}{a}")
            else:
                u = fac.setdefault((f.kind, f.state, f.width), len(fac))
                fusers.setdefault(u, []).append(t)
                refs.append(f"f{u}")
        term_fac.append(refs)
    return fac, ang, fusers, ausers, term_fac


def setup_source(spec: RigSpec, lanes: int) -> str:
    """Python source of ``plant_setup_lanes(P, lanes, K)``: the constants of the plants
    P[lanes[l]] into K[l] (``N_KONST`` of them), once per plant, for `plant_step_lanes`."""
    fac, ang, fusers, ausers, _ = _factor_tables(spec)
    L = ["def plant_setup_lanes(P, lanes, K):"]
    for q in range(lanes):
        s = f"_{q}"
        L.append(f"    pr{s} = P[lanes[{q}]]")
        for i, (name, expr, flag) in enumerate(
                _plant_constants(spec, s, f"pr{s}", fac, ang, fusers, ausers)):
            L.append(f"    {name} = {expr}")
            L.append(f"    K[{q}, {i}] = " + (f"1.0 if {name} else 0.0" if flag else name))
    n_konst = len(_plant_constants(spec, "", "prm", fac, ang, fusers, ausers))
    return "\n".join(L) + f"\n\n\nN_KONST = {n_konst}\n"


def step_source(spec: RigSpec, lanes: int = 0) -> str:
    """Python source of this rig's step, the term table unrolled into straight-line code.

    ``lanes == 0``: ``plant_step(x, u, code, mat, prm, limits, dt, substeps, lsc, dist,
    work)`` for one plant (faults honoured; ``code`` and ``mat`` are accepted and ignored,
    the rig is in the code itself; the applied inputs go to work[5, :m]).
    ``lanes == L``: ``plant_step_lanes(X, U, P, lanes, limits, dt, substeps)`` for the L
    plants P[lanes[l]] with states X[l] and inputs U[l], no faults, their stages
    interleaved (independent chains: the CPU overlaps one plant's tanh latency with the
    others' arithmetic).

    Per call: the inputs saturated, then the constants of the step (Lambda_j lsc_j v_j
    through B plus the disturbance, per row; coef * param per term; 1 / width per width;
    whether a parameterised non-polynomial factor is needed at all; cos and sin of each
    angle k x_s at the start), then RK4 with substeps on scalar locals: each stage
    evaluates each distinct factor once (tanh skipped where it rounds to +-1, sin and cos
    by angle addition from the start of the step, `trig_near`) and adds each term into
    its row. Equal to `sim_rigs.plant.RigPlant.step` to rounding (tests/test_rig_plant.py).
    """
    n, m = spec.n, spec.m
    one = lanes == 0
    LN = [""] if one else [f"_{q}" for q in range(lanes)]
    if one:
        L = ["def plant_step(x, u, code, mat, prm, limits, dt, substeps, lsc, dist, work):"]
    else:
        L = ["def plant_step_lanes(X, U, K, limits, dt, substeps):"]
    w = L.append
    fac, ang, fusers, ausers, term_fac = _factor_tables(spec)
    linear, bias = _folded_terms(spec)
    has_q = [any(spec.B[i, j] != 0.0 for j in range(m)) or i in bias
             or (one and i in spec.drives) for i in range(n)]
    # angles: per state the smallest |k| is computed exactly (cos, sin at the step start,
    # then `trig_near` each stage); k = 2 or 3 times it from that pair by the multiple-angle
    # formulas, at the start and at every stage
    angles = sorted(ang.items(), key=lambda it: abs(it[0][1]))
    derived: dict[int, tuple[int, float]] = {}
    exact_cond: dict[int, str] = {}
    base: dict[int, tuple[float, int]] = {}
    for (state, k), a in angles:
        mult = k / base[state][0] if state in base and base[state][0] != 0.0 else 0.0
        if mult in (2.0, 3.0):
            derived[a] = (base[state][1], mult)
        else:
            base.setdefault(state, (k, a))
    for (_state, _k), a in angles:
        if a not in derived:
            users = ausers[a] + [t for o, (b, _) in derived.items() if b == a for t in ausers[o]]
            exact_cond[a] = " or ".join([f"nt{a}{{s}}"] + [f"nt{o}{{s}}" for o, (b, _) in
                                                            derived.items() if b == a])
            if not _switched_off(spec, users):
                exact_cond[a] = "True"

    def multiple(c: str, sn: str, mult: float, co: str, si: str, ind: str) -> None:
        if mult == 2.0:
            w(f"{ind}{co} = {c} * {c} - {sn} * {sn}")
            w(f"{ind}{si} = 2.0 * {sn} * {c}")
        else:
            w(f"{ind}{co} = {c} * ({c} * {c} - 3.0 * {sn} * {sn})")
            w(f"{ind}{si} = {sn} * (3.0 * {c} * {c} - {sn} * {sn})")

    for s in LN:
        ln = s[1:]
        if one:
            for name, expr, _flag in _plant_constants(spec, "", "prm", fac, ang, fusers, ausers):
                w(f"    {name} = {expr}")
        else:
            for q, (name, _expr, flag) in enumerate(
                    _plant_constants(spec, s, "", fac, ang, fusers, ausers)):
                w(f"    {name} = K[{ln}, {q}]" + (" != 0.0" if flag else ""))
        for i in range(n):
            w(f"    x{i}{s} = " + (f"x[{i}]" if one else f"X[{ln}, {i}]"))
        for j in range(m):
            uj = f"u[{j}]" if one else f"U[{ln}, {j}]"
            w(f"    v{j}{s} = {uj}")
            w(f"    if v{j}{s} > limits[{j}]:")
            w(f"        v{j}{s} = limits[{j}]")
            w(f"    elif v{j}{s} < -limits[{j}]:")
            w(f"        v{j}{s} = -limits[{j}]")
            if one:
                w(f"    work[5, {j}] = v{j}")
            w(f"    g{j}{s} = lam{j}{s} * " + (f"lsc[{j}] * v{j}" if one else f"v{j}{s}"))
        for i in range(n):
            parts = [f"{_lit(spec.B[i, j])} * g{j}{s}" for j in range(m) if spec.B[i, j] != 0.0]
            if one:
                parts += [f"dist[{j}]" for j in range(m) if spec.drives[j] == i]
            if i in bias:
                parts.append(f"b{i}{s}")
            if parts:
                w(f"    q{i}{s} = {' + '.join(parts)}")
        for (state, k), a in angles:
            w(f"    z{a}{s} = {_lit(k)} * x{state}{s}")
            if a in derived:  # multiple angle from the base pair: no library call
                b, mult = derived[a]
                multiple(f"cz{b}{s}", f"sz{b}{s}", mult, f"cz{a}{s}", f"sz{a}{s}", "    ")
                continue
            gate = "" if exact_cond[a] == "True" else f" if {exact_cond[a].format(s=s)} else 0.0"
            w(f"    cz{a}{s} = math.cos(z{a}{s}){gate}")
            w(f"    sz{a}{s} = math.sin(z{a}{s}){gate}")

    def deriv(src: str, dst: str) -> None:
        for s in LN:
            for (kind, state, _width), u in fac.items():
                v = f"{src}{state}{s}"
                expr = {"tanh": f"fast_tanh({v} * r{u}{s})", "abs": f"abs({v})",
                        "gauss": f"math.exp(-(({v} * r{u}{s}) * ({v} * r{u}{s})))"}[kind]
                w(f"        f{u}{s} = {expr}" + (f" if need{u}{s} else 0.0"
                                                    if _switched_off(spec, fusers[u]) else ""))
            for (state, k), a in angles:
                if a in derived:
                    b, mult = derived[a]
                    multiple(f"co{b}{s}", f"si{b}{s}", mult, f"co{a}{s}", f"si{a}{s}",
                             "        ")
                    continue
                near = (f"co{a}{s}, si{a}{s} = trig_near({_lit(k)} * {src}{state}{s}, "
                        f"z{a}{s}, cz{a}{s}, sz{a}{s})")
                if exact_cond[a] == "True":
                    w(f"        {near}")
                    continue
                w(f"        if {exact_cond[a].format(s=s)}:")
                w(f"            {near}")
                w("        else:")
                w(f"            co{a}{s} = 0.0")
                w(f"            si{a}{s} = 0.0")
            cheap: list[list[str]] = [[] for _ in range(n)]
            costly: list[list[list[str]]] = [[] for _ in range(n)]
            for i in range(n):
                for j in range(n):
                    if (i, j) in linear:
                        cheap[i].append(f"c{i}_{j}{s} * {src}{j}{s}")
                    elif spec.A[i, j] == 1.0:
                        cheap[i].append(f"{src}{j}{s}")
                    elif spec.A[i, j] != 0.0:
                        cheap[i].append(f"{_lit(spec.A[i, j])} * {src}{j}{s}")
                if has_q[i]:
                    cheap[i].append(f"q{i}{s}")
            for t, term in enumerate(spec.terms):
                if term.coef == 0.0 or len(term.factors) == 0 or (
                        len(term.factors) == 1 and term.factors[0].kind == "x"):
                    continue  # folded into c{i}_{j} and q{i}
                fs = [(src + r[1:] if r.startswith("S") else r) + s for r in term_fac[t]]
                if all(r.startswith("S") for r in term_fac[t]):
                    cheap[term.row].append(" * ".join([f"p{t}{s}"] + fs))
                else:
                    costly[term.row].append([f"p{t}{s}"] + fs)
            slow = {r + s for refs in term_fac for r in refs if not r.startswith("S")}
            for i in range(n):
                w(f"        {dst}{i}{s} = {_row_sum(cheap[i], costly[i], slow)}")

    w("    h = dt / substeps")
    w("    hh = 0.5 * h")
    w("    h6 = h / 6.0")
    w("    for _ in range(substeps):")
    for src, dst, nxt, c in (("x", "ka", "y", "hh"), ("y", "kb", "y", "hh"),
                             ("y", "kc", "y", "h"), ("y", "kd", None, None)):
        deriv(src, dst)
        if nxt is not None:
            for s in LN:
                for i in range(n):
                    w(f"        y{i}{s} = x{i}{s} + {c} * {dst}{i}{s}")
    for s in LN:
        for i in range(n):
            w(f"        x{i}{s} = x{i}{s} + h6 * (ka{i}{s} + 2 * kb{i}{s} + 2 * kc{i}{s}"
              f" + kd{i}{s})")
    for s in LN:
        for i in range(n):
            w(f"    x[{i}] = x{i}" if one else f"    X[{s[1:]}, {i}] = x{i}{s}")
    return "\n".join(L) + "\n"


def _cache_dir() -> Path:
    base = os.environ.get("CORRAL_RIG_CACHE") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"),
        "corral", "rigs")
    return Path(base)


def module_source(spec: RigSpec, prelude: str = "", extra: str = "") -> str:
    """The generated module of a rig: `prelude`, its `plant_step`, `plant_step_lanes` and
    `plant_setup_lanes`, then `extra` (code a caller compiles against this rig's step: the
    runtime's dry-run loop and sweep kernel, `runtime.kernels.rigloops`, which read the
    rig's sizes `RIG_N` and `RIG_M` as compile-time constants)."""
    parts = ['"""Generated by sim_rigs.kernel.module_source for one rig; do not edit."""',
             "import math  # noqa: F401", "import numba", "import numpy as np  # noqa: F401",
             prelude, "",
             "from sim_rigs.kernel import fast_tanh, trig_near  # noqa: F401",
             "", "", "@numba.njit(cache=True)", step_source(spec),
             "", "@numba.njit(cache=True)", step_source(spec, LANES),
             "", "@numba.njit(cache=True)", setup_source(spec, LANES),
             f"RIG_N = {spec.n}\nRIG_M = {spec.m}\n", extra]
    return "\n".join(parts)


def load_generated(src: str, sources: tuple[Path, ...]) -> Any:
    """Import generated source `src` as a module, once a process. The module is written to
    a file named by a hash of its text, of the files its compiled code depends on
    (`sources`) and of numba's version, so numba's on-disk cache (keyed by file) is never
    stale: an edit anywhere in them gives a new file."""
    hsh = hashlib.sha256(src.encode())
    for path in sources:
        hsh.update(path.read_bytes())
    hsh.update(numba.__version__.encode())
    key = hsh.hexdigest()[:20]
    mod = _COMPILED.get(key)
    if mod is not None:
        return mod
    d = _cache_dir()
    d.mkdir(parents=True, exist_ok=True)
    path = d / f"rig_{key}.py"
    if not path.exists():
        tmp = d / f".rig_{key}.{os.getpid()}.tmp"
        tmp.write_text(src)
        os.replace(tmp, path)
    name = f"corral_rig_{key}"
    ispec = importlib.util.spec_from_file_location(name, path)
    assert ispec is not None and ispec.loader is not None
    mod = importlib.util.module_from_spec(ispec)
    sys.modules[name] = mod
    ispec.loader.exec_module(mod)
    _COMPILED[key] = mod
    return mod


def compiled(spec: RigSpec) -> Any:
    """The rig's generated plant module (`plant_step`, `plant_step_lanes`,
    `plant_setup_lanes`), compiled once and cached on disk (`load_generated`)."""
    root = Path(__file__).resolve().parents[1]
    return load_generated(module_source(spec), tuple(root / rel for rel in _SOURCES))


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
        self._step = compiled(plant.spec).plant_step
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
        self._step(x, self._u, self.code, self.mat, self.prm, self.limits, float(dt),
                   int(p.substeps), lsc, dist, self.work)
        p.x[0] = x
        return tuple(float(v) for v in self.work[5, :m])
