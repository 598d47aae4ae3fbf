"""`corral config CONFIG`: the fully resolved config, with units and where each value
comes from (the file, a --set, the declared default, or derived from other settings).

The listing reads the declarations in `runtime.schema` through `runtime.config_check.resolved`;
what a derived default works out to is shown by the command that derives it
(`corral design` for the envelope and eps, `corral sweep` for its substeps).
"""

from __future__ import annotations

import argparse
import json
from typing import Any

from runtime.cli.common import common_config_args
from runtime.config import load_config, resolved


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral config`."""
    common_config_args(parser)
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--set-only", action="store_true",
                        help="list only the keys the file or --set give")


def _text(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_text(v)}" for k, v in value.items()) + "}"
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_text(v) for v in value) + "]"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def format_resolved(rows: list[dict[str, Any]], header: str) -> str:
    """The rows as sections of ``key = value  unit  (source)`` lines."""
    out = [header, "# (default): the declared default; (derived): computed from other "
           "settings as noted; (unset): off or not needed"]
    section = None
    width = max((len(r["key"].partition(".")[2]) for r in rows), default=10)
    for r in rows:
        sec, _, rest = r["key"].partition(".")
        rest = rest or sec
        if sec != section:
            section = sec
            out.append(f"\n[{sec}]")
        value = _text(r["value"])
        if len(value) > 60:
            value = value[:57] + "..."
        src = r["source"]
        mark = {"file": "", "--set": "(--set)", "default": "(default)"}.get(src, f"({src})")
        note = r["default"] if src in ("derived", "unset") else ""
        note = note.removeprefix("derived: ")
        unit = r["unit"] if r["value"] is not None and r["unit"] != "1" else ""
        line = f"{rest:<{width}} = {value} {unit}".rstrip()
        out.append(f"{line:<{width + 30}} {mark} {note}".rstrip())
    return "\n".join(out)


def main(args: argparse.Namespace) -> int:
    """Print the resolved config; 0 (a config error exits 2 through the CLI)."""
    cfg = load_config(args.config, args.overrides)
    rows = resolved(cfg)
    if args.set_only:
        rows = [r for r in rows if r["source"] in ("file", "--set")]
    if args.json:
        print(json.dumps({"config": str(cfg.path), "overrides": list(cfg.overrides),
                          "config_hash": cfg.hash(), "keys": rows}, indent=2, default=str))
        return 0
    sets = f", with --set {' '.join(cfg.overrides)}" if cfg.overrides else ""
    print(format_resolved(rows, f"# {cfg.path} (config hash {cfg.hash()}){sets}"))
    return 0
