"""Crash-safe records: the run log, the trip log, and their readers.

Lives here:
- `RunLogWriter`: every tick as one positional msgpack list after a schema
  header, written by a background thread from a bounded queue. `append` never
  blocks the tick; when the queue is full the row is dropped and counted.
- `TripLog`: the append-only trip log. Every record (header, trip, post-trip
  capture, operator event) is one msgpack map written with write + flush +
  os.fsync at once, so everything appended before a crash or a kill reads back.
- (in `runtime.records.logwriter`, re-exported here) the format names and the writers.
- Readers: `read_stream` (header, records, torn flag), `read_trip_records` (one trip
  log as typed records: `TripLogContents`), `load_trips` (trips of many logs, post
  captures merged, sorted by wall time), `read_run_log` (columns), `read_ticks`
  (typed rows). A torn last record (a crash mid-write) is detected and skipped, never
  fatal; a record that does not match its schema is skipped and named in ``bad``.
- `Trip` and `Capture`: a trip as a reviewer sees it (`Trip.rec`, a
  `runtime.records.kinds.TripRecord`), and its pre/post capture as named columns
  (used by `corral trips`, the plot and the exports).

What does not live here: deciding when to trip (`runtime.guard.watchdog`), the loop
that fills these records (`runtime.realtime.loop`), plots and exports
(`runtime.review.triplot`, `runtime.review.comtrade_export`), the command line
(`runtime.cli.cmd_trips`). The file formats are the shared contract in the
design notes; this module is their only writer.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
from numpy.typing import NDArray

from runtime.records.kinds import (
    Event,
    PostRecord,
    RecordError,
    RunEnd,
    TripRecord,
)
from runtime.records.logwriter import (
    DEFAULT_LEVELS,
    FORMAT_VERSION,
    MODES,
    RULES,
    RUNLOG_FORMAT,
    RUNLOG_SUFFIX,
    TRIPS_FORMAT,
    TRIPS_SUFFIX,
    LogReadError,
    RunLogWriter,
    TripLog,
    log_paths,
)
from runtime.records.tickrow import TickRecord

#: The writers and the format names live in `runtime.records.logwriter`; importable from here.
__all__ = [
    'DEFAULT_LEVELS', 'FORMAT_VERSION', 'log_paths', 'LogReadError', 'MODES', 'RULES',
    'RUNLOG_FORMAT', 'RUNLOG_SUFFIX', 'RunLogWriter', 'TripLog', 'TRIPS_FORMAT',
    'TRIPS_SUFFIX',
]


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------

def read_stream(path: str | Path) -> tuple[dict[str, Any] | None, list[Any], bool]:
    """Read a msgpack log: (header map or None, the records after it, torn).

    `torn` is True when bytes after the last complete record were skipped (a
    crash mid-write, or garbage). Trip logs give maps; run logs give lists.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError as exc:
        raise LogReadError(f"no such log: {path}") from exc
    except IsADirectoryError as exc:
        raise LogReadError(f"{path} is a folder, not a log file") from exc
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=False, max_buffer_size=0)
    unpacker.feed(data)
    objs: list[Any] = []
    end = 0
    try:
        for obj in unpacker:
            objs.append(obj)
            end = unpacker.tell()
    except (ValueError, msgpack.UnpackException):
        pass  # garbage after the last good record: counted as torn below
    torn = end < len(data)
    header = None
    if objs and isinstance(objs[0], dict) and objs[0].get("type") == "header":
        header = objs.pop(0)
    return header, objs, torn


def find_logs(paths: Iterable[str | Path], suffix: str = TRIPS_SUFFIX) -> list[Path]:
    """Files as given, folders searched (recursively) for `*<suffix>`; missing paths raise."""
    out: list[Path] = []
    for p in map(Path, paths):
        if p.is_dir():
            out.extend(sorted(p.rglob(f"*{suffix}")))
        elif p.exists():
            out.append(p)
        else:
            raise LogReadError(f"no such log or folder: {p}")
    seen: set[Path] = set()
    unique = []
    for p in out:
        key = p.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(p)
    return unique


