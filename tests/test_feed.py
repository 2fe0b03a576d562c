"""Model and warning feeds over loopback: late joiners, feed loss, slow subscribers, and the
snapshot socket's handling of bad requests."""

from __future__ import annotations

import threading
import time

import msgpack
import numpy as np
import pytest
import scipy.signal
import zmq

from conftest import recv_until
from wingwatch.clients.feed import ModelFeed, ModelUpdate, WarningFeed
from wingwatch.clients.publisher import FramePublisher
from wingwatch.daemon.pipeline import Output
from wingwatch.daemon.service import Daemon

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


class ScriptedStage:
    """Emits a model on chosen blocks and a warning raise/clear: stands in for identification."""

    def __init__(self, model_every=None, model_at=(0,), payload_kb=0):
        self.model_every, self.model_at, self.payload_kb = model_every, set(model_at), payload_kb
        self.reset()

    def reset(self):
        self.n = 0
        self.seq = 0

    def samples_to_boundary(self, discontinuity=False):
        return 10  # one step per 10 samples (one frame here), however the daemon batches frames

    def update(self, block):
        out = []
        if self.n in self.model_at or (self.model_every and self.n % self.model_every == 0):
            self.seq += 1
            out.append(Output("model", {
                "model_id": f"m{self.seq}", "seq": self.seq, "t": float(block.t[0]), "dt": 1e-3,
                "rank": 2, "status": "accepted", "A": np.diag([0.9, 0.8]), "B": np.ones((2, 1)),
                "C": np.eye(2), "pad": b"x" * (1024 * self.payload_kb)}))
        if self.n == 3:
            out.append(Output("warning", {"warning_id": "w1", "event": "raised", "t": float(block.t[0])}))
            out.append(Output("warning", {"warning_id": "w2", "event": "raised", "t": float(block.t[0])}))
        if self.n == 5:
            out.append(Output("warning", {"warning_id": "w1", "event": "cleared", "t": float(block.t[0])}))
        self.n += 1
        return out

    def state_dict(self):
        return {"n": self.n, "seq": self.seq}

    def load_state_dict(self, s):
        self.n, self.seq = s["n"], s["seq"]


def start(cfg, stage, zctx):
    d = Daemon(cfg, record=False, context=zctx)
    d.session.pipeline.stages.append(stage)
    th = threading.Thread(target=d.run, kwargs={"duration_s": 60}, daemon=True)
    th.start()
    return d, th


def poll_until(feed, pred, timeout_s=5.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        feed.poll(0.02)
        if pred():
            return True
    return False


def test_late_joiner_gets_model_and_warnings_from_snapshot(cfg, zctx):
    d, th = start(cfg, ScriptedStage(model_at=(0,)), zctx)
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(5)
        for i in range(8):
            pub.send(np.ones((10, 5)))
        time.sleep(0.3)  # the one model and the warnings are long published when the feeds join
        feed = ModelFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, heartbeat_period_s=0.2,
                         context=zctx)
        wfeed = WarningFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, context=zctx)
        assert poll_until(feed, lambda: feed.model is not None)
        assert feed.snapshots == 1 and feed.model.model_id == "m1"
        assert feed.model.A.shape == (2, 2) and feed.model.status == "accepted"
        assert poll_until(wfeed, lambda: wfeed.snapshots == 1)
        assert set(wfeed.active) == {"w2"}  # w1 was raised and cleared before it joined
        assert feed.sample_age_s == pytest.approx(0.08 - 0.0, abs=0.011)
        feed.close()
        wfeed.close()
    finally:
        d.stop()
        th.join(5)
        pub.close()
        d.close()


def test_killed_daemon_is_reported_lost_within_three_periods(cfg, zctx):
    d, th = start(cfg, ScriptedStage(model_at=()), zctx)
    feed = ModelFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, context=zctx,
                     heartbeat_period_s=cfg.status_period_s, lost_after=3)
    events = []
    feed.on_lost(events.append)
    try:
        assert poll_until(feed, lambda: feed.last_heartbeat is not None)
        assert not feed.lost
        d.stop()
        th.join(5)
        stopped = time.monotonic()
        assert poll_until(feed, lambda: feed.lost, timeout_s=10 * cfg.status_period_s)
        # the last heartbeat is the 'final' one sent at stop; loss must be declared within
        # three periods of it (plus one period of polling slack)
        assert time.monotonic() - stopped <= 3 * cfg.status_period_s + 0.5  # 0.5 s: polling slack under load
        assert events == [True]
    finally:
        feed.close()
        d.close()


