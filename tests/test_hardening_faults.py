"""Hardening: faults while running. A source that restarts, a log disk that fills up and comes
back, subscribers that hang or vanish, and the publish socket rebound by a new daemon."""

from __future__ import annotations

import errno
import os
import threading
import time

import numpy as np
import pytest
import zmq

from conftest import free_port, recv_until
from wingwatch.clients.feed import ModelFeed
from wingwatch.clients.publisher import FramePublisher
from wingwatch.daemon import recorder as recmod
from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.codec import SensorFrame, decode_message, encode_message, encode_sensor_frame
from wingwatch.daemon.ingest import Ingest
from wingwatch.daemon.pipeline import Output
from wingwatch.daemon.service import Daemon

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


def block(i, n=10):
    return np.random.default_rng(i).normal(size=(n, 5)) + np.array([2.0, 1.0, 45.0, 300.0, 100.0])


def _sub(zctx, endpoint, prefix=b"ww."):
    s = zctx.socket(zmq.SUB)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.SUBSCRIBE, prefix)
    s.connect(endpoint)
    return s


def _status_when(sock, pred, timeout_s=10.0):
    def ok(parts):
        m = decode_message(parts[1])
        return m["kind"] == "status" and pred(m)
    return decode_message(recv_until(sock, ok, timeout_s)[1])


def _start(d):
    th = threading.Thread(target=d.run, kwargs={"duration_s": 60}, daemon=True)
    th.start()
    return th


# ----------------------------------------------------------------------------------------------
# Source restart


def test_source_restart_is_an_event_counted_and_ingest_goes_on(cfg, zctx):
    d = Daemon(cfg, context=zctx)
    sub = _sub(zctx, cfg.endpoints.publish)
    th = _start(d)
    events = []
    try:
        first = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
        assert first.wait_ready(5)
        for i in range(100):
            first.send(block(i))
        _status_when(sub, lambda m: m["counters"]["accepted"] >= 100)
        first.close()
        # the source comes back with its sequence at 0 and its clock reset to 0 as well (same
        # seq and t0 as the first frame 0, other samples), then once more with a clock jump
        again = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
        assert again.wait_ready(5)
        for i in range(50):
            again.send(block(1000 + i))
        # all of them in before the next source connects: two connected sources are
        # fair-queued, so a late frame of this one could otherwise arrive after the jump
        def in_150(parts):
            m = decode_message(parts[1])
            if m["kind"] == "event":
                events.append(m)
            return m["kind"] == "status" and m["counters"]["accepted"] + m["counters"]["rejected"] >= 150
        recv_until(sub, in_150, 10)
        again.close()
        jumped = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx,
                                t0=86_400.0)
        assert jumped.wait_ready(5)
        for i in range(50):
            jumped.send(block(2000 + i))

        def seen(parts):
            m = decode_message(parts[1])
            if m["kind"] == "event":
                events.append(m)
            return m["kind"] == "status" and m["counters"]["accepted"] >= 200
        st = decode_message(recv_until(sub, seen, 10)[1])
        jumped.close()
    finally:
        d.stop()
        th.join(10)
        sub.close(linger=0)
        d.close()
    c = st["counters"]
    assert c["accepted"] == 200 and c["rejected"] == 0 and c["restarts"] == 2
    assert c["duplicates"] == 0 and c["gaps"] == 0
    assert [(e["event"], e["seq"], e["t"]) for e in events] == [("restart", 0, 0.0),
                                                                ("restart", 0, 86_400.0)]
    recs = list(rl.LogReader.open(d.log_path))
    assert sum(r.kind == rl.KIND_INBOUND for r in recs) == 200
    logged = [decode_message(r.payload) for r in recs if r.kind == rl.KIND_EVENT]
    assert [e["event"] for e in logged] == ["restart", "restart"]


