"""The records corral writes and sends, each defined once: fields, types, units.

Lives here, one class per record kind (docs/telemetry.md names the wire fields):
- `Hello`: what a telemetry client gets on connect (socket, retained on MQTT).
- `Telemetry`: the decimated live record, with its `LoopFigures` and `TripSummary` list.
- `TripSummary`: a trip in one line (telemetry ``trip``/``trips``, socket/MQTT ``trip``).
- `TripRecord`: the trip as the trip log holds it (`FirstOut`, later rules, snapshot, pre
  capture); `PostRecord`: its post-trip capture.
- `Event`: an operator or mode event (trip log, socket, MQTT).
- `Reply`: the answer to an operator request.
- `RunEnd`: the end record, the summary of how a run ended (last record of both logs).
- (in `runtime.records.tickrow`) `TickRecord`: one run-log row.

Every map record has `to_wire()` (the plain dict msgpack/JSON get, fields in the order
they were always written) and `from_wire(d)` (a dict read from a file or a socket):
- a malformed record raises `RecordError` naming the record, the field and what it needs;
- an optional field that an older file lacks gets its default, and is remembered as
  missing so `to_wire()` leaves it out again (a read -> write round trip is identity);
- unknown fields are KEPT in `extra` and written back after the known ones, so a file
  from a newer corral survives a read and write by this one.

The tick builds these records directly (`runtime.realtime.tick_records`, keyword
constructors; `given` leaves out the optional fields it was not given). The writer, the
socket and the MQTT bridge still parse a plain map (`parse_log_record`, `as_record`)
where an outside peer or an old file supplies one, so such a record is checked there.

What does not live here: the file framing and the writers (`runtime.records.logwriter`),
the readers (`runtime.records.logs`), the log headers (plain maps: the config is open).
"""

from __future__ import annotations

import math
import types
import typing
from dataclasses import MISSING, dataclass, field, fields
from typing import Any, ClassVar, TypeVar, Union

R = TypeVar("R", bound="WireRecord")


class RecordError(ValueError):
    """A record that does not match its schema; the message names the field and the fix."""


def _type_name(tp: Any) -> str:
    names = {str: "a string", int: "an integer", float: "a number", bool: "true or false"}
    if tp in names:
        return names[tp]
    origin = typing.get_origin(tp)
    if origin is list:
        return "a list"
    if origin is dict:
        return "a map"
    if origin in (Union, types.UnionType):
        return " or ".join(_type_name(a) for a in typing.get_args(tp))
    if tp is type(None):
        return "null"
    if isinstance(tp, type) and issubclass(tp, WireRecord):
        return "a map"
    return str(tp)


_SCALARS: dict[Any, frozenset[type]] = {
    float: frozenset({float, int}), int: frozenset({int}), str: frozenset({str}),
    bool: frozenset({bool}), type(None): frozenset({type(None)})}
_LEAVES: dict[Any, frozenset[type] | None] = {}


def _leaf(tp: Any) -> frozenset[type] | None:
    """The exact Python types a scalar type (or a union of scalars) accepts; None for
    other types. The fast path: ``type(v) in ...`` (bool is not an int here)."""
    if tp in _LEAVES:
        return _LEAVES[tp]
    out: frozenset[type] | None = _SCALARS.get(tp)
    if out is None and typing.get_origin(tp) in (Union, types.UnionType):
        args = typing.get_args(tp)
        if all(a in _SCALARS for a in args):
            out = frozenset().union(*(_SCALARS[a] for a in args))
    _LEAVES[tp] = out
    return out


