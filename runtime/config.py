"""Reading, overriding and validating corral's TOML configs.

What lives here: `load_config` (file + `--set key=value` overrides), the
`ConfigError` that names the field and the fix, and small typed readers the
other modules use to pull validated values out of the raw table. What does
not: the design math (`runtime.method.design`) and rig models (`sim_rigs`); they
raise `ConfigError` through the readers here when a value is unusable.

Every key is declared once in `runtime.schema` (type, unit, range, default,
meaning). Loading refuses any key the schema does not declare, naming it with a
did-you-mean, and runs every declared key present through the reader of its kind;
the readers take their default and their range from the declaration, so call
sites carry neither (except defaults the schema marks as derived from other
settings). The config stays a plain nested dict (`Config.raw`).
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
import tomllib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime import schema

_MISSING = object()

SECTIONS = schema.section_names()
"""Top-level tables corral knows (declared in `runtime.schema`)."""

KEY_ALIASES = schema.KEY_ALIASES


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
        spec = schema.spec_for(key)
        if (positive or (spec is not None and spec.positive)) and np.any(arr <= 0):
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


def _as_float_array(key: str, value: Any) -> NDArray[np.float64]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ConfigError(key, f"must be numbers, got {value!r}.",
                          "use numbers only, rows of equal length.") from None
    if not np.all(np.isfinite(arr)):
        raise ConfigError(key, "contains a non-finite number.", "use finite numbers only.")
    return arr


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
    apply_aliases(raw)
    _anchor_rig_file(raw, p)
    check_config(raw, str(path))
    cfg = Config(raw=raw, path=p)
    if overrides:
        merged = cfg.with_overrides(overrides)
        check_config(merged.raw, "--set", keys=override_keys(overrides))
        cfg = merged
    return cfg


def _anchor_rig_file(raw: dict[str, Any], path: Path) -> None:
    """A rig file named relative to the config (`rig.sim = "my-rig.toml"`) is read relative
    to the config file, also where the config travels without its path (sweep workers)."""
    rig = raw.get("rig")
    if not isinstance(rig, dict):
        return
    sim = rig.get("sim")
    if isinstance(sim, str) and ("/" in sim or sim.endswith(".toml")):
        q = Path(sim)
        if not q.is_absolute():
            rig["sim"] = str((path.parent / q).resolve())



class UndeclaredKey(LookupError):
    """Code read a config key `runtime.schema` does not declare (a programming error)."""

    def __init__(self, key: str) -> None:
        self.key = key
        super().__init__(f"config key {key!r} is read but not declared in runtime/schema.py; "
                         "declare it there (one line) with its type, unit and default.")


def override_keys(overrides: Sequence[str]) -> list[str]:
    """The dotted keys `key=value` overrides set, under the names the modules read."""
    out = []
    for item in overrides:
        k = item.partition("=")[0].strip()
        out.append(KEY_ALIASES.get(k, k))
    return out


def check_sections(raw: dict[str, Any], where: str) -> None:
    """Check a whole raw config against the schema (kept for callers of the older name)."""
    check_config(raw, where)


def check_config(raw: dict[str, Any], where: str, keys: Sequence[str] | None = None) -> None:
    """Refuse keys the schema does not declare (with a did-you-mean and the fix) and
    declared keys whose value is the wrong kind or out of range.

    `where` names the source for the message (a file path, ``--set``, ``--grid``);
    `keys` restricts the check to those dotted keys and what lies under them (the keys
    an override set), so a recorded config is not re-judged for a what-if.
    """
    cfg = Config(raw=raw)
    for path, value in _walk_all(raw):
        if keys is not None and not any(path == k or path.startswith(k + ".")
                                        or k.startswith(path + ".") for k in keys):
            continue
        spec = schema.spec_for(path)
        if spec is None:
            given = [k for k in keys or () if k == path or k.startswith(path + ".")]
            _refuse_unknown(raw, given[0] if given else path, where)
        assert spec is not None
        _check_value(cfg, path, spec, value, where)
    if keys is not None:  # an override into a value: `--set plant.truth.x.y=1`
        for k in keys:
            if schema.spec_for(k) is None:
                _refuse_unknown(raw, k, where)


def _walk_all(raw: dict[str, Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    """Every (dotted key, value) of a nested table, tables included, parents first;
    the entries of a declared table-valued key are not descended into."""
    for k, v in raw.items():
        path = f"{prefix}.{k}" if prefix else str(k)
        yield path, v
        spec = schema.spec_for(path)
        if isinstance(v, dict) and spec is not None and spec.kind == schema.TABLE:
            yield from _walk_all(v, path)


def _candidates(raw: dict[str, Any], parent: str) -> list[str]:
    """Names that may stand under `parent` (declared keys, or an open table's entries)."""
    names = schema.children(parent)
    table = schema.open_table(parent) if parent else None
    if table is not None and table.names is not None:
        entries = table.names(raw)
        if entries:
            names = [*names, *entries]
    return names


def _refuse_unknown(raw: dict[str, Any], path: str, where: str) -> None:
    # Report the outermost undeclared part: under a misspelt table every key is unknown.
    # An override or grid key is named as typed, so the user sees which one was refused.
    given = path
    parts = path.split(".")
    for i in range(1, len(parts) + 1):
        if schema.spec_for(".".join(parts[:i])) is None:
            path = ".".join(parts[:i])
            break
    parent, _, leaf = path.rpartition(".")
    close = difflib.get_close_matches(leaf, _candidates(raw, parent), n=1, cutoff=0.6)
    set_fix = where in ("--set", "--grid")
    if not parent:
        fix = f"did you mean [{close[0]}]?" if close else (
            f"known sections: {', '.join(SECTIONS)}.")
        if given != path:
            raise ConfigError(given, f"[{path}] is not a section corral knows (in {where}).",
                              fix)
        raise ConfigError(path, f"is not a section corral knows (in {where}).", fix)
    table = schema.open_table(parent)
    what = table.what if table is not None else "key"
    if table is not None and table.names is not None and table.names(raw):
        problem = f"is not a {what} corral knows here (in {where}; {table.doc})."
    else:
        problem = f"is not a key corral knows (in {where})."
    if close:
        right = f"{parent}.{close[0]}"
        fix = (f"did you mean {right}? Write --{where.lstrip('-')} "
               f"{right}{given[len(path):]}=VALUE." if set_fix
               else f"did you mean {right}? Rename {leaf} to {close[0]} in [{parent}].")
    else:
        known = _candidates(raw, parent)
        fix = (f"known under [{parent}]: {', '.join(known)}." if known else
               f"remove it; [{parent}] takes no such {what}.")
    raise ConfigError(path, problem, fix)


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


def _check_value(cfg: Config, path: str, spec: schema.Key, value: Any, where: str) -> None:
    """Run one present value through the reader of its kind (the readers hold the checks)."""
    kind = spec.kind
    if kind == schema.TABLE:
        if not isinstance(value, dict):
            raise ConfigError(path, f"must be a table of keys, got {value!r} (in {where}).",
                              f"write [{path}] with its keys, or set one key: "
                              f"--set {path}.KEY=VALUE")
        table = schema.open_table(path)
        if table is not None and table.names is not None:
            allowed = table.names(cfg.raw)
            for name in value:
                if allowed and name not in allowed and f"{path}.{name}" not in {
                        k.path for k in schema.KEYS}:
                    _refuse_unknown(cfg.raw, f"{path}.{name}", where)
    elif kind == schema.TABLES:
        if not (isinstance(value, list) and all(isinstance(v, dict) for v in value)):
            raise ConfigError(path, f"must be a list of tables, got {value!r} (in {where}).",
                              f"write [[{path}]] tables with their keys.")
    elif kind == schema.NUMBER:
        cfg.number(path)
    elif kind == schema.INTEGER:
        v = cfg.number(path)
        if v != int(v):
            raise ConfigError(path, f"must be a whole number, got {v:g}.",
                              f"write e.g. {path} = {int(v)}")
    elif kind == schema.FLAG:
        cfg.flag(path)
    elif kind == schema.CHOICE:
        cfg.choice(path)
    elif kind == schema.TEXT:
        if not isinstance(value, str):
            raise ConfigError(path, f"must be text, got {value!r}.", f'write {path} = "..."')
    elif kind == schema.NAMES:
        cfg.strings(path)
    elif kind == schema.VECTOR:
        arr = _as_float_array(path, value)
        cfg.vector(path, None if arr.ndim else 1)
    elif kind == schema.MATRIX:
        cfg.matrix(path, (None, None))
    elif kind == schema.WEIGHT:
        arr = _as_float_array(path, value)
        if arr.ndim > 2:
            raise ConfigError(path, f"has {arr.ndim} dimensions.",
                              "give a scalar, the diagonal, or a square matrix.")
    elif kind == schema.EPS:
        if value != "from_limits":
            if isinstance(value, str):
                raise ConfigError(path, f"must be \"from_limits\" or a number, got {value!r}.",
                                  f'write {path} = "from_limits" or a positive number.')
            cfg.number(path)
    elif kind == schema.PAIR:
        ok = (isinstance(value, list) and len(value) == 2
              and all(isinstance(v, int | float) and not isinstance(v, bool)
                      and np.isfinite(v) for v in value))
        if not ok or value[0] > value[1]:
            raise ConfigError(path, f"must be [lo, hi] with lo <= hi, got {value!r}.",
                              f"write {path.rpartition('.')[2]} = [lo, hi].")
    elif kind == schema.SEGMENTS:
        if not isinstance(value, list):
            leaf = path.rpartition(".")[2]
            raise ConfigError(path, "must be a list of segments.",
                              f'write {leaf} = [{{ at = 1.0, kind = "step", to = 0.1 }}]')


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


def resolved(cfg: Config) -> list[dict[str, Any]]:
    """Every declared key with the value a reader gets and where it comes from.

    One dict per key, in declaration order: ``key``, ``value`` (None when unset or
    derived), ``unit``, ``source`` ("file", "--set", "default", "derived" or "unset"),
    ``default`` (the declared default as text) and ``doc``. Open tables list their
    present entries; ``[plant.truth]`` also lists the simulated rig's parameters the
    config leaves at their rig default.
    """
    rows: list[dict[str, Any]] = []

    def row(path: str, spec: schema.Key, value: Any, source: str) -> None:
        rows.append({"key": path, "value": value, "unit": spec.unit, "source": source,
                     "default": spec.default_text(), "doc": spec.doc})

    def one(path: str, spec: schema.Key) -> None:
        if cfg.has(path):
            row(path, spec, cfg.get(path), cfg.source(path))
        elif isinstance(spec.default, schema.Derived):
            row(path, spec, None, "derived")
        elif spec.has_value_default:
            row(path, spec, copy.deepcopy(spec.default), "default")
        else:
            row(path, spec, None, "unset")

    for spec in schema.iter_keys():
        if spec.kind == schema.TABLE:
            continue
        if "*" not in spec.path:
            one(spec.path, spec)
            continue
        table, _, rest = spec.path.partition(".*")
        present = cfg.get(table, {}) or {}
        names = [n for n in present if schema.pattern_of(f"{table}.{n}") == f"{table}.*"]
        for name in names:
            one(f"{table}.{name}{rest}", spec)
        rig = schema.rig_spec(cfg.raw) if table.startswith("plant.") else None
        if rig is not None:  # parameters of the simulated rig carry their units there
            for r in rows[len(rows) - len(names):]:
                r["unit"] = rig.param_units.get(r["key"].rpartition(".")[2], r["unit"])
            if table == "plant.truth":
                for name, value in rig.truth_defaults.items():
                    if name not in names:
                        row(f"{table}.{name}", spec, value, "default")
                        rows[-1]["unit"] = rig.param_units.get(name, spec.unit)
    return rows
