"""Command profiles per tracked axis: steps, smooth slews, sinusoids and holds.

Config form (`[commands]`): one list of segments per tracked output, named by
the output's state name; each segment is ``{at = seconds, kind = ...}``:

- ``step``: jump to ``to``;
- ``slew``: move to ``to`` over ``duration`` seconds along a smooth
  (raised-cosine) path, so the velocity is continuous;
- ``sine``: add ``amplitude * sin(2 pi frequency_hz (t - at))`` for
  ``duration`` seconds around the value held at ``at``;
- ``hold``: keep the value (a readable placeholder).

Between segments the command holds. What lives here: parsing and evaluation
(vectorised over time). What does not: the reference model (`runtime.method.law`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runtime.config import Config, ConfigError

KINDS = ("step", "slew", "sine", "hold")


@dataclass(frozen=True)
class Segment:
    """One command segment on one axis."""

    at: float
    kind: str
    to: float = 0.0
    duration: float = 0.0
    amplitude: float = 0.0
    frequency_hz: float = 0.0


@dataclass(frozen=True)
class AxisProfile:
    """The command on one axis: an initial value and its segments in time order."""

    name: str
    initial: float
    segments: tuple[Segment, ...]

    def evaluate(self, t: ArrayLike) -> NDArray[np.float64]:
        """Command value at times t (any shape)."""
        t = np.asarray(t, dtype=float)
        value = np.full(t.shape, self.initial)
        base = self.initial
        for seg in self.segments:
            after = t >= seg.at
            if seg.kind == "step":
                value = np.where(after, seg.to, value)
                base = seg.to
            elif seg.kind == "slew":
                tau = np.clip((t - seg.at) / seg.duration, 0.0, 1.0)
                path = base + (seg.to - base) * 0.5 * (1.0 - np.cos(np.pi * tau))
                value = np.where(after, path, value)
                base = seg.to
            elif seg.kind == "sine":
                inside = after & (t < seg.at + seg.duration)
                wave = base + seg.amplitude * np.sin(2 * np.pi * seg.frequency_hz * (t - seg.at))
                value = np.where(inside, wave, np.where(after, base, value))
        return value


@dataclass(frozen=True)
class CommandSchedule:
    """Commands for all tracked outputs, over `duration` seconds."""

    axes: tuple[AxisProfile, ...]
    duration: float

    def evaluate(self, t: ArrayLike) -> NDArray[np.float64]:
        """Commands at times t: shape t.shape + (p,)."""
        return np.stack([a.evaluate(t) for a in self.axes], axis=-1)


def _seg_number(item: dict[str, Any], key: str, where: str, *, positive: bool = False) -> float:
    if key not in item:
        raise ConfigError(f"{where}.{key}", "is missing.", f"add {key} = <number> to the segment.")
    v = item[key]
    if isinstance(v, bool) or not isinstance(v, int | float) or not np.isfinite(v):
        raise ConfigError(f"{where}.{key}", f"must be a number, got {v!r}.", "give a number.")
    if positive and v <= 0:
        raise ConfigError(f"{where}.{key}", f"must be positive, got {v}.",
                          "give a value greater than zero.")
    return float(v)


def schedule_from_config(cfg: Config, tracked: Sequence[str]) -> CommandSchedule:
    """Parse `[commands]` for the tracked outputs (names of the states C selects)."""
    duration = cfg.number("commands.duration")
    known = set(tracked) | {"duration", "initial"}
    for key in cfg.get("commands") or {}:
        if key not in known:
            raise ConfigError(f"commands.{key}", "is not a tracked output.",
                              f"name segments after a tracked output: {', '.join(tracked)}.")
    initial = cfg.vector("commands.initial", len(tracked))
    axes = []
    for j, name in enumerate(tracked):
        items = cfg.get(f"commands.{name}") or []
        if not isinstance(items, list):
            raise ConfigError(f"commands.{name}", "must be a list of segments.",
                              f'write {name} = [{{ at = 1.0, kind = "step", to = 0.1 }}]')
        segs = []
        for k, item in enumerate(items):
            where = f"commands.{name}[{k}]"
            if not isinstance(item, dict):
                raise ConfigError(where, "must be a table {at = ..., kind = ...}.",
                                  'write { at = 1.0, kind = "step", to = 0.1 }')
            kind = item.get("kind")
            if kind not in KINDS:
                raise ConfigError(f"{where}.kind", f"unknown kind {kind!r}.",
                                  f"use one of {', '.join(KINDS)}.")
            at = _seg_number(item, "at", where)
            if at < 0:  # time starts at 0: a negative start is a typo, not a schedule
                raise ConfigError(f"{where}.at", f"must be zero or later, got {at:g} s.",
                                  "give the start time in seconds from the run's start, >= 0.")
            if kind == "step":
                segs.append(Segment(at, kind, to=_seg_number(item, "to", where)))
            elif kind == "slew":
                segs.append(Segment(at, kind, to=_seg_number(item, "to", where),
                                    duration=_seg_number(item, "duration", where, positive=True)))
            elif kind == "sine":
                segs.append(Segment(
                    at, kind, amplitude=_seg_number(item, "amplitude", where),
                    frequency_hz=_seg_number(item, "frequency_hz", where, positive=True),
                    duration=_seg_number(item, "duration", where, positive=True)))
            else:
                segs.append(Segment(at, kind))
        segs.sort(key=lambda s: s.at)
        axes.append(AxisProfile(name, float(initial[j]), tuple(segs)))
    return CommandSchedule(tuple(axes), duration)


def tracked_names(C: NDArray[np.float64], states: Sequence[str]) -> list[str]:
    """Names of the tracked outputs: the state each row of C selects (or y0, y1...)."""
    names = []
    for i, row in enumerate(C):
        nz = np.flatnonzero(row)
        names.append(states[nz[0]] if nz.size == 1 and row[nz[0]] == 1 else f"y{i}")
    return names


RMS_FINAL_WINDOW_S = 5.0
"""The stretch at the end of a run `rms_error_final` averages over (s)."""
RMS_ERROR_FINAL_AGAINST = ("command: measured tracked outputs minus the command, rms over the "
                           "last 5 s")
"""What `rms_error_final` measures, as every JSON report names it (`rms_error_final_against`)."""


def rms_error_final(t: NDArray[np.float64], tracked: NDArray[np.float64],
                    cmd: NDArray[np.float64]) -> float:
    """The one definition of `rms_error_final` (dry run, replay; docs/sampled-data.md).

    rms over the last `RMS_FINAL_WINDOW_S` seconds of t (all of it when shorter) of
    ||y_tracked - c||: what the rig's sensors report against what the operator asked for,
    the quantity a live record, a dry run and a replay all have. nan when empty.
    """
    t = np.asarray(t, dtype=float)
    if t.size == 0:
        return float("nan")
    last = t >= t[-1] - RMS_FINAL_WINDOW_S
    err = np.asarray(tracked, dtype=float)[last] - np.asarray(cmd, dtype=float)[last]
    return float(np.sqrt(np.mean(np.sum(err**2, axis=1))))
