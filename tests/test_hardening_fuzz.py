"""Hardening: fuzzing every inbound message type.

Sensor frames: a seeded stream of 12,000 messages (valid frames in sequence, every field of
valid frames mutated in type, range and length, wrong topics, wrong part counts, raw and
damaged bytes) is driven through ``pipeline.Session`` with a ``LogWriter``. Every message must
be accepted, or refused with a reason code and a sentence, and every one of them must be in the
replay log, in order, byte for byte. A smaller run goes through a live loopback Daemon.

Snapshot requests: a seeded stream of 10,000 requests through ``codec.decode_snapshot_request``,
and a few hundred through a live Daemon's REP socket, which must answer every one.

The bulk streams are our own seeded generators, not hypothesis: 10,000 hypothesis examples
take tens of seconds, the generator a fraction of a second. Hypothesis still drives a smaller
property test on names (where a trailing-newline bug hid).
"""

from __future__ import annotations

import random
import re
import struct
import threading

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import recv_until, write_config
from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import (
    REJECT_REASONS,
    decode_message,
    decode_sensor_frame,
    decode_snapshot_request,
)
from wingwatch.daemon.config import load_config
from wingwatch.daemon.errors import FrameRejected
from wingwatch.daemon.ingest import MAX_TOPIC_BYTES
from wingwatch.daemon.pipeline import Pipeline, Session
from wingwatch.daemon.recorder import FLAG_TOPIC_CUT, MAX_TOPIC, LogWriter
from wingwatch.daemon.service import Daemon

CH = ["pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid"]
MAX_PAYLOAD = 4096  # small limit: too_large messages stay small, so the fuzz stays fast
FUZZ_EXTRA = f"[limits]\nmax_payload_bytes = {MAX_PAYLOAD}\n"

_ODD_VALUES = [None, True, False, 0, -1, 1, 2**63 - 1, -(2**63), 2**64 - 1, 0.5, -0.0, 1e300,
               float("nan"), float("inf"), float("-inf"), "", "x", "rig", "1", "\u00e9\u00e9",
               b"", b"\x00" * 3, [], [1, 2], ["a"], {}, {"a": 1}, [[1]]]


_BLOCKS = [np.array([[2.0, 1.0, 45.0, 300.0, 100.0]]) + np.random.default_rng(i).normal(size=(10, 5))
           for i in range(64)]  # a pool of sample blocks: drawing fresh noise per frame is slow


def _valid_map(seq: int, rng: random.Random, n: int = 10, dtype: str = "<f8") -> dict:
    data = _BLOCKS[rng.randrange(len(_BLOCKS))][:n]
    return {"v": 1, "stream": "rig", "seq": seq, "t0": seq * 0.01, "rate": 1000.0,
            "channels": list(CH), "dtype": dtype, "n": n,
            "data": np.ascontiguousarray(data, dtype=dtype).tobytes()}


def _pack(m) -> bytes:
    return msgpack.packb(m, use_bin_type=True)


