"""Plan and command messages: round trip through a plain msgpack reader, refusals with their
reasons, fuzzing (every input accepted or refused with a reason, nothing else raised), and the
publisher and the rig's command listener over loopback."""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from wingwatch.clients.plan import PlanPublisher
from wingwatch.daemon.codec import REJECT_REASONS
from wingwatch.daemon.errors import ConfigError, FrameRejected
from wingwatch.daemon.plan import (MAX_PLAN_SAMPLES, Plan, decode_command, decode_plan,
                                   encode_command, encode_plan)
from wingwatch.daemon.rig.cli import CommandListener

from conftest import free_port, recv_until


def test_plan_round_trip_through_a_plain_msgpack_reader():
    alpha = np.radians(np.linspace(5.0, 6.5, 41))
    topic, payload = encode_plan("mpc-1", 12.5, 0.025, alpha)
    assert topic == b"plan.mpc-1"
    m = msgpack.unpackb(payload, raw=False)  # what any reader of docs/protocol.md would do
    assert list(m) == ["v", "kind", "controller", "t0", "dt", "alpha"]
    assert (m["v"], m["kind"], m["controller"], m["t0"], m["dt"]) == (1, "plan", "mpc-1", 12.5, 0.025)
    assert m["alpha"]["dtype"] == "<f8" and m["alpha"]["shape"] == [41]
    np.testing.assert_array_equal(np.frombuffer(m["alpha"]["data"], "<f8"), alpha)
    p = decode_plan(topic, payload)
    assert isinstance(p, Plan) and p.controller == "mpc-1" and p.n_samples == 41
    np.testing.assert_array_equal(p.alpha, alpha)  # bit for bit
    assert not p.alpha.flags.writeable
    assert p.t_end == pytest.approx(12.5 + 40 * 0.025, abs=1e-12)
    assert encode_plan("mpc-1", 12.5, 0.025, alpha) == (topic, payload)  # equal plans, equal bytes


def _valid() -> dict:
    return msgpack.unpackb(encode_plan("mpc", 1.0, 0.05, [0.1, 0.2, 0.3])[1], raw=False)


def _with(**kw) -> bytes:
    m = _valid()
    for k, v in kw.items():
        if v is _DROP:
            m.pop(k)
        else:
            m[k] = v
    return msgpack.packb(m, use_bin_type=True)


