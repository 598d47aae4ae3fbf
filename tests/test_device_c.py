"""The C99 device codec: compiled with gcc here, checked against the Python codec.

Cross-checks go through the shared vectors file (drivers/test_vectors.json) and
through a real pseudo-terminal, where the compiled example device and
`SerialLink` close a loop.
"""

from __future__ import annotations

import asyncio
import json
import pathlib
import random
import shutil
import subprocess

import pytest

from drivers.base import (
    FLAG_OUTPUTS_ON,
    STATUS_COMMAND_TIMEOUT,
    STATUS_OUTPUTS_OFF,
    STATUS_SATURATED,
    Command,
)
from drivers.serial_link import SerialLink, host_hello
from drivers.wire import (
    FrameDecoder,
    Stop,
    cobs_encode,
    encode_message,
    frame_body,
)

pytestmark = [
    pytest.mark.timeout(60),
    pytest.mark.skipif(shutil.which("gcc") is None, reason="gcc not installed: C codec not built"),
]

ROOT = pathlib.Path(__file__).resolve().parent.parent
SRC = ROOT / "drivers" / "device_c"
CODEC = ["corral_device.c", "cobs.c", "crc16.c", "corral_msgpack.c"]
FLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]
ERR = {"cobs": -1, "crc": -2, "decode": -3, "unknown_kind": -4}


def _build(out: pathlib.Path, main: str) -> pathlib.Path:
    exe = out / main.removesuffix(".c")
    cmd = ["gcc", *FLAGS, "-o", str(exe), main, *CODEC]
    res = subprocess.run(cmd, cwd=SRC, capture_output=True, text=True)
    assert res.returncode == 0, f"{' '.join(cmd)}\n{res.stderr}"
    return exe


@pytest.fixture(scope="module")
def bins(tmp_path_factory):
    out = tmp_path_factory.mktemp("device_c")
    return {m: _build(out, f"{m}.c") for m in ("vector_tool", "example_device")}


def _tool(bins, lines: list[str]) -> list[str]:
    res = subprocess.run(
        [str(bins["vector_tool"])], input="\n".join(lines) + "\n",
        capture_output=True, text=True, timeout=20,
    )
    assert res.returncode == 0, res.stderr
    return res.stdout.splitlines()


def test_c_codec_agrees_with_shared_vectors(bins):
    vec = json.loads((ROOT / "drivers" / "test_vectors.json").read_text())
    good, bad = vec["good"], vec["bad"]
    out = _tool(bins, [f"frame {v['frame_hex']}" for v in good + bad] + ["crc 313233343536373839"])
    for v, line in zip(good, out, strict=False):
        # decode then re-encode must give the very bytes Python produced
        assert line == f"OK {v['frame_hex']}", v["name"]
    for v, line in zip(bad, out[len(good) :], strict=False):
        assert line == f"ERR {ERR[v['error']]}", v["name"]
    # CRC-16/CCITT-FALSE check value 0x29B1 ("Catalogue of parametrised CRC algorithms").
    assert out[-1] == "29b1"


def test_c_cobs_agrees_with_python_on_examples_and_random_data(bins):
    from tests.test_wire import COBS_EXAMPLES  # Cheshire and Baker (1999) examples

    rnd = random.Random(1999)
    datas = [raw for raw, _ in COBS_EXAMPLES] + [b""]
    for _ in range(200):
        n = rnd.choice([rnd.randrange(0, 20), rnd.randrange(240, 800)])
        datas.append(bytes(rnd.choice([0, rnd.randrange(256)]) for _ in range(n)))
    lines = [f"cobs {d.hex()}" for d in datas]
    lines += [f"uncobs {cobs_encode(d).hex()}" for d in datas]
    out = _tool(bins, lines)
    n = len(datas)
    for d, enc, dec in zip(datas, out[:n], out[n:], strict=True):
        assert enc == cobs_encode(d).hex()
        assert dec == d.hex()
    for raw, encoded in COBS_EXAMPLES:
        assert cobs_encode(raw) == encoded