def sensor_fuzz_stream(count: int, seed: int = 20240611) -> list[list[bytes]]:
    """``count`` inbound multipart messages: a valid stream with every kind of damage mixed in."""
    rng = random.Random(seed)
    out: list[list[bytes]] = []
    seq = 0
    fields = list(_valid_map(0, rng))
    while len(out) < count:
        r = rng.random()
        m = _valid_map(seq, rng)
        topic = b"sensor.rig"
        if r < 0.30:  # valid, in sequence (sometimes float32, sometimes a gap or a time gap)
            if rng.random() < 0.1:
                m = _valid_map(seq, rng, dtype="<f4")
            if rng.random() < 0.03:
                seq += rng.randint(2, 5)
                m["seq"], m["t0"] = seq, seq * 0.01
            elif rng.random() < 0.03:
                m["t0"] += 0.05
            if rng.random() < 0.1:
                m["flags"] = rng.choice([1, 2, 4, 1 << 31])
            seq += 1
            out.append([topic, _pack(m)])
            continue
        if r < 0.36:  # sequence trouble: duplicate, late, clock backwards, restart
            k = rng.randrange(4)
            if k == 0 and seq > 0:
                m = _valid_map(seq - 1, rng)
            elif k == 1 and seq > 3:
                m = _valid_map(rng.randrange(max(0, seq - 400), seq - 2), rng)
            elif k == 2:
                m["seq"] = seq
                m["t0"] = (seq - 3) * 0.01
                seq += 1
            else:
                m = _valid_map(0, rng)
                m["t0"] = rng.choice([0.0, 500.0, -3.0])
                seq = 1
        elif r < 0.52:  # one field: odd value of any type
            m[rng.choice(fields)] = rng.choice(_ODD_VALUES)
        elif r < 0.56:  # one field missing, or an unknown one
            if rng.random() < 0.5:
                del m[rng.choice(fields)]
            else:
                m[rng.choice(["extra", "Seq", "flagz", "v2"])] = 1
        elif r < 0.64:  # ranges
            key, val = rng.choice([
                ("seq", -1), ("seq", 2**63), ("t0", 1e13), ("t0", -2e12), ("rate", 0.0),
                ("rate", -1000.0), ("rate", 1e8), ("rate", 999.0), ("rate", 1000.0000001),
                ("n", 0), ("n", 11), ("n", 9), ("n", 10001), ("flags", -1), ("flags", 2**32),
                ("v", 0), ("v", 2), ("v", 1.0)])
            m[key] = val
        elif r < 0.72:  # channel lists
            c = list(CH)
            k = rng.randrange(7)
            if k == 0:
                rng.shuffle(c)
            elif k == 1:
                c = c[:-1]
            elif k == 2:
                c[1] = c[0]
            elif k == 3:
                c[2] = rng.choice(["a b", "x/y", "", "q_pitot\n", "\u00e9", "z" * 65])
            elif k == 4:
                c = [f"c{i}" for i in range(65)]
            elif k == 5:
                c = []
            else:
                c[0] = "pitch_encoder"
            m["channels"] = c
        elif r < 0.78:  # dtype and data length
            k = rng.randrange(5)
            if k == 0:
                m["dtype"] = rng.choice(["<f4", ">f8", "<i4", "f8", "float64"])
            elif k == 1:
                m["data"] = m["data"][:rng.randrange(len(m["data"]))]
            elif k == 2:
                m["data"] = m["data"] + b"\x00" * rng.randint(1, 16)
            elif k == 3:
                arr = np.frombuffer(m["data"], "<f8").copy()
                arr[rng.randrange(arr.size)] = rng.choice([np.nan, np.inf, -np.inf])
                m["data"] = arr.tobytes()
            else:
                m["data"] = m["data"].decode("latin-1")
        elif r < 0.84:  # topics
            topic = rng.choice([b"", b"sensor.", b"sensor.rig2", b"sensor.rig\n", b"sensorrig",
                                b"ww.status", b"SENSOR.rig", b"sensor.\xff\xfe",
                                b"sensor." + b"r" * 2000])
            if rng.random() < 0.3:  # a well-formed frame of an undeclared stream
                m["stream"] = "tunnel9"
                topic = b"sensor.tunnel9"
        elif r < 0.88:  # part counts
            p = _pack(m)
            out.append(rng.choice([[topic], [topic, p, b""], [topic, p, p], [topic, b"", p, b"x"]]))
            continue
        else:  # raw and damaged bytes
            p = bytearray(_pack(m))
            k = rng.randrange(6)
            if k == 0:
                data = bytes(rng.getrandbits(8) for _ in range(rng.randrange(64)))
            elif k == 1:
                data = bytes(p[:rng.randrange(len(p))])
            elif k == 2:
                for _ in range(rng.randint(1, 4)):
                    p[rng.randrange(len(p))] ^= 1 << rng.randrange(8)
                data = bytes(p)
            elif k == 3:
                data = bytes(p) + bytes([rng.randrange(256)])
            elif k == 4:
                data = _pack(rng.choice([[1, 2], 7, "rig", None, {1: 2}, {"v": {"v": 1}}]))
            else:
                data = b"\x00" * (MAX_PAYLOAD + rng.randint(1, 900))
            out.append([topic, data])
            continue
        out.append([topic, _pack(m)])
    return out


