"""SerialLink against a real pseudo-terminal with a pure-Python fake device."""

from __future__ import annotations

import asyncio
import dataclasses
import os
import threading
import time

import pytest

from drivers.base import (
    FLAG_OUTPUTS_ON,
    STATUS_COMMAND_TIMEOUT,
    STATUS_OUTPUTS_OFF,
    Command,
    Hello,
    LinkClosed,
    Sample,
)
from drivers.serial_link import (
    DeviceEndpoint,
    HandshakeError,
    SerialLink,
    open_pty,
    parse_serial_url,
)
from drivers.wire import PROTOCOL_VERSION, Fault, Heartbeat, Stop, encode_message

pytestmark = pytest.mark.timeout(30)

HELLO = Hello(
    protocol=PROTOCOL_VERSION,
    rig_id="fake-1",
    channels=("x", "v"),
    units=("m", "m/s"),
    sample_rate_hz=500.0,
    output_names=("force",),
    output_limits=(5.0,),
    output_units=("N",),
    # Long enough that a loaded machine never lets the fail-safe fire mid-test; the test
    # of the fail-safe itself uses FAST_FAILSAFE.
    command_timeout_s=2.0,
)
FAST_FAILSAFE = dataclasses.replace(HELLO, command_timeout_s=0.05)


class FakeDevice:
    """A double integrator x'' = u behind a DeviceEndpoint, clocked by a thread."""

    def __init__(self, hello: Hello = HELLO, link_path: str | None = None, *, stream: bool = True):
        self.dev = DeviceEndpoint.create_pty(hello, link_path=link_path)
        self.path = self.dev.path
        self.period = 1.0 / hello.sample_rate_hz
        self.stream = stream
        self.x = self.v = 0.0
        self.statuses: list[int] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def __enter__(self) -> FakeDevice:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.stop()
        self.dev.close()

    def stop(self) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(5)

    def _run(self) -> None:
        deadline = time.monotonic()
        while not self._stop.is_set():
            deadline += self.period
            while (left := deadline - time.monotonic()) > 0:
                self.dev.poll(left)
            (u,), status = self.dev.outputs()
            self.v += u * self.period
            self.x += self.v * self.period
            self.statuses.append(status)
            if self.stream:
                self.dev.send_sample((self.x, self.v), status)


def run(coro):
    return asyncio.run(coro)


# --------------------------------------------------------------------------- URL


@pytest.mark.parametrize(
    ("url", "want"),
    [
        ("serial:/dev/pts/5@115200", ("/dev/pts/5", 115200)),
        ("serial:/dev/ttyACM0", ("/dev/ttyACM0", 115200)),
        ("serial:///dev/ttyUSB1@921600", ("/dev/ttyUSB1", 921600)),
        ("serial:/dev/serial/by-id/usb-x@y-if00@57600", ("/dev/serial/by-id/usb-x@y-if00", 57600)),
    ],
)
def test_parse_serial_url(url, want):
    assert parse_serial_url(url) == want


@pytest.mark.parametrize("url", ["mqtt://host", "serial:", "serial:/dev/x@fast", "serial:/dev/x@0"])
def test_parse_serial_url_rejects(url):
    with pytest.raises(ValueError):
        parse_serial_url(url)


# --------------------------------------------------------------------------- handshake and loop


def test_handshake_samples_and_commands_echo_seq():
    async def main():
        with FakeDevice() as fake:
            async with SerialLink.from_url(f"serial:{fake.path}@115200") as link:
                # The device granted this link's session (protocol v2 handshake).
                assert link.hello == dataclasses.replace(HELLO, session=link.session)
                assert link.stats.connected
                seqs = []
                for _ in range(150):
                    s = await link.receive()
                    assert s.t_host > 0 and len(s.y) == 2
                    seqs.append(s.seq)
                    # PD loop to x = 0.2 (closes a real loop over the pty)
                    u = 40.0 * (0.2 - s.y[0]) - 8.0 * s.y[1]
                    await link.send(Command(s.seq, (u,), FLAG_OUTPUTS_ON))
                # the device thread reads the last commands when the machine lets it: wait
                # for them (a generous bound, not a deadline)
                end = time.monotonic() + 60
                while fake.dev.guard.commands < 140 and time.monotonic() < end:
                    await asyncio.sleep(0.01)
                last = fake.dev.last_command
                assert last is not None and last.seq in seqs
                assert fake.dev.guard.commands >= 140
                assert seqs == sorted(seqs)
                assert len(link.stats.latencies_us) == 150
                assert all(v >= 0 for v in link.stats.latencies_us)
                assert fake.x > 0.02  # the commands moved the plant
            # close() sent a stop: wait for the device thread to read it (a bound, not a
            # deadline)
            end = time.monotonic() + 60
            while not fake.dev.guard.stopped and time.monotonic() < end:
                await asyncio.sleep(0.01)
            assert fake.dev.guard.stopped
            assert not link.stats.connected

    run(main())


def test_counts_gaps_duplicates_and_garbage():
    async def main():
        with FakeDevice(stream=False) as fake:
            async with SerialLink(fake.path) as link:
                dev = fake.dev
                for seq in (10, 11, 11, 14, 12, 15):
                    dev.send(Sample(seq, 0.01 * seq, (float(seq), 0.0), 0))
                os.write(dev.fd, b"\x13\x37garbage\x00")
                dev.send(Heartbeat(1, 0.2, STATUS_COMMAND_TIMEOUT))
                dev.send(Fault(2, 0.3, 7, "overtemp"))
                dev.send(Sample(16, 0.16, (16.0, 0.0), 0))
                got = [(await link.receive()).seq for _ in range(5)]
                assert got == [10, 11, 14, 15, 16]
                st = link.stats
                assert st.gaps == 2  # 12 and 13 missed after 11 (12 arrives late: counted old)
                assert st.duplicates == 2  # 11 repeated, 12 after 14
                assert st.crc_errors + st.cobs_errors + st.decode_errors == 1
                assert list(link.faults) == [Fault(2, 0.3, 7, "overtemp")]
                assert link.device_status == 0  # the last sample's status after the heartbeat

    run(main())


