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

The parts: `runtime.config_overrides` (`ConfigError`, aliases, `--set`),
`runtime.config_readers` (`Config` and its readers), `runtime.config_check`
(the schema check, `resolved`). This module loads a file and re-exports them, so
callers import from `runtime.config` alone.
"""

from __future__ import annotations

import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from runtime.config_check import SECTIONS, check_config, check_sections, resolved, walk
from runtime.config_overrides import (
    KEY_ALIASES,
    ConfigError,
    UndeclaredKey,
    apply_aliases,
    apply_override,
    override_keys,
    parse_value,
)
from runtime.config_readers import RIG_NAME_MAX, Config, check_rig_name, rig_name

__all__ = [
    "KEY_ALIASES", "RIG_NAME_MAX", "SECTIONS", "Config", "ConfigError", "UndeclaredKey",
    "apply_aliases", "apply_override", "check_config", "check_rig_name", "check_sections",
    "load_config", "override_keys", "parse_value", "resolved", "rig_name", "walk",
]


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
