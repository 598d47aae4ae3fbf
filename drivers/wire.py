"""The corral wire protocol: framing, checksum, message layouts, stream decoding.

A frame on the wire is ``COBS(body + CRC16_BE(body)) + b"\\x00"`` where ``body``
is one msgpack *positional array* ``[kind, seq, t, ...fields]`` and the CRC is
CRC-16/CCITT-FALSE over the body. docs/wire-protocol.md is the normative spec;
this module is the reference implementation of it in Python.

What lives here: the message kinds and layouts, encoding and decoding to and
from the `drivers.base` records (a hello checked for usability), the host hello,
and an incremental `FrameDecoder` that never raises on garbage. It re-exports,
where callers have always found them, the framing layer (`drivers.framing`:
COBS, the CRC, the error family), the sequence checks (`drivers.sequence`:
`SeqTracker`, `SampleGate`) and the device's fail-safe
(`drivers.command_guard.CommandGuard`). What does not: any transport (see
`drivers.serial_link`), any control logic.
"""


from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import SupportsFloat

import msgpack

from drivers.base import (
    STATUS_OK,
    Command,
    Hello,
    LinkStats,
    Sample,
)
from drivers.command_guard import CommandGuard
from drivers.framing import (
    DELIMITER,
    MAX_FRAME,
    CobsError,
    CrcError,
    DecodeError,
    UnknownKind,
    WireError,
    cobs_decode,
    cobs_encode,
    crc16,
    frame_body,
    unframe,
)
from drivers.sequence import SEQ_MOD, SampleGate, SeqTracker, seq_newer

__all__ = [
    # this module's own
    "STATUS_DEVICE_BASE_BIT", "MAX_STATUS_FLAGS", "PROTOCOL_VERSION", "KIND_HELLO",
    "KIND_SAMPLE", "KIND_COMMAND", "KIND_HEARTBEAT", "KIND_FAULT", "KIND_STOP", "KIND_NAMES",
    "MAX_CHANNELS", "Heartbeat", "Fault", "Stop", "Message", "HOST_HELLO_RIG_ID", "host_hello",
    "message_array", "encode_body",
    "encode_message", "decode_array", "decode_body", "decode_frame", "FrameDecoder",
    # re-exported from their modules, where callers found them before the split
    "DELIMITER", "MAX_FRAME", "SEQ_MOD", "CobsError", "CrcError", "DecodeError",
    "UnknownKind", "WireError", "cobs_decode", "cobs_encode", "crc16", "frame_body",
    "unframe", "SampleGate", "SeqTracker", "seq_newer", "CommandGuard",
]

STATUS_DEVICE_BASE_BIT = 8
"""Status bit of the first device-declared status flag (hello ``status_flags``)."""

MAX_STATUS_FLAGS = 24
"""Most status flags a hello may declare (bits 8..31)."""

PROTOCOL_VERSION = 2
"""Wire protocol version carried in every hello. Bumped on any incompatible change.

v2 added the session token (a trailing element of hello and command): a device obeys
commands only from the host session that completed the hello handshake."""

KIND_HELLO = 0
KIND_SAMPLE = 1
KIND_COMMAND = 2
KIND_HEARTBEAT = 3
KIND_FAULT = 4
KIND_STOP = 5
KIND_NAMES = {
    KIND_HELLO: "hello",
    KIND_SAMPLE: "sample",
    KIND_COMMAND: "command",
    KIND_HEARTBEAT: "heartbeat",
    KIND_FAULT: "fault",
    KIND_STOP: "stop",
}


# --------------------------------------------------------------------------- extra messages


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """'I am alive' with the sender's status bits; either side may send it."""

    seq: int
    t: float
    status: int = STATUS_OK


@dataclass(frozen=True, slots=True)
class Fault:
    """A device-side fault report: numeric code and a short text."""

    seq: int
    t: float
    code: int
    text: str = ""


@dataclass(frozen=True, slots=True)
class Stop:
    """Outputs off now. From the host: an order. From the device: a report that it stopped."""

    seq: int
    t: float
    code: int = 0


Message = Hello | Sample | Command | Heartbeat | Fault | Stop

HOST_HELLO_RIG_ID = "host"
"""The rig id of a host's hello (it announces no channels)."""


def host_hello(session: int = 0) -> Hello:
    """The hello a host sends to ask a device to announce itself and grant `session`."""
    return Hello(PROTOCOL_VERSION, HOST_HELLO_RIG_ID, (), (), 0.0, (), (), (), 0.0, session)


# --------------------------------------------------------------------------- messages

_pack = msgpack.Packer(use_bin_type=True, autoreset=True).pack


def _floats(values: Iterable[SupportsFloat]) -> list[float]:
    return [float(v) for v in values]


