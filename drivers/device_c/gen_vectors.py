"""Write drivers/test_vectors.json: frames produced by the Python reference codec.

The C codec (drivers/device_c) and the Python codec are both checked against
this file by tests/test_device_c.py and tests/test_wire.py. Regenerate with
``python drivers/device_c/gen_vectors.py`` after a deliberate protocol change
(and bump `drivers.wire.PROTOCOL_VERSION` if the change is incompatible).
"""

from __future__ import annotations

import json
import pathlib
import sys

import msgpack

from drivers.base import Command, Hello, Sample
from drivers.wire import (
    PROTOCOL_VERSION,
    Fault,
    Heartbeat,
    Message,
    Stop,
    cobs_encode,
    crc16,
    encode_body,
    encode_message,
    frame_body,
)

OUT = pathlib.Path(__file__).resolve().parent.parent / "test_vectors.json"

HELLO = Hello(
    protocol=PROTOCOL_VERSION,
    rig_id="pan-tilt-1",
    channels=("az", "el"),
    units=("rad", "rad"),
    sample_rate_hz=1000.0,
    output_names=("v_az", "v_el"),
    output_limits=(12.0, 12.0),
    output_units=("V", "V"),
    command_timeout_s=0.05,
)


def _good() -> list[tuple[str, Message, int, float]]:
    return [
        ("hello", HELLO, 0, 0.0),
        ("hello_host", Hello(PROTOCOL_VERSION, "host", (), (), 0.0, (), (), (), 0.0), 3, 1.5),
        ("hello_status_flags", Hello(PROTOCOL_VERSION, "bench-2", ("az",), ("rad",), 500.0,
                                     ("v_az",), (10.0,), ("V",), 0.1, 0,
                                     ("estop", "interlock")), 0, 0.0),
        ("sample", Sample(7, 0.007, (0.1, -0.2), 0), 0, 0.0),
        ("sample_estop", Sample(8, 0.008, (0.1,), 0x108), 0, 0.0),
        ("sample_status", Sample(123456, 123.456, (1e-9, -3.5, 0.0, 42.0), 0b1010), 0, 0.0),
        ("sample_seq_max", Sample(2**32 - 1, 4294967.295, (), 0), 0, 0.0),
        ("command", Command(7, (1.25, -12.0), 1), 0, 0.007),
        ("command_stop_flag", Command(65536, (0.0,), 0b101), 0, 65.536),
        ("heartbeat", Heartbeat(300, 0.3, 2), 0, 0.0),
        ("fault", Fault(17, 1.0, 513, "encoder el lost"), 0, 0.0),
        ("stop", Stop(9, 2.25, 1), 0, 0.0),
    ]


def _fields(msg: Message) -> dict[str, object]:
    from dataclasses import asdict

    d = asdict(msg)
    d.pop("t_host", None)
    return d


def build_vectors() -> dict[str, object]:
    """The vectors as a JSON-ready dict."""
    good = []
    for name, msg, seq, t in _good():
        good.append(
            {
                "name": name,
                "type": type(msg).__name__,
                "fields": _fields(msg),
                "seq": seq,
                "t": t,
                "body_hex": encode_body(msg, seq=seq, t=t).hex(),
                "frame_hex": encode_message(msg, seq=seq, t=t).hex(),
            }
        )
    sample = encode_body(Sample(7, 0.007, (0.1, -0.2), 0))
    bad_crc = bytearray(sample + crc16(sample).to_bytes(2, "big"))
    bad_crc[-1] ^= 0x01
    unknown = msgpack.packb([99, 1, 0.0, "future"])
    bad = [
        ("crc_flipped", cobs_encode(bytes(bad_crc)) + b"\x00", "crc"),
        ("cobs_overrun", bytes([0x09, 0x95, 0x01]) + b"\x00", "cobs"),
        ("too_short", cobs_encode(b"\x01\x02") + b"\x00", "cobs"),
        ("not_an_array", frame_body(msgpack.packb({"kind": 1})), "decode"),
        ("sample_missing_y", frame_body(msgpack.packb([1, 7, 0.0, 0])), "decode"),
        ("sample_bad_y", frame_body(msgpack.packb([1, 7, 0.0, 0, ["x"]])), "decode"),
        ("unknown_kind", frame_body(unknown), "unknown_kind"),
    ]
    return {
        "protocol": PROTOCOL_VERSION,
        "crc_check": {"input_ascii": "123456789", "crc16_ccitt_false": 0x29B1},
        "good": good,
        "bad": [{"name": n, "frame_hex": f.hex(), "error": e} for n, f, e in bad],
    }


def render() -> str:
    """The file text (stable, so a test can compare it)."""
    return json.dumps(build_vectors(), indent=1, sort_keys=True) + "\n"


if __name__ == "__main__":
    OUT.write_text(render())
    sys.stdout.write(f"wrote {OUT}\n")
