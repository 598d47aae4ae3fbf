"""The corral wire protocol: framing, checksum, message layouts, stream decoding.

A frame on the wire is ``COBS(body + CRC16_BE(body)) + b"\\x00"`` where ``body``
is one msgpack *positional array* ``[kind, seq, t, ...fields]`` and the CRC is
CRC-16/CCITT-FALSE over the body. docs/wire-protocol.md is the normative spec;
this module is the reference implementation of it in Python.

What lives here: COBS (Cheshire and Baker, 1999) written out by hand, the CRC,
message encoding and decoding to and from the `drivers.base` records, an
incremental `FrameDecoder` that never raises on garbage, a `SeqTracker` for
gaps and duplicates, and `CommandGuard`, the device-side command-timeout logic
a simulated device can reuse. What does not: any transport (see
`drivers.serial_link`), any control logic.
"""

from __future__ import annotations

import binascii
import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import SupportsFloat

import msgpack

from drivers.base import (
    FLAG_OUTPUTS_ON,
    FLAG_STOP,
    STATUS_COMMAND_TIMEOUT,
    STATUS_OK,
    STATUS_OUTPUTS_OFF,
    STATUS_SATURATED,
    Command,
    Hello,
    LinkStats,
    Sample,
)

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

SEQ_MOD = 1 << 32
"""Sequence numbers are unsigned 32-bit and wrap."""

MAX_FRAME = 1024
"""Longest encoded frame (without its delimiter) a receiver must accept."""

DELIMITER = b"\x00"


# --------------------------------------------------------------------------- errors


class WireError(ValueError):
    """A frame or message could not be decoded."""


class CobsError(WireError):
    """The COBS layer is malformed (a zero inside, or a code pointing past the end)."""


class CrcError(WireError):
    """The CRC over the body does not match."""


class DecodeError(WireError):
    """The body is not a well-formed message of a known kind."""


class UnknownKind(WireError):
    """The body is a well-formed array whose kind this version does not know."""

    def __init__(self, kind: object) -> None:
        super().__init__(f"unknown message kind {kind!r}")
        self.kind = kind


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


# --------------------------------------------------------------------------- COBS


def cobs_encode(data: bytes | bytearray | memoryview) -> bytes:
    """COBS-encode `data` (Cheshire and Baker, 1999). The result holds no zero byte.

    The trailing 0x00 delimiter is *not* added; `frame_body` does that.
    """
    out = bytearray()
    pieces = bytes(data).split(b"\x00")
    last = len(pieces) - 1
    for i, piece in enumerate(pieces):
        n = len(piece)
        pos = 0
        while n - pos >= 254:
            out.append(0xFF)
            out += piece[pos : pos + 254]
            pos += 254
        # A run of exactly k*254 bytes at the very end needs no final block
        # (the paper's 0xFF code carries no implied zero).
        if i == last and n > 0 and pos == n:
            break
        out.append(n - pos + 1)
        out += piece[pos:]
    return bytes(out)


def cobs_decode(data: bytes | bytearray | memoryview) -> bytes:
    """Invert `cobs_encode`. Raises `CobsError` on malformed input."""
    src = bytes(data)
    n = len(src)
    if n == 0:
        raise CobsError("empty COBS block")
    out = bytearray()
    i = 0
    while i < n:
        code = src[i]
        if code == 0:
            raise CobsError(f"zero byte inside COBS data at offset {i}")
        end = i + code
        if end > n:
            raise CobsError(f"COBS code {code} at offset {i} runs past the end ({n} bytes)")
        block = src[i + 1 : end]
        if 0 in block:
            raise CobsError("zero byte inside COBS data")
        out += block
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)


# --------------------------------------------------------------------------- CRC


def crc16(data: bytes | bytearray | memoryview) -> int:
    """CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, no final xor."""
    return binascii.crc_hqx(data, 0xFFFF)


def frame_body(body: bytes) -> bytes:
    """Wrap a message body into a complete frame: COBS(body + CRC16 BE) + 0x00."""
    return cobs_encode(body + crc16(body).to_bytes(2, "big")) + DELIMITER


def unframe(encoded: bytes | bytearray | memoryview) -> bytes:
    """Undo `frame_body` for one frame given *without* its delimiter; returns the body."""
    raw = cobs_decode(encoded)
    if len(raw) < 3:
        raise CobsError(f"frame too short ({len(raw)} bytes after COBS)")
    body = raw[:-2]
    if crc16(body) != int.from_bytes(raw[-2:], "big"):
        raise CrcError("CRC mismatch")
    return body


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


