"""Rig description files: a simulated rig written as data (TOML).

A rig file names the rig's states, inputs, units and limits, its nominal
linear model (A, B, C), and its simulated truth: the nominal model plus
matched uncertainty written as a table of named terms, the motor
effectiveness of each input, the input saturation and the sensor model. The
built-in rigs are files in ``sim_rigs/rigs/`` read by the same loader as a
user's file. The format, field by field (units in brackets):

``name``, ``description``
    Strings.
``[[state]]`` (one table per state, in state order)
    ``name``, ``unit``, ``limit`` (|x_i| the rig can reach [state unit]: a sweep calls a plant
    diverged beyond ``sweep.divergence_factor`` times ``design.state_range``; ``limit`` is the
    default of ``design.state_range``), optional ``measured`` (default true).
``[[input]]`` (one table per input)
    ``name``, ``unit``, ``limit`` (the drive saturates at +-limit [input unit]),
    optional ``effectiveness`` (the name of a parameter Lambda_j: the plant applies
    Lambda_j times the saturated input; absent: 1), optional ``drives`` (the state row a
    disturbance fault on this input adds to; default the row where B[:, j] is largest).
``[nominal]``
    ``A`` (n x n), ``B`` (n x m), ``C`` (p x n, the tracked outputs): what the design uses.
``[params]``
    ``NAME = { value = ..., unit = "...", range = [lo, hi], doc = "..." }`` (``range``
    optional: the interval a sweep draws the parameter from, uniformly). One parameter may
    feed several terms.
``[[term]]``
    One matched-uncertainty term, an acceleration added to state row ``row``:
    ``param * coef * product(factors)``. ``param`` (a parameter name; absent: 1), ``coef``
    (a number, default 1), ``factors`` (a list, empty: a bias). Each factor is a string
    ``"STATE"``, ``"sin:STATE"``, ``"cos:STATE"``, ``"abs:STATE"``, or a table
    ``{ kind = "sin" | "cos", state = "...", k = 2.0 }`` (sin(k x)), or
    ``{ kind = "tanh" | "gauss", state = "...", width = NUMBER or PARAMETER }``
    (tanh(x / width), exp(-(x / width)^2)). Products of states, stick-slip friction
    (gauss times tanh) and linear cross-coupling (another state's row) are all terms.
``[sensors]``
    Named sensor settings (numbers, e.g. ``angle_noise = 2e-5``) and ``delay_ticks``
    (whole ticks); ``[sensors.channels]`` maps each measured state to
    ``{ resolution = NAME or NUMBER, noise = NAME or NUMBER }`` (quantum and noise
    standard deviation in the state's unit; absent: exact). A config's ``[plant.sensors]``
    overrides the named settings, ``[plant.truth]`` the parameter values and
    ``[plant.ranges]`` the ranges.

Errors are `RigFileError` (field, problem, fix); the runtime turns them into its one-line
config errors. What does not live here: the plant itself (`sim_rigs.plant`), the compiled
kernel (`sim_rigs.kernel`).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

BUILTIN_DIR = Path(__file__).parent / "rigs"
FACTOR_KINDS = ("x", "sin", "cos", "tanh", "gauss", "abs")
"""Factor kinds, in the order of their kernel codes (`sim_rigs.kernel`)."""


class RigFileError(ValueError):
    """A rig description problem: the field, what is wrong, how to fix it."""

    def __init__(self, field: str, problem: str, fix: str = "") -> None:
        super().__init__(f"{field}: {problem}")
        self.field = field
        self.problem = problem
        self.fix = fix


@dataclass(frozen=True)
class Param:
    """A named plant parameter: its truth value, unit, sweep range and meaning."""

    value: float
    unit: str = "1"
    range: tuple[float, float] | None = None
    doc: str = ""


@dataclass(frozen=True)
class Factor:
    """One factor of a term: kind (`FACTOR_KINDS`), state index, frequency k, width."""

    kind: str
    state: int
    k: float = 1.0
    width: float | str = 1.0
    """A number, or the name of a parameter (so a sweep can draw it)."""


@dataclass(frozen=True)
class Term:
    """An acceleration on state row `row`: param * coef * product(factors)."""

    row: int
    param: str | None
    coef: float
    factors: tuple[Factor, ...]


@dataclass(frozen=True)
class RigSpec:
    """A simulated rig, as read from its description."""

    name: str
    description: str
    states: tuple[str, ...]
    state_units: tuple[str, ...]
    state_limits: tuple[float, ...]
    measured: tuple[bool, ...]
    inputs: tuple[str, ...]
    input_units: tuple[str, ...]
    input_limits: tuple[float, ...]
    A: Array
    B: Array
    C: Array
    params: dict[str, Param]
    terms: tuple[Term, ...]
    effectiveness: tuple[str | None, ...]
    drives: tuple[int, ...]
    sensor_settings: dict[str, float]
    sensor_channels: tuple[tuple[float | str, float | str], ...]
    """(resolution, noise) per state: a number or a sensor setting's name."""
    delay_ticks: int = 0
    source: str = ""
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def n(self) -> int:
        """Number of states."""
        return len(self.states)

    @property
    def m(self) -> int:
        """Number of inputs."""
        return len(self.inputs)

    def nominal_model(self) -> tuple[Array, Array, Array]:
        """Copies of the nominal (A, B, C)."""
        return self.A.copy(), self.B.copy(), self.C.copy()

    @property
    def truth_defaults(self) -> dict[str, float]:
        """Every parameter at its truth value."""
        return {k: p.value for k, p in self.params.items()}

    @property
    def param_units(self) -> dict[str, str]:
        """Every parameter's unit."""
        return {k: p.unit for k, p in self.params.items()}

    @property
    def ranges(self) -> dict[str, tuple[float, float]]:
        """The sweep ranges the rig file gives."""
        return {k: p.range for k, p in self.params.items() if p.range is not None}


