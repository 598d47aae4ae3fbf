"""The loaded config and its typed readers.

What lives here: `Config` (the raw nested table, where it came from, and the
readers `get`, `number`, `choice`, `flag`, `matrix`, `vector`, `weight_matrix`,
`strings`, each taking its default and range from `runtime.schema`), and the rig
name check (`check_rig_name`, `rig_name`). What does not: loading a file
(`runtime.config`), the whole-config check (`runtime.config_check`).
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime import schema
from runtime.config_overrides import (
    KEY_ALIASES,
    ConfigError,
    UndeclaredKey,
    apply_aliases,
    apply_override,
)

_MISSING = object()


@dataclass
class Config:
    """A loaded config: the raw nested table plus where it came from."""

    raw: dict[str, Any]
    path: Path | None = None
    overrides: list[str] = field(default_factory=list)

    # -- typed readers ---------------------------------------------------
    def get(self, key: str, default: Any = _MISSING) -> Any:
        """The value at a declared dotted key; when absent, `default` if given, else the
        schema's default (None for an optional key). ConfigError when a required key is
        absent; `UndeclaredKey` when an absent key is not in `runtime.schema` (a loaded
        config holds no undeclared key; a hand-built table may, and reads as it is)."""
        node: Any = self.raw
        for part in key.split("."):
            if not isinstance(node, dict) or part not in node:
                return self._absent(key, default)
            node = node[part]
        return node

    def _absent(self, key: str, default: Any) -> Any:
        spec = schema.spec_for(KEY_ALIASES.get(key, key))
        if spec is None:
            raise UndeclaredKey(key)
        if default is not _MISSING:
            return default
        d = spec.default
        if d is schema.OPTIONAL:
            return None
        if isinstance(d, schema.Required | schema.Derived):
            problem = "is missing" + (f" (required {d.when})" if isinstance(
                d, schema.Required) and d.when else "") + "."
            typo = _unknown_sibling(self.raw, key)
            if typo:
                raise ConfigError(key, f"{problem[:-1]}, and the config has {typo}, which "
                                  "corral does not know.", f"rename {typo} to {key}.")
            raise ConfigError(key, problem, f"add '{key}' to the config ({spec.doc}).")
        return copy.deepcopy(d)

    def has(self, key: str) -> bool:
        """True when the dotted key is present in the config (defaults do not count)."""
        node: Any = self.raw
        for part in key.split("."):
            if not isinstance(node, dict) or part not in node:
                return False
            node = node[part]
        return node is not None

    def source(self, key: str) -> str:
        """Where the value of `key` comes from: "--set", "file" or "default"."""
        if not self.has(key):
            return "default"
        for item in self.overrides:
            k = KEY_ALIASES.get(item.partition("=")[0].strip(), item.partition("=")[0].strip())
            if k == key or key.startswith(k + "."):
                return "--set"
        return "file"

    def number(
        self,
        key: str,
        default: Any = _MISSING,
        *,
        positive: bool = False,
        minimum: float | None = None,
        maximum: float | None = None,
        unit: str = "",
    ) -> float:
        """A finite float at `key`, range-checked (the schema's range and unit apply too)."""
        value = self.get(key, default)
        spec = schema.spec_for(key)
        if spec is not None:
            positive = positive or spec.positive
            if spec.minimum is not None:
                minimum = spec.minimum if minimum is None else max(minimum, spec.minimum)
            if spec.maximum is not None:
                maximum = spec.maximum if maximum is None else min(maximum, spec.maximum)
            unit = unit or spec.unit
        unit_txt = f" {unit}" if unit else ""
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(
                key, f"must be a finite number{unit_txt}, got {value!r}.", f"write e.g. {key} = 1.0"
            )
        value = float(value)
        if not np.isfinite(value):
            raise ConfigError(key, f"must be finite, got {value}.", "give a finite number.")
        if positive and value <= 0:
            raise ConfigError(key, f"must be positive, got {value}{unit_txt}.",
                              "give a value greater than zero.")
        if minimum is not None and value < minimum:
            raise ConfigError(key, f"must be at least {minimum}{unit_txt}, got {value}.",
                              f"raise it to {minimum} or more.")
        if maximum is not None and value > maximum:
            raise ConfigError(key, f"must be at most {maximum}{unit_txt}, got {value}.",
                              f"lower it to {maximum} or less.")
        return value

    def choice(self, key: str, options: Sequence[str] | None = None,
               default: Any = _MISSING) -> str:
        """A string at `key` that must be one of `options` (None: the schema's)."""
        value = self.get(key, default)
        if options is None:
            spec = schema.spec_for(key)
            options = spec.allowed() if spec is not None else ()
        if value not in options:
            raise ConfigError(
                key, f"must be one of {', '.join(map(repr, options))}, got {value!r}.",
                f"set {key} = {options[0]!r} (or another of the listed values).",
            )
        return str(value)

    def flag(self, key: str, default: Any = _MISSING) -> bool:
        """A boolean at `key`."""
        value = self.get(key, default)
        if not isinstance(value, bool):
            raise ConfigError(key, f"must be true or false, got {value!r}.",
                              f"write {key} = true or {key} = false")
        return value

    def matrix(
        self, key: str, shape: tuple[int | None, int | None], default: Any = _MISSING
    ) -> NDArray[np.float64]:
        """A 2-D float array at `key` with the expected shape (None = any)."""
        value = self.get(key, default)
        arr = as_float_array(key, value)
        if arr.ndim != 2:
            raise ConfigError(
                key, f"must be a matrix (a list of rows), got an array of {arr.ndim} dimension(s).",
                f"write {key} = [[...], [...]] with {_shape_txt(shape)}.",
            )
        for got, want, what in zip(arr.shape, shape, ("rows", "columns"), strict=True):
            if want is not None and got != want:
                raise ConfigError(
                    key, f"has {got} {what}, expected {want} (shape {arr.shape}, "
                    f"expected {_shape_txt(shape)}).",
                    f"give {key} {_shape_txt(shape)}.",
                )
        return arr

    def vector(
        self, key: str, length: int | None = None, default: Any = _MISSING,
        *, positive: bool = False,
    ) -> NDArray[np.float64]:
        """A 1-D float array at `key` (a scalar is broadcast when `length` is given)."""
        value = self.get(key, default)
        arr = as_float_array(key, value)
        if arr.ndim == 0 and length is not None:
            arr = np.full(length, float(arr))
        if arr.ndim != 1:
            raise ConfigError(key, f"must be a list of numbers, got shape {arr.shape}.",
                              f"write {key} = [a, b, ...].")
        if length is not None and arr.size != length:
            raise ConfigError(key, f"has {arr.size} entries, expected {length}.",
                              f"give exactly {length} values.")
        spec = schema.spec_for(key)
        if (positive or (spec is not None and spec.positive)) and np.any(arr <= 0):
            raise ConfigError(key, f"must be all positive, got {arr.tolist()}.",
                              "make every entry greater than zero.")
        return arr

    def weight_matrix(self, key: str, n: int, default: Any = _MISSING) -> NDArray[np.float64]:
        """A symmetric positive definite n x n weight: scalar, diagonal list or full matrix."""
        value = self.get(key, default)
        arr = as_float_array(key, value)
        if arr.ndim == 0:
            arr = float(arr) * np.eye(n)
        elif arr.ndim == 1:
            if arr.size != n:
                raise ConfigError(key, f"has {arr.size} diagonal entries, expected {n}.",
                                  f"give {n} values or an {n}x{n} matrix.")
            arr = np.diag(arr)
        elif arr.shape != (n, n):
            raise ConfigError(key, f"has shape {arr.shape}, expected ({n}, {n}).",
                              f"give {n} diagonal values or an {n}x{n} matrix.")
        if not np.allclose(arr, arr.T):
            raise ConfigError(key, "must be symmetric.", "make the matrix equal its transpose.")
        if np.min(np.linalg.eigvalsh(arr)) <= 0:
            raise ConfigError(key, "must be positive definite (all eigenvalues > 0).",
                              "use positive diagonal weights.")
        return arr

    def strings(self, key: str, length: int | None = None, default: Any = _MISSING) -> list[str]:
        """A list of strings at `key`."""
        value = self.get(key, default)
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ConfigError(key, f"must be a list of names, got {value!r}.",
                              f'write {key} = ["a", "b"].')
        if length is not None and len(value) != length:
            raise ConfigError(key, f"has {len(value)} names, expected {length}.",
                              f"give exactly {length} names.")
        return list(value)

    # -- identity ---------------------------------------------------------
    def hash(self) -> str:
        """A short stable hash of the effective config (after overrides)."""
        blob = json.dumps(self.raw, sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()[:16]

    def with_overrides(self, overrides: Sequence[str]) -> Config:
        """A copy with `key=value` overrides applied."""
        raw = copy.deepcopy(self.raw)
        for item in overrides:
            apply_override(raw, item)
        apply_aliases(raw)
        return Config(raw=raw, path=self.path, overrides=[*self.overrides, *overrides])


RIG_NAME_MAX = 64
"""Longest rig name: it names the run's files, its socket and its MQTT topics."""


def check_rig_name(value: object) -> str:
    """``rig.name`` checked for use in file names, the socket path and topics, or a
    one-line `ConfigError`: text of 1..`RIG_NAME_MAX` characters without ``/``, NUL,
    control characters or MQTT wildcards, and not ``.`` or ``..``."""
    fix = (f"write 1 to {RIG_NAME_MAX} characters of letters, digits, '-', '_' or '.', "
           'e.g. rig.name = "pedestal-lab2".')
    if not isinstance(value, str) or not value:
        raise ConfigError("rig.name", f"must be a non-empty text, not {value!r}.", fix)
    if len(value) > RIG_NAME_MAX:
        raise ConfigError("rig.name", f"is {len(value)} characters long; it names the "
                          f"run's files and socket, so at most {RIG_NAME_MAX}.", fix)
    bad = sorted({c for c in value if c in "/\\+#" or not c.isprintable()})
    if bad or value in (".", ".."):
        shown = ", ".join(repr(c) for c in bad) or repr(value)
        raise ConfigError("rig.name", f"{shown} cannot be part of a file name or topic.",
                          fix)
    return value


def rig_name(cfg: Config) -> str:
    """The rig's name, checked (`check_rig_name`): ``rig.name``, else the simulated rig's own
    name (a built-in rig or a rig file's ``name``), else "rig"."""
    name = cfg.get("rig.name")
    if name is None:
        spec = schema.rig_spec(cfg.raw)
        name = spec.name if spec is not None else "rig"
    return check_rig_name(name)


def _shape_txt(shape: tuple[int | None, int | None]) -> str:
    r, c = ("any" if s is None else str(s) for s in shape)
    return f"shape ({r}, {c})"


def as_float_array(key: str, value: Any) -> NDArray[np.float64]:
    """`value` as a float array of finite numbers, or a one-line `ConfigError` on `key`."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ConfigError(key, f"must be numbers, got {value!r}.",
                          "use numbers only, rows of equal length.") from None
    if not np.all(np.isfinite(arr)):
        raise ConfigError(key, "contains a non-finite number.", "use finite numbers only.")
    return arr


def _unknown_sibling(raw: dict[str, Any], key: str) -> str:
    """A present key next to `key` that the schema does not declare and that looks like
    a misspelling of it ("" when there is none)."""
    parent, _, leaf = key.rpartition(".")
    node: Any = raw
    for part in parent.split(".") if parent else []:
        node = node.get(part) if isinstance(node, dict) else None
    if not isinstance(node, dict):
        return ""
    unknown = [k for k in node if schema.spec_for(f"{parent}.{k}" if parent else k) is None]
    close = difflib.get_close_matches(leaf, unknown, n=1, cutoff=0.6)
    return (f"{parent}.{close[0]}" if parent else close[0]) if close else ""
