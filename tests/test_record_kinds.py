"""The typed records (runtime/records/kinds.py, tickrow.py) against files written before them.

Reference outside the new code: tests/data/records/ holds a run log, a trip log and the
socket's hello and telemetry maps written by the code of main at 08e2992, before the typed
records existed (tests/data/records/make_fixtures.py says how). Every record must parse,
and write back to the same msgpack bytes (the msgpack spec fixes the encoding of a map
given its key order; common practice for a format kept compatible across versions).
"""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import msgpack
import numpy as np
import pytest

from runtime.realtime.telemetry import TelemetryServer
from runtime.records.kinds import (
    Event,
    FirstOut,
    Hello,
    RecordError,
    RunEnd,
    Telemetry,
    TripRecord,
    TripSummary,
    parse_live_record,
    parse_log_record,
)
from runtime.records.logs import read_stream, read_ticks, read_trip_records
from runtime.records.logwriter import TripLog
from runtime.records.tickrow import TickRecord
from tests.runtime_helpers import runner

DATA = Path(__file__).parent / "data" / "records"
TRIPS = DATA / "pedestal-fixture.trips"
RUN = DATA / "pedestal-fixture.run"
LIVE = DATA / "telemetry.msgpack"


def pack(obj):
    return msgpack.packb(obj, use_bin_type=True)


def live_maps():
    with open(LIVE, "rb") as fh:
        return list(msgpack.Unpacker(fh, raw=False))


# ------------------------------------------------------------------ files written today
def test_every_trip_log_record_of_todays_file_parses_and_writes_back_byte_identical():
    _, records, torn = read_stream(TRIPS)
    assert not torn
    kinds = [r["type"] for r in records]
    assert kinds.count("trip") == 1 and "post" in kinds and "event" in kinds
    assert kinds[-1] == "end"
    for rec in records:
        typed = parse_log_record(rec)
        assert pack(typed.to_wire()) == pack(rec), rec["type"]


def test_the_run_logs_rows_and_end_record_round_trip_unchanged():
    header, records, _ = read_stream(RUN)
    names, widths = header["fields"], header["widths"]
    rows = [r for r in records if isinstance(r, list)]
    assert len(rows) == 1000
    for row in rows:
        assert TickRecord.from_row(names, widths, row).to_row(names, widths) == row
    end = records[-1]
    assert pack(parse_log_record(end).to_wire()) == pack(end)
    _, ticks = read_ticks(RUN)
    # The spike at 0.5 s (make_fixtures.py) is the jump rule's signal on tick 500.
    assert ticks[500].tick_index == 500 and ticks[500].signals["jump"] > 1.0
    assert ticks[499].signals["jump"] < 1.0
    assert len(ticks[0].x) == 4 and len(ticks[0].u) == 2


def test_the_sockets_hello_and_telemetry_of_today_parse_and_pack_identically():
    hello_map, tel_map = live_maps()
    hello = parse_live_record(hello_map)
    tel = parse_live_record(tel_map)
    assert isinstance(hello, Hello) and isinstance(tel, Telemetry)
    assert pack(hello.to_wire()) == pack(hello_map)
    assert pack(tel.to_wire()) == pack(tel_map)
    assert hello.states == ["az", "el", "az_rate", "el_rate"] or len(hello.states) == 4
    assert (hello.warning_level, hello.trip_level) == (0.8, 0.9)
    assert tel.tick == 1000 and tel.loop.ticks == 1000
    assert tel.trip is not None and tel.trip.rule == "jump" and tel.trips[0].id == 1
    # Nested summaries carry no "type" on the wire, as today.
    assert "type" not in tel.to_wire()["trips"][0]


def test_the_typed_reader_gives_the_trip_its_events_and_how_the_run_ended():
    got = read_trip_records(TRIPS)
    assert not got.torn and not got.bad
    (trip,) = got.trips
    assert trip.rec.first_out.rule == "jump" and trip.rec.action == "baseline"
    assert trip.rec.first_out.capture_field == "sig_jump"
    assert trip.rec.first_out.threshold == 1.0 and trip.rec.first_out.value > 1.0
    assert [e.kind for e in got.events][:2] == ["arm", "mode"]
    assert got.end.how == "tripped_and_stopped" and got.end.trips == 1
    assert trip.end.how == "tripped_and_stopped"
    assert trip.rec.summary().rule == "jump"
    # Each trip carries the run's events and end; the trip record its own recent events.
    assert trip.events is got.events and trip.end == got.end
    assert [e.kind for e in trip.rec.events] == [e.kind for e in got.events][:len(
        trip.rec.events)]


