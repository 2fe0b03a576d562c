"""Pipeline: the decisions depend on the samples, never on how the source cut them into frames.

The same samples sent as frames of 10, 7 or 100 samples, or of random sizes, must give the same
model, warning and watch messages byte for byte (DEVELOPERS.md, "Blocks by sample count"), and
so must the batched replay path (:meth:`Session.inbound_many`). The sample rate is declared as
1024 Hz so that every frame's start time and every sample time is an exact binary fraction
whatever the cut; at 1000 Hz ``t0 + i / rate`` rounds differently for different cuts and only
the time stamps would differ.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.signal

from wingwatch.daemon.codec import SensorFrame, decode_message, encode_sensor_frame
from wingwatch.daemon.config import StreamSpec, load_config
from wingwatch.daemon.pipeline import Session
from wingwatch.daemon.service import make_pipeline

RATE = 1024.0
BASE = load_config()
CFG = dataclasses.replace(BASE, streams={
    "rig": StreamSpec(name="rig", rate_hz=RATE, channels=BASE.streams["rig"].channels)})


def _raw(n: int, seed: int = 3) -> np.ndarray:
    """Raw channels of a pitching plate (invented demo plant: a lagged lift, a 4 Hz mode)."""
    rng = np.random.default_rng(seed)
    b, a = scipy.signal.butter(4, 3.0, fs=RATE)
    u = scipy.signal.lfilter(b, a, rng.standard_normal(n))
    alpha = np.radians(5.0) + np.radians(1.0) * u / u.std()
    bl, al = scipy.signal.butter(2, 4.0, fs=RATE)
    lift = 0.5 + 3.5 * scipy.signal.lfilter(bl, al, alpha - alpha[0]) + 1e-3 * rng.standard_normal(n)
    kappa = 0.9 + 9.0 * (alpha - alpha[0]) + 1e-2 * rng.standard_normal(n)
    ch = CFG.channels
    q = 80.0 + 0.5 * rng.standard_normal(n)
    S, t = CFG.outputs.lift.reference_area_m2, CFG.outputs.curvature.thickness_m
    si = {"pitch_enc": alpha, "balance_lift": lift * q * S, "q_pitot": q,
          "strain_root": kappa * t / 2, "strain_mid": kappa * t / 4}
    return np.column_stack([(si[c] - ch[c].offset) / ch[c].gain
                            for c in CFG.streams["rig"].channels])


def _messages(raw: np.ndarray, cuts: list[int], gap_after: int | None = None):
    """Frames of the given sizes (cycled); optionally with the samples of 0.25 s after sample
    ``gap_after`` lost (a time gap: the frame after it starts later)."""
    spans = [(0, raw.shape[0])]
    if gap_after is not None:
        spans = [(0, gap_after), (gap_after + int(0.25 * RATE), raw.shape[0])]
    msgs, seq, k = [], 0, 0
    for lo, hi in spans:
        i = lo
        while i < hi:
            m = min(int(cuts[k % len(cuts)]), hi - i)
            k += 1
            f = SensorFrame("rig", seq, i / RATE, RATE, CFG.streams["rig"].channels, raw[i:i + m])
            msgs.append(encode_sensor_frame(f))
            i += m
            seq += 1
    return msgs


def _decisions(msgs, batched: bool = False, verdicts: list | None = None) -> list[bytes]:
    out: list[tuple[bytes, bytes]] = []
    s = Session(make_pipeline(CFG, None), sink=lambda t, p: out.append((t, p)))
    if batched:
        got = s.inbound_many([[t, p] for t, p in msgs], [0.0] * len(msgs))
    else:
        got = [s.inbound([t, p], 0.0) for t, p in msgs]
    if verdicts is not None:
        verdicts.extend(v.outcome for v in got)
    # Events describe the frames (their sequence numbers), so they differ with the cut; every
    # decision (model, warning, watch) must not.
    return [p for t, p in out if not t.startswith(b"ww.event")]


@pytest.fixture(scope="module")
def raw():
    return _raw(int(36 * RATE))


def test_frame_cuts_do_not_change_any_decision(raw):
    ref = _decisions(_messages(raw, [10]))
    kinds = [decode_message(p)["kind"] for p in ref]
    assert kinds.count("model") >= 4 and "watch" in kinds  # the comparison has substance
    rng = np.random.default_rng(0)
    assert _decisions(_messages(raw, [7])) == ref
    assert _decisions(_messages(raw, [100])) == ref
    assert _decisions(_messages(raw, list(rng.integers(1, 160, 50)))) == ref


def test_frame_cuts_around_a_gap_do_not_change_any_decision(raw):
    gap = int(14.3 * RATE)
    ref = _decisions(_messages(raw, [10], gap_after=gap))
    assert _decisions(_messages(raw, [33], gap_after=gap)) == ref
    assert _decisions(_messages(raw, [10], gap_after=gap), batched=True) == ref


def test_batched_inbound_equals_one_message_at_a_time(raw):
    rng = np.random.default_rng(5)
    msgs = _messages(raw, list(rng.integers(1, 160, 50)))
    # a duplicate and an out-of-order frame inside a batch are judged one by one as before
    msgs.insert(300, msgs[299])
    msgs.insert(500, msgs[100])  # older than the 256 frames ingest remembers
    v_one: list[str] = []
    v_batch: list[str] = []
    one = _decisions(msgs, verdicts=v_one)
    assert _decisions(msgs, batched=True, verdicts=v_batch) == one
    assert v_batch == v_one and "duplicate" in v_one and "out_of_order" in v_one
