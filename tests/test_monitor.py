"""The terminal monitor: state from messages, the rendered screen at 80 and 120 columns, a replay
driven through it, and a loopback daemon read with ``--once``."""

from __future__ import annotations

import argparse
import io
import threading
import time

import numpy as np
import pytest
from rich.console import Console

from wingwatch.clients.monitor import (
    MonitorState,
    configure_parser,
    render,
    run,
    sparkline,
    trend_arrow,
)
from wingwatch.daemon.codec import TOPICS, SensorFrame, decode_message, encode_sensor_frame
from wingwatch.daemon.pipeline import Output, Pipeline

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")
HAVE_WATCH_TOPIC = "watch" in TOPICS  # ww.watch is in the protocol; the codec may not list it yet

REASON = "excitation 0.04 is below 0.10: too little input to trust this fit"
DRIFT_MSG = "Quasi-steady lift coefficient 6.1 % below its reference; check the flow speed."


def coefficients(qs_lift: float, qs_curv: float = 11.8) -> dict:
    return {"quasi_steady": {"lift": qs_lift, "curvature": qs_curv},
            "rate": {"lift": 1.52, "curvature": 0.31},
            "added_mass": {"lift": 0.0123, "curvature": 4.5e-4},
            "bias": {"lift": 0.0, "curvature": 0.0}}


def intervals(c: dict, rel: float = 0.01) -> dict:
    return {k: {o: [v - rel * abs(v), v + rel * abs(v)] for o, v in d.items()} for k, d in c.items()}


def model_body(seq: int, t: float, qs_lift: float, *, status: str = "accepted", reason: str = "",
               reference: dict | None = None, f1: float = 12.41, z1: float = 0.021) -> dict:
    c = coefficients(qs_lift)
    body = {"model_id": f"M{seq:06d}", "seq": seq, "status": status, "reason": reason, "t": t,
            "dt": 1e-3, "rank": 2, "input": "alpha_dot", "outputs": ["lift", "curvature"],
            "A": np.diag([0.9, 0.8]), "B": np.ones((2, 1)), "C": np.eye(2),
            "coefficients": c, "intervals": intervals(c),
            "modes": [{"id": 1, "freq_hz": f1, "damping": z1, "participation": [0.7, 0.3]},
                      {"id": 2, "freq_hz": 38.9, "damping": 0.034, "participation": [0.2, 0.8]}],
            "fit": {"lift": 0.041, "curvature": 0.063}, "excitation": 0.6,
            "hankel_sv": np.array([3.0, 1.0])}
    if reference is not None:
        body["reference"] = reference
    return body


def watch_body(t: float, now: float) -> dict:
    return {"t": t, "model_id": "M000004",
            "margin": {"limit": 2.0, "now": now, "predicted_min": 0.41, "time_to_limit_s": 3.5,
                       "horizon_s": 5.0, "band": 0.02, "allowable_alpha_deg": 9.7, "source": "hold"},
            "drift": {"quasi_steady.lift": {"z": -2.7, "cusum": 6.2, "threshold": 5.0}},
            "stale": {"statistic": 0.42, "threshold": 1.0},
            "sensors": {"strain_root": {"state": "ok", "detail": ""}}}


def warning_body(wid: str, event: str, t: float, level: str = "caution", message: str = DRIFT_MSG,
                 quantity: str = "quasi_steady.lift") -> dict:
    return {"warning_id": wid, "event": event, "level": level, "warning_kind": "coefficient_drift",
            "quantity": quantity, "value": 6.2, "threshold": 5.0, "t": t, "model_id": "M000004",
            "message": message, "advisory": "advisory only"}


def status_body(t_wall: float, t_sample: float, **over) -> dict:
    body = {"t_wall": t_wall, "uptime_s": 75.0, "t_sample": t_sample, "lag_s": 0.01, "period_s": 1.0,
            "counters": {"frames": 4120, "accepted": 4117, "samples": 41170, "rejected": 3,
                         "gaps": 2, "duplicates": 1},
            "rates": {"frames_per_s": 100.0, "samples_per_s": 1000.0, "rejected_per_s": 0.0},
            "recorder": {"path": "x", "records": 9, "bytes": 12_500_000, "segments": 1,
                         "failing": False, "backlog_records": 0, "dropped_records": 0,
                         "last_error": None}}
    body.update(over)
    return body