def _check(tp: Any, value: Any, where: str, partial: bool = False) -> Any:
    """`value` if it is of type `tp` (nested records parsed, partially with `partial`),
    else RecordError. Plain scalars and lists of them take a fast path (this runs for
    every telemetry record on the event loop, which shares the GIL with the tick)."""
    if tp is Any:
        return value
    leaf = _leaf(tp)
    if leaf is not None and type(value) in leaf:
        return value
    origin = typing.get_origin(tp)
    if origin is list and isinstance(value, list):
        item = _leaf(typing.get_args(tp)[0])
        if item is not None and all(type(v) in item for v in value):
            return list(value)
    if origin in (Union, types.UnionType):
        for arg in typing.get_args(tp):
            try:
                return _check(arg, value, where, partial)
            except RecordError:
                continue
        raise RecordError(f"{where} must be {_type_name(tp)}, got {value!r:.60}")
    if origin is list:
        if not isinstance(value, (list, tuple)):
            raise RecordError(f"{where} must be a list, got {value!r:.60}")
        (arg,) = typing.get_args(tp)
        if arg is Any:
            return list(value)
        return [_check(arg, v, f"{where}[{i}]", partial) for i, v in enumerate(value)]
    if origin is dict:
        if not isinstance(value, dict):
            raise RecordError(f"{where} must be a map, got {value!r:.60}")
        _, varg = typing.get_args(tp)
        if varg is Any:
            return value
        return {k: _check(varg, v, f"{where}.{k}", partial) for k, v in value.items()}
    if isinstance(tp, type) and issubclass(tp, WireRecord):
        if isinstance(value, tp):
            return value
        if not isinstance(value, dict):
            raise RecordError(f"{where} must be a map, got {value!r:.60}")
        return tp.from_wire(value, where=where, partial=partial)
    ok = {
        type(None): value is None,
        bool: isinstance(value, bool),
        str: isinstance(value, str),
        int: isinstance(value, int) and not isinstance(value, bool),
        # An integer is a number (msgpack keeps 0 an int); kept as is so bytes round-trip.
        float: isinstance(value, (int, float)) and not isinstance(value, bool),
    }.get(tp)
    if ok is None:
        raise TypeError(f"no check for {tp!r} ({where})")
    if not ok:
        raise RecordError(f"{where} must be {_type_name(tp)}, got {value!r:.60}")
    return value


def _unknown(tp: Any) -> Any:
    """The value standing for a missing required field in a partial record."""
    origin = typing.get_origin(tp)
    if origin in (Union, types.UnionType):
        args = typing.get_args(tp)
        return None if type(None) in args else _unknown(args[0])
    if origin is list:
        return []
    if origin is dict:
        return {}
    if isinstance(tp, type) and issubclass(tp, WireRecord):
        return tp.from_partial({})
    return {float: math.nan, int: -1, str: "", bool: False}.get(tp)


def _nests(tp: Any) -> bool:
    """Whether a field type holds records (then `to_wire` converts it)."""
    if isinstance(tp, type) and issubclass(tp, WireRecord):
        return True
    return any(_nests(a) for a in typing.get_args(tp))


def _wire(value: Any, tag: bool) -> Any:
    """A field value as the wire holds it (nested records as maps, ``type`` when `tag`)."""
    if isinstance(value, WireRecord):
        return value.to_wire(tag=tag)
    if isinstance(value, list):
        return [_wire(v, tag) for v in value]
    return value


UNTAGGED = {"tag": False}
"""Field metadata: the nested records of this field carry no ``type`` on the wire."""