def test_restart_with_the_same_t0_versus_a_resent_frame_zero(cfg):
    # Regression: a frame 0 with the same t0 as the accepted frame 0 was always a 'duplicate',
    # so a source that restarted within 256 frames with its clock reset lost every frame up to
    # its old sequence number. Now only a byte-identical frame 0 is a duplicate.
    ing = Ingest(cfg)

    def msg(seq, salt):
        return encode_sensor_frame(SensorFrame("rig", seq, seq * 0.01, 1000.0, CH, block(salt)))
    for s in range(5):
        assert ing.update(*msg(s, s)).accepted
    assert ing.update(*msg(0, 0)).outcome == "duplicate"  # the very same bytes again
    v = ing.update(*msg(0, 99))  # a new frame 0: the source restarted
    assert v.accepted and v.restart
    assert ing.update(*msg(1, 100)).accepted  # and the new session goes on in order
    assert ing.counters["restarts"] == 1 and ing.counters["duplicates"] == 1
    st = ing.state_dict()
    other = Ingest(cfg)
    other.load_state_dict(st)
    assert other.state_dict() == st
    assert other.update(*msg(0, 99)).outcome == "duplicate"  # frame 0 remembered across restore


# ----------------------------------------------------------------------------------------------
# Disk full / unwritable


class _FullDisk:
    """Stands in for the ``os`` module inside daemon/recorder.py: writes fail while ``on``."""

    def __init__(self):
        self.on = False
        self.failed = 0

    def __getattr__(self, name):
        return getattr(os, name)

    def write(self, fd, data):
        if self.on:
            self.failed += 1
            raise OSError(errno.ENOSPC, "No space left on device")
        return os.write(fd, data)


def test_disk_full_mid_run_is_reported_counted_and_recovered(cfg, zctx, monkeypatch, caplog):
    disk = _FullDisk()
    monkeypatch.setattr(recmod, "os", disk)  # only the recorder's writes; nothing else in the process
    d = Daemon(cfg, context=zctx)
    d.recorder.backlog_bytes = 30_000  # a small queue, so that some records must be dropped
    sub = _sub(zctx, cfg.endpoints.publish, b"ww.")
    th = _start(d)
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    emitted: dict[str, int] = {}  # per kind: how many the daemon has published (from pub_seq)

    def _status_when(sock, pred, timeout_s=10.0):
        found = []

        def ok(parts):
            m = decode_message(parts[1])
            if m["kind"] == "status" and pred(m):
                m["_others"] = sum(n for k, n in emitted.items() if k != "status")
                found.append(m)
                return True
            emitted[m["kind"]] = m["pub_seq"] + 1
            return False
        recv_until(sock, ok, timeout_s)
        return found[0]

    def adds_up(m):
        # every record the session handed the recorder before this heartbeat is on disk, queued
        # or counted as dropped: inbound frames, the heartbeats before this one, other outputs
        r = m["recorder"]
        return r["records"] + r["backlog_records"] + r["dropped_records"] == \
            m["counters"]["frames"] + m["pub_seq"] + m["_others"]
    try:
        assert pub.wait_ready(5)
        for i in range(50):
            pub.send(block(i))
        healthy = _status_when(sub, lambda m: m["counters"]["accepted"] >= 50)
        assert healthy["recorder"]["failing"] is False, healthy
        assert adds_up(healthy), (healthy["recorder"], healthy["pub_seq"], healthy["counters"]["frames"])
        with caplog.at_level("WARNING", logger="wingwatch.recorder"):
            disk.on = True
            for i in range(50, 250):
                pub.send(block(i))
            bad = _status_when(sub, lambda m: m["counters"]["accepted"] >= 250)
            bad2 = _status_when(sub, lambda m: True)
            assert bad["recorder"]["failing"] is True
            assert "No space left on device" in bad["recorder"]["last_error"]
            assert bad["recorder"]["backlog_records"] > 0 and bad["recorder"]["dropped_records"] > 0
            assert adds_up(bad) and adds_up(bad2)
            assert bad["counters"]["accepted"] == 250  # ingest never waited for the disk
            disk.on = False
            for i in range(250, 300):
                pub.send(block(i))
            good = _status_when(sub, lambda m: m["counters"]["accepted"] >= 300
                                and not m["recorder"]["failing"])
        assert good["recorder"]["backlog_records"] == 0 and good["recorder"]["last_error"] == ""
        assert good["recorder"]["dropped_records"] >= bad2["recorder"]["dropped_records"] > 0
        assert adds_up(good)
        msgs = [r.getMessage() for r in caplog.records]
        assert any("cannot write the replay log" in m and "No space" in m for m in msgs)
        assert any("writing the replay log again" in m for m in msgs)
    finally:
        d.stop()
        th.join(10)
        pub.close()
        sub.close(linger=0)
        d.close()
    dropped = d.recorder.dropped
    segs = sorted(d.log_path.glob("*.wwlog"))
    assert all(s.stat().st_size > 0 for s in segs)  # no empty segment per failed attempt
    assert len(segs) == 2  # the one that failed and the one recovery opened
    reader = rl.LogReader.open(d.log_path)  # the whole run reads, across the failure
    recs = list(reader)
    assert not reader.corrupt
    assert len(recs) == d.recorder.records
    assert len(recs) + dropped == d.session.pipeline.ingest.counters["frames"] + d.session.outputs_sent
    seqs = [decode_message_seq(r.payload) for r in recs if r.kind == rl.KIND_INBOUND]
    # the queue keeps the oldest and refuses the newest: the hole is one run of frames
    assert seqs == sorted(seqs) and seqs[:50] == list(range(50)) and seqs[-50:] == list(range(250, 300))
    hole = sorted(set(range(300)) - set(seqs))
    assert hole and hole == list(range(hole[0], hole[-1] + 1))