def test_subscriber_that_never_reads_does_not_slow_ingest(tmp_path, zctx):
    from conftest import write_config
    from wingwatch.daemon.config import load_config

    cfg = load_config(write_config(tmp_path, "[publish]\nsndhwm = 50\n"))
    d, th = start(cfg, ScriptedStage(model_every=1, payload_kb=64), zctx)
    lazy = ModelFeed(cfg.endpoints.publish, None, context=zctx, rcvhwm=2)  # polled only at the end
    watcher = zctx.socket(zmq.SUB)
    watcher.setsockopt(zmq.LINGER, 0)
    watcher.setsockopt(zmq.SUBSCRIBE, b"ww.status")
    watcher.connect(cfg.endpoints.publish)
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(5)
        time.sleep(0.2)  # let both subscribers' subscriptions reach the daemon
        n = 1500
        for i in range(n):
            pub.send(np.ones((10, 5)))
        from wingwatch.daemon.codec import decode_message

        st = decode_message(recv_until(
            watcher, lambda p: decode_message(p[1])["counters"]["accepted"] >= n, 30)[1])
        # every frame taken: 1500 models of 64 kB went out while one subscriber read nothing
        assert st["counters"]["accepted"] == n
        # Catch up: read what the queues held (the first few dozen models only) until no
        # more models come for 0.5 s (heartbeats keep coming). One poll is not enough: with a
        # receive queue of two, the rest is still in the sockets' buffers, the daemon's queue
        # toward this subscriber stays full, and a model published meanwhile is dropped.
        quiet_since, deadline, last = time.monotonic(), time.monotonic() + 20.0, None
        while time.monotonic() - quiet_since < 0.5 and time.monotonic() < deadline:
            lazy.poll(0.05)
            if lazy.model is not last:
                last, quiet_since = lazy.model, time.monotonic()
        assert lazy.model is not None and lazy.model.seq < n  # the newest models were lost
        pub.send(np.ones((10, 5)))  # one more model, after the gap: it must get through
        assert poll_until(lazy, lambda: lazy.model is not None and lazy.model.seq == n + 1,
                          timeout_s=20.0)  # generous: the machine may be busy
        # the stalled subscriber lost most models and knows how many, from the gap in pub_seq
        assert lazy.missed >= 1000
    finally:
        d.stop()
        th.join(5)
        pub.close()
        lazy.close()
        watcher.close()
        d.close()


def test_snapshot_socket_answers_bad_requests_and_plain_msgpack(cfg, zctx):
    d, th = start(cfg, ScriptedStage(model_at=()), zctx)
    req = zctx.socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.connect(cfg.endpoints.snapshot)
    try:
        for bad in (b"\xc1", msgpack.packb({"v": 1, "want": "everything"}), msgpack.packb([1])):
            req.send(bad)
            assert req.poll(5000)
            m = msgpack.unpackb(req.recv(), raw=False)
            assert m["kind"] == "error" and m["reason"] in ("malformed", "bad_field")
        req.send(msgpack.packb({"v": 1, "want": "snapshot"}))
        assert req.poll(5000)
        m = msgpack.unpackb(req.recv(), raw=False)  # a plain msgpack reader is enough
        assert m["kind"] == "snapshot" and m["model"] is None and m["warnings"] == []
    finally:
        req.close()
        d.stop()
        th.join(5)
        d.close()
    assert d.snapshot_rejected == 3 and d.snapshot_requests == 1


def test_continuous_time_model_matches_scipy_zoh():
    # Reference: scipy.signal.cont2discrete with zero-order hold (general-purpose library).
    Ac = np.array([[0.0, 1.0], [-(2 * np.pi * 5) ** 2, -2 * 0.05 * 2 * np.pi * 5]])
    Bc = np.array([[0.0], [1.0]])
    C = np.array([[1.0, 0.0]])
    Ad, Bd, *_ = scipy.signal.cont2discrete((Ac, Bc, C, np.zeros((1, 1))), 1e-3, method="zoh")
    m = ModelUpdate.from_message({"A": Ad, "B": Bd, "C": C, "dt": 1e-3, "rank": 2}, 0.0)
    A2, B2, C2 = m.continuous()
    np.testing.assert_allclose(A2, Ac, rtol=1e-8, atol=1e-6)
    np.testing.assert_allclose(B2, Bc, rtol=1e-8, atol=1e-9)
