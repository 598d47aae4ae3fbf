"""The sweep's engines: the per-process setup, the rule bookkeeping and the two engines.

`run_chunk` runs one chunk of plants in this process (the local sweep and the cluster's
workers call it); `sweep_compiled` runs every plant through the compiled kernel on numba
threads. ``compiled``: `runtime.kernels.fast.sweep_kernel` compiled per rig
(`runtime.kernels.rigloops`); ``reference``: `AdaptiveLaw.step` and `RigPlant.step` (numpy)
over the batch, its rules kept by `_Rules` one block of ticks at a time. Both take the
watchdog's rules from `runtime.guard.watchdog` (`sweep_levels`: thresholds and on-delays;
`over`: the comparison).

What does not live here: settings and plants (`runtime.offline.sweep_settings`), the
summary and `run_sweep` (`runtime.offline.sweep`).
"""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.guard.watchdog import build_rules, over, sweep_levels
from runtime.method.commands import schedule_from_config, tracked_names
from runtime.method.design import Design, design_from_config
from runtime.method.law import AdaptiveLaw
from runtime.method.modifiers import modifiers_from_config
from runtime.offline.dryrun import eps_schedule, plant_from_config
from runtime.offline.sweep_settings import RULES, Array, Columns, Progress, SweepSettings
from sim_rigs.plant import RigPlant

BLOCK = 64
"""Ticks between rule bookkeeping passes (buffers hold one block)."""


# ------------------------------------------------------------------ per-process setup
@dataclass
class _Setup:
    design: Design
    settings: SweepSettings
    cmd: Array
    eps_t: Array
    x0: Array
    sensors: Any
    modifiers: list[Any]
    engine: str
    packed: tuple[Any, Any] | None = None
    """(ic, fc) of `runtime.kernels.fast.pack_law` when the compiled engine can run this design."""
    levels: dict[str, float] = field(default_factory=dict)
    """From the live rule set (`runtime.guard.watchdog.sweep_levels`): margin, clamp, breach
    ratios, the saturation threshold in ticks, and ``<rule>_delay``, each on-delay in ticks."""


_SETUP_CACHE: dict[str, _Setup] = {}


def _compiled_packing(design: Design, mods: Sequence[Any]) -> tuple[Any, str]:
    """((ic, fc), "") when the compiled engine can run this design, else (None, why)."""
    rig = design.rig
    if rig.spec is None:
        return None, "it needs a simulated rig."
    try:  # deferred: numba and the kernels are heavy, and the reference engine needs neither
        from runtime.kernels import fast
    except ImportError:  # pragma: no cover - numba is a dependency
        return None, "numba is not installed."
    try:
        return fast.pack_law(design, fast.ModifierSettings.from_modifiers(mods, rig.m)), ""
    except ValueError as exc:
        return None, str(exc)


def _setup(raw: dict[str, Any], settings: SweepSettings) -> _Setup:
    key = json.dumps([raw, settings.__dict__], sort_keys=True, default=str)
    if key in _SETUP_CACHE:
        return _SETUP_CACHE[key]
    cfg = Config(raw=raw)
    design = design_from_config(cfg)
    rig = design.rig
    schedule = schedule_from_config(cfg, tracked_names(rig.C, rig.states))
    ticks = max(1, int(round(settings.duration / design.Ts)))
    t = np.arange(ticks, dtype=np.float64) * design.Ts
    cmd = np.ascontiguousarray(schedule.evaluate(t), dtype=float)
    eps_t = eps_schedule(cfg, design, t)
    plant = plant_from_config(cfg, design)
    mods = list(modifiers_from_config(cfg, design))
    packed, why = _compiled_packing(design, mods)
    engine = settings.engine
    if engine == "auto":
        engine = "compiled" if packed is not None else "reference"
    if engine == "compiled" and packed is None:
        raise ConfigError("sweep.engine", f"the compiled engine cannot run this config: {why}",
                          'use engine "reference" (or "auto", which falls back by itself).')
    lv = sweep_levels(build_rules(cfg, design.Ts, design.clamp_margin), design.Ts)
    # the bound itself (ratio 1) is watched like a rule without an on-delay
    levels = {**lv, "breach": 1.0, "breach_delay": 0.0}
    out = _Setup(design, settings, cmd, eps_t, np.array(plant.x[0]), plant.sensors, mods,
                 engine, packed, levels)
    _SETUP_CACHE.clear()
    _SETUP_CACHE[key] = out
    return out