def _expected_record(parts: list[bytes]) -> tuple[bytes, bytes, int]:
    """(topic, payload, flags) the recorder must hold for one inbound message."""
    if len(parts) == 2:
        return parts[0], parts[1], 0
    return (parts[0] if parts else b""), b"".join(parts[1:]), 1


def _check_verdict(v) -> None:
    if v.accepted:
        f = v.frame
        assert f is not None and f.stream == "rig" and list(f.channels) == CH
        assert np.isfinite(f.samples).all()
    else:
        assert v.reason in REJECT_REASONS, v.reason
        assert v.detail and "\n" not in v.detail


def test_fuzz_sensor_frames_through_session_all_recorded(tmp_path):
    cfg = load_config(write_config(tmp_path, FUZZ_EXTRA))
    msgs = sensor_fuzz_stream(12_000)
    path = tmp_path / "fuzz.wwlog"
    writer = LogWriter(path=path, header={"config": cfg.as_dict()}, fsync_interval_s=60.0,
                       start_unix=0.0)
    session = Session(Pipeline(cfg), recorder=writer)
    outcomes = []
    for i, parts in enumerate(msgs):
        v = session.inbound(parts, float(i))
        _check_verdict(v)
        outcomes.append(v.outcome)
    writer.close()
    assert len(msgs) >= 10_000
    counts = {o: outcomes.count(o) for o in set(outcomes)}
    # the stream reaches every verdict there is (seeded, so this pins the generator's coverage)
    assert set(counts) == {"accepted", *REJECT_REASONS}, counts
    assert counts["accepted"] > 2000
    c = session.pipeline.ingest.counters
    assert c["frames"] == len(msgs) and c["accepted"] + c["rejected"] == len(msgs)
    assert c["restarts"] > 0 and c["gaps"] > 0

    reader = rl.LogReader.open(path)
    inbound = [r for r in reader if r.kind in (rl.KIND_INBOUND, rl.KIND_REJECTED)]
    assert not reader.damage
    assert len(inbound) == len(msgs)
    for parts, rec, outcome in zip(msgs, inbound, outcomes, strict=True):
        topic, payload, flags = _expected_record(parts)
        assert (rec.topic, rec.payload, rec.flags) == (topic, payload, flags)
        if outcome == "accepted":
            assert rec.kind == rl.KIND_INBOUND
        else:
            assert rec.kind == rl.KIND_REJECTED and rec.aux == REJECT_REASONS[outcome]

    # and the log replays to the very same verdicts (decisions from the bytes alone)
    again = Session(Pipeline(cfg))
    assert [again.replay_record(r).outcome for r in inbound] == outcomes


def test_fuzz_sensor_frames_through_a_live_daemon(tmp_path, zctx):
    cfg = load_config(write_config(tmp_path, FUZZ_EXTRA))
    msgs = sensor_fuzz_stream(800, seed=7)
    d = Daemon(cfg, context=zctx)
    th = threading.Thread(target=d.run, kwargs={"duration_s": 60}, daemon=True)
    th.start()
    src = zctx.socket(zmq.XPUB)
    src.setsockopt(zmq.LINGER, 0)
    src.setsockopt(zmq.SNDHWM, 100_000)
    src.connect(cfg.endpoints.sensor)
    watch = zctx.socket(zmq.SUB)
    watch.setsockopt(zmq.LINGER, 0)
    watch.setsockopt(zmq.SUBSCRIBE, b"ww.status")
    watch.connect(cfg.endpoints.publish)
    try:
        assert src.poll(5000), "the daemon never subscribed"
        assert src.recv()[:1] == b"\x01"
        for parts in msgs:
            src.send_multipart(parts)
        st = decode_message(recv_until(
            watch, lambda p: decode_message(p[1])["counters"]["frames"] >= len(msgs), 20)[1])
        assert st["counters"]["frames"] == len(msgs)
        assert st["counters"]["accepted"] + st["counters"]["rejected"] == len(msgs)
    finally:
        d.stop()
        th.join(10)
        src.close(linger=0)
        watch.close(linger=0)
        d.close()
    assert not th.is_alive()
    recs = [r for r in rl.LogReader.open(d.log_path)
            if r.kind in (rl.KIND_INBOUND, rl.KIND_REJECTED)]
    assert [(r.topic, r.payload, r.flags) for r in recs] == [_expected_record(p) for p in msgs]


