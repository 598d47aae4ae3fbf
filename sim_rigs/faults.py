"""Fault injection for simulated rigs: parse, schedule and apply faults.

A fault is ``KIND@SECONDS`` or ``KIND@SECONDS:key=value,key=value`` (command
line ``--fault``) or a ``[[faults]]`` table (``kind``, ``at`` and parameters).
Times count from the start of the run (seconds of rig time). Kinds:

- sensor kinds, applied to what the rig reports: ``sensor_freeze`` (readings
  held), ``spike`` (one reading offset by ``size`` on ``axis``), ``dropout``
  (no samples), ``nan`` (readings become NaN), ``delay`` (readings ``ticks``
  periods old, timestamped when measured), ``malformed`` (a well-formed sample
  one reading short: a frame that lies about its channel count);
- plant kinds, applied to the physics: ``effectiveness_loss`` (motor
  effectiveness times ``scale``), ``disturbance_step`` (extra acceleration
  ``size`` rad/s^2 on ``axis``);
- link kinds, for served or in-process links: ``corrupt`` (every ``every``-th
  frame fails its CRC and is discarded by the receiver), ``drop`` (``count``
  samples lost on the way: their sequence numbers are skipped), ``link_delay``
  (every sample arrives ``seconds`` late), ``disconnect``, ``duplicate`` (every
  ``every``-th frame arrives twice: the previous one again instead of the new),
  ``burst`` (samples held back for ``ticks`` periods, then only the newest
  arrives), ``insertion`` (one forged, plausible sample with a sequence number
  ``ahead`` of the real ones: a masquerading sender);
- host kinds: ``overrun`` (reading the rig stalls the tick for ``seconds``, every
  tick: deadline misses);
- plant kind ``saturation``: the drive keeps only ``scale`` of its effectiveness
  on ``axis``, so the law holds the input at its limit;
- ``tick_error``: a test hook for the runtime's last line of defence: reading
  the in-process rig raises inside the tick (the `internal` trip must follow).

Every fault lasts ``duration`` seconds (default: to the end of the run;
a spike is one reading). ``axis`` names a state (``az``, ``el_rate``) or an
input axis (``az``, ``el``); ``all`` (the default for most kinds) hits every
channel.

What lives here: `Fault`, `parse_fault`, `FaultSchedule`, `FaultInjector`.
What does not: the plant (`sim_rigs.pedestal`), the link (`sim_rigs.link`)
and the watchdog that should catch each fault (`runtime.guard.watchdog`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

SENSOR_KINDS = ("sensor_freeze", "spike", "dropout", "nan", "delay", "malformed")
PLANT_KINDS = ("effectiveness_loss", "disturbance_step", "saturation")
LINK_KINDS = ("corrupt", "drop", "link_delay", "disconnect", "duplicate", "burst",
              "insertion")
HOST_KINDS = ("overrun",)
TEST_KINDS = ("tick_error",)
KINDS = SENSOR_KINDS + PLANT_KINDS + LINK_KINDS + HOST_KINDS + TEST_KINDS

# Parameters each kind accepts, with defaults.
DEFAULTS: dict[str, dict[str, Any]] = {
    "sensor_freeze": {"axis": "all"},
    "spike": {"axis": 0, "size": 0.2},
    "dropout": {},
    "nan": {"axis": "all"},
    "delay": {"ticks": 5},
    "malformed": {},
    "effectiveness_loss": {"axis": "all", "scale": 0.3},
    "disturbance_step": {"axis": 1, "size": 3.0},
    "corrupt": {"every": 1},
    "drop": {"count": 1},
    "link_delay": {"seconds": 0.01},
    "disconnect": {},
    "duplicate": {"every": 1},
    "burst": {"ticks": 20},
    "insertion": {"ahead": 100000},
    "overrun": {"seconds": 0.003},
    "saturation": {"axis": 1, "scale": 0.02},
    "tick_error": {},
}


_COUNTS = ("ticks", "every", "count", "ahead")
_NUMBERS = ("size", "scale", "seconds")


class FaultError(ValueError):
    """A fault text or table is unusable; the message says what to write instead."""


class InjectedTickError(RuntimeError):
    """Raised by the ``tick_error`` fault inside the tick (a test of the last line of
    defence: the runtime must turn it into the ``internal`` trip)."""


@dataclass(frozen=True)
class Fault:
    """One scheduled fault."""

    kind: str
    at: float
    """Start time (s from the start of the run)."""
    duration: float = math.inf
    """How long it lasts (s); a spike is a single reading whatever this says."""
    params: dict[str, Any] = field(default_factory=dict)

    def param(self, key: str) -> Any:
        """A parameter, or the kind's default."""
        return self.params.get(key, DEFAULTS[self.kind].get(key))

    def active(self, t: float) -> bool:
        """True while the fault is in force at rig time t."""
        return self.at <= t < self.at + self.duration

    def label(self) -> str:
        """The fault written back in the command-line form."""
        extra = dict(self.params)
        if math.isfinite(self.duration):
            extra["duration"] = self.duration
        tail = ",".join(f"{k}={v}" for k, v in extra.items())
        return f"{self.kind}@{self.at:g}" + (f":{tail}" if tail else "")