# ------------------------------------------------------------------ rule bookkeeping
HELD = ("margin", "clamp", "breach", "saturation")
"""The rules counted in ticks held, against their on-delays (as the compiled kernel's
`runtime.kernels.fast.HELD_RULES`)."""


def _over(value: Any, threshold: Any) -> Any:
    """`runtime.guard.watchdog.over` element by element."""
    with np.errstate(invalid="ignore"):
        return np.vectorize(over, otypes=[bool])(value, threshold)


def _runs(hit: NDArray[np.bool_], carry: Array) -> Array:
    """Ticks in a row each condition has held up to each tick (hit (K, ...) over the block),
    continuing the run `carry` (...) from the block before."""
    idx = np.arange(hit.shape[0]).reshape((-1,) + (1,) * (hit.ndim - 1))
    last = np.maximum.accumulate(np.where(hit, -1, idx), axis=0)
    return np.where(last < 0, idx + 1 + carry, idx - last).astype(float)


class _Rules:
    """First tick of each rule per plant, fed one block of ticks at a time."""

    def __init__(self, B: int, design: Design, settings: SweepSettings,
                 levels: dict[str, float]) -> None:
        self.B = B
        self.max_ratio = np.zeros(B)
        self.first = {r: np.full(B, -1, dtype=np.int64)
                      for r in (*RULES, "breach", "diverged", "weights")}
        self.levels = {k: levels[k] for k in ("margin", "clamp", "breach")}
        self.delays = {k: levels[f"{k}_delay"] for k in HELD}
        self.u_max = design.rig.input_limits[:, None]
        self.sat_ticks = levels["saturation_ticks"]
        self.w_limit = settings.weight_norm_limit
        self.carry = np.zeros((design.rig.m, B))
        self.held = {k: np.zeros(B) for k in HELD}
        self.bound = settings.divergence_factor * design.state_range

    def _trip(self, rule: str, k0: int, hit: NDArray[np.bool_]) -> None:
        """The rule trips where its condition (K, B) has held past its on-delay."""
        run = _runs(hit, self.held[rule])
        self.held[rule] = run[-1]
        due = run > self.delays[rule]
        first = self.first[rule]
        newly = (first < 0) & due.any(axis=0)
        if newly.any():
            first[newly] = k0 + np.argmax(due[:, newly], axis=0)

    def block(self, k0: int, R: Array, C: NDArray[np.bool_], UR: Array) -> None:
        """R (K, B) ratios, C (K, B) phi_d clamp engaged and UR (K, m, B) raw inputs of ticks
        k0 .. k0+K-1. The signals as the live watchdog's rules define them: margin and
        breach the ratio, clamp the ratio while clamped (else 0), saturation ticks at the
        limit."""
        blockmax = np.max(np.where(np.isfinite(R), R, -np.inf), axis=0)
        np.fmax(self.max_ratio, blockmax, out=self.max_ratio)
        self._trip("margin", k0, _over(R, self.levels["margin"]))
        self._trip("clamp", k0, _over(np.where(C, R, 0.0), self.levels["clamp"]))
        self._trip("breach", k0, _over(R, self.levels["breach"]))
        bad = ~np.isfinite(R) | ~np.isfinite(UR).all(axis=1)
        first = self.first["nonfinite"]
        newly = (first < 0) & bad.any(axis=0)
        if newly.any():
            first[newly] = k0 + np.argmax(bad[:, newly], axis=0)
        run = _runs(_over(np.abs(UR), self.u_max), self.carry)  # (K, m, B)
        self.carry = run[-1]
        self._trip("saturation", k0, _over(run + 1e-9, self.sat_ticks).any(axis=1))

    def state(self, k: int, x: Array, w_norm: Array) -> None:
        """Divergence checks after tick k: the true state x (n, B), the weight norms (B,)."""
        bad = ~(np.abs(x) <= self.bound[:, None]).all(axis=0)
        first = self.first["diverged"]
        newly = (first < 0) & bad
        if newly.any():
            first[newly] = k
        bad = ~(w_norm <= self.w_limit)
        first = self.first["weights"]
        newly = (first < 0) & bad
        if newly.any():
            first[newly] = k

    def result(self) -> Columns:
        out: Columns = {f"first_{r}": v for r, v in self.first.items()}
        ratio = self.max_ratio.copy()
        ratio[self.first["nonfinite"] >= 0] = np.inf
        out["max_ratio"] = ratio
        return out


