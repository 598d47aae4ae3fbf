"""Tests for `drivers.base.SampleInbox` and `drivers.base.LatencyRing`, with real asyncio.

What lives here: the inbox's bound and drop counting (checked against
`collections.deque(maxlen=...)`, whose documented rule is the same: when full,
an append discards from the opposite end), waking a waiting receiver from the
loop and from another thread, failing it with `LinkClosed`, resetting; the
latency ring's bookkeeping; and the free-running `SimLink`, which queues
through the inbox. What does not: the links' transports (tests/test_serial_link.py,
tests/test_mqtt_link.py).
"""

from __future__ import annotations

import asyncio
import collections
import threading
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.base import LatencyRing, LinkClosed, LinkStats, Sample, SampleInbox


def sample(seq: int, t_device: float = 0.0, t_host: float = 0.0) -> Sample:
    return Sample(seq, t_device, (float(seq),), 0, t_host)


def run(coro):
    return asyncio.run(asyncio.wait_for(coro, 10.0))


# --------------------------------------------------------------------------- SampleInbox


@settings(max_examples=200, deadline=None)
@given(
    maxlen=st.integers(1, 6),
    ops=st.lists(st.one_of(st.just("get"), st.just("latest"), st.integers(0, 1000)),
                 max_size=60),
)
def test_inbox_matches_a_bounded_deque(maxlen, ops):
    # Reference: collections.deque(maxlen=n) "once full, when new items are added, a
    # corresponding number of items are discarded from the opposite end" (Python docs,
    # collections.deque). Every discard, and every sample get_latest skips, is a late frame.
    stats = LinkStats()
    inbox = SampleInbox(stats, maxlen)
    model: collections.deque[int] = collections.deque(maxlen=maxlen)
    late = 0

    async def main():
        nonlocal late
        for op in ops:
            if op == "get":
                if not model:
                    continue  # would wait: covered by the waking tests
                assert (await inbox.get()).seq == model.popleft()
            elif op == "latest":
                if not model:
                    continue
                late += len(model) - 1
                assert (await inbox.get_latest()).seq == model[-1]
                model.clear()
            else:
                if len(model) == maxlen:
                    late += 1
                model.append(op)
                inbox.put(sample(op))
            assert [s.seq for s in inbox] == list(model)
            assert len(inbox) == len(model)
            assert stats.late_frames == late

    run(main())


def test_get_waits_for_a_later_put():
    async def main():
        inbox = SampleInbox(LinkStats())
        loop = asyncio.get_running_loop()
        getter = asyncio.ensure_future(inbox.get())
        await asyncio.sleep(0)
        assert not getter.done()  # nothing queued: it waits
        loop.call_soon(inbox.put, sample(5))
        assert (await getter).seq == 5
        assert len(inbox) == 0

    run(main())


def test_put_from_another_thread_wakes_the_receiver():
    # The free-running simulated rig hands samples over with call_soon_threadsafe.
    async def main():
        inbox = SampleInbox(LinkStats(), maxlen=1000)
        loop = asyncio.get_running_loop()

        def produce():
            for k in range(1, 201):
                loop.call_soon_threadsafe(inbox.put, sample(k))

        thread = threading.Thread(target=produce)
        thread.start()
        got = [(await inbox.get()).seq for _ in range(200)]
        thread.join()
        assert got == list(range(1, 201))
        assert inbox.stats.late_frames == 0

    run(main())


def test_fail_wakes_a_waiting_receiver_with_link_closed():
    async def main():
        inbox = SampleInbox(LinkStats())
        getter = asyncio.ensure_future(inbox.get())
        await asyncio.sleep(0)
        inbox.fail("serial port gone")
        with pytest.raises(LinkClosed, match="serial port gone"):
            await getter
        assert inbox.closed_reason == "serial port gone"

    run(main())


def test_queued_samples_are_handed_out_before_the_failure():
    async def main():
        inbox = SampleInbox(LinkStats())
        inbox.put(sample(1))
        inbox.put(sample(2))
        inbox.fail("broker lost")
        assert (await inbox.get()).seq == 1
        assert (await inbox.get_latest()).seq == 2
        with pytest.raises(LinkClosed, match="broker lost"):
            await inbox.get()
        with pytest.raises(LinkClosed, match="broker lost"):
            await inbox.get_latest()

    run(main())


def test_fail_keeps_the_first_reason_only_when_asked():
    inbox = SampleInbox(LinkStats())
    inbox.fail("rig went offline", replace=False)
    inbox.fail("link closed", replace=False)
    assert inbox.closed_reason == "rig went offline"
    inbox.fail("link closed")
    assert inbox.closed_reason == "link closed"