def test_device_stop_message_is_reported():
    async def main():
        with FakeDevice(stream=False) as fake:
            async with SerialLink(fake.path) as link:
                fake.dev.send(Stop(1, 0.0, 3))
                fake.dev.send(Sample(1, 0.0, (0.0, 0.0), STATUS_OUTPUTS_OFF))
                s = await link.receive()
                assert s.status == STATUS_OUTPUTS_OFF and link.device_stopped

    run(main())


def test_no_hello_gives_a_clear_error():
    master, slave, path = open_pty()
    try:
        async def main():
            link = SerialLink(path, hello_timeout_s=0.3)
            with pytest.raises(HandshakeError, match="no hello"):
                await link.open()
            assert not link.stats.connected

        run(main())
    finally:
        os.close(master)
        os.close(slave)


def test_wrong_protocol_version_is_refused():
    old = Hello(PROTOCOL_VERSION + 1, "future", ("a",), ("-",), 10.0, ("u",), (1.0,), ("-",), 0.1)
    with FakeDevice(old) as fake:
        async def main():
            with pytest.raises(HandshakeError, match="protocol"):
                await SerialLink(fake.path, hello_timeout_s=1.0).open()

        run(main())


def test_missing_port_raises_link_closed():
    async def main():
        with pytest.raises(LinkClosed, match="cannot open"):
            await SerialLink("/dev/does-not-exist-corral").open()

    run(main())


def test_fail_safe_when_host_stops_commanding():
    async def main():
        with FakeDevice(FAST_FAILSAFE) as fake:
            async with SerialLink(fake.path) as link:
                statuses = []
                for _ in range(200):
                    s = await link.receive()
                    statuses.append(s.status)
                    await link.send(Command(s.seq, (1.0,), FLAG_OUTPUTS_ON))
                # commanded: outputs on (a loaded machine may let the 50 ms fail-safe fire
                # between two commands now and then, so not necessarily the last sample)
                assert 0 in statuses
                await asyncio.sleep(0.2)  # no commands for 4x the command timeout
                # wait for the device's answer to the silence (a loaded machine may hold
                # its clock off longer than the sleep): a generous bound, not a deadline
                end = time.monotonic() + 60
                s = await link.receive()
                while not s.status & STATUS_COMMAND_TIMEOUT and time.monotonic() < end:
                    s = await link.receive()
                assert s.status & STATUS_COMMAND_TIMEOUT and s.status & STATUS_OUTPUTS_OFF

    run(main())


# --------------------------------------------------------------------------- unplug and reconnect


def test_unplug_raises_link_closed_and_reconnect_recovers(tmp_path):
    stable = str(tmp_path / "rig0")  # like /dev/serial/by-id/...: survives a re-plug

    async def main():
        fake = FakeDevice(link_path=stable).__enter__()
        link = SerialLink(stable, hello_timeout_s=1.0)
        await link.open()
        first = await link.receive()
        # Unplug: the device's end of the pty goes away.
        await asyncio.to_thread(fake.__exit__, None, None, None)
        with pytest.raises(LinkClosed):
            for _ in range(10_000):
                await link.receive()
        assert not link.stats.connected
        with pytest.raises(LinkClosed):
            await link.send(Command(first.seq, (0.0,)))

        # Re-plug a little later, while reconnect() is already retrying.
        async def replug():
            await asyncio.sleep(0.3)
            return FakeDevice(link_path=stable).__enter__()

        replug_task = asyncio.create_task(replug())
        await link.reconnect(timeout_s=5.0)
        fake2 = await replug_task
        try:
            s = await link.receive()
            await link.send(Command(s.seq, (0.5,), FLAG_OUTPUTS_ON))
            assert link.stats.reconnects == 1 and link.stats.connected
            assert link.hello == dataclasses.replace(HELLO, session=link.session)
            await asyncio.sleep(0.05)
            assert fake2.dev.guard.commands == 1
        finally:
            await link.close()
            fake2.__exit__(None, None, None)

    run(main())


def test_reconnect_gives_up_with_link_closed(tmp_path):
    async def main():
        link = SerialLink(str(tmp_path / "never"))
        with pytest.raises(LinkClosed, match="still unavailable"):
            await link.reconnect(timeout_s=0.3)

    run(main())


def test_device_endpoint_answers_host_hello_and_rearms():
    fake = FakeDevice(stream=False)
    try:
        host = os.open(fake.path, os.O_RDWR | os.O_NOCTTY)
        fake.dev.guard.on_stop()
        from drivers.serial_link import host_hello
        from drivers.wire import FrameDecoder

        os.write(host, b"\x00" + encode_message(host_hello(), seq=1))
        assert fake.dev.poll(1.0) and fake.dev.host_hellos == 1
        assert not fake.dev.guard.stopped
        dec = FrameDecoder()
        got = []
        while not got:
            got = dec.feed(os.read(host, 4096))
        assert got == [HELLO]
        os.close(host)
    finally:
        fake.dev.close()