# --------------------------------------------------------------------------- sequences


class SeqTracker:
    """Counts sample sequence gaps and duplicates (32-bit wrap-aware).

    `accept(seq)` returns True for a sample newer than every one seen so far.
    A jump forward by k adds k - 1 to `stats.gaps` (samples missed). A sample
    not newer than the last accepted one (repeated or reordered) adds 1 to
    `stats.duplicates` and is rejected. Call `reset()` when the device
    re-announces itself (a new hello restarts its numbering).
    """

    __slots__ = ("stats", "last")

    def __init__(self, stats: LinkStats | None = None) -> None:
        self.stats = stats if stats is not None else LinkStats()
        self.last: int | None = None

    def reset(self) -> None:
        """Forget the last sequence number."""
        self.last = None

    def accept(self, seq: int) -> bool:
        """Record `seq`; True if it is new (forward), False if duplicate or old."""
        last = self.last
        if last is None:
            self.last = seq
            return True
        diff = (seq - last) % SEQ_MOD
        if diff == 0 or diff >= SEQ_MOD // 2:
            self.stats.duplicates += 1
            return False
        self.stats.gaps += diff - 1
        self.last = seq
        return True


class SampleGate:
    """Checks every sample against the device's hello before the loop sees it.

    A sample is refused (counted in `stats.rejected`, or `stats.duplicates`
    when it is not newer than the last one) when its reading count differs from
    the hello's channels, its device time is not finite, or it is implausible
    next to the last accepted sample: a sequence jump over `max_seq_jump`, or a
    device time that disagrees with the sequence step by more than
    `max_time_error_s`. Non-finite readings pass: a NaN from a sensor is the
    loop's `nonfinite` trip, not the link's to hide.

    One forged or corrupted sample cannot poison the stream: a refused sample
    is kept as a candidate, and only when the very next sample continues it
    (seq + 1, one period later) does the gate adopt the new numbering (a device
    that restarted without a hello), counting `stats.resyncs`; the real stream
    resynchronises back the same way. `accept` returns 0 (refused), 1
    (accepted) or 2 (accepted, new numbering: the device clock starts over).
    """

    __slots__ = ("stats", "channels", "period", "max_seq_jump", "max_time_error_s",
                 "last_seq", "last_t", "_cand", "_span")

    def __init__(self, stats: LinkStats | None = None, *, max_span_s: float = 1.0,
                 max_time_error_s: float = 0.5) -> None:
        self.stats = stats if stats is not None else LinkStats()
        self.channels: int | None = None
        self.period = 0.0
        self.max_seq_jump = 1000
        self.max_time_error_s = max_time_error_s
        self._span = max_span_s
        self.last_seq: int | None = None
        self.last_t = 0.0
        self._cand: tuple[int, float] | None = None

    def start(self, hello: Hello) -> None:
        """A new session with this device: its channel count and rate; numbering forgotten."""
        self.channels = len(hello.channels)
        rate = hello.sample_rate_hz
        self.period = 1.0 / rate if math.isfinite(rate) and rate > 0 else 0.0
        self.max_seq_jump = max(16, int(rate * self._span)) if self.period else 1000
        self.reset()

    def reset(self) -> None:
        """Forget the numbering (a new hello restarts it)."""
        self.last_seq = None
        self._cand = None

    def _plausible(self, seq: int, t: float, seq0: int, t0: float) -> bool:
        d = (seq - seq0) % SEQ_MOD
        if d == 0 or d >= SEQ_MOD // 2 or d > self.max_seq_jump:
            return False
        return abs((t - t0) - d * self.period) <= self.max_time_error_s + 0.1 * d * self.period

    def accept(self, s: Sample) -> int:
        """0: refused; 1: accepted; 2: accepted after a resynchronisation."""
        stats = self.stats
        t = s.t_device
        if (self.channels is not None and len(s.y) != self.channels) or not math.isfinite(t):
            stats.rejected += 1
            return 0
        seq = s.seq
        last = self.last_seq
        if last is None:
            self.last_seq, self.last_t = seq, t
            return 1
        if self._plausible(seq, t, last, self.last_t):
            stats.gaps += (seq - last) % SEQ_MOD - 1
            self.last_seq, self.last_t = seq, t
            self._cand = None
            return 1
        cand = self._cand
        if cand is not None and (seq - cand[0]) % SEQ_MOD == 1 \
                and self._plausible(seq, t, cand[0], cand[1]):
            self.last_seq, self.last_t = seq, t
            self._cand = None
            stats.resyncs += 1
            return 2
        d = (seq - last) % SEQ_MOD
        if d == 0:
            stats.duplicates += 1  # a plain repeat is never a resync candidate
            return 0
        self._cand = (seq, t)
        if d >= SEQ_MOD // 2:
            stats.duplicates += 1
        else:
            stats.rejected += 1
        return 0


