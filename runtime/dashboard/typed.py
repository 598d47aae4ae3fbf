"""The dashboard's records, typed: what the panels read (`runtime.records.kinds`).

The runtime's socket sends complete records; a peer on the broker (an older corral, a
test rig) or a test may send a partial map. Each is read here into its record class,
a partial map with `WireRecord.from_partial` (missing fields show as "-").

What does not live here: the schemas (`runtime.records.kinds`), the panels
(`runtime.dashboard.panels`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from runtime.records.kinds import (
    LIVE_RECORDS,
    Hello,
    RecordError,
    Telemetry,
    TripRecord,
    TripSummary,
    WireRecord,
)

HelloLike = Hello | Mapping[str, Any]
TelemetryLike = Telemetry | Mapping[str, Any]
TripLike = TripSummary | TripRecord | Mapping[str, Any]


def as_hello(hello: HelloLike) -> Hello:
    """The hello, typed (a map read as a partial record)."""
    return hello if isinstance(hello, Hello) else Hello.from_partial(dict(hello))


def as_telemetry(tel: TelemetryLike) -> Telemetry:
    """A telemetry record, typed (a map read as a partial record)."""
    return tel if isinstance(tel, Telemetry) else Telemetry.from_partial(dict(tel))


def as_trip(trip: TripLike) -> TripSummary:
    """A trip summary: a summary passes, a trip-log record is summarised, a map with a
    ``first_out`` is read as a trip-log record, else as a partial summary."""
    if isinstance(trip, TripSummary):
        return trip
    if isinstance(trip, TripRecord):
        return trip.summary()
    if isinstance(trip.get("first_out"), dict):
        return TripRecord.from_partial(dict(trip)).summary()
    return TripSummary.from_partial(dict(trip))


def as_live(rec: WireRecord | Mapping[str, Any]) -> WireRecord | None:
    """A record off the socket or the broker, typed by its ``type`` (partial maps
    accepted); None for a type the dashboard does not show or a malformed map."""
    if isinstance(rec, WireRecord):
        return rec
    cls = LIVE_RECORDS.get(str(rec.get("type")))
    if cls is None:
        return None
    try:
        return cls.from_partial(dict(rec))
    except RecordError:
        return None