def decode_message_seq(payload: bytes) -> int:
    import msgpack
    return msgpack.unpackb(payload, raw=False)["seq"]


# ----------------------------------------------------------------------------------------------
# Subscribers and the publish socket


class _ModelPerBlock:
    """A stand-in stage: one 128 kB model message per block (plenty to fill a slow queue)."""

    def reset(self):
        self.n = 0

    def __init__(self):
        self.reset()

    def samples_to_boundary(self, discontinuity=False):
        return 10  # one step per 10 samples (one frame here), however the daemon batches frames

    def update(self, blk):
        self.n += 1
        return [Output("model", {"model_id": f"m{self.n}", "seq": self.n, "status": "accepted",
                                 "t": float(blk.t[0]), "pad": b"x" * 131072})]

    def state_dict(self):
        return {"n": self.n}

    def load_state_dict(self, s):
        self.n = s["n"]


def _stop_all(running):
    while running:
        d, th = running.pop()
        d.stop()
        th.join(10)
        assert not th.is_alive()
        d.close()


def _drain(sock, kind, wait_ms=300):
    got = []
    while sock.poll(wait_ms):
        m = decode_message(sock.recv_multipart()[1])
        if m["kind"] == kind:
            got.append(m["pub_seq"])
        wait_ms = 50
    return got