# ------------------------------------------------------------------ the reference engine
def _run_reference(setup: _Setup, prm: Columns, rng: np.random.Generator,
                   ) -> Columns:
    d = setup.design
    st = setup.settings
    B = len(next(iter(prm.values())))
    m = d.rig.m
    sens = setup.sensors
    sensors = sens if st.noise else sens.noiseless()
    plant = RigPlant.create(d.rig.spec, prm, batch=B, x0=setup.x0, sensors=sensors,
                            substeps=st.substeps, rng=rng,
                            limits=np.asarray(d.rig.input_limits, dtype=float))
    law = AdaptiveLaw(d, setup.modifiers)
    rules = _Rules(B, d, st, setup.levels)
    R = np.empty((BLOCK, B))
    C = np.empty((BLOCK, B), dtype=bool)
    UR = np.empty((BLOCK, m, B))
    lat = st.latency_ticks
    ubuf = np.zeros((lat + 1, B, m))
    y = plant.measure()
    state = law.init_state(y)
    blk = 0
    k_block0 = 0
    ticks = len(setup.cmd)
    with np.errstate(all="ignore"):
        for k in range(ticks):
            out = law.step(state, y, setup.cmd[k], setup.eps_t[k])
            R[blk] = out.ratio
            C[blk] = out.clamped
            UR[blk] = out.u_raw.T
            ubuf[k % (lat + 1)] = out.u
            plant.step(ubuf[(k - lat) % (lat + 1)] if k >= lat else np.zeros((B, m)), d.Ts)
            y = plant.measure()
            blk += 1
            if blk == BLOCK or k == ticks - 1:
                rules.block(k_block0, R[:blk], C[:blk], UR[:blk])
                rules.state(k, plant.x.T, np.sqrt(np.sum(state.W * state.W, axis=(-2, -1))))
                blk = 0
                k_block0 = k + 1
    return rules.result()


# ------------------------------------------------------------------ the compiled engine
def _run_compiled(setup: _Setup, prm: Columns, plant_ids: NDArray[np.int64],
                  noise_given: Array | None = None) -> Columns:
    """Plants `plant_ids` through `runtime.kernels.fast.sweep_kernel` (threads: numba's current
    count).

    Noise: each plant's own stream keyed by (seed, plant id), or `noise_given`
    (B, ticks + 1, 4) standard normals (tests use it to replay another engine's draws).
    """
    # deferred: numba and the kernels are heavy, and the reference engine needs neither
    from runtime.kernels import fast, rigloops
    from sim_rigs import kernel

    d = setup.design
    st = setup.settings
    sens = setup.sensors
    spec = d.rig.spec
    B = len(plant_ids)
    assert setup.packed is not None, "the fused engine runs only on a packed plant"
    ic, fc = setup.packed
    pcode, pmat = kernel.pack_rig(spec)
    P = kernel.pack_params(spec, {k: np.broadcast_to(np.asarray(prm[k], dtype=float), (B,))
                                  for k in spec.params})
    noisy = st.noise and bool(np.any(sens.noise > 0))
    mode = fast.NOISE_OFF if not noisy else (
        fast.NOISE_STREAM if noise_given is None else fast.NOISE_GIVEN)
    given = np.zeros((1, 1, 1)) if noise_given is None else np.ascontiguousarray(
        noise_given, dtype=float)
    lv = setup.levels
    assert tuple(fast.HELD_RULES) == HELD
    levels = np.array([lv["margin"], lv["clamp"], lv["breach"]])
    delays = np.array([int(lv[f"{r}_delay"]) for r in HELD], dtype=np.int64)
    assert ic[fast.I_N] == spec.n and ic[fast.I_M] == spec.m, "the law and the rig differ"
    first = np.empty((B, len(fast.SWEEP_RULES)), dtype=np.int64)
    max_ratio = np.empty(B)
    rigloops.compiled(spec).sweep_kernel(
        setup.cmd, setup.eps_t, np.ascontiguousarray(setup.x0, dtype=float), pcode, pmat, P,
        np.ascontiguousarray(plant_ids, dtype=np.int64), int(st.seed), int(st.substeps),
        np.asarray(d.rig.input_limits, dtype=float),
        np.ascontiguousarray(sens.resolution, dtype=float),
        np.ascontiguousarray(sens.noise, dtype=float), int(sens.delay_ticks),
        int(st.latency_ticks), mode, given, ic, fc, levels, delays,
        float(lv["saturation_ticks"]), np.asarray(st.divergence_factor * d.state_range,
                                                  dtype=float),
        float(st.weight_norm_limit), first, max_ratio)
    out: Columns = {f"first_{r}": first[:, j].copy() for j, r in enumerate(fast.SWEEP_RULES)}
    max_ratio[out["first_nonfinite"] >= 0] = np.inf
    out["max_ratio"] = max_ratio
    return out


