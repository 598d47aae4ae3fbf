"""Reading, overriding and validating corral's TOML configs.

What lives here: `load_config` (file + `--set key=value` overrides), the
`ConfigError` that names the field and the fix, and small typed readers the
other modules use to pull validated values out of the raw table. What does
not: the design math (`runtime.design`) and rig models (`sim_rigs`); they
raise `ConfigError` through the readers here when a value is unusable.

The config stays a plain nested dict (`Config.raw`) so new sections can be
added by the module that owns them without touching this file.
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
import sys
import tomllib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

_MISSING = object()

SECTIONS = (
    "rig", "basis", "design", "adaptation", "loop", "commands", "plant", "log", "watchdog",
    "supervisor", "fallback", "telemetry", "faults", "link", "sweep", "preflight", "replay",
    "estimator", "device", "dashboard", "operator", "recorder", "mqtt",
)
"""Top-level tables corral knows; anything else is almost always a typo."""


class ConfigError(Exception):
    """A config value is missing or unusable.

    `field` is the dotted key (``adaptation.gamma``), `problem` what is wrong,
    `fix` what to do about it. `str()` gives one line for the user.
    """

    def __init__(self, field: str, problem: str, fix: str = "") -> None:
        self.field = field
        self.problem = problem
        self.fix = fix
        msg = f"config error in '{field}': {problem}"
        if fix:
            msg += f" Fix: {fix}"
        super().__init__(msg)


@dataclass
class Config:
    """A loaded config: the raw nested table plus where it came from."""

    raw: dict[str, Any]
    path: Path | None = None
    overrides: list[str] = field(default_factory=list)

    # -- typed readers ---------------------------------------------------
    def get(self, key: str, default: Any = _MISSING) -> Any:
        """The value at a dotted key, or `default`; ConfigError if absent without one."""
        node: Any = self.raw
        for part in key.split("."):
            if not isinstance(node, dict) or part not in node:
                if default is _MISSING:
                    raise ConfigError(key, "is missing.", f"add '{key}' to the config.")
                return default
            node = node[part]
        return node

    def has(self, key: str) -> bool:
        """True when the dotted key is present."""
        return self.get(key, None) is not None

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
        """A finite float at `key`, range-checked."""
        value = self.get(key, default)
        unit_txt = f" {unit}" if unit else ""
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(
                key, f"must be a number{unit_txt}, got {value!r}.", f"write e.g. {key} = 1.0"
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

    def choice(self, key: str, options: Sequence[str], default: Any = _MISSING) -> str:
        """A string at `key` that must be one of `options`."""
        value = self.get(key, default)
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
        arr = _as_float_array(key, value)
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
        arr = _as_float_array(key, value)
        if arr.ndim == 0 and length is not None:
            arr = np.full(length, float(arr))
        if arr.ndim != 1:
            raise ConfigError(key, f"must be a list of numbers, got shape {arr.shape}.",
                              f"write {key} = [a, b, ...].")
        if length is not None and arr.size != length:
            raise ConfigError(key, f"has {arr.size} entries, expected {length}.",
                              f"give exactly {length} values.")
        if positive and np.any(arr <= 0):
            raise ConfigError(key, f"must be all positive, got {arr.tolist()}.",
                              "make every entry greater than zero.")
        return arr

    def weight_matrix(self, key: str, n: int, default: Any = _MISSING) -> NDArray[np.float64]:
        """A symmetric positive definite n x n weight: scalar, diagonal list or full matrix."""
        value = self.get(key, default)
        arr = _as_float_array(key, value)
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


def _shape_txt(shape: tuple[int | None, int | None]) -> str:
    r, c = ("any" if s is None else str(s) for s in shape)
    return f"shape ({r}, {c})"


def _as_float_array(key: str, value: Any) -> NDArray[np.float64]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ConfigError(key, f"must be numbers, got {value!r}.",
                          "use numbers only, rows of equal length.") from None
    if not np.all(np.isfinite(arr)):
        raise ConfigError(key, "contains a non-finite number.", "use finite numbers only.")
    return arr


KEY_ALIASES = {"watchdog.saturation_time": "watchdog.saturation_s"}
"""Other names a key is accepted under (old or brief spellings) -> the name every module reads."""


def apply_aliases(raw: dict[str, Any]) -> None:
    """Move values given under an alias to the key the modules read, in place.

    Done once here so the live watchdog, the sweep and the replay all see the same
    value whichever spelling the user wrote. Both spellings at once is refused.
    """
    for alias, key in KEY_ALIASES.items():
        *a_path, a_leaf = alias.split(".")
        node: Any = raw
        for part in a_path:
            node = node.get(part) if isinstance(node, dict) else None
            if node is None:
                break
        if not isinstance(node, dict) or a_leaf not in node:
            continue
        *k_path, k_leaf = key.split(".")
        if a_path != k_path:
            raise NotImplementedError("aliases move keys within one table")
        if k_leaf in node and node[k_leaf] != node[a_leaf]:
            raise ConfigError(alias, f"and {key} are the same setting with different values.",
                              f"keep only {key}.")
        node[k_leaf] = node.pop(a_leaf)


def parse_value(text: str) -> Any:
    """Parse an override value as a TOML value; bare words become strings."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def apply_override(raw: dict[str, Any], item: str) -> None:
    """Apply one `dotted.key=value` override to a nested dict in place."""
    if "=" not in item:
        raise ConfigError(item, "an override must look like key=value.",
                          "write e.g. --set adaptation.gamma=8")
    key, _, text = item.partition("=")
    key = key.strip()
    parts = key.split(".")
    if not key or any(not p for p in parts):
        raise ConfigError(item, "the key is empty or has an empty part.",
                          "write e.g. --set adaptation.gamma=8")
    node = raw
    for part in parts[:-1]:
        nxt = node.setdefault(part, {})
        if not isinstance(nxt, dict):
            raise ConfigError(key, f"'{part}' is a value, not a table.",
                              "override the whole value instead.")
        node = nxt
    node[parts[-1]] = parse_value(text.strip())


