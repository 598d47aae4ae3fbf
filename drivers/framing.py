"""The wire's framing layer: COBS, the CRC, frame limits and the wire's error types.

A frame is ``COBS(body + CRC16_BE(body)) + b"\\x00"`` (docs/wire-protocol.md).
What lives here: COBS (Cheshire and Baker, 1999) written out by hand, the
CRC-16/CCITT-FALSE, `frame_body` / `unframe`, `MAX_FRAME`, and the error family
(`WireError` and its kinds). What does not: the message bodies (`drivers.wire`).
"""

from __future__ import annotations

import binascii

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
