"""Nothing a peer sends can crash the loop: fuzzed frames through the live decoder path.

The seeded corpus of bench/fuzz_frames.py (real samples mixed with wrong channel counts,
non-finite readings and times, forged sequence and time jumps, mid-run hellos with bad
rates, non-finite commands, unknown kinds, random bytes, bit flips, oversized frames)
goes through `SerialLink._on_data` plus the estimator, and through `MqttLink._on_topic`:
50 000 frames each here (a twentieth of the 1 000 000 that `python bench/fuzz_frames.py`
runs), with zero exceptions and a stream that still delivers real samples afterwards.
Hypothesis adds arbitrary bytes and arbitrary msgpack values. The frame limit (1024
bytes), the CRC and COBS are the protocol's own rules (docs/wire-protocol.md).
"""

from __future__ import annotations

import importlib.util
import math
import warnings
from pathlib import Path

import msgpack
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.base import Command, Hello, LinkStats, Sample
from drivers.serial_link import SerialLink
from drivers.wire import (
    MAX_FRAME,
    PROTOCOL_VERSION,
    CobsError,
    DecodeError,
    SampleGate,
    WireError,
    decode_body,
    decode_frame,
    encode_body,
    encode_message,
    frame_body,
)

pytestmark = pytest.mark.timeout(300)

_spec = importlib.util.spec_from_file_location(
    "fuzz_frames", Path(__file__).resolve().parents[1] / "bench" / "fuzz_frames.py")
assert _spec is not None and _spec.loader is not None
fuzz = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(fuzz)

N = 50_000


def test_serial_decoder_path_survives_the_corpus():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # 1e308 readings overflow a ratio
        res = fuzz.run_serial(N, seed=11)
    assert res["exceptions"] == 0, res["first_errors"]
    st_ = res["stats"]
    # Every hostile class was seen and refused somewhere (not a test that cannot fail).
    assert st_["rejected"] > 0 and st_["decode_errors"] > 0 and st_["crc_errors"] > 0
    assert st_["hellos_midrun"] > 0 and st_["cobs_errors"] > 0
    assert res["after"] == 10  # not poisoned: the real stream goes on


def test_mqtt_sample_path_survives_the_corpus():
    res = fuzz.run_mqtt(N, seed=12)
    assert res["exceptions"] == 0, res["first_errors"]
    assert res["stats"]["rejected"] > 0
    assert res["after"] == 10


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=2048))
def test_any_bytes_never_raise_from_the_stream_decoder(data):
    link = SerialLink("/nonexistent")
    fuzz.adopt(link)
    link._on_data(b"\x00" + data + b"\x00")


_mp = st.recursive(
    st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats() | st.text(max_size=8)
    | st.binary(max_size=8),
    lambda kids: st.lists(kids, max_size=14) | st.dictionaries(st.text(max_size=4), kids,
                                                                  max_size=4),
    max_leaves=30)


@settings(max_examples=500, deadline=None)
@given(st.lists(_mp, min_size=0, max_size=14), st.integers(0, 5))
def test_any_msgpack_array_decodes_or_raises_a_wire_error(arr, kind):
    if arr:
        arr[0] = kind
    body = msgpack.packb(arr, use_bin_type=True)
    try:
        decode_body(body)
    except WireError:
        pass
    link = SerialLink("/nonexistent")
    fuzz.adopt(link)
    link._on_data(frame_body(body))


def test_decode_frame_refuses_a_frame_over_the_limit():
    body = msgpack.packb([3, 1, 0.0, 0, "x" * (MAX_FRAME + 10)])
    with pytest.raises(CobsError):
        decode_frame(frame_body(body))


@pytest.mark.parametrize("rate", [0.0, -1.0, math.nan, math.inf])
def test_a_device_hello_with_a_rate_that_is_not_positive_is_refused(rate):
    h = Hello(PROTOCOL_VERSION, "rig", ("a",), ("rad",), rate, ("v",), (1.0,), ("V",), 0.05)
    with pytest.raises(DecodeError):
        decode_frame(encode_message(h))


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_a_command_with_a_non_finite_input_is_refused(bad):
    with pytest.raises(DecodeError):
        decode_frame(encode_message(Command(5, (0.0, bad))))


def _gate() -> SampleGate:
    g = SampleGate(LinkStats())
    g.start(fuzz.HELLO)
    return g


def test_a_forged_sequence_jump_does_not_make_later_samples_duplicates():
    g, T = _gate(), 1 / fuzz.RATE
    assert g.accept(Sample(1, 0.0, (0.0,) * 4)) == 1
    assert g.accept(Sample(100_001, T, (0.0,) * 4)) == 0  # forged seq + 100000
    for k in range(2, 50):
        assert g.accept(Sample(k, (k - 1) * T, (0.0,) * 4)) == 1, k
    assert g.stats.duplicates == 0 and g.stats.rejected == 1


def test_a_forged_device_time_does_not_make_later_samples_late():
    g, T = _gate(), 1 / fuzz.RATE
    assert g.accept(Sample(1, 0.0, (0.0,) * 4)) == 1
    assert g.accept(Sample(2, 1e9, (0.0,) * 4)) == 0  # forged t = 1e9
    for k in range(2, 50):
        assert g.accept(Sample(k, (k - 1) * T, (0.0,) * 4)) == 1, k


def test_a_device_that_restarts_its_numbering_is_resynchronised_after_two_samples():
    g, T = _gate(), 1 / fuzz.RATE
    for k in range(1, 1000):
        g.accept(Sample(k, k * T, (0.0,) * 4))
    assert g.accept(Sample(1, 0.0, (0.0,) * 4)) == 0  # could be one stray old frame
    assert g.accept(Sample(2, T, (0.0,) * 4)) == 2  # it continues: a restart
    assert g.accept(Sample(3, 2 * T, (0.0,) * 4)) == 1
    assert g.stats.resyncs == 1


def test_wrong_channel_count_and_non_finite_time_are_refused_before_the_loop():
    g = _gate()
    assert g.accept(Sample(1, 0.0, (0.0,) * 3)) == 0
    assert g.accept(Sample(1, math.nan, (0.0,) * 4)) == 0
    # A NaN reading passes: the loop's nonfinite rule trips on it.
    assert g.accept(Sample(1, 0.0, (math.nan, 0.0, 0.0, 0.0))) == 1


def test_a_hello_mid_run_is_an_event_and_is_not_adopted():
    link = SerialLink("/nonexistent")
    fuzz.adopt(link)
    forged = Hello(PROTOCOL_VERSION, "forged", ("a", "b", "c"), ("", "", ""), 100.0, ("v",),
                   (1.0,), ("V",), 0.05)
    link._on_data(b"\x00" + encode_message(forged))
    assert link.hello == fuzz.HELLO
    assert link.stats.hellos_midrun == 1
    assert link.events and "mid-run" in link.events[0][1]
    assert encode_body(forged)  # (the forged hello itself is well-formed)
