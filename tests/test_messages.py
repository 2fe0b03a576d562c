"""Every outbound message type, as published by the daemon's pipeline, read back with a plain
msgpack reader (no wingwatch code), arrays decoded by hand from their dtype/shape/data maps."""

from __future__ import annotations

import msgpack
import numpy as np

from test_identifier import frames, motion, outputs
from wingwatch.daemon.codec import encode_snapshot
from wingwatch.daemon.config import load_config
from wingwatch.daemon.pipeline import Session
from wingwatch.daemon.service import make_pipeline


def _plain_arrays(obj, found):
    if isinstance(obj, dict):
        if set(obj) == {"dtype", "shape", "data"}:
            a = np.frombuffer(obj["data"], dtype=np.dtype(obj["dtype"])).reshape(obj["shape"])
            found.append(a)
            return
        for v in obj.values():
            _plain_arrays(v, found)
    elif isinstance(obj, list):
        for v in obj:
            _plain_arrays(v, found)


def test_every_message_type_reads_with_plain_msgpack():
    cfg = load_config()
    alpha, ad, add = motion(30000, bandwidth=5.0)
    y = outputs(alpha, ad, add)
    msgs = list(frames(alpha, y))
    msgs.insert(2000, msgs[1999])  # a duplicate and, below, a gap: an event
    del msgs[2500]
    got: dict[bytes, list[bytes]] = {}
    s = Session(make_pipeline(cfg), sink=lambda t, p: got.setdefault(t, []).append(p))
    for m in msgs:
        s.inbound(list(m), 0.0)
    s.status(1000.0)
    assert {b"ww.model", b"ww.watch", b"ww.event", b"ww.status"} <= set(got)
    for topic, payloads in got.items():
        for p in payloads:
            m = msgpack.unpackb(p, raw=False)  # the plain reader
            assert m["v"] == 1 and topic.decode().endswith(m["kind"])
            assert isinstance(m["pub_seq"], int)
    model = msgpack.unpackb(got[b"ww.model"][-1], raw=False)
    arrays = []
    _plain_arrays({"A": model["A"], "B": model["B"], "C": model["C"]}, arrays)
    A, B, C = arrays
    # the state holds the identified transient (rank) and, when the circulatory-lag prior is
    # on (the shipped configuration), its lag states after it (docs/protocol.md)
    lag = model.get("lift_lag")
    r = model["rank"] + (lag["states"] if lag else 0)
    assert A.shape == (r, r) and B.shape == (r, 1) and C.shape == (2, r)
    assert np.all(np.isfinite(A))
    watch = msgpack.unpackb(got[b"ww.watch"][-1], raw=False)
    assert {"margin", "drift", "stale", "sensors"} <= set(watch)
    # the snapshot reply too: one plain read gives the model in service and the status
    snap = msgpack.unpackb(encode_snapshot(s.last.model, list(s.last.warnings.values()),
                                           s.last.status), raw=False)
    assert snap["kind"] == "snapshot" and snap["status"]["kind"] == "status"
    if snap["model"] is not None:
        assert snap["model"]["status"] in ("accepted", "reference")