_DROP = object()
_arr = lambda data, shape=None, dtype="<f8": {"dtype": dtype, "shape": shape or [len(data) // 8], "data": data}  # noqa: E731


@pytest.mark.parametrize("topic, payload, reason", [
    (b"plan.mpc", b"\xc1", "malformed"),
    (b"plan.mpc", msgpack.packb([1, 2]), "malformed"),
    (b"plan.mpc", _with() + b"\x00", "malformed"),
    (b"plan.mpc", _with(v=_DROP), "schema_version"),
    (b"plan.mpc", _with(v=2), "schema_version"),
    (b"plan.mpc", _with(v=True), "schema_version"),
    (b"plan.mpc", _with(kind="sensor"), "bad_field"),
    (b"plan.mpc", _with(extra=1), "bad_field"),
    (b"plan.mpc", _with(dt=_DROP), "bad_field"),
    (b"plan.mpc", _with(dt=0.0), "bad_field"),
    (b"plan.mpc", _with(dt=-0.1), "bad_field"),
    (b"plan.mpc", _with(t0="now"), "bad_field"),
    (b"plan.mpc", _with(t0=2e12), "bad_field"),
    (b"plan.mpc", _with(t0=float("nan")), "non_finite"),
    (b"plan.mpc", _with(dt=float("inf")), "non_finite"),
    (b"plan.mpc", _with(controller="m p c"), "bad_field"),
    (b"plan.mpc\n", _with(controller="mpc\n"), "bad_field"),
    (b"plan.other", _with(), "bad_topic"),
    (b"sensor.mpc", _with(), "bad_topic"),
    (b"plan.mpc", _with(alpha=[0.1, 0.2]), "bad_field"),
    (b"plan.mpc", _with(alpha=_arr(np.zeros(3, "<f4").tobytes(), [3], "<f4")), "bad_field"),
    (b"plan.mpc", _with(alpha=_arr(np.zeros(4).tobytes(), [2, 2])), "bad_shape"),
    (b"plan.mpc", _with(alpha=_arr(b"", [0])), "bad_shape"),
    (b"plan.mpc", _with(alpha=_arr(np.zeros(3).tobytes(), [4])), "bad_shape"),
    (b"plan.mpc", _with(alpha=_arr(b"\x00" * 8, [MAX_PLAN_SAMPLES + 1])), "bad_shape"),
    (b"plan.mpc", _with(alpha=_arr(np.array([0.1, np.nan]).tobytes())), "non_finite"),
    (b"plan.mpc", b"\x00" * 100, "malformed"),
])
def test_each_refusal_has_its_reason(topic, payload, reason):
    with pytest.raises(FrameRejected) as e:
        decode_plan(topic, payload)
    assert e.value.reason == reason


def test_size_limit_is_checked_before_unpacking():
    topic, payload = encode_plan("mpc", 0.0, 0.01, np.zeros(1000))
    assert decode_plan(topic, payload).n_samples == 1000
    with pytest.raises(FrameRejected) as e:
        decode_plan(topic, payload, max_bytes=len(payload) - 1)
    assert e.value.reason == "too_large"


@pytest.mark.parametrize("args", [("", 0.0, 0.1, [0.0]), ("a/b", 0.0, 0.1, [0.0]),
                                  ("mpc", math.nan, 0.1, [0.0]), ("mpc", 0.0, 0.0, [0.0]),
                                  ("mpc", 0.0, 0.1, []), ("mpc", 0.0, 0.1, [[0.0]]),
                                  ("mpc", 0.0, 0.1, [math.inf])])
def test_encoder_refuses_what_the_decoder_would(args):
    with pytest.raises(ValueError):
        encode_plan(*args)


def test_command_round_trip_and_refusals():
    topic, payload = encode_command(3.25, math.radians(6.0))
    m = msgpack.unpackb(payload, raw=False)
    assert topic == b"cmd.alpha" and m == {"v": 1, "kind": "command", "t": 3.25,
                                          "alpha": math.radians(6.0)}
    c = decode_command(topic, payload)
    assert (c.t, c.alpha) == (3.25, math.radians(6.0))
    bad = [(b"cmd.beta", payload, "bad_topic"),
           (topic, msgpack.packb({"v": 1, "kind": "command", "t": 1.0}), "bad_field"),
           (topic, msgpack.packb({"v": 1, "kind": "command", "t": 1.0, "alpha": 2.0}), "bad_field"),
           (topic, msgpack.packb({"v": 1, "kind": "command", "t": 1.0, "alpha": math.nan}), "non_finite"),
           (topic, msgpack.packb({"v": 3, "kind": "command", "t": 1.0, "alpha": 0.1}), "schema_version"),
           (topic, b"\x93\x01", "malformed")]
    for t, p, reason in bad:
        with pytest.raises(FrameRejected) as e:
            decode_command(t, p)
        assert e.value.reason == reason


# --------------------------------------------------------------------------- fuzzing
_scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                     st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
                     st.binary(max_size=24))
_values = st.recursive(_scalars, lambda inner: st.one_of(st.lists(inner, max_size=3),
                                                         st.dictionaries(st.text(max_size=6), inner, max_size=3)),
                       max_leaves=6)
_keys = st.sampled_from(["v", "kind", "controller", "t0", "dt", "alpha", "x"])


@st.composite
def _message(draw) -> tuple[bytes, bytes]:
    """One inbound message: valid, a valid one with fields replaced, dropped or added, one
    with its bytes cut or flipped, or random bytes."""
    n = draw(st.integers(1, 6))
    alpha = draw(st.lists(st.floats(-1.0, 1.0), min_size=n, max_size=n))
    topic, payload = encode_plan("mpc", draw(st.floats(-10.0, 10.0)), draw(st.floats(1e-3, 1.0)), alpha)
    kind = draw(st.integers(0, 4))
    if kind == 1:
        m = msgpack.unpackb(payload, raw=False)
        for _ in range(draw(st.integers(1, 3))):
            k = draw(_keys)
            if draw(st.booleans()):
                m[k] = draw(_values)
            else:
                m.pop(k, None)
        if draw(st.booleans()):
            m["alpha"] = {"dtype": draw(st.sampled_from(["<f8", "<f4", "<i8", 5])),
                          "shape": draw(st.one_of(st.lists(st.integers(-3, 2**40), max_size=3), _values)),
                          "data": draw(st.binary(max_size=64))}
        payload = msgpack.packb(m, use_bin_type=True)
    elif kind == 2:
        cut = draw(st.integers(0, len(payload)))
        payload = payload[:cut]
    elif kind == 3:
        b = bytearray(payload)
        for _ in range(draw(st.integers(1, 4))):
            i = draw(st.integers(0, len(b) - 1))
            b[i] = draw(st.integers(0, 255))
        payload = bytes(b)
    elif kind == 4:
        payload = draw(st.binary(max_size=96))
    if draw(st.integers(0, 9)) == 0:
        topic = draw(st.binary(max_size=12))
    return topic, payload


def test_fuzzed_plans_are_accepted_or_refused_with_a_reason_and_nothing_else():
    """Hypothesis draws 160 messages; each is decoded as drawn and as every one of its
    prefixes and with each of 8 single-byte changes (over 10,000 inputs in all)."""
    seen = {"accepted": 0, "refused": 0}
    reasons: set[str] = set()

    def one(topic: bytes, payload: bytes) -> None:
        try:
            p = decode_plan(topic, payload)
        except FrameRejected as exc:
            assert exc.reason in REJECT_REASONS
            reasons.add(exc.reason)
            seen["refused"] += 1
        else:
            assert np.all(np.isfinite(p.alpha)) and p.dt > 0 and 1 <= p.n_samples
            seen["accepted"] += 1
        try:
            decode_command(b"cmd.alpha", payload)
        except FrameRejected as exc:
            assert exc.reason in REJECT_REASONS

    @settings(max_examples=160, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    @given(_message(), st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)),
                                min_size=8, max_size=8))
    def check(msg, flips):
        topic, payload = msg
        one(topic, payload)
        for cut in range(len(payload)):
            one(topic, payload[:cut])
        for i, byte in flips:
            if payload:
                b = bytearray(payload)
                b[i % len(b)] = byte
                one(topic, bytes(b))

    check()
    assert seen["accepted"] + seen["refused"] >= 10_000
    assert seen["accepted"] > 0 and seen["refused"] > 0
    assert {"malformed", "bad_field", "schema_version", "bad_topic"} <= reasons