# ------------------------------------------------------------------ reading
def _num(where: str, v: Any, positive: bool = False) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        raise RigFileError(where, f"must be a finite number, got {v!r}.", "write a number.")
    if positive and not v > 0:
        raise RigFileError(where, f"must be positive, got {v!r}.", "write a number > 0.")
    return float(v)


def _str(where: str, v: Any) -> str:
    if not isinstance(v, str) or not v:
        raise RigFileError(where, f"must be a non-empty string, got {v!r}.", 'write e.g. "az".')
    return v


def _matrix(where: str, v: Any, shape: tuple[int, int]) -> Array:
    try:
        a = np.array(v, dtype=float)
    except (TypeError, ValueError):
        raise RigFileError(where, f"must be a matrix of numbers, got {v!r}.",
                           f"write a list of {shape[0]} rows of {shape[1]} numbers.") from None
    if a.ndim == 1 and shape[0] == 1:
        a = a[None, :]
    if a.shape != shape or not np.all(np.isfinite(a)):
        raise RigFileError(where, f"must be a {shape[0]} x {shape[1]} matrix of finite numbers, "
                           f"got shape {a.shape}.",
                           f"write a list of {shape[0]} rows of {shape[1]} numbers.")
    return a


def _tables(where: str, v: Any) -> list[dict[str, Any]]:
    if not isinstance(v, list) or not v or not all(isinstance(t, dict) for t in v):
        raise RigFileError(where, "must be one or more tables.",
                           f"write [[{where}]] once per entry.")
    return v


def _known(where: str, table: dict[str, Any], keys: tuple[str, ...]) -> None:
    for k in table:
        if k not in keys:
            raise RigFileError(f"{where}.{k}", "is not a key of this table.",
                               f"use one of: {', '.join(keys)}.")


def _state_index(where: str, name: Any, states: tuple[str, ...]) -> int:
    if name not in states:
        raise RigFileError(where, f"names no state of this rig ({name!r}).",
                           f"use one of: {', '.join(states)}.")
    return states.index(name)


def _factor(where: str, v: Any, states: tuple[str, ...], params: dict[str, Param]) -> Factor:
    if isinstance(v, str):
        kind, _, state = v.partition(":")
        if not state:
            kind, state = "x", kind
        if kind not in ("x", "sin", "cos", "abs"):
            raise RigFileError(where, f"unknown factor {v!r}.",
                               'write "STATE", "sin:STATE", "cos:STATE", "abs:STATE" or a '
                               'table { kind = "tanh", state = "...", width = ... }.')
        return Factor(kind, _state_index(where, state, states))
    if not isinstance(v, dict):
        raise RigFileError(where, f"must be a string or a table, got {v!r}.",
                           'write e.g. "cos:el" or { kind = "tanh", state = "az_rate", '
                           'width = 0.02 }.')
    _known(where, v, ("kind", "state", "k", "width"))
    kind = v.get("kind", "x")
    if kind not in FACTOR_KINDS:
        raise RigFileError(f"{where}.kind", f"unknown factor kind {kind!r}.",
                           f"use one of: {', '.join(FACTOR_KINDS)}.")
    index = _state_index(f"{where}.state", v.get("state"), states)
    k = _num(f"{where}.k", v.get("k", 1.0))
    width: float | str = 1.0
    if kind in ("tanh", "gauss"):
        if "width" not in v:
            raise RigFileError(f"{where}.width", f"a {kind} factor needs a width.",
                               "write width = a number (the state's unit) or a parameter name.")
        w = v["width"]
        if isinstance(w, str):
            if w not in params:
                raise RigFileError(f"{where}.width", f"names no parameter ({w!r}).",
                                   f"use a number or one of: {', '.join(params)}.")
            pw = params[w]
            lowest = min(pw.value, pw.range[0]) if pw.range is not None else pw.value
            if not lowest > 0:
                raise RigFileError(f"params.{w}", f"is the width of a {kind} factor "
                                   f"({where}) but can be {lowest:g}.",
                                   "give it a positive value and range (a width divides "
                                   "the state).")
            width = w
        else:
            width = _num(f"{where}.width", w, positive=True)
    return Factor(kind, index, k, width)


