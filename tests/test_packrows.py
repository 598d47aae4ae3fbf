"""The capture packer writes exactly the bytes msgpack writes for the same record.

Reference: msgpack-python's own `Packer.pack` (the registry's msgpack package) on the
record with its rows as lists of Python floats, the form the trip log held before;
the format itself is the msgpack specification (array 16/32 headers, float 64 = 0xcb
and 8 bytes big endian; https://github.com/msgpack/msgpack/blob/master/spec.md).
"""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest

from runtime.records.logs import read_trip_records
from runtime.records.logwriter import TripLog, _packer
from runtime.records.packrows import BIG_ROWS, pack_float_rows, pack_record


def _reference(record: dict) -> bytes:
    plain = {k: (v.tolist() if isinstance(v, np.ndarray) else
                 [r.tolist() for r in v] if isinstance(v, list) and v
                 and isinstance(v[0], np.ndarray) else v) for k, v in record.items()}
    return msgpack.Packer(use_bin_type=True).pack(plain)


@pytest.mark.parametrize("rows,cols", [(BIG_ROWS + 1, 46), (1000, 46), (70000, 3), (300, 15),
                                       (300, 16), (5, 4), (0, 0)])
def test_same_bytes_as_msgpack(rows: int, cols: int) -> None:
    rng = np.random.default_rng(rows * 100 + cols)
    a = rng.normal(size=(rows, cols)) * 10.0 ** rng.integers(-8, 8, size=(rows, cols))
    if a.size:
        a.flat[:: max(a.size // 7, 1)] = math.nan
        a.flat[1] = math.inf
        a.flat[-1] = -0.0
    rec = {"type": "trip", "id": 3, "pre": a, "events": [{"kind": "arm"}], "x": [1.5, 2]}
    got = b"".join(pack_record(_packer(), rec))
    assert got == _reference(rec)
    assert msgpack.unpackb(got)["id"] == 3


def test_list_of_rows_and_list_of_lists() -> None:
    rng = np.random.default_rng(7)
    rows = [rng.normal(size=46) for _ in range(500)]
    rec = {"type": "post", "trip_id": 1, "rows": rows}
    assert b"".join(pack_record(_packer(), rec)) == _reference(rec)
    lists = {"type": "post", "trip_id": 1, "rows": [r.tolist() for r in rows]}
    assert b"".join(pack_record(_packer(), lists)) == msgpack.packb(lists, use_bin_type=True)


def test_pieces_are_small() -> None:
    """No single piece holds more than PIECE_ROWS rows (the point of packing in pieces)."""
    a = np.zeros((2000, 46))
    pieces = list(pack_float_rows(_packer(), a, piece_rows=100))
    assert len(pieces) == 1 + 20
    assert max(len(p) for p in pieces) == 100 * (3 + 9 * 46)


def test_trip_log_reads_back_a_capture_array(tmp_path) -> None:
    """A trip log written with an array capture reads back the same values (the reader
    of `runtime.records.logs`)."""
    from runtime.records.kinds import FirstOut, TripRecord

    a = np.arange(300 * 5, dtype=float).reshape(300, 5) / 7.0
    log = TripLog(tmp_path / "r.trips", {"rig": "t", "capture_fields": list("abcde"),
                                         "capture_widths": [1] * 5})
    log.append(TripRecord(id=1, first_out=FirstOut(rule="margin"), pre=a))  # type: ignore[arg-type]
    log.close()
    got = read_trip_records(tmp_path / "r.trips")
    assert np.array_equal(np.asarray(got.trips[0].rec.pre), a)