def _value(text: str) -> Any:
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


def _make(kind: str, at: Any, params: dict[str, Any], where: str) -> Fault:
    if kind not in KINDS:
        raise FaultError(f"{where}: unknown fault kind {kind!r}; use one of {', '.join(KINDS)}.")
    try:
        at_s = float(at)
    except (TypeError, ValueError):
        raise FaultError(f"{where}: the time {at!r} is not a number of seconds "
                         f"(write e.g. {kind}@5).") from None
    if not 0.0 <= at_s < math.inf:
        raise FaultError(f"{where}: the time must be a finite number of seconds >= 0.")
    params = dict(params)
    duration = params.pop("duration", math.inf)
    try:
        duration = float(duration)
    except (TypeError, ValueError):
        raise FaultError(f"{where}: duration {duration!r} is not a number of seconds.") from None
    if not duration > 0:
        raise FaultError(f"{where}: duration must be > 0 s.")
    unknown = set(params) - set(DEFAULTS[kind])
    if unknown:
        allowed = ", ".join(sorted(DEFAULTS[kind])) or "none"
        raise FaultError(f"{where}: {kind} takes no parameter {', '.join(sorted(unknown))} "
                         f"(allowed: {allowed}, duration).")
    # Check the values here, not when the fault fires mid-run.
    for key, val in params.items():
        if key in _COUNTS and not (isinstance(val, int) and not isinstance(val, bool)
                                   and val >= 1):
            raise FaultError(f"{where}: {key} must be a whole number >= 1, not {val!r}.")
        if key in _NUMBERS and not (isinstance(val, (int, float)) and not isinstance(val, bool)
                                    and math.isfinite(val)):
            raise FaultError(f"{where}: {key} must be a finite number, not {val!r}.")
        if key == "axis" and not isinstance(val, (int, str)):
            raise FaultError(f"{where}: axis must be a channel name, an index or all.")
    return Fault(kind, at_s, duration, params)


def parse_fault(text: str) -> Fault:
    """Parse ``KIND@SECONDS`` or ``KIND@SECONDS:key=value,...``.

    Example:
        >>> parse_fault("spike@5:axis=az,size=0.2").params
        {'axis': 'az', 'size': 0.2}
    """
    where = f"--fault {text!r}"
    head, _, tail = text.strip().partition(":")
    kind, sep, at = head.partition("@")
    if not sep:
        raise FaultError(f"{where}: write KIND@SECONDS, e.g. spike@5 or "
                         f"disturbance_step@8:axis=el,size=3.")
    params: dict[str, Any] = {}
    for item in filter(None, (p.strip() for p in tail.split(","))):
        key, eq, val = item.partition("=")
        if not eq:
            raise FaultError(f"{where}: parameter {item!r} needs key=value.")
        params[key.strip()] = _value(val.strip())
    return _make(kind.strip(), at, params, where)


