"""A raw config held against `runtime.schema`, and every declared key resolved.

What lives here: `check_config` (refuse undeclared keys with a did-you-mean, run
every declared key present through the reader of its kind), `resolved` (every
declared key with its value, unit and source, for `corral config`) and `walk`.
What does not: the readers themselves (`runtime.config_readers`), loading a file
(`runtime.config`).
"""

from __future__ import annotations

import copy
import difflib
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np

from runtime import schema
from runtime.config_overrides import ConfigError
from runtime.config_readers import Config, as_float_array

SECTIONS = schema.section_names()
"""Top-level tables corral knows (declared in `runtime.schema`)."""


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
        arr = as_float_array(path, value)
        cfg.vector(path, None if arr.ndim else 1)
    elif kind == schema.MATRIX:
        cfg.matrix(path, (None, None))
    elif kind == schema.WEIGHT:
        arr = as_float_array(path, value)
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