def test_c_stream_decoder_counts_like_python(bins):
    rnd = random.Random(7)
    # The session handshake first (protocol v2): the device obeys session 9 only.
    chunks = [b"\x00", encode_message(host_hello(9), seq=1)]
    forged = 0
    for i in range(60):
        r = rnd.random()
        if r < 0.1:
            # A forger (or a second runtime): another session, seq far ahead. Refused
            # and counted; the owner's later commands are not made "old" by it.
            chunks.append(encode_message(Command(100_000 + i, (12.0, 12.0), 1, session=8)))
            forged += 1
        elif r < 0.5:
            chunks.append(encode_message(Command(i, (0.5, -0.5), FLAG_OUTPUTS_ON, session=9)))
        elif r < 0.55:
            chunks.append(frame_body(b"\x94\x63\x01\xcb" + bytes(8)))  # truncated array
        elif r < 0.6:
            chunks.append(frame_body(b"\x94\x63\x01\xcb" + bytes(8) + b"\xc0"))  # kind 99
        elif r < 0.8:
            f = bytearray(encode_message(Command(i, (1.0, 2.0), 1, session=9)))
            f[rnd.randrange(len(f) - 1)] ^= 1 << rnd.randrange(8)
            chunks.append(bytes(f))
        else:
            chunks.append(bytes(rnd.randrange(256) for _ in range(rnd.randrange(1, 30))))
    chunks.append(encode_message(host_hello(8), seq=2))  # a second host: refused
    chunks.append(encode_message(Stop(3, 0.0)))  # a stop is obeyed from anyone
    stream = b"".join(chunks)
    py = FrameDecoder(synced=False)
    msgs = py.feed(stream)
    out = _tool(bins, [f"feed {stream[i : i + 97].hex()}" for i in range(0, len(stream), 97)])
    frames, crc, cobs, dec, unk, cmds, hellos, stopped, foreign, refused = map(
        int, out[-1].split())
    s = py.stats
    assert min(s.frames_in, s.crc_errors, s.cobs_errors, s.decode_errors, s.unknown_kinds) > 0
    assert (frames, crc, cobs, dec, unk) == (
        s.frames_in, s.crc_errors, s.cobs_errors, s.decode_errors, s.unknown_kinds
    )
    owned = {m.seq for m in msgs if isinstance(m, Command) and m.session == 9}
    assert cmds == len(owned)  # all newer, width 2, the owner's session
    assert foreign == sum(1 for m in msgs if isinstance(m, Command) and m.session != 9) > 0
    assert hellos == 2 and refused == 1 and stopped == 1


# --------------------------------------------------------------------------- over a pty


