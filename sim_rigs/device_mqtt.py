"""The served rig's MQTT transport: the device side of the rig topics.

What lives here: `MqttDeviceTransport` (retained hello and status with a last
will, samples out, commands, stops and host hellos in, on its own asyncio loop
in a helper thread). What does not: the host link (`drivers.mqtt_link`), the
device clock (`sim_rigs.device`).
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import random
import threading
import time
from collections.abc import Callable
from typing import Any

import aiomqtt
from paho.mqtt.subscribeoptions import SubscribeOptions

from drivers.base import Command, Hello, LinkClosed, Sample
from drivers.command_guard import CommandGuard
from drivers.mqtt_client import (
    Topics,
    client_id,
    connect_client,
    disconnect_client,
    expiry,
    make_client,
    publish_now,
    quick_ack,
    status_payload,
)
from drivers.mqtt_settings import MqttSettings
from drivers.wire import HOST_HELLO_RIG_ID, Stop, WireError, decode_body, encode_body
from sim_rigs.transports import Transport, try_fifo


class MqttDeviceTransport(Transport):
    """Device side of the MQTT topics, run on its own asyncio loop in a helper thread.

    Publishes a retained hello and a retained ``online`` status (its last will
    says offline), samples (QoS 0, message expiry), answers a host hello with
    its hello (and re-arms the guard, as the serial device does), feeds
    commands and stops into the guard. Reconnects with backoff when the broker
    goes away.
    """

    def __init__(self, hello: Hello, settings: MqttSettings, *, seed: int = 0,
                 on_command: Callable[[Command, float], None] | None = None,
                 realtime: bool = False) -> None:
        self.hello = hello
        self.settings = settings
        self.realtime = realtime
        """SCHED_FIFO for the network thread when permitted (it carries samples, commands)."""
        self.topics = Topics(settings.prefix, settings.rig)
        self.rng = random.Random(seed)
        self.on_command = on_command
        self.guard = CommandGuard(hello.output_limits, hello.command_timeout_s)
        self.guard_lock = threading.Lock()
        self.connected = False
        self.wanted = True
        self.seq = 0
        self.publish_drops = 0
        self.decode_errors = 0
        self.last_error = ""
        self._inbox: collections.deque[tuple[float, object]] = collections.deque(maxlen=256)
        self._loop = asyncio.new_event_loop()
        self._client: aiomqtt.Client | None = None
        self._expiry = expiry(settings.sample_expiry_s)
        self._stop_evt: asyncio.Event | None = None
        self._kick: asyncio.Event | None = None
        self._up = threading.Event()
        self._thread = threading.Thread(target=self._run, name="mqtt-device", daemon=True)
        self._thread.start()

    def wait_connected(self, timeout_s: float) -> bool:
        """Block until the first connection is up (False on timeout)."""
        return self._up.wait(timeout_s)

    # ---- asyncio side
    def _run(self) -> None:
        if self.realtime:
            try_fifo()
        asyncio.set_event_loop(self._loop)
        self._loop.run_until_complete(self._main())
        self._loop.close()

    async def _main(self) -> None:
        self._stop_evt = asyncio.Event()
        self._kick = asyncio.Event()
        delay = 0.1
        while not self._stop_evt.is_set():
            if not self.wanted:
                self._kick.clear()
                await self._wait_any(self._kick.wait(), self._stop_evt.wait())
                continue
            will = aiomqtt.Will(self.topics.status,
                                status_payload(False, self.settings.rig, "connection lost"),
                                qos=1, retain=True)
            client = make_client(self.settings, identifier=client_id("device", self.settings.rig),
                                 will=will)
            try:
                await connect_client(client, self.settings)
            except LinkClosed as exc:
                self.last_error = str(exc)
                await self._wait_any(asyncio.sleep(delay), self._stop_evt.wait())
                delay = min(2 * delay, 1.0)
                continue
            delay = 0.1
            reason = "stopped"
            try:
                # Commands skip aiomqtt's queue: paho hands them over inside its socket read.
                def on_command(pc: Any, ud: Any, m: Any, c: aiomqtt.Client = client) -> None:
                    self._on_paho_command(c, pc, m)

                client._client.message_callback_add(self.topics.command, on_command)
                # Retain-as-published: a command published retained keeps its flag, so
                # it is recognised and ignored (a stored command must never act).
                await client.subscribe(self.topics.command,
                                       options=SubscribeOptions(qos=0, retainAsPublished=True))
                await client.publish(self.topics.status,
                                     status_payload(True, self.settings.rig), qos=1, retain=True)
                await self._publish_hello(client)
                self._client = client
                self.connected = True
                self._up.set()
                self._kick.clear()
                tasks = [asyncio.create_task(c) for c in (
                    self._reader(client), self._stop_evt.wait(), self._kick.wait())]
                done, pending = await asyncio.wait(tasks, return_when=asyncio.FIRST_COMPLETED)
                for t in pending:
                    t.cancel()
                for t in pending:
                    with contextlib.suppress(BaseException):
                        await t
                for t in done:
                    if not t.cancelled() and t.exception() is not None:
                        self.last_error = str(t.exception())
                        reason = ""
                if not self.wanted:
                    reason = "link fault: disconnect"
            except aiomqtt.MqttError as exc:
                self.last_error = str(exc)
                reason = ""
            finally:
                self.connected = False
                self._client = None
            if reason:
                # Announce the going-away ourselves (a clean exit does not fire the will).
                with contextlib.suppress(Exception):
                    await asyncio.wait_for(client.publish(
                        self.topics.status, status_payload(False, self.settings.rig, reason),
                        qos=1, retain=True), 1.0)
            await disconnect_client(client)

    @staticmethod
    async def _wait_any(*aws: Any) -> None:
        tasks = [asyncio.ensure_future(a) for a in aws]
        _, pending = await asyncio.wait(tasks, return_when=asyncio.FIRST_COMPLETED)
        for t in pending:
            t.cancel()

    async def _publish_hello(self, client: aiomqtt.Client, session: int | None = None) -> None:
        self.seq = (self.seq + 1) & 0xFFFFFFFF
        if session is None:
            session = self.guard.owner or 0
        hello = dataclasses.replace(self.hello, session=session)
        await client.publish(self.topics.hello, encode_body(hello, seq=self.seq), qos=1,
                             retain=True)

    async def _reader(self, client: aiomqtt.Client) -> None:
        # Commands arrive through `_on_paho_command`; this only notices a lost connection.
        async for _ in client.messages:
            pass

    def _on_paho_command(self, client: aiomqtt.Client, pc: Any, m: Any) -> None:
        """A message on the command topic, inside paho's socket read (loop thread).

        Commands and stops go straight into the inbox the clock thread drains;
        a host hello re-arms the guard and is answered on the next loop turn
        (no publishing from inside a paho callback). Never raises.
        """
        now = time.monotonic()
        quick_ack(pc.socket())
        payload = m.payload
        if m.retain or not isinstance(payload, bytes):
            return
        try:
            msg = decode_body(payload)
        except WireError:
            self.decode_errors += 1
            return
        except Exception:
            self.decode_errors += 1
            return
        if type(msg) is Hello:
            if msg.rig_id == HOST_HELLO_RIG_ID:
                # The session handshake: granted (guard re-armed) or refused; the
                # answer names the session the device obeys.
                with self.guard_lock:
                    granted = self.guard.on_host_hello(msg.session, now)
                self._loop.create_task(self._answer_hello(client, granted))
            return
        self._inbox.append((now, msg))

    async def _answer_hello(self, client: aiomqtt.Client, session: int) -> None:
        with contextlib.suppress(aiomqtt.MqttError):
            await self._publish_hello(client, session)

    def _publish_sample(self, body: bytes) -> None:
        """Write one sample to the broker now (loop thread; called from the clock thread)."""
        client = self._client
        if client is None:
            self.publish_drops += 1
            return
        try:
            publish_now(client, self.topics.sample, body, self._expiry)
        except aiomqtt.MqttError:
            self.publish_drops += 1  # the reader sees the lost connection

    # ---- clock-thread side
    def poll_until(self, deadline: float) -> None:
        """Sleep to `deadline`, then apply what arrived (zero-order hold at the period)."""
        while (left := deadline - time.monotonic()) > 0:
            time.sleep(left)
        inbox = self._inbox
        while inbox:
            t_arr, msg = inbox.popleft()
            with self.guard_lock:
                if type(msg) is Command:
                    if self.guard.on_command(msg, t_arr) and self.on_command is not None:
                        self.on_command(msg, t_arr)
                elif type(msg) is Stop:
                    self.guard.on_stop()

    def send_sample(self, sample: Sample, corrupt: int) -> None:
        """Queue the sample for publishing (header bits flipped when corrupting)."""
        if not self.connected:
            return
        body = encode_body(sample)
        if corrupt:
            # Flip one bit of the array header: the receiver always sees a bad message.
            body = bytes([body[0] ^ (1 << self.rng.randrange(8))]) + body[1:]
        self._loop.call_soon_threadsafe(self._publish_sample, body)

    def disconnect(self) -> None:
        """Drop the broker connection (status goes offline) until `reconnect`."""
        if self.wanted:
            self.wanted = False
            self._loop.call_soon_threadsafe(self._set_kick)

    def reconnect(self) -> None:
        """Connect again after `disconnect`."""
        if not self.wanted:
            self.wanted = True
            self._loop.call_soon_threadsafe(self._set_kick)

    def _set_kick(self) -> None:
        if self._kick is not None:
            self._kick.set()

    def close(self) -> None:
        """Publish the offline status and disconnect."""
        if self._thread.is_alive() and self._stop_evt is not None:
            self._loop.call_soon_threadsafe(self._stop_evt.set)
        self._thread.join(5)

    def outputs(self, now: float) -> tuple[tuple[float, ...], int]:
        """Outputs and status from the guard (thread-safe)."""
        with self.guard_lock:
            return self.guard.outputs(now)