def rig_from_dict(raw: dict[str, Any], source: str = "") -> RigSpec:
    """A `RigSpec` from a parsed rig description (see the module docstring)."""
    _known("rig", raw, ("name", "description", "state", "input", "nominal", "params", "term",
                        "sensors"))
    name = _str("name", raw.get("name", Path(source).stem or "rig"))
    states: list[str] = []
    sunits: list[str] = []
    slimits: list[float] = []
    measured: list[bool] = []
    for i, t in enumerate(_tables("state", raw.get("state"))):
        w = f"state[{i}]"
        _known(w, t, ("name", "unit", "limit", "measured", "doc"))
        states.append(_str(f"{w}.name", t.get("name")))
        sunits.append(str(t.get("unit", "1")))
        slimits.append(_num(f"{w}.limit", t.get("limit", 1.0), positive=True))
        measured.append(bool(t.get("measured", True)))
    if len(set(states)) != len(states):
        raise RigFileError("state", "two states have the same name.", "give each a new name.")
    st = tuple(states)
    n = len(st)
    params: dict[str, Param] = {}
    praw = raw.get("params", {})
    if not isinstance(praw, dict):
        raise RigFileError("params", "must be a table.", "write [params] NAME = { value = ... }.")
    for pname, p in praw.items():
        w = f"params.{pname}"
        if isinstance(p, int | float) and not isinstance(p, bool):
            p = {"value": p}
        if not isinstance(p, dict):
            raise RigFileError(w, f"must be a number or a table, got {p!r}.",
                               'write NAME = { value = 1.0, unit = "1/s", range = [lo, hi] }.')
        _known(w, p, ("value", "unit", "range", "doc"))
        rng = p.get("range")
        if rng is not None:
            if not (isinstance(rng, list) and len(rng) == 2):
                raise RigFileError(f"{w}.range", f"must be [lo, hi], got {rng!r}.",
                                   "write range = [lo, hi].")
            lo, hi = _num(f"{w}.range", rng[0]), _num(f"{w}.range", rng[1])
            if lo > hi:
                raise RigFileError(f"{w}.range", f"has lo > hi ({lo} > {hi}).", "swap them.")
            rng = (lo, hi)
        params[pname] = Param(_num(f"{w}.value", p.get("value")), str(p.get("unit", "1")),
                              rng, str(p.get("doc", "")))
    inputs: list[str] = []
    iunits: list[str] = []
    ilimits: list[float] = []
    eff: list[str | None] = []
    drives_raw: list[Any] = []
    for j, t in enumerate(_tables("input", raw.get("input"))):
        w = f"input[{j}]"
        _known(w, t, ("name", "unit", "limit", "effectiveness", "drives", "doc"))
        inputs.append(_str(f"{w}.name", t.get("name")))
        iunits.append(str(t.get("unit", "1")))
        ilimits.append(_num(f"{w}.limit", t.get("limit"), positive=True))
        e = t.get("effectiveness")
        if e is not None and e not in params:
            raise RigFileError(f"{w}.effectiveness", f"names no parameter ({e!r}).",
                               "add it under [params] or leave the key out (effectiveness 1).")
        eff.append(e)
        drives_raw.append(t.get("drives"))
    m = len(inputs)
    nom = raw.get("nominal")
    if not isinstance(nom, dict):
        raise RigFileError("nominal", "is missing.", "write [nominal] with A, B and C.")
    _known("nominal", nom, ("A", "B", "C"))
    A = _matrix("nominal.A", nom.get("A"), (n, n))
    B = _matrix("nominal.B", nom.get("B"), (n, m))
    C_raw = np.array(nom.get("C", []), dtype=object)
    p = 1 if C_raw.ndim == 1 else len(nom.get("C", []))
    C = _matrix("nominal.C", nom.get("C"), (p, n))
    drives = []
    for j, d in enumerate(drives_raw):
        drives.append(int(np.argmax(np.abs(B[:, j]))) if d is None
                      else _state_index(f"input[{j}].drives", d, st))
    terms: list[Term] = []
    for i, t in enumerate(raw.get("term", []) or []):
        w = f"term[{i}]"
        if not isinstance(t, dict):
            raise RigFileError(w, "must be a table.", "write [[term]] with row, param, factors.")
        _known(w, t, ("row", "param", "coef", "factors", "doc"))
        row = _state_index(f"{w}.row", t.get("row"), st)
        pn = t.get("param")
        if pn is not None and pn not in params:
            raise RigFileError(f"{w}.param", f"names no parameter ({pn!r}).",
                               f"add it under [params] or use one of: {', '.join(params)}.")
        facs = t.get("factors", [])
        if not isinstance(facs, list):
            raise RigFileError(f"{w}.factors", "must be a list.", 'write factors = ["cos:el"].')
        terms.append(Term(row, pn, _num(f"{w}.coef", t.get("coef", 1.0)),
                          tuple(_factor(f"{w}.factors[{k}]", f, st, params)
                                for k, f in enumerate(facs))))
    sens = raw.get("sensors", {}) or {}
    if not isinstance(sens, dict):
        raise RigFileError("sensors", "must be a table.", "write [sensors].")
    settings: dict[str, float] = {}
    delay = 0
    for k, v in sens.items():
        if k == "channels":
            continue
        if k == "delay_ticks":
            delay = int(_num("sensors.delay_ticks", v))
            continue
        settings[k] = _num(f"sensors.{k}", v)
        if settings[k] < 0:
            raise RigFileError(f"sensors.{k}", "must be >= 0.", "write a number >= 0.")
    channels: list[tuple[float | str, float | str]] = [(0.0, 0.0)] * n
    ch = sens.get("channels", {}) or {}
    for sname, spec in ch.items():
        w = f"sensors.channels.{sname}"
        i = _state_index(w, sname, st)
        if not isinstance(spec, dict):
            raise RigFileError(w, "must be a table.", "write { resolution = ..., noise = ... }.")
        _known(w, spec, ("resolution", "noise"))
        pair: list[float | str] = []
        for key in ("resolution", "noise"):
            v = spec.get(key, 0.0)
            if isinstance(v, str):
                if v not in settings:
                    raise RigFileError(f"{w}.{key}", f"names no sensor setting ({v!r}).",
                                       "add it under [sensors] or write a number.")
                pair.append(v)
            else:
                x = _num(f"{w}.{key}", v)
                if x < 0:
                    raise RigFileError(f"{w}.{key}", "must be >= 0.", "write a number >= 0.")
                pair.append(x)
        channels[i] = (pair[0], pair[1])
    return RigSpec(
        name=name, description=str(raw.get("description", "")), states=st,
        state_units=tuple(sunits), state_limits=tuple(slimits), measured=tuple(measured),
        inputs=tuple(inputs), input_units=tuple(iunits), input_limits=tuple(ilimits),
        A=A, B=B, C=C, params=params, terms=tuple(terms), effectiveness=tuple(eff),
        drives=tuple(drives), sensor_settings=settings, sensor_channels=tuple(channels),
        delay_ticks=delay, source=source)