# ------------------------------------------------------------------ write -> read identity
def test_write_then_read_is_identity_and_the_bytes_match_todays_file(tmp_path):
    header, records, _ = read_stream(TRIPS)
    typed = [parse_log_record(r) for r in records]
    out = tmp_path / "again.trips"
    with TripLog(out, {k: v for k, v in header.items()
                       if k not in ("type", "format", "version")}) as log:
        for rec in typed:
            log.append(rec)
    _, again, torn = read_stream(out)
    assert not torn
    # Identity as msgpack bytes (the trip's snapshot holds NaN figures: NaN != NaN).
    assert [pack(parse_log_record(r).to_wire()) for r in again] == [
        pack(r.to_wire()) for r in typed]
    assert b"".join(pack(r) for r in again) == b"".join(pack(r) for r in records)


def test_the_tick_s_plain_maps_with_numpy_values_are_written_as_their_records(tmp_path):
    _, records, _ = read_stream(TRIPS)
    trip = next(r for r in records if r["type"] == "trip")
    as_tick = {**trip, "tick": np.int64(trip["tick"]), "t": np.float64(trip["t"])}
    with TripLog(tmp_path / "t.trips", {"rig": "x"}) as log:
        log.append(as_tick)
        assert log.schema_errors == []
    _, again, _ = read_stream(tmp_path / "t.trips")
    assert pack(again[0]) == pack(trip)


# ------------------------------------------------------------------ older and newer files
def test_an_older_record_gets_defaults_and_writes_back_without_them():
    old = {"type": "hello", "rig": "r", "states": ["a"], "state_units": ["rad"],
           "inputs": ["u"], "input_units": ["V"], "input_limits": [1.0], "limits": [0.1],
           "envelope": [0.05], "eps": 0.02, "bound": {"kind": "constant"},
           "levels": {"warning": 0.8, "trip": 0.9}, "period": 0.001, "simulated": True,
           "tracked": ["a"]}
    hello = Hello.from_wire(old)
    assert hello.status_flags == [] and hello.preflight is None and hello.run_name == ""
    assert hello.to_wire() == old and list(hello.to_wire()) == list(old)
    ev = Event.from_wire({"type": "event", "kind": "arm"})
    assert (ev.tick, ev.detail, ev.t_wall) == (-1, "", None)
    assert ev.to_wire() == {"type": "event", "kind": "arm"}


def test_unknown_fields_are_kept_and_written_back_after_the_known_ones():
    newer = {"type": "event", "t_mono": 1.0, "t_wall": 2.0, "tick": 3, "kind": "arm",
             "detail": "", "operator": "ana", "count": 2}
    ev = Event.from_wire(newer)
    assert ev.extra == {"operator": "ana", "count": 2}
    assert pack(ev.to_wire()) == pack(newer)


# ------------------------------------------------------------------ malformed records
@pytest.mark.parametrize("change, words", [
    ({"tick": "500"}, "field 'tick' must be an integer"),
    ({"first_out": {"value": 1.0}}, "field 'rule' is missing"),
    ({"later": "margin"}, "field 'later' must be a list"),
    ({"type": "post"}, "type is 'post', expected 'trip'"),
])
def test_a_malformed_trip_record_is_refused_naming_the_field(change, words):
    _, records, _ = read_stream(TRIPS)
    trip = next(r for r in records if r["type"] == "trip")
    with pytest.raises(RecordError, match=words):
        TripRecord.from_wire({**trip, **change})


def test_a_missing_required_field_and_an_unknown_type_are_clear_errors():
    _, tel = live_maps()
    with pytest.raises(RecordError, match="telemetry record: field 'mode' is missing"):
        Telemetry.from_wire({k: v for k, v in tel.items() if k != "mode"})
    with pytest.raises(RecordError, match="unknown record type 'gossip'"):
        parse_live_record({"type": "gossip"})


def test_the_reader_skips_a_malformed_trip_names_it_and_keeps_the_rest(tmp_path):
    header, records, _ = read_stream(TRIPS)
    trip = next(r for r in records if r["type"] == "trip")
    path = tmp_path / "mixed.trips"
    with open(path, "wb") as fh:
        fh.write(pack(header))
        fh.write(pack({**trip, "id": 7, "first_out": "jump"}))  # not a map: malformed
        fh.write(pack(trip))
    got = read_trip_records(path)
    assert [t.id for t in got.trips] == [trip["id"]]
    assert len(got.bad) == 1 and "first_out" in got.bad[0] and "mixed.trips" in got.bad[0]


def test_a_row_of_the_wrong_length_is_refused():
    with pytest.raises(RecordError, match="3 values, the header's widths say 4"):
        TickRecord.from_row(["t", "x"], [1, 3], [0.0, 1.0, 2.0])


