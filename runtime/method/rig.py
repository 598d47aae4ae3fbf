"""The rig a config names: its nominal model (`RigModel`, `rig_model`) and its simulation
(a `sim_rigs.rigfile.RigSpec`).

Three ways, one result:

- ``rig.sim = "pedestal"``: a built-in rig (a file in ``sim_rigs/rigs/``);
- ``rig.sim = "path/to/rig.toml"``: a rig file, relative to the config file;
- no ``rig.sim``, the nominal model inline (``rig.A``, ``rig.B``, ``rig.C``, names, units,
  ``rig.input_limits``) plus ``[plant.params]`` and ``[[plant.terms]]`` (the rig file's
  ``[params]`` and ``[[term]]``), optional ``plant.effectiveness`` (one parameter name per
  input) and ``[plant.sensors]`` in the rig file's ``[sensors]`` form.

Rig file problems become one-line `ConfigError`s naming the field. What does not live here:
the format (`sim_rigs.rigfile`), the plant (`sim_rigs.plant`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError, rig_name
from sim_rigs.rigfile import RigFileError, RigSpec, resolve_rig, rig_from_dict

INLINE = "config"
"""`RigModel.sim` of a rig simulated from the config's own [plant] terms."""

Array = NDArray[np.float64]


def as_config_error(exc: RigFileError) -> ConfigError:
    """A rig file problem as the runtime's one-line config error."""
    return ConfigError(exc.field, exc.problem, exc.fix)


def rig_spec(cfg: Config) -> RigSpec | None:
    """The simulated rig of a config, or None when it has none (a real rig, no terms)."""
    sim = cfg.get("rig.sim")
    try:
        if sim is not None:
            base = cfg.path.parent if cfg.path is not None else None
            return resolve_rig(sim, base)
        if not (cfg.has("plant.terms") or cfg.has("plant.params")):
            return None
        return _inline(cfg)
    except RigFileError as exc:
        raise as_config_error(exc) from None


def _inline(cfg: Config) -> RigSpec:
    A = cfg.matrix("rig.A", (None, None))
    n = A.shape[0]
    B = cfg.matrix("rig.B", (n, None))
    m = B.shape[1]
    C = cfg.matrix("rig.C", (m, n))
    states = cfg.strings("rig.states", n, [f"x{i}" for i in range(n)])
    units = cfg.strings("rig.state_units", n, ["1"] * n)
    inputs = cfg.strings("rig.inputs", m, [f"u{i}" for i in range(m)])
    in_units = cfg.strings("rig.input_units", m, ["1"] * m)
    limits = cfg.vector("rig.input_limits", m)
    srange = cfg.vector("design.state_range", n)
    eff = cfg.get("plant.effectiveness") or [None] * m
    if not isinstance(eff, list) or len(eff) != m:
        raise ConfigError("plant.effectiveness", f"must list {m} parameter names (one per input).",
                          'write e.g. effectiveness = ["lam"] under [plant].')
    sensors: dict[str, Any] = dict(cfg.get("plant.sensors") or {})
    raw: dict[str, Any] = {
        "name": str(cfg.get("rig.name", "rig")),
        "state": [{"name": s, "unit": u, "limit": float(r)}
                  for s, u, r in zip(states, units, srange, strict=True)],
        "input": [{"name": i, "unit": u, "limit": float(lim),
                   **({"effectiveness": e} if e is not None else {})}
                  for i, u, lim, e in zip(inputs, in_units, limits, eff, strict=True)],
        "nominal": {"A": A.tolist(), "B": B.tolist(), "C": C.tolist()},
        "params": dict(cfg.get("plant.params") or {}),
        "term": list(cfg.get("plant.terms") or []),
        "sensors": sensors,
    }
    try:
        return rig_from_dict(raw, "config")
    except RigFileError as exc:
        field = exc.field.replace("term[", "plant.terms[").replace("params.", "plant.params.")
        field = field.replace("sensors.", "plant.sensors.")
        raise ConfigError(field, exc.problem, exc.fix) from None