def seq_newer(a: int, b: int) -> bool:
    """True if sequence number `a` is newer than `b` (32-bit serial arithmetic)."""
    return 0 < (a - b) % SEQ_MOD < SEQ_MOD // 2


# --------------------------------------------------------------------------- device side


class CommandGuard:
    """The device's own fail-safe, for simulated devices written in Python.

    Mirrors the C reference (drivers/device_c/corral_device.c): outputs are
    zero until a valid command arrives; a command older than the last applied
    one is ignored; if no valid command arrived for `timeout_s`, outputs go to
    zero and `STATUS_COMMAND_TIMEOUT | STATUS_OUTPUTS_OFF` is reported; a stop
    (message or `FLAG_STOP`) latches outputs off until `rearm()` (a new host
    hello). Commands are clamped to `limits` (`STATUS_SATURATED` when clamped).
    """

    def __init__(self, limits: tuple[float, ...], timeout_s: float,
                 lease_s: float | None = None) -> None:
        self.limits = tuple(float(v) for v in limits)
        self.timeout_s = float(timeout_s)
        self.lease_s = float(lease_s) if lease_s is not None else max(1.0, 20 * self.timeout_s)
        """An owner silent (no accepted command) this long may be replaced by a new host."""
        self.owner: int | None = None
        """The session whose commands are obeyed (None until a host hello)."""
        self._owner_t = 0.0
        self.sessions_refused = 0
        """Host hellos refused because another live session owns the rig."""
        self.foreign_commands = 0
        """Commands refused because they carry another session's token."""
        self.stopped = False
        self._u = tuple(0.0 for _ in self.limits)
        self._flags = 0
        self._last_cmd_t: float | None = None
        self._last_seq: int | None = None
        self.commands = 0

    def on_host_hello(self, session: int, now: float) -> int:
        """A host asks for the rig with `session`; returns the session the device grants.

        Granted (and the guard re-armed) when nobody owns the rig, when it is the
        owner asking again, or when the owner has been silent for `lease_s`;
        otherwise refused (counted) and the owner's session is returned, so the
        asking host learns the rig is taken.
        """
        owner = self.owner
        if owner is None or session == owner or now - self._owner_t > self.lease_s:
            self.owner = session
            self._owner_t = now
            self.rearm()
            return session
        self.sessions_refused += 1
        return owner

    def rearm(self) -> None:
        """Clear a latched stop (the host said hello again)."""
        self.stopped = False
        self._last_cmd_t = None
        self._last_seq = None

    def on_stop(self) -> None:
        """A stop message arrived: outputs off, latched."""
        self.stopped = True

    def on_command(self, cmd: Command, now: float) -> bool:
        """Apply a command received at device time `now`; False if it was rejected."""
        if self.owner is None or cmd.session != self.owner:
            self.foreign_commands += 1
            return False
        if len(cmd.u) != len(self.limits) or not all(math.isfinite(v) for v in cmd.u):
            return False
        if self._last_seq is not None and not seq_newer(cmd.seq, self._last_seq):
            return False
        self._last_seq = cmd.seq
        self._last_cmd_t = now
        self._owner_t = now
        self._u = tuple(cmd.u)
        self._flags = cmd.flags
        self.commands += 1
        if cmd.flags & FLAG_STOP:
            self.stopped = True
        return True

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """The outputs to apply at device time `now` and the status bits to report."""
        zero = tuple(0.0 for _ in self.limits)
        if self.stopped:
            return zero, STATUS_OUTPUTS_OFF
        if self._last_cmd_t is None:
            return zero, STATUS_OUTPUTS_OFF
        if now - self._last_cmd_t > self.timeout_s:
            return zero, STATUS_COMMAND_TIMEOUT | STATUS_OUTPUTS_OFF
        if not self._flags & FLAG_OUTPUTS_ON:
            return zero, STATUS_OUTPUTS_OFF
        status = STATUS_OK
        u = []
        for v, lim in zip(self._u, self.limits, strict=True):
            if v > lim:
                v, status = lim, status | STATUS_SATURATED
            elif v < -lim:
                v, status = -lim, status | STATUS_SATURATED
            u.append(v)
        return tuple(u), status