@dataclass(slots=True, kw_only=True)
class WireRecord:
    """Base of every map record: the schema machinery (see the module docstring)."""

    KIND: ClassVar[str] = ""
    """The wire ``type`` (empty: a nested map without one)."""
    LABEL: ClassVar[str] = "record"
    """How errors name the record."""

    extra: dict[str, Any] = field(default_factory=dict, repr=False)
    """Fields this version does not know, kept and written back after the known ones."""
    missing: tuple[str, ...] = field(default=(), repr=False, compare=False)
    """Optional fields the record was read without; left out again by `to_wire`."""

    @classmethod
    def _schema(cls) -> list[tuple[str, Any, bool, bool | None]]:
        """(name, type, required, tag) of each wire field, in wire order (cached); tag is
        None for a field holding no record (written as it is), else whether its nested
        records carry their ``type``."""
        cache: dict[type, list[tuple[str, Any, bool, bool | None]]] = _SCHEMAS
        spec = cache.get(cls)
        if spec is None:
            hints = typing.get_type_hints(cls)
            spec = []
            for f in fields(cls):
                if f.name in ("extra", "missing"):
                    continue
                required = f.default is MISSING and f.default_factory is MISSING
                tag = f.metadata.get("tag", True) if _nests(hints[f.name]) else None
                spec.append((f.name, hints[f.name], required, tag))
            cache[cls] = spec
        return spec

    @classmethod
    def from_partial(cls: type[R], d: dict[str, Any], where: str | None = None) -> R:
        """Parse a map that may lack required fields (a display of what a peer sent: an
        older corral, a hand-made test map): each missing one gets its type's "unknown"
        value (NaN, -1, "", false, empty, null) and is left out by `to_wire`. A present
        field of the wrong type is still a RecordError."""
        return cls.from_wire(d, where, partial=True)

    @classmethod
    def from_wire(cls: type[R], d: dict[str, Any], where: str | None = None,
                  partial: bool = False) -> R:
        """Parse a wire map; RecordError (naming the field) when it is malformed."""
        label = where or cls.LABEL
        if not isinstance(d, dict):
            raise RecordError(f"{label}: expected a map, got {type(d).__name__}")
        kind = d.get("type")
        if cls.KIND and kind is not None and kind != cls.KIND:
            raise RecordError(f"{label}: type is {kind!r}, expected {cls.KIND!r}")
        values: dict[str, Any] = {}
        missing: list[str] = []
        for name, tp, required, _ in cls._schema():
            if name not in d:
                if required and not partial:
                    raise RecordError(f"{label}: field {name!r} is missing "
                                      f"(it must be {_type_name(tp)})")
                if required:
                    values[name] = _unknown(tp)
                missing.append(name)
                continue
            values[name] = _check(tp, d[name], f"{label}: field {name!r}", partial)
        known = cls._names()
        extra = {k: v for k, v in d.items() if k not in known and k != "type"}
        return cls(**values, extra=extra, missing=tuple(missing))

    @classmethod
    def given(cls: type[R], extra: dict[str, Any] | None = None, **values: Any) -> R:
        """A record of exactly these fields (not checked): the optional ones not given are
        left out by `to_wire`, as when a file without them is read."""
        missing = tuple(s[0] for s in cls._schema() if not s[2] and s[0] not in values)
        return cls(**values, extra=extra or {}, missing=missing)

    @classmethod
    def _names(cls) -> frozenset[str]:
        cache: dict[type, frozenset[str]] = _NAMES
        names = cache.get(cls)
        if names is None:
            names = cache[cls] = frozenset(s[0] for s in cls._schema())
        return names

    def to_wire(self, tag: bool = True) -> dict[str, Any]:
        """The plain map (msgpack/JSON): ``type`` first when tagged, known fields, extras."""
        out: dict[str, Any] = {}
        if tag and self.KIND:
            out["type"] = self.KIND
        skip = self.missing
        for name, _, _, nested_tag in self._schema():
            if name not in skip:
                value = getattr(self, name)
                out[name] = value if nested_tag is None else _wire(value, nested_tag)
        out.update(self.extra)
        return out

    def validate(self: R) -> R:
        """This record checked against its schema (a constructed record is not checked)."""
        return type(self).from_wire(self.to_wire())


_SCHEMAS: dict[type, list[tuple[str, Any, bool, bool | None]]] = {}
_NAMES: dict[type, frozenset[str]] = {}


# ---------------------------------------------------------------------------
# Live records (socket, MQTT)
# ---------------------------------------------------------------------------

