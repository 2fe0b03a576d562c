"""Ingest stage: sequence rules, stream checks, counting and once-per-burst logging."""

from __future__ import annotations

import logging

import numpy as np
import pytest

from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame
from wingwatch.daemon.config import load_config
from wingwatch.daemon.ingest import Ingest

CFG = load_config()
CH = CFG.streams["rig"].channels


def msg(seq, t0=None, n=10, stream="rig", channels=CH, rate=1000.0, value=0.0):
    t0 = seq * n / rate if t0 is None else t0
    f = SensorFrame(stream, seq, t0, rate, tuple(channels), np.full((n, len(channels)), value))
    return encode_sensor_frame(f)


def outcomes(ing, msgs):
    return [ing.update(*m).outcome for m in msgs]


def test_in_order_stream_is_accepted_and_counted():
    ing = Ingest(CFG)
    assert outcomes(ing, [msg(i) for i in range(20)]) == ["accepted"] * 20
    assert ing.counters["samples"] == 200 and ing.counters["gaps"] == 0


def test_gap_duplicate_out_of_order():
    ing = Ingest(CFG)
    got = outcomes(ing, [msg(0), msg(1), msg(4), msg(4), msg(2), msg(1), msg(5)])
    assert got == ["accepted", "accepted", "accepted", "duplicate", "out_of_order", "duplicate",
                   "accepted"]
    c = ing.counters
    assert (c["gaps"], c["missing_frames"], c["duplicates"], c["out_of_order"]) == (1, 2, 2, 1)
    assert c["rejected"] == 3 and c["frames"] == 7


def test_gap_verdict_carries_the_discontinuity():
    ing = Ingest(CFG)
    ing.update(*msg(0))
    v = ing.update(*msg(3))
    assert v.accepted and v.gap_frames == 2 and v.discontinuity


def test_clock_backwards_and_time_gap():
    ing = Ingest(CFG)
    ing.update(*msg(0))
    back = ing.update(*msg(1, t0=0.005))  # starts inside the previous frame (ends at 0.010)
    assert back.outcome == "clock_backwards"
    jump = ing.update(*msg(1, t0=0.5))
    assert jump.accepted and jump.time_gap_s == pytest.approx(0.49)
    assert ing.counters["time_gaps"] == 1 and ing.counters["gaps"] == 1


def test_source_restart_is_a_discontinuity_not_a_duplicate():
    ing = Ingest(CFG)
    for i in range(5):
        ing.update(*msg(i))
    v = ing.update(*msg(0, t0=100.0))  # sequence reset, clock jumped: a new source session
    assert v.accepted and v.restart
    assert ing.update(*msg(1, t0=100.01)).accepted
    assert ing.update(*msg(0, t0=100.0)).outcome == "duplicate"  # the same frame again
    assert ing.counters["restarts"] == 1


@pytest.mark.parametrize(
    "kw, reason",
    [
        ({"stream": "tunnel2"}, "unknown_stream"),
        ({"channels": CH[::-1]}, "channel_mismatch"),
        ({"rate": 2000.0}, "rate_mismatch"),
    ],
)
def test_stream_checks(kw, reason):
    ing = Ingest(CFG)
    assert ing.update(*msg(0, **kw)).outcome == reason
    assert ing.rejected_by_reason == {reason: 1}


def test_nan_frame_rejected_and_stream_continues():
    ing = Ingest(CFG)
    ing.update(*msg(0))
    assert ing.update(*msg(1, value=np.nan)).outcome == "non_finite"
    v = ing.update(*msg(2))
    assert v.accepted and v.gap_frames == 1  # the rejected frame left a hole, said as a gap


def test_wrong_part_count_rejected():
    ing = Ingest(CFG)
    assert ing.update(*msg(0), parts_ok=False).outcome == "malformed"


def test_burst_logged_once_then_summarised(caplog):
    ing = Ingest(CFG)
    ing.update(*msg(0))
    with caplog.at_level(logging.WARNING, logger="wingwatch.ingest"):
        for _ in range(50):
            ing.update(b"sensor.rig", b"\xc1")
        ing.update(*msg(1))
    lines = [r.getMessage() for r in caplog.records]
    first = CFG.limits.max_burst_log
    assert sum("frame rejected (malformed)" in m for m in lines) == first
    assert any(f"{50 - first} more frames rejected for malformed" in m for m in lines)
    assert len(lines) == first + 2


def test_state_dict_round_trip_continues_identically():
    a = Ingest(CFG)
    for i in (0, 1, 3):
        a.update(*msg(i))
    b = Ingest(CFG)
    b.load_state_dict(a.state_dict())
    assert b.state_dict() == a.state_dict()
    for m in (msg(3), msg(2), msg(4), msg(9)):
        assert a.update(*m) .outcome == b.update(*m).outcome
    assert a.state_dict() == b.state_dict()


def test_reset_equals_fresh():
    a = Ingest(CFG)
    for i in (0, 2, 2):
        a.update(*msg(i))
    a.reset()
    assert a.state_dict() == Ingest(CFG).state_dict()
