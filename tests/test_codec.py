"""Wire codec: round trips, every rejection reason, and property-based fuzzing of the decoder."""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from wingwatch.daemon.codec import (
    REJECT_REASONS,
    SensorFrame,
    decode_array,
    decode_message,
    decode_sensor_frame,
    encode_array,
    encode_message,
    encode_sensor_frame,
)
from wingwatch.daemon.errors import FrameRejected

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


def good_map(**over):
    m = {"v": 1, "stream": "rig", "seq": 3, "t0": 0.03, "rate": 1000.0, "channels": list(CH),
         "dtype": "<f8", "n": 2, "data": np.arange(10.0).tobytes()}
    m.update(over)
    return m


def pack(m):
    return msgpack.packb(m, use_bin_type=True)


@pytest.mark.parametrize("dtype", ["<f8", "<f4"])
def test_round_trip(dtype):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(10, 5))
    f = SensorFrame("rig", 12, 1.25, 1000.0, CH, x, flags=4, dtype=dtype)
    g = decode_sensor_frame(*encode_sensor_frame(f))
    assert (g.stream, g.seq, g.t0, g.rate, g.channels, g.flags) == ("rig", 12, 1.25, 1000.0, CH, 4)
    want = x.astype(np.float32).astype(np.float64) if dtype == "<f4" else x
    assert np.array_equal(g.samples, want)
    assert not g.samples.flags.writeable
    assert math.isclose(g.t_end, 1.26)


@pytest.mark.parametrize(
    "payload, reason, field",
    [
        (b"\xc1", "malformed", "msgpack"),
        (pack([1, 2]), "malformed", "map"),
        (pack(good_map()) + b"\x00", "malformed", "after"),
        (pack(good_map(v=2)), "schema_version", "version 2"),
        (pack({k: v for k, v in good_map().items() if k != "v"}), "schema_version", "'v'"),
        (pack({k: v for k, v in good_map().items() if k != "seq"}), "bad_field", "'seq'"),
        (pack(good_map(extra=1)), "bad_field", "'extra'"),
        (pack(good_map(seq=-1)), "bad_field", "'seq'"),
        (pack(good_map(seq="3")), "bad_field", "'seq'"),
        (pack(good_map(t0=float("nan"))), "bad_field", "'t0'"),
        (pack(good_map(rate=0.0)), "bad_field", "'rate'"),
        (pack(good_map(channels=[])), "bad_field", "'channels'"),
        (pack(good_map(channels=["a b"] * 5)), "bad_field", "'channels'"),
        (pack(good_map(dtype="<i4")), "bad_field", "'dtype'"),
        (pack(good_map(n=0)), "bad_shape", "'n'"),
        (pack(good_map(n=3)), "bad_shape", "'data'"),
        (pack(good_map(data="text")), "bad_field", "'data'"),
        (pack(good_map(flags=-1)), "bad_field", "'flags'"),
        (pack(good_map(stream="x" * 65)), "bad_field", "'stream'"),
        (pack(good_map(data=np.array([np.nan] + [0.0] * 9).tobytes())), "non_finite", "pitch_enc"),
        (pack(good_map(data=np.array([0.0] * 7 + [np.inf, 0, 0]).tobytes())), "non_finite", "q_pitot"),
    ],
)
def test_each_violation_has_its_reason(payload, reason, field):
    with pytest.raises(FrameRejected) as exc:
        decode_sensor_frame(b"sensor.rig", payload)
    assert exc.value.reason == reason
    assert field in exc.value.detail


def test_topic_and_size_limits():
    with pytest.raises(FrameRejected) as exc:
        decode_sensor_frame(b"sensor.other", pack(good_map()))
    assert exc.value.reason == "bad_topic"
    big = pack(good_map(n=2000, data=np.zeros(10000).tobytes()))
    with pytest.raises(FrameRejected) as exc:
        decode_sensor_frame(b"sensor.rig", big, max_bytes=50_000)
    assert exc.value.reason == "too_large"
    with pytest.raises(FrameRejected) as exc:
        decode_sensor_frame(b"sensor.rig", pack(good_map(n=2000, data=np.zeros(10000).tobytes())),
                            max_samples=1000)
    assert exc.value.reason == "bad_shape"


def _check_decoder(topic: bytes, payload: bytes) -> None:
    try:
        f = decode_sensor_frame(topic, payload, max_bytes=1 << 16)
    except FrameRejected as exc:
        assert exc.reason in REJECT_REASONS
        assert exc.detail
    else:
        assert f.samples.shape == (f.n_samples, len(f.channels))
        assert np.isfinite(f.samples).all()


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=512))
def test_fuzz_arbitrary_bytes_never_crash(data):
    _check_decoder(b"sensor.rig", data)


_values = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(2**63), max_value=2**64 - 1),  # what msgpack can carry
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8), st.binary(max_size=96),
    st.lists(st.text(max_size=4), max_size=6),
)


@settings(max_examples=600, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(st.sampled_from(list(good_map()) + ["flags", "zz"]), _values, max_size=10),
       st.booleans())
def test_fuzz_structured_maps_accept_or_reject_with_reason(over, drop):
    m = good_map()
    if drop and over:
        m.pop(next(iter(over)), None)
    else:
        m.update(over)
    _check_decoder(b"sensor.rig", pack(m))


def test_outbound_messages_read_with_plain_msgpack():
    a = np.arange(6.0).reshape(2, 3)
    topic, payload = encode_message("status", {"A": a, "n": np.int64(3), "z": [1.5, "x"]})
    assert topic == b"ww.status"
    plain = msgpack.unpackb(payload, raw=False)  # no wingwatch code: any msgpack reader
    assert plain["v"] == 1 and plain["kind"] == "status" and plain["n"] == 3
    assert plain["A"]["dtype"] == "<f8" and plain["A"]["shape"] == [2, 3]
    assert np.array_equal(np.frombuffer(plain["A"]["data"], "<f8").reshape(2, 3), a)
    back = decode_message(payload)
    assert np.array_equal(back["A"], a)
    # equal messages give equal bytes (replay compares outputs byte for byte)
    assert encode_message("status", {"A": a.copy(), "n": 3, "z": [1.5, "x"]})[1] == payload


def test_array_map_validation():
    m = encode_array(np.ones((2, 2)))
    m["shape"] = [3, 3]
    with pytest.raises(ValueError, match="length"):
        decode_array(m)
    assert decode_array(encode_array(np.array([1 + 2j]))).dtype == np.complex128