# ------------------------------------------------------------------------- transport
def _ready(wait, peer, timeout_s: float = 5.0) -> bool:
    """Wait for a subscription while letting the peer socket (same thread) process its commands:
    a bound SUB sends its subscriptions only when its own thread calls into it."""
    import time

    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        peer.getsockopt(zmq.EVENTS)
        if wait(0.02):
            return True
    return False


def test_plan_publisher_reaches_a_bound_subscriber_over_loopback():
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"plan.")
    ep = f"tcp://127.0.0.1:{free_port()}"
    sub.bind(ep)
    pub = PlanPublisher(ep, "demo_ctl", context=ctx)
    try:
        assert _ready(pub.wait_ready, sub)
        pub.send(4.0, 0.025, np.radians([5.0, 5.1]))
        topic, payload = recv_until(sub, lambda parts: True)
        p = decode_plan(topic, payload)
        assert (p.controller, p.t0, p.dt) == ("demo_ctl", 4.0, 0.025)
        np.testing.assert_array_equal(p.alpha, np.radians([5.0, 5.1]))
        assert pub.sent == 1
        with pytest.raises(ValueError):
            pub.send(4.0, 0.0, [0.1])
    finally:
        pub.sock.close(linger=0)
        sub.close(linger=0)
        ctx.term()
    with pytest.raises(ValueError):
        PlanPublisher(ep, "bad name")


def test_command_listener_holds_the_newest_command_and_counts_refusals():
    ctx = zmq.Context()
    ep = f"tcp://127.0.0.1:{free_port()}"
    lis = CommandListener(ep, context=ctx)
    pub = ctx.socket(zmq.XPUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.connect(ep)
    try:
        assert _ready(lambda t: bool(pub.poll(int(t * 1000))) and pub.recv() is not None, lis.sock)
        assert lis.alpha_at(0.0) is None  # nothing yet: the rig follows its scenario
        pub.send_multipart(list(encode_command(1.0, 0.10)))
        pub.send_multipart(list(encode_command(2.0, 0.12)))
        pub.send_multipart([b"cmd.alpha", b"\xc1"])
        pub.send_multipart([b"cmd.other", encode_command(2.5, 0.3)[1]])
        import time
        deadline = time.monotonic() + 5.0
        while lis.received < 2 or sum(lis.rejected.values()) < 2:
            assert time.monotonic() < deadline, "commands did not arrive"
            lis.drain()
            time.sleep(0.01)
        assert lis.alpha_at(0.5) is None
        assert lis.alpha_at(1.5) == 0.10
        assert lis.alpha_at(9.0) == 0.12  # the last one is held
        assert lis.rejected == {"malformed": 1, "bad_topic": 1}
    finally:
        pub.close(linger=0)
        lis.sock.close(linger=0)
        ctx.term()
    with pytest.raises(ConfigError):
        CommandListener("tcp://0.0.0.0:5999")