@dataclass
class Capture:
    """A trip's pre/post capture as columns, with the trip instant located.

    `columns[name]` is (N,) or (N, width) float, or an object array for text
    fields (a mode name). `t` is seconds relative to the trip instant (the trip
    tick is at t = 0); `trip_index` is that row.
    """

    fields: list[str]
    units: dict[str, Any]
    columns: dict[str, NDArray[Any]]
    t: NDArray[np.float64]
    trip_index: int
    n_pre: int
    period: float

    def __len__(self) -> int:
        return len(self.t)

    def numeric(self, name: str) -> NDArray[np.float64] | None:
        """A column as floats, or None when absent or not numeric."""
        col = self.columns.get(name)
        if col is None or col.dtype == object:
            return None
        return col

    def unit(self, name: str, j: int | None = None) -> str:
        """The unit of a field (of element j of a vector field)."""
        u = self.units.get(name, "")
        if isinstance(u, (list, tuple)):
            if j is not None and j < len(u):
                return str(u[j])
            return str(u[0]) if u and len(set(map(str, u))) == 1 else ""
        u = str(u or "")
        if j is not None and "," in u:
            parts = [s.strip() for s in u.split(",")]
            return parts[j] if j < len(parts) else ""
        return u


def _column(values: list[Any]) -> NDArray[Any]:
    """One field's values over the rows as a float array (N,) / (N, w), else object."""
    if values and all(isinstance(v, (list, tuple)) for v in values):
        widths = {len(v) for v in values}
        if len(widths) == 1:
            try:
                return np.array([[math.nan if x is None else x for x in v] for v in values],
                                dtype=float).reshape(len(values), widths.pop())
            except (TypeError, ValueError):
                pass
        return np.array(values + [None], dtype=object)[:-1]
    try:
        return np.array([math.nan if v is None else v for v in values], dtype=float)
    except (TypeError, ValueError):
        return np.array(values + [None], dtype=object)[:-1]


def _period(header: dict[str, Any]) -> float:
    for key in ("period", "capture_period"):
        if isinstance(header.get(key), (int, float)) and header[key] > 0:
            return float(header[key])
    loop = (header.get("config") or {}).get("loop") or {}
    p = loop.get("period") if isinstance(loop, dict) else None
    return float(p) if isinstance(p, (int, float)) and p > 0 else 0.001


def build_capture(header: dict[str, Any], record: TripRecord,
                  post: list[Any] | None) -> Capture:
    """The capture of one trip: pre rows then post rows, as named columns."""
    fields = [str(f) for f in header.get("capture_fields") or []]
    units_list = list(header.get("capture_units") or [])
    units = {f: (units_list[i] if i < len(units_list) else "") for i, f in enumerate(fields)}
    widths = header.get("capture_widths")
    pre = [r for r in record.pre if isinstance(r, (list, tuple))]
    post_rows = [r for r in (post or []) if isinstance(r, (list, tuple))]

    def split(row: Sequence[Any]) -> list[Any] | None:
        if len(row) == len(fields):
            return list(row)
        if widths and len(widths) == len(fields) and len(row) == sum(widths):
            out, k = [], 0
            for w in widths:
                out.append(row[k] if w == 1 else list(row[k:k + w]))
                k += w
            return out
        return None

    pre_s = [s for s in map(split, pre) if s is not None]
    post_s = [s for s in map(split, post_rows) if s is not None]
    rows = pre_s + post_s
    columns = {f: _column([r[i] for r in rows]) for i, f in enumerate(fields)} if rows else {
        f: np.zeros(0) for f in fields}
    n = len(rows)
    trip_index = max(len(pre_s) - 1, 0)
    tick_col = columns.get("tick")
    if tick_col is not None and tick_col.dtype != object and n:
        hits = np.flatnonzero(tick_col == record.tick)
        if hits.size:
            trip_index = int(hits[0])
    period = _period(header)
    t_col = columns.get("t")
    if t_col is not None and t_col.dtype != object and t_col.ndim == 1 and n:
        t = t_col - t_col[min(trip_index, n - 1)]
        steps = np.diff(t_col)
        steps = steps[np.isfinite(steps) & (steps > 0)]
        if steps.size:
            period = float(np.median(steps))
    else:
        t = (np.arange(n) - trip_index) * period
    return Capture(fields=fields, units=units, columns=columns, t=np.asarray(t, dtype=float),
                   trip_index=min(trip_index, max(n - 1, 0)), n_pre=len(pre_s), period=period)