class FaultSchedule:
    """The faults of one run, in start order."""

    def __init__(self, faults: Iterable[Fault] = ()) -> None:
        self.faults = sorted(faults, key=lambda f: f.at)
        self.sources: dict[str, list[str]] = {"config": [], "command_line": []}
        """Labels (`Fault.label`) by where each fault was scheduled (for the log headers)."""

    @classmethod
    def from_config(cls, cfg: Any, extra: Sequence[str] = ()) -> FaultSchedule:
        """`[[faults]]` tables of a config plus command-line ``KIND@SECONDS`` texts.

        Raises `runtime.config.ConfigError`-compatible `FaultError` for bad entries;
        the caller turns it into one line.
        """
        faults = []
        tables = cfg.get("faults") if hasattr(cfg, "get") else []
        if isinstance(tables, dict):
            tables = [tables]
        for i, table in enumerate(tables or []):
            if not isinstance(table, dict) or "kind" not in table or "at" not in table:
                raise FaultError(f"faults[{i}]: each [[faults]] table needs kind and at.")
            params = {k: v for k, v in table.items() if k not in ("kind", "at")}
            faults.append(_make(str(table["kind"]), table["at"], params, f"faults[{i}]"))
        from_cfg = list(faults)
        extra_faults = [parse_fault(t) for t in extra]
        out = cls(from_cfg + extra_faults)
        out.sources = {"config": [f.label() for f in from_cfg],
                       "command_line": [f.label() for f in extra_faults]}
        return out

    def describe(self) -> dict[str, list[str]]:
        """The schedule as labels: ``{"config": [...], "command_line": [...]}``."""
        known = set(self.sources["config"]) | set(self.sources["command_line"])
        other = [f.label() for f in self.faults if f.label() not in known]
        return {"config": list(self.sources["config"]) + other,
                "command_line": list(self.sources["command_line"])}

    def __len__(self) -> int:
        return len(self.faults)

    def active(self, t: float) -> list[Fault]:
        """Faults in force at t."""
        return [f for f in self.faults if f.active(t)]

    def link_faults(self, t: float) -> list[Fault]:
        """Link faults in force at t."""
        return [f for f in self.faults if f.kind in LINK_KINDS and f.active(t)]


def resolve_axis(axis: Any, names: Sequence[str], width: int) -> list[int]:
    """Channel indices an ``axis`` parameter names (an index, a name, or ``all``)."""
    if axis is None or axis == "all":
        return list(range(width))
    if isinstance(axis, int):
        if not 0 <= axis < width:
            raise FaultError(f"axis {axis} is out of range 0..{width - 1}.")
        return [axis]
    if axis in names:
        return [list(names).index(axis)]
    matches = [i for i, n in enumerate(names) if n.split("_")[0] == axis or n.endswith(axis)]
    if matches:
        return matches[:1]
    raise FaultError(f"axis {axis!r} is not one of {', '.join(names)} (or all).")


