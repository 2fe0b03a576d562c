"""Loopback integration: publisher -> daemon -> recorder and status; bad input never stops it;
a kill -9 of the daemon process leaves a log that inspect reads with the right counts."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import threading
import time

import msgpack
import numpy as np
import pytest
import zmq

from conftest import recv_until
from wingwatch.clients.publisher import FramePublisher
from wingwatch.daemon.codec import SensorFrame, decode_message, encode_sensor_frame
from wingwatch.daemon.config import load_config
from wingwatch.daemon.logsummary import summarise_log
from wingwatch.daemon.service import Daemon, record_frames

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


def block(i, n=10):
    rng = np.random.default_rng(i)
    return rng.normal(size=(n, 5)) + np.array([2.0, 1.0, 45.0, 300.0, 100.0])


def bad_messages():
    """One of every kind of bad input the foundation catalogues."""
    def frame(**kw):
        base = dict(stream="rig", seq=1000, t0=10.0, rate=1000.0, channels=CH, samples=block(0))
        base.update(kw)
        return encode_sensor_frame(SensorFrame(**base))

    good = msgpack.unpackb(frame()[1])
    def with_(**kw):
        m = dict(good)
        m.update(kw)
        return [b"sensor.rig", msgpack.packb(m, use_bin_type=True)]

    return {
        "malformed": [b"sensor.rig", b"\xc1\xc1"],
        "schema_version": with_(v=99),
        "bad_field": with_(seq="one"),
        "bad_shape": with_(n=11),
        "non_finite": list(frame(samples=np.full((10, 5), np.nan))),
        "unknown_stream": list(encode_sensor_frame(SensorFrame("tunnel9", 0, 0.0, 1000.0, CH, block(1)))),
        "bad_topic": [b"sensor.elsewhere", frame()[1]],
        "too_large": [b"sensor.rig", b"\x00" * (5 << 20)],
        "channel_mismatch": list(frame(channels=CH[::-1])),
        "rate_mismatch": list(frame(rate=500.0)),
    }


@contextlib.contextmanager
def running(d, cfg, zctx, subscribe: bytes, duration_s: float):
    """The daemon ``d`` on a thread, a subscriber to its ``subscribe`` topics and a frame
    publisher into it; everything stopped and closed on the way out (bounded joins)."""
    sub = zctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, subscribe)
    sub.connect(cfg.endpoints.publish)
    th = threading.Thread(target=d.run, kwargs={"duration_s": duration_s}, daemon=True)
    th.start()
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(5.0)
        yield sub, pub
    finally:
        d.stop()
        th.join(10)
        pub.close()
        sub.close()
        d.close()
    assert not th.is_alive()


def test_daemon_ingests_records_and_publishes_status(cfg, zctx):
    d = Daemon(cfg)
    with running(d, cfg, zctx, b"ww.", 30) as (sub, pub):
        sent = 0
        for i in range(100):
            if i == 50:
                pub.seq += 3  # lose three frames: a gap
                pub.t0 += 0.03
            pub.send(block(i))
            sent += 1
        pub.send_raw(*encode_sensor_frame(SensorFrame("rig", 10, 0.1, 1000.0, CH, block(10))))  # duplicate
        bad = bad_messages()
        for parts in bad.values():
            pub.sock.send_multipart(parts)
        pub.sock.send_multipart([b"sensor.rig"])  # one part only
        pub.send(block(200))  # the daemon still takes good frames after all that

        seen = []

        def counted(parts):
            m = decode_message(parts[1])
            seen.append(m)
            return m["kind"] == "status" and m["counters"]["frames"] >= sent + 2 + len(bad) + 1
        status = decode_message(recv_until(sub, counted, 10.0)[1])
        c = status["counters"]
        assert c["accepted"] == sent + 1
        assert c["gaps"] == 1 and c["missing_frames"] == 3
        assert c["duplicates"] == 1
        reasons = c["rejected_by_reason"]
        for r in bad:
            assert reasons.get(r, 0) >= 1, r
        assert reasons["malformed"] == 2  # garbage bytes and the one-part message
        assert "Advisory only" in status["advisory"]
        assert status["lag_s"] >= 0.0
        events = [m for m in seen if m["kind"] == "event"]
        assert len(events) == 1
        assert events[0]["event"] == "gap" and events[0]["missing_frames"] == 3
        assert events[0]["seq"] == 53 and events[0]["t"] == pytest.approx(0.53)
    s = summarise_log(d.log_path)
    assert s["accepted"] == sent + 1 and s["samples"] == (sent + 1) * 10
    assert s["rejected"] == 1 + len(bad) + 1
    assert s["frames"] == s["accepted"] + s["rejected"]
    assert s["gaps"] == 1 and s["duplicates"] == 1
    assert s["verdicts_differ_from_recorded"] == 0
    assert s["records_by_kind"]["status"] >= 2
    assert not s["truncated_tail"] and s["corrupt_frames"] == 0


def test_record_frames_without_sockets_matches_inspect(tmp_path):
    cfg = load_config()
    msgs = []
    for i in range(30):
        f = SensorFrame("rig", i if i < 20 else i + 2, i * 0.01 if i < 20 else (i + 2) * 0.01,
                        1000.0, CH, block(i))
        t, p = encode_sensor_frame(f)
        msgs.append((t, p, f.t_end))
    msgs.insert(5, (b"sensor.rig", b"junk", 0.05))
    out = record_frames(msgs, cfg, tmp_path / "rig.wwlog")
    s = summarise_log(tmp_path / "rig.wwlog")
    for k in ("frames", "accepted", "samples", "gaps", "rejected", "missing_frames"):
        assert s[k] == out[k], k
    assert (s["frames"], s["gaps"], s["missing_frames"], s["rejected"]) == (31, 1, 2, 1)
    assert s["duration_s"] == pytest.approx(0.32)
    again = record_frames(msgs, cfg, tmp_path / "rig2.wwlog")
    assert again == {**out, "path": str(tmp_path / "rig2.wwlog")}
    assert (tmp_path / "rig.wwlog").read_bytes() == (tmp_path / "rig2.wwlog").read_bytes()


def _wingwatch(*args, **kw):
    return subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", *args], capture_output=True,
                          text=True, timeout=120, **kw)


def test_kill_9_of_the_daemon_then_inspect(tmp_path, cfg_path, zctx):
    cfg = load_config(cfg_path)
    logs = tmp_path / "logs"
    proc = subprocess.Popen([sys.executable, "-m", "wingwatch.daemon.cli", "run", "--config",
                             str(cfg_path), "--duration", "60"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(20.0), "the daemon did not subscribe"
        for i in range(400):
            pub.send(block(i))
            if i == 200:
                pub.sock.send_multipart([b"sensor.rig", b"\xc1"])
        one = encode_sensor_frame(SensorFrame("rig", 0, 0.0, 1000.0, CH, block(0)))
        rec_size = 24 + 2 + len(one[0]) + len(one[1])
        deadline = time.monotonic() + 20
        seg = None
        while time.monotonic() < deadline:  # wait until the recorder has 300 frames on disk
            segs = list(logs.glob("*/segment-*.wwlog"))
            if segs and segs[0].stat().st_size > 300 * rec_size + 4096:
                seg = segs[0]
                break
            time.sleep(0.05)
        assert seg is not None
        for i in range(400, 600):  # still sending while it dies
            pub.send(block(i))
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(10)
        pub.close()
    assert proc.returncode == -signal.SIGKILL
    res = _wingwatch("inspect", str(seg.parent), "--json")
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert s["corrupt_frames"] == 0
    assert s["accepted"] >= 250  # at least what had reached the disk (less status records)
    assert s["frames"] == s["accepted"] + s["rejected"]
    assert s["rejected"] == 1 and s["rejected_by_reason"] == {"malformed": 1}
    assert s["gaps"] == 0 and s["duplicates"] == 0  # loopback lost nothing before the kill
    assert s["samples"] == 10 * s["accepted"]
    for key in ("duration_s", "frames", "samples", "streams", "channels", "gaps", "duplicates",
                "rejected", "truncated_tail", "corrupt_frames"):
        assert key in s
    assert s["channels"] == list(CH) and s["streams"] == ["rig"]
    assert s["duration_s"] == pytest.approx(s["samples"] / 1000.0)


def test_daemon_behind_takes_batches_and_replays_identically(cfg, zctx):
    """Frames sent in bursts faster than the daemon handles them queue up; the daemon takes
    them in batches (Session.inbound_many), and the replay of its log, one batch size or
    another, reproduces every recorded decision byte for byte."""
    from test_identifier import frames, motion, outputs

    from wingwatch.daemon.replay import compare_outputs, recorded_outputs, replay_log

    n = 30000  # 30 s at 1 kHz: slow updates, models accepted
    alpha, ad, add = motion(n, seed=4)
    msgs = list(frames(alpha, outputs(alpha, ad, add), noise=1e-3))
    d = Daemon(cfg)
    sizes: list[int] = []
    many = d.session.inbound_many

    def spy(messages, t_recv):
        sizes.append(len(messages))
        return many(messages, t_recv)

    d.session.inbound_many = spy
    with running(d, cfg, zctx, b"ww.status", 60) as (sub, pub):
        for i, (topic, payload) in enumerate(msgs):
            pub.send_raw(topic, payload)
            if i % 200 == 199:
                time.sleep(0.05)  # bursts of 200 frames (2 s of data), below the queue limits
        recv_until(sub, lambda p: decode_message(p[1])["counters"]["frames"] >= len(msgs), 30.0)
    assert max(sizes) > 1 and sum(sizes) == len(msgs)
    rec = recorded_outputs(d.log_path)
    assert sum(1 for o in rec if o.topic.startswith(b"ww.model")) >= 3
    assert compare_outputs(rec, replay_log(d.log_path).outputs) is None