def test_a_topic_too_long_for_the_log_is_cut_flagged_and_replays_the_same(tmp_path):
    # Before the fix, pack_record raised ValueError out of Session.inbound: one message with a
    # 70 kB topic stopped the daemon loop.
    cfg = load_config(write_config(tmp_path, FUZZ_EXTRA))
    path = tmp_path / "long.wwlog"
    w = LogWriter(path=path, header={}, start_unix=0.0)
    s = Session(Pipeline(cfg), recorder=w)
    good = [b"sensor.rig", _pack(_valid_map(0, random.Random(1)))]
    v = s.inbound([b"sensor.rig" + b"x" * 70_000, good[1]], 0.0)
    assert (v.accepted, v.reason) == (False, "bad_topic") and "70010 bytes" in v.detail
    assert s.inbound(good, 1.0).accepted  # and the session carries on
    mid = s.inbound([b"sensor." + b"r" * (MAX_TOPIC_BYTES + 1), good[1]], 2.0)
    assert mid.reason == "bad_topic"
    w.close()
    recs = [r for r in rl.LogReader.open(path) if r.kind in (rl.KIND_INBOUND, rl.KIND_REJECTED)]
    assert len(recs) == 3
    assert len(recs[0].topic) == MAX_TOPIC and recs[0].flags & FLAG_TOPIC_CUT
    assert recs[0].payload == good[1] and recs[0].aux == REJECT_REASONS["bad_topic"]
    assert recs[1].flags == 0 and recs[2].flags == 0
    again = Session(Pipeline(cfg))
    assert [again.replay_record(r).outcome for r in recs] == ["bad_topic", "accepted", "bad_topic"]


_NAME_CHARS = st.characters(codec="ascii")


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(stream=st.text(_NAME_CHARS, min_size=0, max_size=70),
       chan=st.text(_NAME_CHARS, min_size=0, max_size=70))
def test_fuzz_names_accepted_only_when_every_character_is_allowed(stream, chan):
    # Regression: the patterns used ^...$, and "$" matches before a trailing newline, so
    # "rig\n" passed as a stream name and "q_pitot\n" as a channel name.
    m = {"v": 1, "stream": stream, "seq": 0, "t0": 0.0, "rate": 1000.0,
         "channels": [chan, "b"], "dtype": "<f8", "n": 1, "data": b"\x00" * 16}
    topic = b"sensor." + stream.encode("ascii")
    try:
        f = decode_sensor_frame(topic, _pack(m))
    except FrameRejected as exc:
        assert exc.reason in ("bad_field", "bad_topic")
        return
    assert re.fullmatch(r"[A-Za-z0-9_.-]{1,64}", f.stream)
    assert re.fullmatch(r"[A-Za-z0-9_.:-]{1,64}", f.channels[0])


@pytest.mark.parametrize("stream, chan", [("rig\n", "a"), ("rig", "a\n")])
def test_trailing_newline_in_names_is_a_bad_field(stream, chan):
    m = {"v": 1, "stream": stream, "seq": 0, "t0": 0.0, "rate": 1000.0,
         "channels": [chan, "b"], "dtype": "<f8", "n": 1, "data": b"\x00" * 16}
    with pytest.raises(FrameRejected) as exc:
        decode_sensor_frame(b"sensor." + stream.encode(), _pack(m))
    assert exc.value.reason == "bad_field"


# ----------------------------------------------------------------------------------------------
# Snapshot requests