@dataclass(slots=True, kw_only=True)
class Hello(WireRecord):
    """Sent once on connect (and retained on MQTT): what the rig is.

    Units: `period` s; `eps` the bound at engage, in the ‖e‖_P norm; `limits`/`envelope`
    per state in that state's unit (`state_units`); `input_limits` per input
    (`input_units`); `levels` fractions of eps.
    """

    KIND: ClassVar[str] = "hello"
    LABEL: ClassVar[str] = "hello record"

    rig: str
    states: list[str]
    state_units: list[str]
    inputs: list[str]
    input_units: list[str]
    input_limits: list[float]
    limits: list[float]
    envelope: list[float]
    eps: float
    bound: dict[str, Any]
    """The schedule eps(t): ``kind`` (constant when none), ``eps0``, ``eps_inf``, ``alpha``..."""
    levels: dict[str, float]
    """``warning`` and ``trip`` as fractions of eps."""
    period: float
    simulated: bool | None
    tracked: list[str]
    hostcheck: dict[str, Any] | None = None
    """`corral hostcheck --json` keys when a host check ran before arming."""
    link: dict[str, Any] = field(default_factory=dict)
    """`runtime.records.runinfo.link_identity` of the run's link."""
    run_name: str = ""
    status_flags: list[str] = field(default_factory=list)
    """Names of the device's own status bits (bit 8 + k of telemetry ``status``)."""
    preflight: dict[str, Any] | None = None
    """The preflight verdict (``go``, ``reasons``, ...) once it has run."""

    @property
    def warning_level(self) -> float:
        """The margin warning level (fraction of eps), 0.8 when the hello has none."""
        return float(self.levels.get("warning", 0.8))

    @property
    def trip_level(self) -> float:
        """The margin trip level (fraction of eps), 0.9 when the hello has none."""
        return float(self.levels.get("trip", 0.9))


@dataclass(slots=True, kw_only=True)
class TripSummary(WireRecord):
    """A trip in one line: telemetry's ``trip``/``trips``, the socket's and MQTT's ``trip``.

    `t` s of rig time; `detect_to_action_us` µs; `value`/`threshold` in the rule's unit
    (`runtime.records.runinfo.RULE_SIGNALS`; the `internal` rule's value is the exception text).
    """

    KIND: ClassVar[str] = "trip"
    LABEL: ClassVar[str] = "trip summary"

    id: int
    rule: str
    tick: int
    t: float
    action: str
    detect_to_action_us: float
    value: float | str | None
    threshold: float | None
    later: list[str] = field(default_factory=list)
    """Rule ids that also tripped after the first-out."""
    detail: str = ""
    """Why (a link loss names its cause); absent for most rules."""


@dataclass(slots=True, kw_only=True)
class LoopFigures(WireRecord):
    """Telemetry's ``loop``: rate (Hz), lateness percentiles (µs, null when not measured
    yet) over the last second of ticks, deadline misses and ticks so far."""

    LABEL: ClassVar[str] = "telemetry loop figures"

    rate_hz: float
    lateness_p50_us: float | None
    lateness_p99_us: float | None
    deadline_misses: int
    ticks: int