class FaultInjector:
    """Applies a schedule to a plant and its readings.

    `apply(t)` before each plant step sets ``plant.disturbance`` and
    ``plant.lam_scale``; `measure(t, y)` returns the reading the rig reports
    (``None`` = no sample this period). ``states`` and ``axes`` name the
    reading channels and the input axes (the pedestal's by default).
    """

    def __init__(self, schedule: FaultSchedule, plant: Any,
                 states: Sequence[str] = ("az", "el", "az_rate", "el_rate"),
                 axes: Sequence[str] = ("az", "el")) -> None:
        self.schedule = schedule
        self.plant = plant
        self.states = tuple(states)
        self.axes = tuple(axes)
        self._held: NDArray[np.float64] | None = None
        self._spiked: set[int] = set()
        self._history: list[NDArray[np.float64]] = []
        self._channels: dict[int, list[int]] = {}
        for i, f in enumerate(schedule.faults):
            if f.kind in ("sensor_freeze", "spike", "nan"):
                self._channels[i] = resolve_axis(f.param("axis"), self.states, len(self.states))
            elif f.kind in PLANT_KINDS:
                self._channels[i] = resolve_axis(f.param("axis"), self.axes, len(self.axes))
        self._link_n: dict[int, int] = {}
        """Samples each link fault has seen since it started (by fault index)."""
        self._late: list[Any] = []
        self._last_sample: Any = None
        self.wire = False
        """True for a served device that sends real frames: a ``corrupt`` frame is sent
        with flipped bytes (`corrupt_last`) for the receiver's CRC to catch, instead of
        being counted and discarded here as the in-process link does."""
        self.corrupt_last = False
        """Whether the frame `on_link` just returned is to be corrupted (``wire`` only)."""

    def active(self, t: float) -> list[str]:
        """Labels of the faults in force at t."""
        return [f.label() for f in self.schedule.active(t)]

    def delay_ticks(self, t: float) -> int:
        """How many periods old the reading reported at t is (0 without a delay fault)."""
        return max((int(f.param("ticks")) for f in self.schedule.faults
                    if f.kind == "delay" and f.active(t)), default=0)

    def apply(self, t: float) -> None:
        """Set the plant's fault hooks for the step that starts at t."""
        m = len(self.axes)
        batch = getattr(self.plant, "batch", 1)
        dist = np.zeros((batch, m))
        lam = np.ones((batch, m))
        any_dist = any_lam = False
        for i, f in enumerate(self.schedule.faults):
            if not f.active(t):
                continue
            if f.kind == "disturbance_step":
                dist[:, self._channels[i]] += float(f.param("size"))
                any_dist = True
            elif f.kind in ("effectiveness_loss", "saturation"):
                lam[:, self._channels[i]] *= float(f.param("scale"))
                any_lam = True
        self.plant.disturbance = dist if any_dist else None
        self.plant.lam_scale = lam if any_lam else None

    def on_link(self, t: float, sample: Any, stats: Any, period: float) -> Any:
        """The sample (a `drivers.base.Sample`) as the receiver gets it at rig time t through
        the link faults in force (None: nothing arrives this period). Counts what a real
        receiver would count in `stats` (crc_errors, duplicates). Also the host kinds:
        ``overrun`` stalls here, inside the tick (on a served device: the device's clock
        stalls). One definition of each link kind: the in-process link and the served
        device (`sim_rigs.device`, ``wire`` set) both call this."""
        import dataclasses
        import time

        out = sample
        self.corrupt_last = False
        for i, f in enumerate(self.schedule.faults):
            if not f.active(t) or f.kind not in LINK_KINDS + HOST_KINDS:
                continue
            n = self._link_n.get(i, 0)
            self._link_n[i] = n + 1
            kind = f.kind
            if kind == "overrun":
                time.sleep(float(f.param("seconds")))
            elif out is None:
                continue
            elif kind == "drop":
                if n < int(f.param("count")):
                    out = None
            elif kind == "corrupt":
                if n % int(f.param("every")) == 0:
                    if self.wire:
                        self.corrupt_last = True
                    else:
                        stats.crc_errors += 1
                        out = None
            elif kind == "duplicate":
                if n % int(f.param("every")) == 0 and self._last_sample is not None:
                    stats.duplicates += 1
                    out = self._last_sample
            elif kind == "burst":
                held = int(f.param("ticks"))
                if n % (held + 1) != held:
                    out = None
            elif kind == "insertion":
                if n == 0:
                    out = dataclasses.replace(out, seq=out.seq + int(f.param("ahead")))
            elif kind == "link_delay":
                d = max(1, int(round(float(f.param("seconds")) / period)))
                self._late.append(out)
                out = self._late.pop(0) if len(self._late) > d else None
        if out is not None and out is sample:
            self._last_sample = sample
        return out

    def measure(self, t: float, y: NDArray[np.float64]) -> NDArray[np.float64] | None:
        """The reading reported at t for the true reading y (None: dropped)."""
        y = np.array(y, dtype=float)
        self._history.append(y.copy())
        delay_max = max((int(f.param("ticks")) for f in self.schedule.faults
                         if f.kind == "delay"), default=0)
        if len(self._history) > delay_max + 1:
            del self._history[0]
        out = y
        frozen = False
        for i, f in enumerate(self.schedule.faults):
            if not f.active(t):
                continue
            kind = f.kind
            if kind == "dropout":
                return None
            if kind == "tick_error":
                raise InjectedTickError(f"injected tick_error fault at t = {t:.3f} s")
            if kind == "malformed":
                out = out[..., :-1]
                continue
            if kind == "delay":
                d = int(f.param("ticks"))
                out = self._history[max(0, len(self._history) - 1 - d)].copy()
            elif kind == "sensor_freeze":
                frozen = True
                if self._held is None:
                    self._held = out.copy()
                out[..., self._channels[i]] = self._held[..., self._channels[i]]
            elif kind == "spike" and i not in self._spiked:
                self._spiked.add(i)
                out[..., self._channels[i]] += float(f.param("size"))
            elif kind == "nan":
                out[..., self._channels[i]] = np.nan
        if not frozen:
            self._held = None
        return out
