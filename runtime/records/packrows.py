"""Packing a record with a big capture into msgpack in short pieces (`pack_record`).

Why: a trip record carries the pre-trip capture (``log.pre_capture_s`` of rows at the
loop rate, e.g. 1000 rows x 46 values). Turned into Python lists and packed in one go
(``ndarray.tolist()`` then ``Packer.pack``) that is one long C call holding the GIL:
measured 9.5 ms for ``tolist`` and 2.4 ms for ``pack`` of 2000 x 46, plus the
collection the ~92 000 new floats set off (a full one took 13 ms). The tick thread
needs the GIL every period, so a served run at 1 kHz stalled up to 54 ms right after a
trip: long enough for the device's command timeout. Here the rows are packed straight
from the array, a few hundred rows per numpy call (numpy's casts release the GIL), and
no Python float is made for them: the interpreter can hand the GIL to the tick between
pieces (its switch interval is ``loop.switch_interval_us``).

The bytes are exactly those ``Packer.pack`` writes for the same record with the rows as
lists of Python floats (msgpack spec: array header, then float 64 as 0xcb and 8 bytes big
endian, https://github.com/msgpack/msgpack/blob/master/spec.md); the tests compare the two.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import msgpack
import numpy as np

PIECE_ROWS = 128
"""Rows packed per numpy call (a few tens of microseconds for a 46-column capture)."""
BIG_ROWS = 64
"""A list or 2-D array value with more rows than this is packed in pieces."""


def pack_float_rows(packer: msgpack.Packer, a: np.ndarray,
                    piece_rows: int = PIECE_ROWS) -> Iterator[bytes]:
    """A 2-D float64 array as a msgpack array of arrays of float 64, in pieces (the array
    headers from `packer`, which must reset after each call)."""
    rows, cols = a.shape
    yield packer.pack_array_header(rows)
    head = np.frombuffer(packer.pack_array_header(cols), dtype=np.uint8)
    width = head.size + 9 * cols
    for start in range(0, rows, piece_rows):
        part = a[start:start + piece_rows]
        out = np.empty((part.shape[0], width), dtype=np.uint8)
        out[:, :head.size] = head
        body = out[:, head.size:].reshape(part.shape[0], cols, 9)
        body[:, :, 0] = 0xCB
        body[:, :, 1:] = part.astype(">f8").view(np.uint8).reshape(part.shape[0], cols, 8)
        yield out.tobytes()


def _rows_array(v: Any) -> np.ndarray | None:
    """`v` as a 2-D float64 array when it is a big table of floats, else None."""
    if isinstance(v, np.ndarray):
        return v if v.ndim == 2 and v.dtype == np.float64 and v.shape[0] > BIG_ROWS else None
    if isinstance(v, list) and len(v) > BIG_ROWS and all(
            isinstance(r, np.ndarray) and r.ndim == 1 and r.dtype == np.float64 for r in v):
        a = np.asarray(v)
        return a if a.ndim == 2 else None
    return None


def pack_record(packer: msgpack.Packer, record: dict[str, Any]) -> Iterator[bytes]:
    """`record` (a map) as msgpack, in pieces; the same bytes as ``packer.pack(record)``
    would give with its tables as lists of Python floats. `packer` must reset after each
    call (msgpack's default)."""
    yield packer.pack_map_header(len(record))
    for key, value in record.items():
        yield packer.pack(key)
        table = _rows_array(value)
        if table is not None:
            yield from pack_float_rows(packer, table)
        elif isinstance(value, list) and len(value) > BIG_ROWS:
            yield packer.pack_array_header(len(value))
            for start in range(0, len(value), PIECE_ROWS):
                yield b"".join(packer.pack(r) for r in value[start:start + PIECE_ROWS])
        else:
            yield packer.pack(value)