@dataclass
class Trip:
    """One trip as read from a log: the typed record (`rec`: first-out, later rules,
    snapshot, pre rows), its post capture, the run's header, events and end."""

    rec: TripRecord
    header: dict[str, Any]
    source: Path
    post: list[Any] | None = None
    events: list[Event] = field(default_factory=list)
    """The run's operator and mode events (the whole log, in the order written)."""
    log_torn: bool = False
    end: RunEnd = field(default_factory=lambda: RunEnd(how="unknown", found=False))
    """How the run ended (`runtime.records.runinfo.how_ended`; "cut_short" when missing)."""
    _capture: Capture | None = field(default=None, repr=False)

    # -- identity and first-out ------------------------------------------
    @property
    def id(self) -> int:
        return self.rec.id

    @property
    def key(self) -> str:
        """`FILE:N`, the id `corral trips` accepts."""
        return f"{self.source.name}:{self.id}"

    @property
    def rule(self) -> str:
        return self.rec.first_out.rule

    @property
    def value(self) -> float | str | None:
        return self.rec.first_out.value

    @property
    def threshold(self) -> float | None:
        return self.rec.first_out.threshold

    @property
    def action(self) -> str:
        return self.rec.action

    @property
    def detect_to_action_us(self) -> float | None:
        return self.rec.detect_to_action_us

    @property
    def tick(self) -> int:
        return self.rec.tick

    @property
    def t_wall(self) -> float:
        if self.rec.t_wall is not None:
            return float(self.rec.t_wall)
        return float(self.header.get("started_wall", 0.0) or 0.0)

    @property
    def t_mono(self) -> float | None:
        return self.rec.t_mono

    # -- the run it belongs to --------------------------------------------
    @property
    def rig(self) -> str:
        return self.rec.rig or str(self.header.get("rig") or "?")

    @property
    def config_hash(self) -> str:
        return self.rec.config_hash or str(self.header.get("config_hash") or "")

    @property
    def software_version(self) -> str:
        return self.rec.software_version or str(self.header.get("software_version") or "")

    @property
    def config(self) -> dict[str, Any]:
        return dict(self.header.get("config") or {})

    @property
    def capture_fields(self) -> list[str]:
        return list(self.header.get("capture_fields") or [])

    @property
    def capture_units(self) -> list[Any]:
        return list(self.header.get("capture_units") or [])

    @property
    def cut_short(self) -> bool:
        """The log was cut short: a torn tail, or the post-trip capture never arrived."""
        return self.log_torn or self.post is None

    def capture(self) -> Capture:
        """The pre/post capture as columns (built once)."""
        if self._capture is None:
            self._capture = build_capture(self.header, self.rec, self.post)
        return self._capture

    def modes(self) -> list[str]:
        """The supervisor mode at each captured row, as a name ("" where unknown).

        Integer codes index the header's "modes" list, else `MODES`.
        """
        col = self.capture().columns.get("mode")
        if col is None:
            return []
        order = [str(m) for m in self.header.get("modes") or MODES]
        out = []
        for v in col.tolist():
            if isinstance(v, str):
                out.append(v)
            elif isinstance(v, (int, float)) and math.isfinite(v) and 0 <= int(v) < len(order):
                out.append(order[int(v)])
            else:
                out.append("")
        return out

    def levels(self) -> dict[str, float]:
        """Margin warning and trip levels (fractions of eps) the run used."""
        lv = dict(DEFAULT_LEVELS)
        head = self.header.get("levels")
        if isinstance(head, dict):
            lv.update({k: float(v) for k, v in head.items() if k in lv})
            return lv
        wd = self.config.get("watchdog")
        if isinstance(wd, dict):
            margin = wd.get("margin")
            if isinstance(margin, dict):
                for k in lv:
                    for name in (k, f"{k}_level", "level" if k == "trip" else ""):
                        if isinstance(margin.get(name), (int, float)):
                            lv[k] = float(margin[name])
                            break
            for k in lv:
                for name in (f"margin_{k}", f"{k}_level"):
                    if isinstance(wd.get(name), (int, float)):
                        lv[k] = float(wd[name])
        if self.rule == "margin" and self.threshold is not None:
            lv["trip"] = float(self.threshold)
        return lv

    def names(self) -> dict[str, list[str]]:
        """State, input and tracked-output names and units (header first, else the config)."""
        h = self.header
        out: dict[str, list[str]] = {}
        for key in ("states", "state_units", "inputs", "input_units", "tracked"):
            if isinstance(h.get(key), list):
                out[key] = [str(v) for v in h[key]]
        if "input_limits" in h and isinstance(h["input_limits"], list):
            out["input_limits"] = [str(v) for v in h["input_limits"]]
        if {"states", "inputs", "tracked", "input_limits"} <= out.keys() or not self.config:
            return out
        try:  # derive from the config that ran
            from runtime.config import Config
            from runtime.method.commands import tracked_names
            from runtime.method.design import rig_model

            rig = rig_model(Config(raw=self.config))
            out.setdefault("states", list(rig.states))
            out.setdefault("state_units", list(rig.state_units))
            out.setdefault("inputs", list(rig.inputs))
            out.setdefault("input_units", list(rig.input_units))
            out.setdefault("input_limits", [str(v) for v in np.asarray(rig.input_limits)])
            out.setdefault("tracked", list(tracked_names(rig.C, rig.states)))
        except Exception:  # noqa: BLE001 - names are a nicety; a foreign config must not break review
            pass
        return out

    def summary(self) -> dict[str, Any]:
        """The one-line facts of a trip as plain JSON values."""
        from runtime.records.runinfo import iso_time, say_value

        fo = self.rec.first_out
        raw_link = self.header.get("link")
        link: dict[str, Any] = raw_link if isinstance(raw_link, dict) else {}
        return {
            "id": self.id, "key": self.key, "file": str(self.source), "rig": self.rig,
            "link_kind": link.get("kind", "sim" if self.header.get("simulated") else None),
            "simulated": link.get("simulated", self.header.get("simulated")),
            "ended": self.end.how, "time": self.t_wall,
            "time_iso": iso_time(self.t_wall),
            "value_text": say_value(self.rule, self.value, self.threshold, fo.on_delay_s),
            "on_delay_s": fo.on_delay_s,
            "tick": self.tick, "rule": self.rule, "signal": fo.signal or None,
            "value": self.value, "threshold": self.threshold, "action": self.action,
            "detect_to_action_us": self.detect_to_action_us,
            "later": [r.rule for r in self.rec.later],
            "config_hash": self.config_hash, "cut_short": self.cut_short,
            "post_capture": self.post is not None,
        }