def load_config(path: str | Path, overrides: Sequence[str] = ()) -> Config:
    """Read a TOML config and apply overrides. Raises ConfigError on any problem."""
    p = Path(path)
    if p.is_dir():
        raise ConfigError(str(path), "is a folder, not a config file.",
                          "give the path of a TOML file, e.g. configs/pedestal-sim.toml")
    if not p.is_file():
        raise ConfigError(str(path), "no such config file.",
                          "give the path of a TOML file, e.g. configs/pedestal-sim.toml")
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        # TOML is UTF-8 by definition; a binary or Latin-1 file is not a config.
        raise ConfigError(str(path), f"is not UTF-8 text (byte {exc.start}), so not TOML.",
                          "give a TOML config file saved as UTF-8.") from None
    except OSError as exc:
        raise ConfigError(str(path), f"cannot be read ({exc.strerror}).",
                          "check the path and its permissions.") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), f"is not valid TOML ({exc}).",
                          "fix the syntax at the line named.") from None
    check_sections(raw, str(path))
    apply_aliases(raw)
    cfg = Config(raw=raw, path=p)
    if overrides:
        merged = cfg.with_overrides(overrides)
        check_sections(merged.raw, "--set")
        _note_new_keys(raw, overrides)  # only once the overrides are accepted: one message
        cfg = merged
    return cfg


# Nested tables the modules read with dict access; a scalar there (`--set plant.truth=1`)
# must be refused here, not crash the reader.
SUBTABLES = ("plant.truth", "plant.ranges", "plant.sensors", "adaptation.bound")
# Sections that are arrays of tables ([[faults]]), not tables.
LIST_SECTIONS = ("faults",)


def check_sections(raw: dict[str, Any], where: str) -> None:
    """Refuse top-level tables corral does not know (a misspelt section is silently ignored
    otherwise), and a known section or sub-table given as a plain value."""
    for key in raw:
        if key not in SECTIONS:
            close = difflib.get_close_matches(key, SECTIONS, n=1)
            hint = f"did you mean [{close[0]}]?" if close else (
                f"known sections: {', '.join(SECTIONS)}.")
            raise ConfigError(key, f"is not a section corral knows (in {where}).", hint)
    for key in (*SECTIONS, *SUBTABLES):
        if key in LIST_SECTIONS:
            node_list = raw.get(key)
            if node_list is not None and not (isinstance(node_list, list) and all(
                    isinstance(item, dict) for item in node_list)):
                raise ConfigError(key, f"must be a list of tables, got {node_list!r} "
                                  f"(in {where}).", f"write [[{key}]] tables with their keys.")
            continue
        node: Any = raw
        for part in key.split("."):
            if not isinstance(node, dict) or part not in node:
                node = None
                break
            node = node[part]
        if node is not None and not isinstance(node, dict):
            raise ConfigError(key, f"must be a table of keys, got {node!r} (in {where}).",
                              f"write [{key}] with its keys, or set one key: "
                              f"--set {key}.KEY=VALUE")


def _note_new_keys(raw: dict[str, Any], overrides: Sequence[str]) -> None:
    """Warn when an override adds a key the file does not have: usually a misspelling."""
    existing = [k for k, _ in walk(raw)] + [k for k in _tables(raw)]
    for item in overrides:
        key = item.partition("=")[0].strip()
        if key in existing:
            continue
        # Compare the last part among the keys of the same table: on whole dotted keys the
        # shared prefix makes a real key read with a default (adaptation.leakage) look like
        # a misspelling of another (adaptation.law).
        parent, _, leaf = key.rpartition(".")
        siblings = {k.rpartition(".")[2]: k for k in existing if k.rpartition(".")[0] == parent}
        near = difflib.get_close_matches(leaf, list(siblings), n=1, cutoff=0.8)
        close = [siblings[near[0]]] if near else []
        if close:
            print(f"corral: note: --set {key} is not in the config file; did you mean "
                  f"{close[0]}? (using it as given)", file=sys.stderr)


def _tables(raw: dict[str, Any], prefix: str = "") -> Iterator[str]:
    for k, v in raw.items():
        if isinstance(v, dict):
            key = f"{prefix}.{k}" if prefix else k
            yield key
            yield from _tables(v, key)


def walk(raw: dict[str, Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    """Every (dotted key, leaf value) pair of a nested table."""
    for k, v in raw.items():
        key = f"{prefix}.{k}" if prefix else k
        if isinstance(v, dict):
            yield from walk(v, key)
        else:
            yield key, v