def wire(kind: str, body: dict, pub_seq: int) -> dict:
    """What a subscriber decodes: the body through the real codec."""
    return decode_message(Output(kind, body).encode(pub_seq)[1]) if kind in TOPICS else \
        {"v": 1, "kind": kind, "pub_seq": pub_seq, **body}


def text_of(state: MonitorState, width: int, height: int = 24, now: float = 1000.4) -> str:
    con = Console(record=True, width=width, height=height, file=io.StringIO())
    con.print(render(state, width=width, now=now, height=height))
    return con.export_text()


@pytest.fixture
def busy_state() -> MonitorState:
    ref = coefficients(5.71, 11.9)
    s = MonitorState()
    s.apply("status", wire("status", status_body(1000.0, 41.2), 0))
    for i in range(4):
        s.apply("model", wire("model", model_body(i + 1, 30.0 + 3 * i, 5.62 - 0.1 * i, reference=ref,
                                                  f1=12.41 - 0.05 * i), i))
    s.apply("model", wire("model", model_body(5, 41.0, 4.0, status="rejected", reason=REASON), 4))
    for i in range(5):
        s.apply("watch", wire("watch", watch_body(37.0 + i, 0.8 - 0.05 * i), i))
    s.apply("warning", wire("warning", warning_body("coefficient_drift:quasi_steady.lift", "raised",
                                                    39.0), 0))
    return s


# --------------------------------------------------------------------------------------------
# pure pieces


def test_sparkline_and_trend_follow_the_data():
    assert sparkline([3, 2, 1, 0], 4) == "█▆▃▁"
    assert sparkline(range(20), 5) == "▁▃▅▆█"  # only the newest five, scaled among themselves
    assert trend_arrow([12.4, 12.3, 12.2]) == "↓"
    assert trend_arrow([0.02, 0.02, 0.02]) == "→"


def test_state_counts_missed_messages_and_ignores_stale_snapshot():
    s = MonitorState()
    s.apply("model", wire("model", model_body(3, 10.0, 5.0), 0))
    s.apply("model", wire("model", model_body(6, 20.0, 5.1), 3))  # pub_seq 1 and 2 never arrived
    assert s.missed == 2
    # the snapshot reply arrives late with an older model: it must not replace the newer one
    s.apply("model", wire("model", model_body(2, 5.0, 4.0), 7), snapshot=True)
    assert s.model["model_id"] == "M000006" and s.missed == 2
    s.apply("warning", wire("warning", warning_body("w", "raised", 11.0), 0))
    s.apply("warning", wire("warning", warning_body("w", "cleared", 12.0), 1))
    s.apply("warning", wire("warning", warning_body("w", "raised", 11.0), 0), snapshot=True)
    assert s.warnings == {} and s.warnings_cleared == 1


def test_link_is_lost_after_three_silent_periods_and_says_so():
    s = MonitorState()
    s.apply("status", wire("status", status_body(1000.0, 5.0), 0))
    assert s.link(now=1002.5) == "up"
    assert s.link(now=1003.5) == "lost"
    assert "LINK LOST" in text_of(s, 80, now=1003.5)
    s.apply("status", wire("status", status_body(1004.0, 6.0, final=True), 1))
    assert "DAEMON STOPPED" in text_of(s, 80, now=1004.1)


# --------------------------------------------------------------------------------------------
# the screen


@pytest.mark.parametrize("width", [80, 120])
def test_busy_screen_shows_the_key_fields(busy_state, width):
    txt = text_of(busy_state, width)
    lines = txt.splitlines()
    assert len(lines) <= 24 and max(len(x) for x in lines) <= width
    assert "LINK UP" in txt and "1000 samples/s" in txt
    assert "gaps 2" in txt and "dup 1" in txt and "rejected 3" in txt
    assert "M000004" in txt
    # current quasi-steady lift 5.32 against the reference 5.71: -6.8 %
    assert "5.32" in txt and "5.71" in txt and "-6.8%" in txt
    assert "±0.053" in txt  # 1 % of 5.32, the 95 % half-width
    assert "DRIFT" in txt  # cusum 6.2 over threshold 5.0
    assert "12.26 Hz" in txt and "↓" in txt  # mode 1 falling 12.41 -> 12.26
    assert "60.0 % left" in txt and "41.0 %" in txt and "3.5 s" in txt and "9.7°" in txt
    assert "CAUTION" in txt and "2.2 s" in txt  # warning at t=39.0, newest source time 41.2
    assert DRIFT_MSG[:40] in txt
    assert "REJECTED" in txt and "M000005" in txt and REASON[:30] in txt
    flat = " ".join(txt.split())
    assert "not a safety system or an interlock" in flat and "test director decide" in flat