@dataclass
class TripLogContents:
    """One trip log read back, typed (`read_trip_records`)."""

    header: dict[str, Any]
    """The header map (rig, config, capture fields, ...)."""
    trips: list[Trip]
    """The trips, each with its post capture merged."""
    events: list[Event]
    """Operator and mode events, in the order written."""
    end: RunEnd
    """How the run ended (how "cut_short" when the log has no end record)."""
    torn: bool
    """Bytes after the last complete record were skipped, or a record was not a map."""
    bad: list[str] = field(default_factory=list)
    """Why each skipped record did not match its schema."""


_TRIP_LOG_KINDS: dict[str, type[TripRecord] | type[PostRecord] | type[Event]] = {
    "trip": TripRecord, "post": PostRecord, "event": Event}


def read_trip_records(path: str | Path) -> TripLogContents:
    """One trip log as typed records (`runtime.records.kinds`); LogReadError when it is
    not a trip log at all. A record that does not match its schema is skipped and its
    error, naming the file, kept in ``bad`` (the others still read)."""
    from runtime.records.runinfo import how_ended

    path = Path(path)
    header, records, torn = read_stream(path)
    if header is None:
        if not records and torn:
            raise LogReadError(f"{path}: the log was cut short before its header was complete")
        if not records:
            raise LogReadError(f"{path}: empty log")
        raise LogReadError(f"{path}: not a corral trip log (no header)")
    if header.get("format") not in (None, TRIPS_FORMAT):
        raise LogReadError(f"{path}: not a trip log (format {header.get('format')!r})")
    trips: list[Trip] = []
    by_id: dict[int, Trip] = {}
    events: list[Event] = []
    bad: list[str] = []
    odd = 0
    for rec in records:
        if not isinstance(rec, dict):
            odd += 1
            continue
        cls = _TRIP_LOG_KINDS.get(str(rec.get("type")))
        try:
            typed = cls.from_wire(rec, where=f"{path}: {cls.LABEL}") if cls else None
        except RecordError as exc:
            bad.append(str(exc))
            continue
        if isinstance(typed, TripRecord):
            trip = Trip(rec=typed, header=header, source=path)
            trips.append(trip)
            by_id[trip.id] = trip
        elif isinstance(typed, PostRecord):
            target = by_id.get(typed.trip_id)
            if target is not None:
                target.post = list(target.post or []) + list(typed.rows)
        elif isinstance(typed, Event):
            events.append(typed)
    torn = torn or odd > 0
    end = RunEnd.from_wire(how_ended(records, header))
    for trip in trips:
        trip.events = events
        trip.log_torn = torn
        trip.end = end
    return TripLogContents(header=header, trips=trips, events=events, end=end, torn=torn,
                           bad=bad)


