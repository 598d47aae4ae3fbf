"""The run's two logs and the thread that writes them (`RecordWriter`).

Nothing in the tick waits on disk: tick rows go to the run log's non-blocking writer;
trip records, post captures, events and the end record go through a queue to a writer
thread that appends each to the trip log (fsynced). Durable before announced: a trip is
told to the operator (socket, MQTT, stderr) only once its record is on disk.
"""

from __future__ import annotations

import queue
import sys
import threading
from pathlib import Path
from typing import Any, TextIO

from runtime.realtime.hostcheck import explain_from_header
from runtime.realtime.settings import RunSettings
from runtime.realtime.telemetry import TelemetryServer
from runtime.records.kinds import Event, PostRecord, RunEnd, TripRecord, TripSummary
from runtime.records.logs import RunLogWriter, TripLog

Record = dict[str, Any]
_Item = (tuple[str, TripRecord | PostRecord | Event | RunEnd, TripSummary | None]
         | threading.Event | None)
"""(kind, record, the trip's summary for a trip); an Event to set once everything queued
before it is written and announced (`drain`); or None: the end of the run."""


class RecordWriter:
    """The trip log and run log of one run, and the writer thread of the trip log."""

    def __init__(self, trip_path: Path, run_path: Path, trip_header: Record,
                 run_header: Record, settings: RunSettings) -> None:
        self.trip_path, self.run_path = trip_path, run_path
        self.settings = settings
        self.trip_log = TripLog(trip_path, trip_header)
        self.run_log = RunLogWriter(run_path, run_header)
        self.telemetry: TelemetryServer | None = None
        """The operator socket (set by the runner): events and trips are posted there."""
        self._writes: queue.SimpleQueue[_Item] = queue.SimpleQueue()
        self._writer = threading.Thread(target=self._write_records, name="corral-triplog",
                                        daemon=True)
        self._writer.start()
        self.trips_written = 0
        self.durable_trip_id = 0
        """Highest trip id whose record is on disk (fsynced): nothing announces a later one."""

    def console(self) -> TextIO:
        """Where progress lines go: `RunSettings.console` (a file beside the logs while a
        dashboard owns the terminal) or stderr."""
        out: TextIO = (self.settings.console if self.settings.console is not None
                       else sys.stderr)
        return out

    # ------------------------------------------------------------- queued (tick side)
    def put_trip(self, rec: TripRecord, summary: TripSummary) -> None:
        """A trip record: written, then announced (`summary`) by the writer thread."""
        self._writes.put(("trip", rec, summary))

    def put_post(self, rec: PostRecord) -> None:
        """A post-trip capture record."""
        self._writes.put(("post", rec, None))

    def put_event(self, rec: Event) -> None:
        """An event record: written, then sent to the socket (and MQTT)."""
        self._writes.put(("event", rec, None))

    def append_row(self, row: list[float]) -> None:
        """A tick row to the run log (never blocks; dropped and counted when full)."""
        self.run_log.append(row)

    # ------------------------------------------------------------- the writer thread
    def drain(self, timeout: float) -> bool:
        """Wait until everything queued so far is written and announced (at most `timeout`
        seconds; False if it was not). The runner calls it before its socket closes, so a
        trip in the last moments of a run still reaches the clients waiting for it."""
        done = threading.Event()
        self._writes.put(done)
        return done.wait(timeout)

    def _write_records(self) -> None:
        while True:
            item = self._writes.get()
            if item is None:
                return
            if isinstance(item, threading.Event):
                item.set()
                continue
            kind, rec, summary = item
            try:
                # The capture rows come as an array and are packed straight from it, in
                # pieces (`runtime.records.packrows`): no long GIL hold for the tick to wait on.
                self.trip_log.append(rec)
            except Exception as exc:  # noqa: BLE001 - a full disk must not stop the loop
                print(f"corral: could not write the trip log: {exc}", file=self.console(),
                      flush=True)
                if isinstance(rec, TripRecord) and summary is not None:
                    self._announce_trip(rec, summary)  # not durable, but must be heard of
                continue
            # On disk (fsynced) now: only from here on may anyone hear of it.
            if isinstance(rec, TripRecord) and summary is not None:
                self._announce_trip(rec, summary)
            elif isinstance(rec, Event) and self.telemetry is not None:
                self.telemetry.post(rec)

    def mark_durable(self, trip_id: int, summary: TripSummary) -> None:
        """Trip `trip_id` is on disk: count it and post it to the socket (and MQTT)."""
        self.trips_written += 1
        self.durable_trip_id = max(self.durable_trip_id, trip_id)
        if self.telemetry is not None:
            self.telemetry.post(summary)

    def _announce_trip(self, rec: TripRecord, summary: TripSummary) -> None:
        """Tell the operator of a trip whose record is on disk: socket, MQTT, stderr."""
        self.mark_durable(rec.id, summary)
        if self.settings.echo_trips:
            fo = rec.first_out
            print(f"corral: trip {rec.id} ({fo.rule}, action {rec.action}) logged to "
                  f"{self.trip_path}", file=self.console(), flush=True)
            why = explain_from_header(fo.rule, fo.value, fo.threshold,
                                      self.trip_log.header, rec.snapshot.get("loop"))
            if why:
                print(f"corral:   {why}", file=self.console(), flush=True)

    # ------------------------------------------------------------- in the caller's thread
    def write_now(self, rec: TripRecord) -> None:
        """Append (and fsync) a record in the calling thread (the `internal` trip)."""
        self.trip_log.append(rec)

    def close(self, end: RunEnd) -> None:
        """Write the end record to both logs, drain the writer thread, close the logs."""
        self._writes.put(("end", end, None))
        self.run_log.append(end)
        self._writes.put(None)
        self._writer.join(10.0)
        self.trip_log.close()
        self.run_log.close(10.0)
