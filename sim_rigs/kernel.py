"""The compiled plant: ONE numba kernel that interprets a rig's term table.

`pack_rig(spec)` codes a rig (`sim_rigs.rigfile.RigSpec`) into two flat arrays,
the way `runtime.fast` codes a basis:

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

import hashlib
import importlib.util
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


# ------------------------------------------------------------------ the generated plant
TRANSCENDENTAL = ("sin", "cos", "tanh", "gauss", "abs")
_TEMPLATES = {"dry_run_loop": "@numba.njit(cache=True)",
              "sweep_kernel": "@numba.njit(parallel=True, cache=True)"}
_SOURCES = ("runtime/fast.py", "runtime/watchdog.py", "sim_rigs/kernel.py")
_COMPILED: dict[str, Any] = {}


def _lit(v: float) -> str:
    return repr(float(v))


def step_source(spec: RigSpec) -> str:
    """Python source of ``plant_step(x, u, code, mat, prm, limits, dt, substeps, lsc, dist,
    work)`` for this rig: the term table unrolled into straight-line code.

    Per call: the inputs saturated (applied values into work[5, :m]), then the
    constants of the step (Lambda_j lsc_j v_j pushed through B plus the disturbance, per
    row; coef * param per term; 1 / width per parameter width; whether a parameterised
    transcendental factor is needed at all), then RK4 with substeps on scalar locals:
    each stage evaluates each distinct factor once and adds each term into its row.
    ``code`` and ``mat`` are accepted and ignored (the rig is in the code itself).
    """
    n, m = spec.n, spec.m
    names = list(spec.params)
    L: list[str] = ["def plant_step(x, u, code, mat, prm, limits, dt, substeps, lsc, dist, work):"]
    w = L.append
    for j in range(m):
        w(f"    v{j} = u[{j}]")
        w(f"    if v{j} > limits[{j}]:")
        w(f"        v{j} = limits[{j}]")
        w(f"    elif v{j} < -limits[{j}]:")
        w(f"        v{j} = -limits[{j}]")
        w(f"    work[5, {j}] = v{j}")
        e = spec.effectiveness[j]
        lam = f"prm[{names.index(e)}] * " if e is not None else ""
        w(f"    g{j} = {lam}lsc[{j}] * v{j}")
    # the input part of each row (constant over the step)
    for i in range(n):
        parts = [f"{_lit(spec.B[i, j])} * g{j}" for j in range(m) if spec.B[i, j] != 0.0]
        parts += [f"dist[{j}]" for j in range(m) if spec.drives[j] == i]
        w(f"    q{i} = {' + '.join(parts) if parts else '0.0'}")
    # distinct factors, term constants
    fac: dict[tuple[Any, ...], int] = {}
    users: dict[int, list[int]] = {}
    term_fac: list[list[str]] = []
    for t, term in enumerate(spec.terms):
        if term.param is not None:
            w(f"    p{t} = {_lit(term.coef)} * prm[{names.index(term.param)}]")
        else:
            w(f"    p{t} = {_lit(term.coef)}")
        refs = []
        for f in term.factors:
            if f.kind == "x":
                refs.append(f"S{f.state}")
                continue
            key = (f.kind, f.state, float(f.k), f.width)
            if key not in fac:
                fac[key] = len(fac)
            u = fac[key]
            users.setdefault(u, []).append(t)
            refs.append(f"f{u}")
        term_fac.append(refs)
    for (kind, _state, _k, width), u in fac.items():
        if kind in ("tanh", "gauss"):
            if isinstance(width, str):
                w(f"    r{u} = 1.0 / prm[{names.index(width)}]")
            else:
                w(f"    r{u} = {_lit(1.0 / float(width))}")
        guarded = all(spec.terms[t].param is not None for t in users[u])
        cond = " or ".join(f"p{t} != 0.0" for t in users[u]) if guarded else "True"
        w(f"    need{u} = {cond}")

    def deriv(src: str, dst: str) -> None:
        # S{i} in the factor/term text stands for the stage's state
        for (kind, state, k, _width), u in fac.items():
            s = f"{src}{state}"
            expr = {"sin": f"math.sin({_lit(k)} * {s})", "cos": f"math.cos({_lit(k)} * {s})",
                    "tanh": f"math.tanh({s} * r{u})", "abs": f"abs({s})",
                    "gauss": f"math.exp(-(({s} * r{u}) * ({s} * r{u})))"}[kind]
            w(f"        f{u} = {expr} if need{u} else 0.0")
        rows: list[list[str]] = [[] for _ in range(n)]
        for i in range(n):
            rows[i] += [f"{_lit(spec.A[i, j])} * {src}{j}" for j in range(n)
                        if spec.A[i, j] != 0.0]
            rows[i].append(f"q{i}")
        for t, term in enumerate(spec.terms):
            if term.coef == 0.0:
                continue
            prod = " * ".join([f"p{t}"] + [r.replace("S", src) if r.startswith("S") else r
                                           for r in term_fac[t]])
            rows[term.row].append(prod)
        for i in range(n):
            w(f"        {dst}{i} = {' + '.join(rows[i])}")

    w("    h = dt / substeps")
    w("    hh = 0.5 * h")
    w("    h6 = h / 6.0")
    for i in range(n):
        w(f"    x{i} = x[{i}]")
    w("    for _ in range(substeps):")
    deriv("x", "ka")
    for i in range(n):
        w(f"        y{i} = x{i} + hh * ka{i}")
    deriv("y", "kb")
    for i in range(n):
        w(f"        y{i} = x{i} + hh * kb{i}")
    deriv("y", "kc")
    for i in range(n):
        w(f"        y{i} = x{i} + h * kc{i}")
    deriv("y", "kd")
    for i in range(n):
        w(f"        x{i} = x{i} + h6 * (ka{i} + 2 * kb{i} + 2 * kc{i} + kd{i})")
    for i in range(n):
        w(f"    x[{i}] = x{i}")
    return "\n".join(L) + "\n"


def _cache_dir() -> Path:
    base = os.environ.get("CORRAL_RIG_CACHE") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"),
        "corral", "rigs")
    return Path(base)


def module_source(spec: RigSpec) -> str:
    """The generated module of a rig: its `plant_step` and the loops that call it (the
    text of `runtime.fast`'s templates, compiled here against this rig's step)."""
    import inspect

    from runtime import fast

    parts = ['"""Generated by sim_rigs.kernel.module_source for one rig; do not edit."""',
             "import math  # noqa: F401", "import numba", "import numpy as np  # noqa: F401",
             "import runtime.fast as _fast",
             "globals().update({k: v for k, v in vars(_fast).items()"
             " if not k.startswith('__')})", "",
             "", "@numba.njit(cache=True)", step_source(spec)]
    for name, deco in _TEMPLATES.items():
        parts += ["", deco, inspect.getsource(getattr(fast, name))]
    return "\n".join(parts)


def compiled(spec: RigSpec) -> Any:
    """The rig's generated module (`plant_step`, `dry_run_loop`, `sweep_kernel`), once a
    process per rig. The module is written to a file named by a hash of its own text and
    of the sources its compiled code depends on (`_SOURCES`), so numba's on-disk cache
    (keyed by file) is never stale: an edit anywhere in them gives a new file."""
    src = module_source(spec)
    root = Path(__file__).resolve().parents[1]
    hsh = hashlib.sha256(src.encode())
    for rel in _SOURCES:
        hsh.update((root / rel).read_bytes())
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