def test_example_device_closes_a_loop_with_serial_link_and_fails_safe(bins):
    proc = subprocess.Popen(
        [str(bins["example_device"]), "--rate", "500", "--timeout", "0.05", "--seconds", "20"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    try:
        first = proc.stdout.readline().split()
        assert first[0] == "PTY", first
        path = first[1]

        async def main():
            async with SerialLink(path, hello_timeout_s=30.0) as link:  # a bound, not a deadline
                h = link.hello
                assert (h.rig_id, h.channels, h.output_limits) == ("c-example", ("x", "v"), (5.0,))
                assert h.command_timeout_s == 0.05
                # ~0.5 s of PD control to x = 0.1 m, rig-clocked at 500 Hz
                s = await link.receive()
                t_start = s.t_device
                statuses = []
                while s.t_device - t_start < 0.5:
                    s = await link.receive()
                    statuses.append(s.status)
                    u = 100.0 * (0.1 - s.y[0]) - 20.0 * s.y[1]
                    await link.send(Command(s.seq, (u,), FLAG_OUTPUTS_ON))
                assert abs(s.y[0] - 0.1) < 0.03, s
                assert statuses[-1] & ~STATUS_SATURATED == 0
                assert link.stats.gaps == 0 and link.stats.crc_errors == 0
                # Give the plant a velocity, then stop commanding: the device must
                # switch outputs off by itself once its command timeout has passed. The
                # last command (u = 1, after 19 of u = 5) shows in the samples where the
                # device applied it: dv = u x period. Judged on the device's own clock
                # from there (a loaded host may deliver the commands late or in a burst).
                period = 1.0 / 500
                seen = []
                for i in range(20):
                    s = await link.receive()
                    seen.append(s)
                    await link.send(Command(s.seq, (5.0 if i < 19 else 1.0,), FLAG_OUTPUTS_ON))
                t_quiet = s.t_device

                def timed_out_run() -> int:
                    n = 0
                    for a in reversed(seen):
                        if not a.status & STATUS_COMMAND_TIMEOUT:
                            break
                        n += 1
                    return n

                def shows_last(i: int) -> bool:  # sample i is the first with u = 1 applied
                    return seen[i].y[1] - seen[i - 1].y[1] == pytest.approx(period, abs=1e-9)

                k = next((i for i in range(1, len(seen)) if shows_last(i)), None)
                # Until the last command has shown and, after it, the device has reported a
                # timeout for 10 samples in a row (under load the host reads a backlog: an
                # earlier timed-out stretch may come first). A bound on the device's clock.
                while k is None or timed_out_run() < 10 or len(seen) - timed_out_run() <= k:
                    s = await link.receive()
                    seen.append(s)
                    if k is None and shows_last(len(seen) - 1):
                        k = len(seen) - 1
                    assert s.t_device - t_quiet < 10.0, (
                        "the device never timed out after the last command" if k is not None
                        else "the last command never showed in the samples")
                off = seen[len(seen) - timed_out_run():]
                t_cmd, timeout = seen[k].t_device, h.command_timeout_s
                # The first sample past the timeout reports it, and none before it does.
                assert off[0].t_device - t_cmd > timeout
                assert all(a.t_device - t_cmd <= timeout for a in seen[k:len(seen) - len(off)])
                assert all(a.status & STATUS_OUTPUTS_OFF for a in off)
                # outputs zero: the double integrator coasts at constant velocity
                assert off[-1].y[1] == pytest.approx(off[0].y[1], abs=1e-12)
                assert abs(off[0].y[1]) > 0.01

        asyncio.run(main())
    finally:
        proc.terminate()
        out, err = proc.communicate(timeout=10)
    summary = dict(kv.split("=") for kv in out.split("SUMMARY", 1)[1].split())
    assert int(summary["commands"]) > 200
    assert int(summary["timeouts"]) >= 1
    assert int(summary["stops"]) == 1  # SerialLink.close() sent a stop
    assert int(summary["crc"]) == int(summary["cobs"]) == int(summary["decode"]) == 0


def test_c_header_constants_match_python():
    import re

    import drivers.base as base
    from drivers import wire

    text = (SRC / "corral_device.h").read_text()
    defs = {m[0]: m[1] for m in re.findall(r"#define CORRAL_(\w+) \(?(1u << \d+|\d+u?)\)?", text)}

    def val(s: str) -> int:
        return eval(s.replace("u", ""))  # "1u << 3" -> 8

    for name in ("STATUS_SATURATED", "STATUS_COMMAND_TIMEOUT", "STATUS_FAULT",
                 "STATUS_OUTPUTS_OFF", "FLAG_OUTPUTS_ON", "FLAG_FALLBACK", "FLAG_STOP"):
        assert val(defs[name]) == getattr(base, name), name
    for kind in ("HELLO", "SAMPLE", "COMMAND", "HEARTBEAT", "FAULT", "STOP"):
        assert val(defs[f"KIND_{kind}"]) == getattr(wire, f"KIND_{kind}"), kind
    assert val(defs["PROTOCOL_VERSION"]) == wire.PROTOCOL_VERSION
    assert val(defs["MAX_FRAME"]) == wire.MAX_FRAME
    assert val(defs["STATUS_DEVICE_BASE_BIT"]) == wire.STATUS_DEVICE_BASE_BIT