def test_hung_and_vanished_subscribers_then_a_rebound_publish_socket(tmp_path, zctx):
    from conftest import write_config
    from wingwatch.daemon.config import load_config

    cfg = load_config(write_config(tmp_path, "[publish]\nsndhwm = 20\n"))
    a = Daemon(cfg, record=False, context=zctx)
    a.session.pipeline.stages.append(_ModelPerBlock())
    running = [(a, _start(a))]
    hung = zctx.socket(zmq.SUB)
    hung.setsockopt(zmq.LINGER, 0)
    hung.setsockopt(zmq.RCVHWM, 2)
    hung.setsockopt(zmq.SUBSCRIBE, b"ww.model")
    hung.connect(cfg.endpoints.publish)
    gone = _sub(zctx, cfg.endpoints.publish, b"ww.model")
    watcher = _sub(zctx, cfg.endpoints.publish, b"ww.status")
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(5)
        time.sleep(0.3)  # let the three subscriptions reach the daemon
        for i in range(300):
            pub.send(block(i))
            if i == 100:
                assert gone.poll(5000)
                gone.recv_multipart()
                gone.close(linger=0)  # this subscriber vanishes mid-stream
        for i in range(300, 600):
            pub.send(block(i))
        st = _status_when(watcher, lambda m: m["counters"]["accepted"] >= 600, 20)
        assert st["counters"]["accepted"] == 600 and st["counters"]["rejected"] == 0
        seen = _drain(hung, "model")  # what its queues held: the first models only
        pub.send(block(600))  # one more model, after the hole
        st = _status_when(watcher, lambda m: m["counters"]["accepted"] >= 601, 20)
        seen += _drain(hung, "model")
        # the hung subscriber lost models; pub_seq says exactly how many of those sent before
        # its last one
        assert seen and seen == sorted(seen) and seen[-1] >= 600
        missed = seen[-1] + 1 - len(seen)
        assert missed >= 500  # 41 or so arrived, of 601 or more

        # the daemon stops; a new one binds the same endpoints; the source and the watcher
        # were never told and reconnect by themselves
        _stop_all(running)
        b_born = time.time()
        # ZeroMQ closes a listening socket in its I/O thread, a moment after close() returns
        # (at once only when the context terminates, as when a daemon process exits): retry
        b = None
        deadline = time.monotonic() + 5
        while b is None:
            try:
                b = Daemon(cfg, record=False, context=zctx)
            except ConfigError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.05)
        running.append((b, _start(b)))
        # (the source's XPUB reports no new subscription: the prefix is one it already had;
        # frames sent before the new daemon's subscription arrives are dropped by ZeroMQ, so
        # probe until the new daemon has one)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            pub.send(block(0))
            if b.session.pipeline.ingest.counters["accepted"]:
                break
            time.sleep(0.05)
        time.sleep(0.2)  # the last probes arrive
        k = _status_when(watcher, lambda m: m["t_wall"] > b_born + 0.2, 20)["counters"]["accepted"]
        assert k >= 1
        for i in range(601, 701):
            pub.send(block(i))
        st_b = _status_when(watcher, lambda m: m["t_wall"] > b_born
                            and m["counters"]["accepted"] >= k + 100, 20)
        assert st_b["counters"]["accepted"] == k + 100
        assert st_b["counters"]["gaps"] == 0 and st_b["counters"]["rejected"] == 0
    finally:
        _stop_all(running)
        pub.close()
        for s in (hung, watcher):
            s.close(linger=0)
        if not gone.closed:
            gone.close(linger=0)


def test_feed_counts_drops_after_the_daemon_restarts(zctx):
    port = free_port()
    xpub = zctx.socket(zmq.XPUB)
    xpub.setsockopt(zmq.LINGER, 0)
    xpub.bind(f"tcp://127.0.0.1:{port}")
    feed = ModelFeed(f"tcp://127.0.0.1:{port}", None, context=zctx, heartbeat_period_s=1.0)
    try:
        assert xpub.poll(5000)
        xpub.recv()

        def send(n):
            xpub.send_multipart(list(encode_message("status", {"period_s": 1.0}, n)))
        for n in range(20):  # the first daemon's heartbeats 0..19
            send(n)
        for n in (0, 1, 5):  # a new daemon: 0, 1, then 2..4 lost on the way
            send(n)
        deadline = time.monotonic() + 5
        got = 0
        while got < 23 and time.monotonic() < deadline:
            got += feed.poll(0.05)
        assert got == 23
        assert feed.missed == 3
    finally:
        feed.close()
        xpub.close(linger=0)