def snapshot_fuzz_stream(count: int, seed: int = 99) -> list[bytes]:
    rng = random.Random(seed)
    out = []
    while len(out) < count:
        m: object = {"v": 1, "want": "snapshot"}
        r = rng.random()
        if r < 0.15:
            pass
        elif r < 0.35:
            m["v"] = rng.choice(_ODD_VALUES + [2, 1.0, True, "1"])
        elif r < 0.50:
            m["want"] = rng.choice(_ODD_VALUES + ["snapshot ", "SNAPSHOT", "snapshot\n"])
        elif r < 0.60:
            m[rng.choice(["x", "wants", "V", ""])] = rng.choice(_ODD_VALUES)
        elif r < 0.65:
            del m[rng.choice(["v", "want"])]
        elif r < 0.70:
            m = rng.choice([[1, "snapshot"], "snapshot", 1, None, {"v": {"v": 1}}])
        elif r < 0.75:
            out.append(struct.pack("<B", 0x82) + b"\xa1v\x01\x01\x02")  # non-string key
            continue
        elif r < 0.80:
            out.append(_pack(m) + b"\x00")
            continue
        elif r < 0.85:
            out.append(_pack({"v": 1, "want": "x" * rng.randint(4000, 6000)}))
            continue
        else:
            p = bytearray(_pack(m))
            if rng.random() < 0.5:
                out.append(bytes(p[:rng.randrange(len(p))]))
            else:
                out.append(bytes(rng.getrandbits(8) for _ in range(rng.randrange(40))))
            continue
        out.append(_pack(m))
    return out


def _is_valid_request(payload: bytes) -> bool:
    """Independent reading of the rule: exactly {"v": <int 1>, "want": "snapshot"}."""
    try:
        m = msgpack.unpackb(payload, raw=False, strict_map_key=False)
    except Exception:
        return False
    return (isinstance(m, dict) and set(m) == {"v", "want"} and type(m["v"]) is int
            and m["v"] == 1 and m["want"] == "snapshot" and len(payload) <= 4096)


def test_fuzz_snapshot_requests_decoder():
    reqs = snapshot_fuzz_stream(10_000)
    ok = 0
    reasons = set()
    for p in reqs:
        try:
            got = decode_snapshot_request(p)
        except FrameRejected as exc:
            assert exc.reason in REJECT_REASONS and exc.detail
            assert not _is_valid_request(p), p
            reasons.add(exc.reason)
        else:
            assert got == "snapshot" and _is_valid_request(p), p
            ok += 1
    assert ok > 1000
    assert reasons == {"malformed", "schema_version", "bad_field", "too_large"}


@pytest.mark.parametrize("v", [True, 1.0])
def test_snapshot_request_version_must_be_the_integer_one(v):
    # Regression: True == 1 and 1.0 == 1 in Python, so both passed as version 1.
    with pytest.raises(FrameRejected) as exc:
        decode_snapshot_request(_pack({"v": v, "want": "snapshot"}))
    assert exc.value.reason == "schema_version"


def test_fuzz_snapshot_requests_through_a_live_daemon(cfg, zctx):
    d = Daemon(cfg, record=False, context=zctx)
    th = threading.Thread(target=d.run, kwargs={"duration_s": 60}, daemon=True)
    th.start()
    reqs = snapshot_fuzz_stream(400, seed=5)
    req = zctx.socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.connect(cfg.endpoints.snapshot)
    big = zctx.socket(zmq.REQ)
    big.setsockopt(zmq.LINGER, 0)
    big.connect(cfg.endpoints.snapshot)
    answered = 0
    try:
        for i, p in enumerate(reqs):
            if i % 50 == 0:
                req.send_multipart([p, b"second part"])  # a request must be one part
                want = False
            else:
                req.send(p)
                want = _is_valid_request(p)
            assert req.poll(5000), f"no answer to request {i}"
            m = msgpack.unpackb(req.recv(), raw=False)
            answered += 1
            assert m["kind"] == ("snapshot" if want else "error"), (i, p, m)
            if not want:
                assert m["reason"] in REJECT_REASONS and m["detail"]
        # a request above the REP socket's transport cap: ZeroMQ drops it and that peer, the
        # daemon itself never sees it, and it still answers everyone else
        big.send(b"\x00" * 70_000)
        req.send(_pack({"v": 1, "want": "snapshot"}))
        assert req.poll(5000)
        assert msgpack.unpackb(req.recv(), raw=False)["kind"] == "snapshot"
    finally:
        req.close(linger=0)
        big.close(linger=0)
        d.stop()
        th.join(10)
        d.close()
    assert not th.is_alive()
    assert d.snapshot_requests + d.snapshot_rejected == answered + 1
    assert d.snapshot_requests == 1 + sum(
        1 for i, p in enumerate(reqs) if i % 50 and _is_valid_request(p))
