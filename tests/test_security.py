"""Access control: CurveZMQ on every daemon socket; unlisted or keyless peers get nothing."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import zmq

from conftest import write_config
from wingwatch.clients.feed import ModelFeed
from wingwatch.clients.publisher import FramePublisher
from wingwatch.daemon.config import load_config
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.security import client_curve_options, make_keys
from wingwatch.daemon.service import Daemon

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


@pytest.fixture
def secured(tmp_path):
    keys = tmp_path / "keys"
    make_keys(keys, ["rig", "controller"])
    outsider = tmp_path / "outsider"
    make_keys(outsider, ["intruder"])  # a valid key pair, but not on the daemon's allow-list
    cfg = load_config(write_config(tmp_path, f"""
[security]
curve = true
server_key = "{(keys / 'daemon.key_secret').as_posix()}"
allowed_clients = "{(keys / 'allowed').as_posix()}"
"""))
    return cfg, keys, outsider


def test_only_listed_clients_get_in(secured, zctx):
    cfg, keys, outsider = secured
    d = Daemon(cfg, record=False, context=zctx)
    th = threading.Thread(target=d.run, kwargs={"duration_s": 30}, daemon=True)
    th.start()
    server_pub = keys / "daemon.key"
    good = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx,
                          curve=client_curve_options(keys / "rig.key_secret", server_pub))
    plain = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx,
                           start_seq=10_000, t0=100.0)
    intruder = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx,
                              curve=client_curve_options(outsider / "intruder.key_secret", server_pub),
                              start_seq=20_000, t0=200.0)
    feed = ModelFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, context=zctx,
                     heartbeat_period_s=cfg.status_period_s,
                     curve=client_curve_options(keys / "controller.key_secret", server_pub))
    eaves = zctx.socket(zmq.SUB)  # no keys at all
    eaves.setsockopt(zmq.LINGER, 0)
    eaves.setsockopt(zmq.SUBSCRIBE, b"")
    eaves.connect(cfg.endpoints.publish)
    try:
        assert good.wait_ready(5)
        assert not plain.wait_ready(1.0)  # never subscribed to: the handshake never completes
        assert not intruder.wait_ready(1.0)
        for i in range(20):
            good.send(np.ones((10, 5)))
            plain.send(np.ones((10, 5)))
            intruder.send(np.ones((10, 5)))
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and d.session.pipeline.ingest.counters["accepted"] < 20:
            feed.poll(0.05)
        time.sleep(0.5)
        feed.poll(0.1)
        assert d.session.pipeline.ingest.counters["frames"] == 20  # only the listed source's
        assert feed.last_heartbeat is not None and feed.snapshots == 1  # listed reader: served
        assert not eaves.poll(500)  # the keyless subscriber received nothing at all
    finally:
        d.stop()
        th.join(5)
        for c in (good, plain, intruder, feed):
            c.close()
        eaves.close()
        d.close()
    assert d.curve is None  # closed
    st = d.session.last.status
    from wingwatch.daemon.codec import decode_message

    assert decode_message(st)["auth_refused"] >= 1  # refused handshakes are counted


def test_missing_keys_are_a_clear_error(tmp_path):
    cfg = load_config(write_config(tmp_path, f"""
[security]
curve = true
server_key = "{(tmp_path / 'none.key_secret').as_posix()}"
allowed_clients = "{tmp_path.as_posix()}"
"""))
    with pytest.raises(ConfigError, match="none.key_secret.*wingwatch keys"):
        Daemon(cfg, record=False)


def test_keys_command_makes_pairs_and_refuses_overwrite(tmp_path):
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "keys", "--dir",
                        str(tmp_path / "k"), "--client", "rig", "--json"], capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    made = json.loads(r.stdout)
    assert set(made["keys"]) == {"daemon", "rig"}
    assert sorted(p.name for p in (tmp_path / "k" / "allowed").iterdir()) == ["rig.key"]
    again = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "keys", "--dir",
                            str(tmp_path / "k"), "--client", "rig"], capture_output=True, text=True,
                           timeout=60)
    assert again.returncode == 2 and "exists already" in again.stderr


def test_curve_allows_non_loopback_without_insecure(secured):
    from wingwatch.daemon.service import check_binds
    import dataclasses

    cfg, _, _ = secured
    wide = dataclasses.replace(cfg, endpoints=dataclasses.replace(cfg.endpoints, sensor="tcp://0.0.0.0:1"))
    check_binds(wide, insecure=False)  # encrypted and authenticated: allowed
    plain = dataclasses.replace(wide, security=dataclasses.replace(cfg.security, curve=False))
    with pytest.raises(ConfigError, match="--insecure"):
        check_binds(plain, insecure=False)
