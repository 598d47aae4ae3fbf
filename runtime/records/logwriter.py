"""Crash-safe records, the writing half: the file formats' names and both writers.

- `RunLogWriter`: every tick as one positional msgpack list after a schema
  header, written by a background thread from a bounded queue. `append` never
  blocks the tick; when the queue is full the row is dropped and counted.
- `TripLog`: the append-only trip log. Every record (header, trip, post-trip
  capture, operator event, end) is one msgpack map written with write + flush +
  os.fsync at once, so everything appended before a crash or a kill reads back.
  Records are the typed classes of `runtime.records.kinds`; a plain map (what the
  tick builds today) is parsed into its class first. One that does not match its
  schema is still written as given (a trip must reach the disk) and counted in
  `schema_errors`; the readers then report it.

The readers live in `runtime.records.logs`, which re-exports everything here.
"""

from __future__ import annotations

import collections
import os
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import msgpack
import numpy as np

from runtime.guard.watchdog import RULE_IDS
from runtime.records.kinds import Event, RecordError, WireRecord, parse_log_record
from runtime.records.packrows import pack_record

TRIPS_FORMAT = "corral-trips"
RUNLOG_FORMAT = "corral-runlog"
FORMAT_VERSION = 1
TRIPS_SUFFIX = ".trips"
RUNLOG_SUFFIX = ".run"

#: Watchdog rule ids, in the order the contract lists them (one list: the watchdog's).
RULES: tuple[str, ...] = RULE_IDS
#: Supervisor modes, in the order used when a mode is recorded as an integer code.
MODES: tuple[str, ...] = ("idle", "settling", "engaged", "fallback", "stopped")
#: Margin levels (fractions of eps) when neither the log nor its config names them.
DEFAULT_LEVELS = {"warning": 0.8, "trip": 0.9}


class LogReadError(Exception):
    """A log that cannot be read at all (missing, not a corral log)."""


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------

def _plain(obj: Any) -> Any:
    """msgpack fallback: numpy arrays and scalars, paths and tuples as plain values."""
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, (set, frozenset)):
        return sorted(obj)
    raise TypeError(f"cannot record a {type(obj).__name__}")


def _plain_map(record: dict[str, Any]) -> dict[str, Any]:
    """A map with numpy values (the tick's arrays and scalars) as plain values."""
    return {k: (_plain_map(v) if isinstance(v, dict) else
                _plain(v) if isinstance(v, (np.ndarray, np.generic)) else v)
            for k, v in record.items()}


def _packer() -> msgpack.Packer:
    return msgpack.Packer(default=_plain, use_bin_type=True)


