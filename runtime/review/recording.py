"""Reading a recorded run for review: one reader for both run formats.

Lives here:
- `read_recording(path)`: the dry run's ``corral-run`` file and the real-time loop's
  ``corral-runlog``, normalised to arrays (t, c, y measured, u applied, u_cmd, ratio,
  mode, ...). A torn tail (a crash mid-write) is skipped.
- `config_with_overrides(rec, overrides)`: the recorded config with `--set` style changes.

What does not live here: the replay itself (`runtime.review.replay`), the file formats'
writers (`runtime.records.logs`, `runtime.offline.dryrun`).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import KEY_ALIASES, Config, check_config

Array = NDArray[np.float64]

RUN_FORMATS = ("corral-run", "corral-runlog")
# in the order of runtime.guard.supervisor.MODES
MODES = ("idle", "settling", "engaged", "fallback", "stopped")
ENGAGED = MODES.index("engaged")


class RunFileError(Exception):
    """A file that is not a readable corral run (missing, wrong format, no ticks)."""


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------

@dataclass
class Recording:
    """A recorded run, normalised: every array has one row per recorded tick."""

    path: Path
    kind: str
    """"dry-run" (corral-run file) or "runtime" (corral-runlog)."""
    header: dict[str, Any]
    config: dict[str, Any]
    period: float
    t: Array
    tick: Array
    c: Array
    """Commands (N, p)."""
    y: Array
    """Measured state (N, n): the dry run's y, the loop's estimated x."""
    u: Array
    """Applied input (N, m)."""
    u_cmd: Array
    """Input the law asked for before saturation (N, m)."""
    ratio: Array
    engaged: NDArray[np.bool_]
    outputs_on: NDArray[np.bool_]
    latched: NDArray[np.bool_]
    w_norm: Array
    mode: list[str] | None = None
    x_true: Array | None = None
    """True plant state (dry runs only)."""
    clamped: Array | None = None
    torn: bool = False

    @property
    def ticks(self) -> int:
        """Number of complete recorded ticks."""
        return int(self.t.size)

    def window(self) -> tuple[int, int, int]:
        """(start, engaged_end, stop): the first engaged stretch and the replay window.

        The window starts where the adaptive law first engaged. It ends where
        the law stopped for another reason than a trip (disarm, stop), or at
        the next engagement, or at the end of the record; after a trip it
        continues, since the question is what the law would have done.
        """
        idx = np.flatnonzero(self.engaged)
        if idx.size == 0:
            raise RunFileError(f"{self.path}: the adaptive law never engaged in this run "
                               "(nothing to replay)")
        start = int(idx[0])
        off = np.flatnonzero(~self.engaged[start:])
        if off.size == 0:
            return start, self.ticks, self.ticks
        engaged_end = start + int(off[0])
        if not self.latched[engaged_end]:
            return start, engaged_end, engaged_end
        again = np.flatnonzero(self.engaged[engaged_end:])
        stop = engaged_end + int(again[0]) if again.size else self.ticks
        return start, engaged_end, stop


def _read_stream(path: Path) -> tuple[dict[str, Any] | None, list[Any], bool]:
    from runtime.records.logs import LogReadError, read_stream

    try:
        header, records, torn = read_stream(path)
    except LogReadError as exc:
        raise RunFileError(str(exc)) from None
    if header is None and records and isinstance(records[0], dict):
        header = records.pop(0)  # the dry run's header has no "type" key
    return header, records, torn


def _split(header: dict[str, Any], rows: list[Any]) -> dict[str, Array]:
    names = [str(n) for n in header["fields"]]
    widths = [int(w) for w in header.get("widths") or [1] * len(names)]
    total = sum(widths)
    good = [r for r in rows if isinstance(r, (list, tuple)) and len(r) == total]
    if not good:
        return {n: np.zeros((0,) if w == 1 else (0, w)) for n, w in zip(names, widths, strict=True)}
    flat = np.array([[math.nan if v is None else v for v in r] for r in good], dtype=float)
    out: dict[str, Array] = {}
    col = 0
    for name, w in zip(names, widths, strict=True):
        out[name] = flat[:, col] if w == 1 else flat[:, col:col + w]
        col += w
    return out


def read_recording(path: str | Path) -> Recording:
    """Read a dry-run run file or a runtime run log (a torn tail is skipped)."""
    path = Path(path)
    if not path.exists():
        raise RunFileError(f"no such run file: {path}")
    if path.is_dir():
        raise RunFileError(f"{path} is a folder; give one .run file")
    header, records, torn = _read_stream(path)
    fmt = header.get("format") if isinstance(header, dict) else None
    if fmt not in RUN_FORMATS:
        what = f"format {fmt!r}" if fmt else "no run header"
        raise RunFileError(f"{path} is not a corral run file ({what}); give a .run file "
                           "written by 'corral dry-run' or 'corral run'")
    assert header is not None
    if not isinstance(header.get("fields"), list) or not isinstance(header.get("config"), dict):
        raise RunFileError(f"{path}: the run header lacks its fields or config")
    cols = _split(header, records)
    n_rows = cols["t"].shape[0]
    if n_rows == 0:
        raise RunFileError(f"{path}: no complete ticks in the run file")
    period = header.get("period")
    if not isinstance(period, (int, float)) or period <= 0:
        loop = header["config"].get("loop", {})
        period = loop.get("period") if isinstance(loop, dict) else None
    if not isinstance(period, (int, float)) or period <= 0:
        steps = np.diff(cols["t"])
        period = float(np.median(steps)) if steps.size else 0.001

    def need(name: str) -> Array:
        if name not in cols:
            raise RunFileError(f"{path}: the run file has no '{name}' field")
        return cols[name]

    ones = np.ones(n_rows, dtype=bool)
    if fmt == "corral-run":
        u = need("u")
        rec = Recording(
            path=path, kind=str(header.get("kind", "dry-run")), header=header,
            config=header["config"], period=float(period), t=need("t"),
            tick=np.arange(n_rows, dtype=float), c=need("c"), y=need("y"), u=u,
            u_cmd=cols.get("u_raw", u), ratio=need("ratio"), engaged=ones,
            outputs_on=ones.copy(), latched=np.zeros(n_rows, dtype=bool),
            w_norm=cols.get("w_norm", np.zeros(n_rows)), x_true=cols.get("x"),
            clamped=cols.get("clamped"), torn=torn)
    else:
        code = need("mode")
        modes = [MODES[int(v)] if np.isfinite(v) and 0 <= int(v) < len(MODES) else "unknown"
                 for v in code]
        u = need("u")
        rec = Recording(
            path=path, kind="runtime", header=header, config=header["config"],
            period=float(period), t=need("t"),
            tick=cols.get("tick", np.arange(n_rows, dtype=float)),
            c=need("c"), y=need("x"), u=u, u_cmd=cols.get("u_cmd", u), ratio=need("ratio"),
            engaged=code == ENGAGED,
            outputs_on=cols["outputs_on"] > 0.5 if "outputs_on" in cols else ones.copy(),
            latched=cols["latched"] > 0.5 if "latched" in cols else np.zeros(n_rows, dtype=bool),
            w_norm=cols.get("w_norm", np.zeros(n_rows)), mode=modes, torn=torn)
    return rec


def config_with_overrides(rec: Recording, overrides: list[str]) -> tuple[Config, list[str]]:
    """The recorded config with `key=value` overrides applied, and the overrides as
    applied (aliases written under the key the modules read, `runtime.config.KEY_ALIASES`)."""
    items = []
    for item in overrides:
        key, sep, value = item.partition("=")
        key = KEY_ALIASES.get(key.strip(), key.strip())
        items.append(f"{key}{sep}{value}")
    base = Config(raw=copy.deepcopy(rec.config), path=None)
    merged = base.with_overrides(items)
    # Only what the overrides touch: the recorded config was accepted when it ran.
    check_config(merged.raw, "--set", keys=[i.partition("=")[0].strip() for i in items])
    return merged, items