def test_empty_state_says_it_is_waiting():
    txt = text_of(MonitorState(endpoint="tcp://127.0.0.1:5999"), 80)
    assert "WAITING" in txt and "tcp://127.0.0.1:5999" in txt and "no model yet" in txt
    assert "not a safety system" in txt
    assert len(txt.splitlines()) <= 24


def test_running_cold_and_rejected_only_states_are_plain():
    s = MonitorState()
    s.apply("model", wire("model", model_body(1, 2.0, 4.0, status="rejected", reason=REASON), 0))
    txt = text_of(s, 80)
    assert "no model in service yet" in txt and REASON[:30] in txt and "NO HEARTBEAT" in txt
    s.apply("model", wire("model", model_body(2, 3.0, 5.55), 1))  # accepted, no reference in it
    txt = text_of(s, 80)
    assert "running cold (no reference)" in txt and "5.55" in txt
    assert "REJECTED" not in txt  # the rejected candidate is older than the model in service


def test_active_warnings_sorted_by_urgency_and_cleared_ones_gone():
    s = MonitorState()
    s.apply("watch", wire("watch", watch_body(50.0, 0.5), 0))
    s.apply("warning", wire("warning", warning_body("a", "raised", 40.0, "advisory", "first advisory"), 0))
    s.apply("warning", wire("warning", warning_body("b", "raised", 45.0, "limit", "margin at limit"), 1))
    s.apply("warning", wire("warning", warning_body("c", "raised", 46.0, "caution", "gone soon"), 2))
    s.apply("warning", wire("warning", warning_body("c", "cleared", 47.0), 3))
    txt = text_of(s, 120)
    assert "gone soon" not in txt and "2 active" in txt
    assert txt.index("margin at limit") < txt.index("first advisory")
    assert "5.0 s margin at limit" in txt and "10.0 s first advisory" in txt  # ages to watch t=50


def test_recorder_failing_is_loud():
    s = MonitorState()
    st = status_body(1000.0, 1.0)
    st["recorder"] = {**st["recorder"], "failing": True, "last_error": "disk full"}
    s.apply("status", wire("status", st, 0))
    txt = text_of(s, 80, now=1000.1)
    assert "RECORDER FAILING" in txt and "disk full" in txt


def test_render_is_pure():
    s = MonitorState()
    s.apply("status", wire("status", status_body(1000.0, 1.0), 0))
    assert text_of(s, 80) == text_of(s, 80)


# --------------------------------------------------------------------------------------------
# a replay through the monitor


class ScriptedOutputs:
    """Stands in for identification and the watchers: a reference, drifting accepted models, one
    rejected candidate, a warning raised and another raised and cleared, watch states."""

    def __init__(self):
        self.reset()

    def reset(self):
        self.n = 0

    def samples_to_boundary(self, discontinuity=False):
        return 10  # one step of the script per 10 samples (one frame here), however batched

    def update(self, block):
        t = float(block.t[-1])
        n, out = self.n, []
        ref = coefficients(5.71, 11.9)
        if n == 0:
            out.append(Output("model", {**model_body(0, t, 5.71), "status": "reference",
                                        "model_id": "M000000"}))
        elif n in (2, 4, 6, 8):
            out.append(Output("model", model_body(n // 2, t, 5.71 - 0.05 * n, reference=ref,
                                                  f1=12.4 - 0.02 * n)))
        elif n == 9:
            out.append(Output("model", model_body(5, t, 3.0, status="rejected", reason=REASON)))
        if n == 5:
            out.append(Output("warning", warning_body("coefficient_drift:quasi_steady.lift",
                                                      "raised", t)))
            out.append(Output("warning", warning_body("sensor_health:strain_mid", "raised", t,
                                                      "advisory", "strain_mid reads flat")))
        if n == 7:
            out.append(Output("warning", warning_body("sensor_health:strain_mid", "cleared", t)))
        if HAVE_WATCH_TOPIC:
            out.append(Output("watch", watch_body(t, 0.9 - 0.02 * n)))
        self.n += 1
        return out

    def state_dict(self):
        return {"n": self.n}

    def load_state_dict(self, s):
        self.n = s["n"]