def log_paths(log_dir: str | Path, rig: str, stamp: str | None = None) -> tuple[Path, Path]:
    """The run log and trip log paths of one run, claimed so no other run gets them.

    `<dir>/<rig>-<YYYYmmdd-HHMMSS>-<pid>.run|.trips`; when that trip log already exists (a
    second run in the same second from the same process) a sequence suffix ``-2``, ``-3``
    ... is added. The trip log is created empty here with O_EXCL, so two runs never share
    a trip file (and trip ids stay unique per file) nor a run log.
    """
    stamp = stamp or time.strftime("%Y%m%d-%H%M%S")
    stem = f"{rig}-{stamp}-{os.getpid()}"
    for n in range(1, 10_000):
        base = Path(log_dir) / (stem if n == 1 else f"{stem}-{n}")
        # Not with_suffix: a dot in the rig name would be taken for a suffix.
        trips = Path(f"{base}{TRIPS_SUFFIX}")
        try:
            fd = os.open(trips, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            continue
        os.close(fd)
        return Path(f"{base}{RUNLOG_SUFFIX}"), trips
    raise FileExistsError(f"no free trip log name for {stem} in {log_dir}")


def _fsync_dir(path: Path) -> None:
    """Make a new file's directory entry durable (POSIX; ignored where unsupported)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _complete_length(path: Path) -> int:
    """Byte length of the complete records at the start of a log (the torn tail excluded)."""
    with open(path, "rb") as fh:
        data = fh.read()
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=False, max_buffer_size=0)
    unpacker.feed(data)
    end = 0
    try:
        for _ in unpacker:
            end = unpacker.tell()
    except (ValueError, msgpack.UnpackException):
        pass
    return end


class TripLog:
    """The append-only trip log: each record durable before `append` returns.

    Parameters
    ----------
    path : the `.trips` file. Created with `header` (fsynced, directory fsynced);
        an existing log is continued after its last complete record.
    header : the header map (rig, config_hash, software_version, config,
        capture_fields, capture_units, ...); type/format/version/started_wall
        are filled in when absent.

    Example
    -------
    >>> log = TripLog(tmp / "rig.trips", {"rig": "pedestal-sim"})   # doctest: +SKIP
    >>> log.append({"type": "event", "kind": "arm", "detail": "", "tick": 0})  # doctest: +SKIP
    """

    def __init__(self, path: str | Path, header: dict[str, Any]) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.header = {"type": "header", "format": TRIPS_FORMAT, "version": FORMAT_VERSION,
                       "started_wall": time.time(), **header}
        self._lock = threading.Lock()
        self._packer = _packer()
        self.records = 0
        self.schema_errors: list[str] = []
        """Why each record written as given did not match its schema (a bug: say so)."""
        existed = self.path.exists() and self.path.stat().st_size > 0
        if existed:
            good = _complete_length(self.path)
            if good < self.path.stat().st_size:
                # A torn tail from an earlier crash: cut it so new records stay readable.
                os.truncate(self.path, good)
            existed = good > 0
        self._fh = open(self.path, "ab")  # noqa: SIM115 - held open for the run
        if not existed:
            self._write(self.header)
            _fsync_dir(self.path.parent)

    def _write(self, obj: dict[str, Any]) -> None:
        # In pieces: a capture packed in one call held the GIL for milliseconds.
        blob = b"".join(pack_record(self._packer, obj))
        with self._lock:
            self._fh.write(blob)
            self._fh.flush()
            os.fsync(self._fh.fileno())

    def append(self, record: WireRecord | dict[str, Any]) -> None:
        """Write one record (trip, post, event, end) durably: write, flush, fsync."""
        if self._fh.closed:
            raise ValueError(f"trip log {self.path} is closed")
        if isinstance(record, WireRecord):
            wire = record.to_wire()
        else:
            try:
                wire = parse_log_record(_plain_map(record)).to_wire()
            except RecordError as exc:
                self.schema_errors.append(str(exc))
                wire = record
        self._write(wire)
        self.records += 1

    def event(self, kind: str, detail: str = "", tick: int = -1,
              t_mono: float | None = None) -> Event:
        """Append an operator event (arm, disarm, reset, stop, mode, refused, ...); returns it."""
        rec = Event(t_mono=time.monotonic() if t_mono is None else t_mono,
                    t_wall=time.time(), tick=int(tick), kind=kind, detail=detail)
        self.append(rec)
        return rec

    def close(self) -> None:
        """Close the file (every record is already on disk)."""
        with self._lock:
            if not self._fh.closed:
                self._fh.close()

    def __enter__(self) -> TripLog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class RunLogWriter:
    """Every tick to disk without ever blocking the tick.

    `append(row)` puts the positional row on a bounded queue and returns; a
    writer thread packs rows in batches, writes them, and flushes about every
    `flush_interval` seconds. When the queue is full (the disk is slower than
    the loop) the row is dropped and counted in `.dropped`. `close()` drains
    what is queued, flushes, fsyncs and joins the thread.

    The header gets type/format/version/started_wall when absent; it should
    carry "fields", "widths", "units" (one per field), "period" and the config.
    """

    def __init__(self, path: str | Path, header: dict[str, Any], queue_size: int = 65536,
                 flush_interval: float = 0.5) -> None:
        if queue_size < 1:
            raise ValueError("queue_size must be at least 1")
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.header = {"type": "header", "format": RUNLOG_FORMAT, "version": FORMAT_VERSION,
                       "started_wall": time.time(), **header}
        self.queue_size = int(queue_size)
        self.flush_interval = float(flush_interval)
        self.dropped = 0
        self.appended = 0
        self.written = 0
        self.error: BaseException | None = None
        self._queue: collections.deque[Any] = collections.deque()
        self._wake = threading.Event()
        self._closing = False
        self._thread = threading.Thread(target=self._run, name=f"runlog:{self.path.name}",
                                        daemon=True)
        self._thread.start()

    def append(self, row: Sequence[Any] | WireRecord) -> bool:
        """Queue one tick row (positional, `runtime.records.kinds.TickRecord.to_row`), or
        the end record after the rows; False (and `.dropped` += 1) when the queue is full.
        Never blocks, never converts: a record is turned into its map by the writer
        thread."""
        if self._closing or len(self._queue) >= self.queue_size:
            self.dropped += 1
            return False
        self._queue.append(row)
        self.appended += 1
        return True

    @property
    def pending(self) -> int:
        """Rows queued but not yet written."""
        return len(self._queue)

    def _run(self) -> None:
        packer = _packer()
        try:
            fh = open(self.path, "wb")  # noqa: SIM115 - owned by this thread
        except OSError as exc:
            self.error = exc
            return
        try:
            fh.write(packer.pack(self.header))
            fh.flush()
            last_flush = time.monotonic()
            queue = self._queue
            while True:
                if not queue:
                    if self._closing:
                        break
                    self._wake.wait(0.02)
                    self._wake.clear()
                    continue
                chunks: list[bytes] = []
                while queue and len(chunks) < 1024:
                    item = queue.popleft()
                    if isinstance(item, WireRecord):
                        item = item.to_wire()
                    chunks.append(packer.pack(item))
                fh.write(b"".join(chunks))
                self.written += len(chunks)
                now = time.monotonic()
                if now - last_flush >= self.flush_interval:
                    fh.flush()
                    last_flush = now
            fh.flush()
            try:
                os.fsync(fh.fileno())
            except OSError:
                pass  # a pipe or a special file: nothing to sync
        except BaseException as exc:  # noqa: BLE001 - reported through .error, never raised
            self.error = exc
        finally:
            fh.close()

    def close(self, timeout: float | None = None) -> None:
        """Drain the queue, flush, fsync and stop the writer thread."""
        self._closing = True
        self._wake.set()
        self._thread.join(timeout)

    def __enter__(self) -> RunLogWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