def load_trips(paths: Iterable[str | Path]) -> list[Trip]:
    """Every trip in the given logs (files, or folders searched for *.trips), by wall time."""
    trips: list[Trip] = []
    for path in find_logs(paths):
        trips.extend(read_trip_records(path).trips)
    trips.sort(key=lambda tr: (tr.t_wall, str(tr.source), tr.id))
    return trips


def read_run_log(path: str | Path) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
    """A run log: (header, one array per field: (N,) or (N, width)); a torn tail is skipped."""
    path = Path(path)
    header, records, _ = read_stream(path)
    if header is None or "fields" not in header:
        raise LogReadError(f"{path}: not a corral run log (no header with fields)")
    names = list(header["fields"])
    widths = list(header.get("widths") or [1] * len(names))
    total = sum(widths)
    rows = [r for r in records if isinstance(r, (list, tuple)) and len(r) == total]
    out: dict[str, NDArray[Any]] = {}
    col = 0
    for name, w in zip(names, widths, strict=True):
        vals = [r[col] if w == 1 else list(r[col:col + w]) for r in rows]
        arr = _column(vals) if rows else np.zeros((0,) if w == 1 else (0, w))
        out[name] = arr
        col += w
    return header, out


def read_ticks(path: str | Path) -> tuple[dict[str, Any], list[TickRecord]]:
    """A run log as typed rows: (header, one `TickRecord` per tick). A torn tail and
    rows that do not match the header's widths are skipped (the end record too: read
    it with `runtime.records.runinfo.how_ended`)."""
    path = Path(path)
    header, records, _ = read_stream(path)
    if header is None or "fields" not in header:
        raise LogReadError(f"{path}: not a corral run log (no header with fields)")
    names = [str(f) for f in header["fields"]]
    widths = [int(w) for w in header.get("widths") or [1] * len(names)]
    total = sum(widths)
    rows = [TickRecord.from_row(names, widths, list(r)) for r in records
            if isinstance(r, (list, tuple)) and len(r) == total]
    return header, rows