# ------------------------------------------------------------------ the socket's boundary
def test_the_socket_parses_the_ticks_maps_and_counts_a_malformed_one(tmp_path):
    hello_map, tel_map = live_maps()
    server = TelemetryServer(tmp_path / "s.sock", {k: v for k, v in hello_map.items()
                                                   if k != "type"}, lambda op, reply: None)
    seen = []
    server.listeners.append(seen.append)
    server._deliver(tel_map)
    server._deliver({"type": "trip", **tel_map["trips"][0]})
    server._deliver({**tel_map, "tick": None})
    assert [type(r) for r in seen] == [Telemetry, TripSummary]
    assert server.schema_errors == 1 and "field 'tick'" in server.schema_error
    server.update_hello(status_flags=["brake"])
    assert server.hello_record.status_flags == ["brake"]
    with pytest.raises(RecordError, match="status_flags"):
        server.update_hello(status_flags="brake")


def test_a_constructed_record_is_the_tick_s_map():
    fo = FirstOut(rule="margin", signal="ratio", value=0.95, threshold=0.9)
    rec = TripRecord(id=1, tick=10, t=0.01, first_out=fo, action="outputs_off")
    again = TripRecord.from_wire(rec.to_wire())
    assert again == rec and again.validate() == rec
    assert RunEnd(how="completed").to_wire()["type"] == "end"
    assert math.isnan(TickRecord().t)


def test_the_panels_show_the_same_from_the_typed_record_and_from_its_map():
    from runtime.dashboard import panels

    hello_map, tel_map = live_maps()
    hello, tel = Hello.from_wire(hello_map), Telemetry.from_wire(tel_map)
    for fn in (panels.tracking_rows, panels.input_rows, panels.margin_view):
        assert fn(hello, tel) == fn(hello_map, tel_map)
    assert panels.supervisor_view(tel) == panels.supervisor_view(tel_map)
    assert panels.supervisor_view(tel).trip_text.startswith("first out: jump")
    assert panels.health_rows(tel)[3] == ("ticks", "1000")


# ------------------------------------------------------------------ the tick builds records
_CLOCK = {"t_mono", "t_wall", "time_iso", "detect_to_action_us", "config_hash"}
"""Fields that differ from run to run (the clocks, the measured delay) or with the config
schema (the hash covers the resolved config, which gained keys since the fixture)."""


def _shape(obj):
    """Key order and value kinds, nested (an int stays an int: msgpack keeps the two apart)."""
    if isinstance(obj, dict):
        return list(obj), {k: _shape(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_shape(v) for v in obj]
    return type(obj).__name__


def _same(new, old, where):
    """Field by field: equal values (floats to rounding), NaN equal to NaN, `_CLOCK` fields
    skipped."""
    if isinstance(old, dict):
        assert list(new) == list(old), where
        for k in old:
            if k not in _CLOCK and not (where.endswith("snapshot") and k in ("loop", "link")):
                _same(new[k], old[k], f"{where}.{k}")
    elif isinstance(old, list):
        assert len(new) == len(old), where
        for i, (a, b) in enumerate(zip(new, old, strict=True)):
            _same(a, b, f"{where}[{i}]")
    elif isinstance(old, float) and math.isnan(old):
        assert isinstance(new, float) and math.isnan(new), where
    elif isinstance(old, float):
        # Same kind, same value to the last few bits: the compiled law tick may sum in
        # another order than the code that wrote the fixture (its speed-ups keep results
        # to rounding); what is under test here is the record, not the arithmetic.
        assert type(new) is float and math.isclose(new, old, rel_tol=1e-12, abs_tol=1e-15), \
            (where, new, old)
    else:
        assert new == old and type(new) is type(old), (where, new, old)


def test_the_ticks_typed_records_write_what_the_old_maps_wrote(tmp_path):
    # The run make_fixtures.py made with the code that built maps, made again now that the
    # tick builds typed records: the same records, keys in the same order, same values.
    r = runner(tmp_path, ["spike@0.5"], ["log.pre_capture_s=0.05", "log.post_capture_s=0.02"])
    asyncio.run(r.run_ticks(int(round(1.0 / r.design.Ts))))
    hello, tel = r.core.hello(), r.core.telemetry_record()
    assert isinstance(hello, Hello) and isinstance(tel, Telemetry)
    _, new, torn = read_stream(r.core.trip_path)
    _, old, _ = read_stream(TRIPS)
    assert not torn and [x["type"] for x in new] == [x["type"] for x in old]
    for a, b in zip(new, old, strict=True):
        assert _shape(a) == _shape(b), b["type"]
        _same(a, b, b["type"])
        assert parse_log_record(a).to_wire() == a  # a constructed record is not checked
    hello_map, tel_map = live_maps()
    for rec, old_map in ((hello, hello_map), (tel, tel_map)):
        wire = rec.to_wire()
        assert _shape(wire) == _shape(old_map)
        _same(wire, old_map, old_map["type"])
    # What the socket and the run summary carry of the trip.
    assert r.summary()["trips"] == [tel.trips[0].to_wire(tag=False)]
    assert r.core.end is not None and r.core.end.how == "tripped_and_stopped"