def message_array(msg: Message, *, seq: int = 0, t: float = 0.0) -> list[object]:
    """The positional array for `msg`.

    `seq` and `t` are used for `Hello` (which carries neither) and `t` for
    `Command` (the device time of the sample it answers, 0.0 if unknown).
    """
    if isinstance(msg, Sample):
        return [
            KIND_SAMPLE, msg.seq % SEQ_MOD, float(msg.t_device), int(msg.status), _floats(msg.y)
        ]
    if isinstance(msg, Command):
        return [KIND_COMMAND, msg.seq % SEQ_MOD, float(t), int(msg.flags), _floats(msg.u),
                int(msg.session) % SEQ_MOD]
    if isinstance(msg, Heartbeat):
        return [KIND_HEARTBEAT, msg.seq % SEQ_MOD, float(msg.t), int(msg.status)]
    if isinstance(msg, Fault):
        return [KIND_FAULT, msg.seq % SEQ_MOD, float(msg.t), int(msg.code), str(msg.text)]
    if isinstance(msg, Stop):
        return [KIND_STOP, msg.seq % SEQ_MOD, float(msg.t), int(msg.code)]
    if isinstance(msg, Hello):
        flags: list[object] = ([[str(f) for f in msg.status_flags]] if msg.status_flags
                               else [])
        return [
            KIND_HELLO,
            seq % SEQ_MOD,
            float(t),
            int(msg.protocol),
            str(msg.rig_id),
            [str(c) for c in msg.channels],
            [str(u) for u in msg.units],
            float(msg.sample_rate_hz),
            [str(o) for o in msg.output_names],
            _floats(msg.output_limits),
            [str(u) for u in msg.output_units],
            float(msg.command_timeout_s),
            int(msg.session) % SEQ_MOD,
            *flags,
        ]
    raise TypeError(f"not a wire message: {type(msg).__name__}")


def encode_body(msg: Message, *, seq: int = 0, t: float = 0.0) -> bytes:
    """The msgpack body of `msg` (no CRC, no framing)."""
    return _pack(message_array(msg, seq=seq, t=t))


def encode_message(msg: Message, *, seq: int = 0, t: float = 0.0) -> bytes:
    """One complete frame for `msg`, delimiter included, ready to write to the wire."""
    return frame_body(encode_body(msg, seq=seq, t=t))


def _uint(v: object, what: str) -> int:
    if type(v) is not int or v < 0:
        raise DecodeError(f"{what} must be an unsigned integer, got {v!r}")
    return v


def _num(v: object, what: str) -> float:
    if type(v) is float:
        return v
    if type(v) is int:
        return float(v)
    raise DecodeError(f"{what} must be a number, got {v!r}")


def _numlist(v: object, what: str) -> tuple[float, ...]:
    if type(v) is not list:
        raise DecodeError(f"{what} must be an array")
    return tuple(_num(x, what) for x in v)


def _strlist(v: object, what: str) -> tuple[str, ...]:
    if type(v) is not list or not all(type(x) is str for x in v):
        raise DecodeError(f"{what} must be an array of strings")
    return tuple(v)


def _session(arr: list[object], i: int) -> int:
    """The session token at position `i` (0 when a v1 sender left it out)."""
    if len(arr) <= i:
        return 0
    v = _uint(arr[i], "session")
    if v >= SEQ_MOD:
        raise DecodeError("session must fit in 32 bits")
    return v


_MIN_LEN = {
    KIND_HELLO: 12,
    KIND_SAMPLE: 5,
    KIND_COMMAND: 5,
    KIND_HEARTBEAT: 4,
    KIND_FAULT: 5,
    KIND_STOP: 4,
}


def decode_array(arr: object) -> tuple[Message, int, float]:
    """Turn a positional array into a message; returns ``(message, seq, t)``.

    Extra trailing elements are ignored (forward compatibility). Raises
    `UnknownKind` for a kind this version does not know, `DecodeError` otherwise.
    """
    if type(arr) is not list or len(arr) < 3:
        raise DecodeError("message must be an array [kind, seq, t, ...]")
    kind = arr[0]
    if type(kind) is not int:
        raise DecodeError(f"kind must be an integer, got {kind!r}")
    need = _MIN_LEN.get(kind)
    if need is None:
        raise UnknownKind(kind)
    if len(arr) < need:
        raise DecodeError(f"{KIND_NAMES[kind]} needs {need} elements, got {len(arr)}")
    seq = _uint(arr[1], "seq")
    if seq >= SEQ_MOD:
        raise DecodeError("seq must fit in 32 bits")
    t = _num(arr[2], "t")
    msg: Message
    if kind == KIND_SAMPLE:
        msg = Sample(seq, t, _numlist(arr[4], "y"), _uint(arr[3], "status"))
    elif kind == KIND_COMMAND:
        u = _numlist(arr[4], "u")
        if not all(math.isfinite(v) for v in u):
            raise DecodeError("command u must be finite")
        msg = Command(seq, u, _uint(arr[3], "flags"), _session(arr, 5))
    elif kind == KIND_HEARTBEAT:
        msg = Heartbeat(seq, t, _uint(arr[3], "status"))
    elif kind == KIND_FAULT:
        if type(arr[4]) is not str:
            raise DecodeError("fault text must be a string")
        msg = Fault(seq, t, _uint(arr[3], "code"), arr[4])
    elif kind == KIND_STOP:
        msg = Stop(seq, t, _uint(arr[3], "code"))
    else:
        if type(arr[4]) is not str:
            raise DecodeError("rig_id must be a string")
        msg = Hello(
            protocol=_uint(arr[3], "protocol"),
            rig_id=arr[4],
            channels=_strlist(arr[5], "channels"),
            units=_strlist(arr[6], "units"),
            sample_rate_hz=_num(arr[7], "sample_rate_hz"),
            output_names=_strlist(arr[8], "output_names"),
            output_limits=_numlist(arr[9], "output_limits"),
            output_units=_strlist(arr[10], "output_units"),
            command_timeout_s=_num(arr[11], "command_timeout_s"),
            session=_session(arr, 12),
            status_flags=_strlist(arr[13], "status_flags") if len(arr) > 13 else (),
        )
        _check_hello(msg)
    return msg, seq, t