def sensor_overrides(cfg: Config) -> dict[str, Any]:
    """The config's [plant.sensors] overrides of the rig's named sensor settings."""
    raw = dict(cfg.get("plant.sensors") or {})
    raw.pop("channels", None)
    for k, v in raw.items():
        where = f"plant.sensors.{k}"
        if isinstance(v, bool) or not isinstance(v, int | float) or not v >= 0:
            raise ConfigError(where, f"must be a number >= 0, got {v!r}.",
                              f"write e.g. {k} = 0 under [plant.sensors].")
        if k == "delay_ticks" and int(v) != v:
            raise ConfigError(where, f"must be a whole number of ticks, got {v!r}.",
                              "write e.g. delay_ticks = 2.")
    return raw


@dataclass(frozen=True)
class RigModel:
    """Nominal model and naming of the rig a config describes."""

    name: str
    sim: str | None
    A: Array
    B: Array
    C: Array
    states: tuple[str, ...]
    state_units: tuple[str, ...]
    inputs: tuple[str, ...]
    input_units: tuple[str, ...]
    input_limits: Array
    spec: Any = field(default=None, compare=False, repr=False)
    """The simulated rig (`sim_rigs.rigfile.RigSpec`), None for a real rig without terms."""

    @property
    def n(self) -> int:
        """Number of states."""
        return int(self.A.shape[0])

    @property
    def m(self) -> int:
        """Number of inputs."""
        return int(self.B.shape[1])


def rig_model(cfg: Config) -> RigModel:
    """The nominal model: the simulated rig's (`rig.sim`, a built-in name or a rig file), or
    explicit `rig.A`, `rig.B`, `rig.C`; explicit keys override the rig file's."""
    sim = cfg.get("rig.sim")
    if sim is not None and not isinstance(sim, str):
        raise ConfigError("rig.sim", f"must name a built-in rig or a rig file, not {sim!r}.",
                          'write e.g. rig.sim = "pedestal" or rig.sim = "my-rig.toml".')

    spec = rig_spec(cfg)
    name = rig_name(cfg)
    if spec is not None and sim is not None:
        sim = spec.name
        A0, B0, C0 = spec.nominal_model()
        n, m = A0.shape[0], B0.shape[1]
        A = cfg.matrix("rig.A", (n, n)) if cfg.has("rig.A") else A0
        B = cfg.matrix("rig.B", (n, m)) if cfg.has("rig.B") else B0
        C = cfg.matrix("rig.C", (None, n)) if cfg.has("rig.C") else C0
        limits = (cfg.vector("rig.input_limits", m, positive=True)
                  if cfg.has("rig.input_limits") else np.array(spec.input_limits, dtype=float))
        return RigModel(name, sim, A, B, C, spec.states, spec.state_units, spec.inputs,
                        spec.input_units, limits, spec)
    A = cfg.matrix("rig.A", (None, None))
    n = A.shape[0]
    if A.shape != (n, n):
        raise ConfigError("rig.A", f"must be square, got shape {A.shape}.",
                          "give an n x n matrix (n = number of states).")
    B = cfg.matrix("rig.B", (n, None))
    m = B.shape[1]
    C = cfg.matrix("rig.C", (m, n))
    states = tuple(cfg.strings("rig.states", n, [f"x{i}" for i in range(n)]))
    units = tuple(cfg.strings("rig.state_units", n, ["1"] * n))
    inputs = tuple(cfg.strings("rig.inputs", m, [f"u{i}" for i in range(m)]))
    in_units = tuple(cfg.strings("rig.input_units", m, ["1"] * m))
    limits = cfg.vector("rig.input_limits", m)
    return RigModel(name, INLINE if spec is not None else None, A, B, C, states, units, inputs,
                    in_units, limits, spec)