def test_starts_failed_until_reset_and_clear_keeps_the_failure():
    async def main():
        stats = LinkStats()
        inbox = SampleInbox(stats, reason="not open")
        with pytest.raises(LinkClosed, match="not open"):
            await inbox.get()
        inbox.put(sample(1))
        inbox.clear()  # drops the old session's samples, not counted as late
        assert len(inbox) == 0 and stats.late_frames == 0
        with pytest.raises(LinkClosed, match="not open"):
            await inbox.get()
        inbox.put(sample(2))
        inbox.reset()  # a fresh session: no samples, no failure
        assert len(inbox) == 0 and inbox.closed_reason is None and stats.late_frames == 0
        getter = asyncio.ensure_future(inbox.get())
        await asyncio.sleep(0)
        assert not getter.done()  # waits now instead of raising
        inbox.put(sample(3))
        assert (await getter).seq == 3

    run(main())


def test_a_cancelled_receiver_leaves_the_inbox_usable():
    async def main():
        inbox = SampleInbox(LinkStats())
        with pytest.raises(asyncio.TimeoutError):
            await asyncio.wait_for(inbox.get(), 0.01)
        inbox.put(sample(9))  # no stale waiter to trip over
        assert (await inbox.get()).seq == 9

    run(main())


def test_inbox_rejects_an_empty_bound():
    with pytest.raises(ValueError, match="maxlen"):
        SampleInbox(LinkStats(), 0)


# --------------------------------------------------------------------------- LatencyRing


def test_latency_is_receipt_to_send_in_microseconds():
    stats = LinkStats()
    ring = LatencyRing(stats)
    ring.note_received(41, t_device=2.5, t_host=100.0)
    assert ring.device_time(41) == 2.5
    # 100.0 s -> 100.00125 s is 1250 us (exact up to float rounding of the difference).
    lat = ring.note_sent(41, now=100.00125)
    assert lat == pytest.approx(1250.0, abs=1e-6)
    assert stats.latencies_us == [lat]


def test_unknown_or_overwritten_seq_records_nothing():
    stats = LinkStats()
    ring = LatencyRing(stats, size=4)
    ring.note_received(1, 0.1, 10.0)
    ring.note_received(5, 0.5, 11.0)  # 5 % 4 == 1 % 4: the slot now holds seq 5
    assert ring.device_time(1) == 0.0
    assert ring.note_sent(1, 12.0) is None
    assert ring.note_sent(2, 12.0) is None  # never received
    assert ring.device_time(5) == 0.5
    assert ring.note_sent(5, 11.5) == pytest.approx(0.5e6)
    assert len(stats.latencies_us) == 1


def test_a_sample_without_a_receipt_time_records_nothing():
    ring = LatencyRing(LinkStats())
    ring.note_received(3, t_device=1.0, t_host=0.0)  # t_host never set
    assert ring.device_time(3) == 1.0
    assert ring.note_sent(3, 5.0) is None
    assert ring.stats.latencies_us == []


def test_latencies_are_trimmed_to_the_newest_half():
    stats = LinkStats()
    ring = LatencyRing(stats, size=8, keep=10)
    for k in range(11):
        ring.note_received(k, 0.0, 1.0)
        ring.note_sent(k, 1.0 + k * 1e-6)
    # The 11th entry passes keep=10: the oldest keep // 2 = 5 are dropped.
    assert len(stats.latencies_us) == 6
    assert stats.latencies_us[0] == pytest.approx(5.0)
    assert stats.latencies_us[-1] == pytest.approx(10.0)


# --------------------------------------------------------------------------- SimLink (free-running)


def test_free_running_sim_link_queues_through_the_inbox_and_fails_on_close():
    from runtime.config import load_config
    from runtime.method.design import design_from_config
    from runtime.offline.dryrun import plant_from_config
    from sim_rigs.link import SimLink

    cfg = load_config(Path(__file__).resolve().parent.parent / "configs" / "pedestal-sim.toml")
    design = design_from_config(cfg)
    link = SimLink(plant_from_config(cfg, design), 0.01, free_running=True)

    async def main():
        await link.open()
        seqs = [(await link.receive()).seq for _ in range(5)]
        assert seqs == sorted(seqs) and len(set(seqs)) == 5
        # Leave a receiver waiting on an empty inbox (a queued sample completes it at once;
        # then wait again), then close: the waiter gets LinkClosed instead of hanging.
        pending = asyncio.ensure_future(link.receive())
        await asyncio.sleep(0)
        while pending.done():
            pending.result()
            pending = asyncio.ensure_future(link.receive())
            await asyncio.sleep(0)
        await link.close()  # fails the inbox before its first suspension
        with pytest.raises(LinkClosed, match="simulated rig closed"):
            await pending
        with pytest.raises(LinkClosed):
            await link.receive()

    run(main())


def test_latency_ring_forgets_a_previous_session():
    stats = LinkStats()
    ring = LatencyRing(stats)
    ring.note_received(5, t_device=1.0, t_host=100.0)
    ring.forget()
    assert ring.note_sent(5, now=100.5) is None
    assert stats.latencies_us == []