def load_rig_file(path: str | Path) -> RigSpec:
    """Read and check a rig description file."""
    p = Path(path)
    if not p.is_file():
        raise RigFileError(str(path), "no such rig file.",
                           f"give the path of a rig TOML file, or a built-in rig "
                           f"({', '.join(builtin_names())}).")
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise RigFileError(str(path), f"cannot be read as TOML ({exc}).",
                           "fix the file (UTF-8 TOML).") from None
    try:
        return rig_from_dict(raw, str(p))
    except RigFileError as exc:
        raise RigFileError(f"{p.name}: {exc.field}", exc.problem, exc.fix) from None


def builtin_names() -> list[str]:
    """The built-in rigs (files in sim_rigs/rigs/)."""
    return sorted(f.stem for f in BUILTIN_DIR.glob("*.toml"))


_CACHE: dict[str, RigSpec] = {}


def resolve_rig(sim: Any, base: Path | None = None) -> RigSpec:
    """The rig `rig.sim` names: a built-in name, or a rig file path (relative to `base`)."""
    if not isinstance(sim, str) or not sim:
        raise RigFileError("rig.sim", f"must be a built-in rig name or a rig file path, got "
                           f"{sim!r}.", f'write e.g. rig.sim = "pedestal" (built-in: '
                           f'{", ".join(builtin_names())}) or rig.sim = "my-rig.toml".')
    if "/" not in sim and not sim.endswith(".toml"):
        path = BUILTIN_DIR / f"{sim}.toml"
        if not path.is_file():
            raise RigFileError("rig.sim", f"no simulated rig called {sim!r}.",
                               f"use one of: {', '.join(builtin_names())}, or the path of a "
                               "rig file (ending in .toml).")
    else:
        path = Path(sim)
        if not path.is_absolute() and base is not None:
            path = base / path
    key = str(path.resolve())
    try:
        mtime = path.stat().st_mtime_ns
    except OSError:
        mtime = 0
    ck = f"{key}@{mtime}"
    if ck not in _CACHE:
        _CACHE[ck] = load_rig_file(path)
    return _CACHE[ck]