@dataclass(slots=True, kw_only=True)
class Telemetry(WireRecord):
    """The decimated live record (`telemetry.rate_hz`). Units: `t` s; `ratio` ‖e‖_P/eps;
    `s` ‖e‖_P; `eps` the bound in force; `c`, `x`, `xr`, `e` in the state/output units of
    the hello; `u`, `u_raw` in `input_units`; `w_norm` ‖W‖_F; `w_rate` 1/s; `sat_time` s
    per input; `time_to_bound` s (null: not approaching); `status` the device's bits."""

    KIND: ClassVar[str] = "telemetry"
    LABEL: ClassVar[str] = "telemetry record"

    t: float
    tick: int
    mode: str
    latched: bool
    fallback: str | None
    ratio: float
    s: float
    eps: float
    phi_d: float
    eff_rate: float
    step_gain: float
    step_gain_cap: float
    c: list[float]
    x: list[float]
    xr: list[float]
    e: list[float]
    u: list[float]
    u_raw: list[float]
    w_norm: float
    w_rate: float
    sat_time: list[float]
    time_to_bound: float | None
    loop: LoopFigures
    link: dict[str, Any]
    """The link's counters (`LinkStats.as_dict()`) plus ``sample_age_ms``."""
    status: int = 0
    trip: TripSummary | None = field(default=None, metadata=UNTAGGED)
    """The latched trip's first-out summary (null when not latched)."""
    trips: list[TripSummary] = field(default_factory=list, metadata=UNTAGGED)
    """This run's trips, the last 20."""


@dataclass(slots=True, kw_only=True)
class Event(WireRecord):
    """An operator or mode event (arm, disarm, reset, stop, mode, engage, refused,
    events_suppressed, preflight, ...). `t_mono`/`t_wall` s (monotonic / since the epoch);
    `tick` -1 when outside the loop. Kind-specific fields (``count``, ``preflight``) are
    in `extra`."""

    KIND: ClassVar[str] = "event"
    LABEL: ClassVar[str] = "event record"

    t_mono: float | None = None
    t_wall: float | None = None
    tick: int = -1
    kind: str
    detail: str = ""


@dataclass(slots=True, kw_only=True)
class Reply(WireRecord):
    """The answer to an operator request (``id`` on MQTT is kept in `extra`)."""

    KIND: ClassVar[str] = "reply"
    LABEL: ClassVar[str] = "reply"

    op: str
    ok: bool
    message: str = ""


# ---------------------------------------------------------------------------
# Trip log records
# ---------------------------------------------------------------------------

@dataclass(slots=True, kw_only=True)
class FirstOut(WireRecord):
    """The rule that tripped first: its signal, value and threshold (the rule's unit),
    and the rule's settings when it tripped (`on_delay_s` s, `deadband`, `reaction`,
    `capture_field`: the capture column of its judged signal)."""

    LABEL: ClassVar[str] = "trip first_out"

    rule: str
    signal: str = ""
    value: float | str | None = None
    threshold: float | None = None
    on_delay_s: float | None = None
    deadband: float | None = None
    reaction: str = ""
    capture_field: str = ""
    detail: str = ""
    tick: int = -1
    """Set on a later rule's entry (the tick it tripped)."""


@dataclass(slots=True, kw_only=True)
class TripRecord(WireRecord):
    """A trip as the trip log holds it (written fsynced before anyone hears of it).

    `t_mono`/`t_wall` s; `t` s of rig time; `detect_to_action_us` µs; `snapshot` the state
    at the trip (mode, W, x, xr, e, u_cmd, u_applied, eps, phi_d, ratio, loop, link);
    `pre` the capture rows before the trip, positional in the header's
    ``capture_fields``/``capture_widths`` order; `events` the recent operator events;
    `exception` the traceback of an `internal` trip.
    """

    KIND: ClassVar[str] = "trip"
    LABEL: ClassVar[str] = "trip record"

    id: int
    t_mono: float | None = None
    t_wall: float | None = None
    tick: int = -1
    t: float | None = None
    first_out: FirstOut
    later: list[FirstOut] = field(default_factory=list)
    action: str = "?"
    detect_to_action_us: float | None = None
    exception: str = ""
    snapshot: dict[str, Any] = field(default_factory=dict)
    config_hash: str = ""
    software_version: str = ""
    rig: str = ""
    events: list[Event] = field(default_factory=list)
    pre: list[list[Any]] = field(default_factory=list)

    def summary(self) -> TripSummary:
        """The one-line summary the socket and telemetry carry."""
        fo = self.first_out
        return TripSummary(id=self.id, rule=fo.rule, tick=self.tick, t=self.t or 0.0,
                           action=self.action,
                           detect_to_action_us=self.detect_to_action_us or 0.0,
                           value=fo.value, threshold=fo.threshold,
                           later=[e.rule for e in self.later], detail=fo.detail,
                           missing=() if fo.detail else ("detail",))


