"""The words of a config's problems and the edits made to a raw table before it is read.

What lives here: `ConfigError` (field, problem, fix: one line for the user),
`UndeclaredKey` (code read a key the schema does not declare), the key aliases
(`apply_aliases`) and the `--set key=value` overrides (`parse_value`,
`apply_override`, `override_keys`). What does not: reading values
(`runtime.config_readers`), the check against the schema (`runtime.config_check`),
loading a file (`runtime.config`, which re-exports all of these).
"""

from __future__ import annotations

import tomllib
from collections.abc import Sequence
from typing import Any

from runtime import schema

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