MAX_CHANNELS = 64
"""Most channels (and outputs) a hello may announce."""


def _check_hello(h: Hello) -> None:
    """A device hello must describe a usable rig; a host hello (no channels) carries none."""
    if len(h.channels) > MAX_CHANNELS or len(h.output_limits) > MAX_CHANNELS:
        raise DecodeError(f"hello announces more than {MAX_CHANNELS} channels or outputs")
    if len(h.status_flags) > MAX_STATUS_FLAGS:
        raise DecodeError(f"hello declares more than {MAX_STATUS_FLAGS} status flags")
    if not math.isfinite(h.command_timeout_s) or h.command_timeout_s < 0:
        raise DecodeError("hello command_timeout_s must be finite and not negative")
    if not h.channels:
        return  # a host hello: asks the device to announce itself
    if not (math.isfinite(h.sample_rate_hz) and h.sample_rate_hz > 0):
        raise DecodeError(f"hello sample_rate_hz must be positive, got {h.sample_rate_hz!r}")
    if not all(math.isfinite(v) and v > 0 for v in h.output_limits):
        raise DecodeError("hello output_limits must be positive and finite")


def decode_body(body: bytes) -> Message:
    """Decode one msgpack body into a message (see `decode_array`)."""
    try:
        arr = msgpack.unpackb(body, raw=False, use_list=True, strict_map_key=True)
    except Exception as exc:  # msgpack raises several unrelated types on garbage
        raise DecodeError(f"not a msgpack value: {exc}") from None
    return decode_array(arr)[0]


def decode_frame(encoded: bytes | bytearray | memoryview) -> Message:
    """Decode one frame given with or without its trailing delimiter.

    A frame longer than `MAX_FRAME` bytes (without its delimiter) is refused
    (`CobsError`), as the stream decoder refuses it.
    """
    data = bytes(encoded)
    if data.endswith(DELIMITER):
        data = data[:-1]
    if len(data) > MAX_FRAME:
        raise CobsError(f"frame of {len(data)} bytes is over the {MAX_FRAME}-byte limit")
    return decode_body(unframe(data))


# --------------------------------------------------------------------------- stream decoding


class FrameDecoder:
    """Incremental decoder: feed it byte chunks of any size, get messages back.

    Never raises on bad input. Bad frames are counted into `stats`
    (`cobs_errors`, `crc_errors`, `decode_errors`, `unknown_kinds`) and skipped;
    the next 0x00 always resynchronises, so one corrupted byte costs at most
    the frame it lands in (two if it erased a delimiter). Good frames count
    into `stats.frames_in`.

    With ``synced=False`` the bytes before the first delimiter are dropped
    silently (a receiver that opened mid-frame has nothing to report).
    """

    __slots__ = ("stats", "max_frame", "_buf", "_discarding")

    def __init__(
        self, stats: LinkStats | None = None, *, max_frame: int = MAX_FRAME, synced: bool = True
    ) -> None:
        self.stats = stats if stats is not None else LinkStats()
        self.max_frame = max_frame
        self._buf = bytearray()
        self._discarding = not synced

    def reset(self, *, synced: bool = False) -> None:
        """Forget any partial frame (e.g. after a reconnect)."""
        self._buf.clear()
        self._discarding = not synced

    def feed(self, data: bytes | bytearray | memoryview) -> list[Message]:
        """Consume `data`; return every message completed by it, in order."""
        buf = self._buf
        buf += data
        out: list[Message] = []
        start = 0
        stats = self.stats
        while True:
            end = buf.find(0, start)
            if end < 0:
                break
            chunk = bytes(buf[start:end])
            start = end + 1
            if self._discarding:
                self._discarding = False
                continue
            if not chunk:
                continue  # idle fill / leading delimiter
            if len(chunk) > self.max_frame:
                stats.cobs_errors += 1
                continue
            try:
                msg = decode_body(unframe(chunk))
            except CrcError:
                stats.crc_errors += 1
            except CobsError:
                stats.cobs_errors += 1
            except UnknownKind:
                stats.unknown_kinds += 1
            except DecodeError:
                stats.decode_errors += 1
            else:
                stats.frames_in += 1
                out.append(msg)
        if start:
            del buf[:start]
        if len(buf) > self.max_frame:
            # No delimiter for longer than any legal frame: drop it all and
            # skip up to the next delimiter.
            if not self._discarding:
                stats.cobs_errors += 1
            buf.clear()
            self._discarding = True
        return out