@dataclass(slots=True, kw_only=True)
class PostRecord(WireRecord):
    """A trip's post-trip capture rows (positional, like `TripRecord.pre`) and the rules
    that tripped during it."""

    KIND: ClassVar[str] = "post"
    LABEL: ClassVar[str] = "post-trip capture record"

    trip_id: int
    rows: list[list[Any]] = field(default_factory=list)
    later: list[FirstOut] = field(default_factory=list)


@dataclass(slots=True, kw_only=True)
class RunEnd(WireRecord):
    """The end record: how the run ended (`runtime.records.runinfo.END_HOW`), the last
    record of both logs. `t_wall` s since the epoch (null when synthesised for a log
    without one: `found` false); `tick` ticks run; `trips` trips in the run; `loop` and
    `link_stats` the run's figures (the loop's in µs)."""

    KIND: ClassVar[str] = "end"
    LABEL: ClassVar[str] = "end record"

    how: str
    how_text: str = ""
    t_wall: float | None = None
    time_iso: str = ""
    tick: int = 0
    trips: int = 0
    mode: str = ""
    latched: bool = False
    detail: str = ""
    rig: str = ""
    device_rig: str | None = None
    link: dict[str, Any] = field(default_factory=dict)
    link_stats: dict[str, Any] = field(default_factory=dict)
    loop: dict[str, Any] = field(default_factory=dict)
    found: bool = True
    """False when the log had no end record (this one says how it was cut short)."""


LOG_RECORDS: dict[str, type[WireRecord]] = {
    "trip": TripRecord, "post": PostRecord, "event": Event, "end": RunEnd}
"""Trip-log record classes by their ``type``."""

LIVE_RECORDS: dict[str, type[WireRecord]] = {
    "hello": Hello, "telemetry": Telemetry, "trip": TripSummary, "event": Event,
    "reply": Reply}
"""Socket/MQTT record classes by their ``type``."""


def parse_log_record(d: dict[str, Any]) -> WireRecord:
    """A trip-log map as its record class; RecordError for an unknown or malformed one."""
    return _parse(d, LOG_RECORDS, "trip log")


def parse_live_record(d: dict[str, Any]) -> WireRecord:
    """A socket/MQTT map as its record class; RecordError for an unknown or malformed one."""
    return _parse(d, LIVE_RECORDS, "telemetry stream")


def _parse(d: dict[str, Any], table: dict[str, type[WireRecord]], where: str) -> WireRecord:
    if not isinstance(d, dict):
        raise RecordError(f"{where}: expected a map, got {type(d).__name__}")
    cls = table.get(str(d.get("type")))
    if cls is None:
        raise RecordError(f"{where}: unknown record type {d.get('type')!r} "
                          f"(known: {', '.join(table)})")
    return cls.from_wire(d)


def as_record(value: R | dict[str, Any], cls: type[R]) -> R:
    """`value` as a `cls` record: a record passes, a dict (a peer's, a test's) is parsed."""
    if isinstance(value, cls):
        return value
    if isinstance(value, dict):
        return cls.from_wire(value)
    raise RecordError(f"{cls.LABEL}: expected a map or a {cls.__name__}, "
                      f"got {type(value).__name__}")


__all__ = [
    "as_record", "Event", "FirstOut", "Hello", "LIVE_RECORDS", "LOG_RECORDS", "LoopFigures",
    "parse_live_record", "parse_log_record", "PostRecord", "RecordError", "Reply", "RunEnd",
    "Telemetry", "TripRecord", "TripSummary", "UNTAGGED", "WireRecord",
]