def test_replay_drives_the_monitor(tmp_path):
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.service import record_frames

    cfg = load_config()
    ch = cfg.streams["rig"].channels
    msgs = []
    for i in range(12):
        if i == 3:
            continue  # one lost frame: a gap event
        raw = np.tile([2.0, 1.5, 100.0, 400.0, 200.0], (10, 1))
        f = SensorFrame("rig", i, i / 100, 1000.0, ch, raw)
        msgs.append((*encode_sensor_frame(f), f.t_end))
    path = tmp_path / "scripted.wwlog"
    record_frames(msgs, cfg, path)

    def factory(c):
        p = Pipeline(c)
        p.stages.append(ScriptedOutputs())
        return p

    state = MonitorState()
    replay_log(path, sink=lambda topic, payload: state.apply(
        decode_message(payload)["kind"], decode_message(payload)), pipeline_factory=factory)
    assert state.model["model_id"] == "M000004" and state.models_rejected == 1
    assert state.event_counts == {"gap": 1} and state.missed == 0
    txt = text_of(state, 80)
    assert "M000004" in txt and "5.31" in txt and "5.71" in txt  # 5.71 - 0.05 * 8
    assert "12.24 Hz" in txt  # 12.4 - 0.02 * 8
    assert "REJECTED" in txt and REASON[:30] in txt
    assert DRIFT_MSG[:40] in txt and "strain_mid reads flat" not in txt  # cleared in the run
    assert "NO HEARTBEAT" in txt  # a replay publishes no status heartbeat
    if HAVE_WATCH_TOPIC:
        assert "DRIFT" in txt and "70.0 % left" in txt  # 0.9 - 0.02 * 10 on the last block


# --------------------------------------------------------------------------------------------
# a live daemon on loopback, read with --once


def test_once_against_a_loopback_daemon(cfg, cfg_path, zctx):
    from wingwatch.clients.publisher import FramePublisher
    from wingwatch.daemon.service import Daemon

    d = Daemon(cfg, record=False, context=zctx)
    d.session.pipeline.stages.append(ScriptedOutputs())
    th = threading.Thread(target=d.run, kwargs={"duration_s": 60}, daemon=True)
    th.start()
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=zctx)
    try:
        assert pub.wait_ready(5)
        block = np.tile([2.0, 1.5, 100.0, 400.0, 200.0], (10, 1))
        for i in range(10):
            pub.send(block, seq=i, t0=i / 100)
        pub.send(block, seq=9, t0=0.09)  # a duplicate: rejected and counted
        pub.send(block, seq=11, t0=0.11)  # frame 10 lost: a gap
        deadline = time.monotonic() + 10
        while d.session.pipeline.ingest.snapshot()["frames"] < 12:
            assert time.monotonic() < deadline, "the daemon did not take the frames"
            time.sleep(0.02)
        parser = argparse.ArgumentParser()
        configure_parser(parser)
        args = parser.parse_args(["--config", str(cfg_path), "--once"])
        out = io.StringIO()
        con = Console(record=True, width=100, height=30, file=out)
        assert run(args, console=con) == 0
        txt = con.export_text()
    finally:
        d.stop()
        th.join(5)
        pub.close()
        d.close()
    assert "LINK UP" in txt
    assert "gaps 1" in txt and "dup 1" in txt and "rejected 1" in txt
    # 11 blocks reached the stage: the 4th accepted model (block 8) is in service
    assert "M000004" in txt and "5.31" in txt
    assert DRIFT_MSG[:40] in txt
    assert "not a safety system" in txt


def test_monitor_subcommand_is_wired():
    from wingwatch.daemon.cli import build_parser

    args = build_parser().parse_args(["monitor", "--once", "--refresh", "8"])
    assert args.func is run and args.once and args.refresh == 8.0


def test_taller_screen_lists_recent_events_and_a_replay_counts_gaps_from_them():
    s = MonitorState()
    s.apply("event", wire("event", {"t": 1.5, "event": "gap", "stream": "rig", "seq": 150,
                                    "missing_frames": 4, "missing_s": 0.0}, 0))
    s.apply("event", wire("event", {"t": 2.5, "event": "restart", "stream": "rig", "seq": 0,
                                    "missing_frames": 0, "missing_s": 0.0}, 1))
    short, tall = text_of(s, 80), text_of(s, 80, height=32)
    assert "gaps 1" in short  # no heartbeat (a replay): the gap events are counted instead
    assert "4 frame(s) missing" not in short and "4 frame(s) missing" in tall
    assert tall.index("restart") < tall.index("4 frame(s) missing")  # newest first
    assert len(tall.splitlines()) <= 32