def _compiled_threads(workers: int) -> int:
    import numba  # deferred: heavy, the compiled engine only

    return max(1, min(int(workers), int(numba.config.NUMBA_NUM_THREADS)))


def run_chunk(raw: dict[str, Any], settings: SweepSettings, prm: Columns,
              chunk_index: int, plant_ids: NDArray[np.int64] | None = None) -> Columns:
    """Simulate one chunk of plants (in this process); per-plant result arrays.

    The compiled engine keys each plant's noise stream by its number: `plant_ids`
    (the plants' indices in the whole sweep, as `run_sweep` numbers them, so a chunk
    run elsewhere gives the same plant the same noise), by default 0.. in the chunk.
    """
    setup = _setup(raw, settings)
    rng = np.random.default_rng([settings.seed, chunk_index])
    prm = {k: np.ascontiguousarray(v, dtype=float) for k, v in prm.items()}
    if setup.engine == "compiled":
        B = len(next(iter(prm.values())))
        ids = np.arange(B, dtype=np.int64) if plant_ids is None else np.ascontiguousarray(
            plant_ids, dtype=np.int64)
        return _run_compiled(setup, prm, ids)
    return _run_reference(setup, prm, rng)


def sweep_compiled(setup: _Setup, truth: Columns, progress: Progress | None,
                    ) -> tuple[dict[int, Columns], int, float, float]:
    """All plants through the compiled kernel on numba threads, in plant slices so the
    progress bar moves; returns (results by slice start, slice size, wall, compile) seconds."""
    import numba  # deferred: heavy, the compiled engine only

    settings = setup.settings
    N = settings.plants
    threads = _compiled_threads(settings.workers)
    before = numba.get_num_threads()
    numba.set_num_threads(threads)
    results: dict[int, Columns] = {}
    try:
        t0 = time.perf_counter()
        short = _Setup(**{**setup.__dict__, "cmd": setup.cmd[:1], "eps_t": setup.eps_t[:1]})
        _run_compiled(short, {k: v[:1] for k, v in truth.items()}, np.zeros(1, np.int64))
        compile_s = time.perf_counter() - t0  # compiling, or loading numba's cache
        cs = min(settings.chunk, max(4 * threads, -(-N // 20)))
        wall0 = time.perf_counter()
        # dynamic scheduling, one group of plants at a time: on a shared machine a thread
        # that loses its core does not hold the others up at the end of a slice
        with numba.parallel_chunksize(1):
            for s in range(0, N, cs):
                ids = np.arange(s, min(N, s + cs), dtype=np.int64)
                results[s] = _run_compiled(setup, {k: v[ids] for k, v in truth.items()}, ids)
                if progress:
                    progress(int(ids[-1]) + 1, N)
        wall = time.perf_counter() - wall0
    finally:
        numba.set_num_threads(before)
    return results, cs, wall, compile_s
