"""Events (`EventLog`): what the operator, the supervisor and the link did, into the trip
log at a bounded rate, the last few kept for the next trip record."""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

from runtime.guard.supervisor import Supervisor
from runtime.realtime.tick_records import event_record
from runtime.realtime.tick_state import TickState
from runtime.records.kinds import Event


class EventLog:
    """Event records to the trip log (through `put`), at most `per_s` a second.

    Bounded: at most `per_s` event records per second reach the trip log (each is
    fsynced); the rest are counted and summed up in one ``events_suppressed`` record when
    the next second's first event comes (or at the end of the run). A request flood
    cannot fill the disk.
    """

    def __init__(self, st: TickState, per_s: float,
                 put: Callable[[Event], None]) -> None:
        self._st = st
        self.per_s = per_s
        """Most operator events written to the trip log per second (the rest counted)."""
        self._put_record = put
        self.recent: list[Event] = []
        """The last 20 events (each trip record carries them)."""
        self.suppressed = 0
        """Events over the limit, the whole run."""
        self._window_t = -math.inf
        self._count = 0
        self._pending = 0

    def event(self, kind: str, detail: str, **extra: Any) -> None:
        """Record an event (dropped and counted past the rate limit)."""
        now = time.monotonic()
        if now - self._window_t >= 1.0:
            self.flush_suppressed()
            self._window_t = now
            self._count = 0
        if self._count >= self.per_s:
            self._pending += 1
            self.suppressed += 1
            return
        self._count += 1
        self._put(kind, detail, **extra)

    def flush_suppressed(self) -> None:
        """The ``events_suppressed`` record for the events dropped since the last one."""
        if self._pending:
            n, self._pending = self._pending, 0
            self._put("events_suppressed", f"{n} events in one second over the limit "
                      f"of {self.per_s:g} per second (log.events_per_s)", count=n)

    def drain(self, sup: Supervisor) -> None:
        """The supervisor's pending events (mode changes, refusals) as records."""
        ev = sup.events
        while ev:
            kind, detail = ev.pop(0)
            self.event(kind, detail)

    def _put(self, kind: str, detail: str, **extra: Any) -> None:
        rec = event_record(self._st.tick, kind, detail, extra)
        self.recent.append(rec)
        del self.recent[:-20]
        # Sent to the socket (and MQTT) by the writer thread once it is on disk.
        self._put_record(rec)
