"""Watchers: warning lifecycle, flutter margin, curvature forecast, and a flow-speed change on
the virtual rig detected by the stale-model and drift watchers without earlier false alarms."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest

from wingwatch.daemon.codec import decode_message
from wingwatch.daemon.config import load_config
from wingwatch.daemon.replaylog import KIND_WARNING, KIND_WATCH
from wingwatch.daemon.watch.margin import MarginForecaster
from wingwatch.daemon.watch.stage import flutter_margin
from wingwatch.daemon.watch.warnings import WarningBook


def test_warning_dwell_stops_chatter():
    book = WarningBook(dwell_s=1.0)
    events = []
    for k in range(100):  # a condition flickering every 0.1 s for 10 s
        lvl = "caution" if k % 2 == 0 else None
        events += book.report("x", "kind", "q", lvl, 1.0, 1.0, 0.1 * k, "M", "m")
    assert [e.body["event"] for e in events] == ["raised"]
    for k in range(100, 120):  # now quiet for 2 s: cleared once, after the dwell
        events += book.report("x", "kind", "q", None, 0.0, 1.0, 0.1 * k, "M", "m")
    assert [e.body["event"] for e in events] == ["raised", "cleared"]
    # the quiet stretch starts at 9.9 s (the last flicker); cleared one dwell (1 s) later
    assert 10.85 <= events[1].body["t"] <= 11.05
    assert "Advisory only" in events[0].body["advisory"]


def test_warning_levels_go_up_at_once_and_down_after_dwell():
    book = WarningBook(dwell_s=2.0)
    ev = book.report("m", "k", "q", "advisory", 0, 0, 0.0, "M", "")
    ev += book.report("m", "k", "q", "limit", 0, 0, 0.5, "M", "")
    ev += book.report("m", "k", "q", "caution", 0, 0, 1.0, "M", "")
    ev += book.report("m", "k", "q", "caution", 0, 0, 3.0, "M", "")
    assert [(e.body["event"], e.body["level"]) for e in ev] == [
        ("raised", "advisory"), ("updated", "limit"), ("updated", "caution")]


@pytest.mark.parametrize(
    "b1, w1, b2, w2, F",
    [
        # Zimmerman & Weissenburger, J. Aircraft 1(4), 1964, recomputed from the formula
        # (values in the brief): F(0.5, 2, 0.2, 3) = 7.7510; F(0.2, 2, 0.2, 2) = 0.6464.
        (0.5, 2.0, 0.2, 3.0, 7.7510),
        (0.2, 2.0, 0.2, 2.0, 0.6464),
    ],
)
def test_flutter_margin_published_values(b1, w1, b2, w2, F):
    assert flutter_margin(b1, w1, b2, w2) == pytest.approx(F, abs=5e-5)


def test_flutter_margin_vanishes_at_flutter():
    # F -> 0 when one mode's damping reaches zero (Zimmerman & Weissenburger 1964)
    assert flutter_margin(0.0, 2.0, 0.3, 3.0) == pytest.approx(0.0, abs=1e-12)
    assert flutter_margin(1e-3, 2.0, 0.3, 3.0) > 0


def test_margin_forecast_hold_and_plan():
    f = MarginForecaster(limit=2.0, horizon_s=1.0, dt=1e-3)
    A = np.array([[0.99]])
    B = np.array([[0.01]])
    theta = np.array([[3.0, 10.0], [0.0, 0.0], [0.0, 0.0], [0.0, 0.0], [0.0, 0.0]])  # C = 0
    f.set_model("m", A, B, theta, alpha0=math.radians(5.0), y0=np.array([0.3, 0.9]),
                r_var=np.array([1e-8, 1e-8]))
    a = np.full(100, 0.02)  # 0.02 rad above the operating point, holding
    f.update(a, np.zeros(100), np.zeros(100), np.outer(a, [3.0, 10.0]), np.ones(100, bool))
    hold = f.forecast()
    kappa = 0.9 + 10.0 * 0.02  # the quasi-steady model at this angle
    assert hold["now"] == pytest.approx(1 - kappa / 2.0, abs=1e-9)
    assert hold["time_to_limit_s"] is None and hold["source"] == "hold"
    # allowable angle: alpha0 + (limit - kappa0) / K_qs  (quasi-steady inverse)
    assert hold["allowable_alpha_deg"] == pytest.approx(5.0 + math.degrees(1.1 / 10.0))
    # a plan ramping alpha up by 0.2 rad over 1 s reaches the limit where 0.9 + 10 a = 2.0,
    # i.e. a = 0.11 rad: at t = 0.11 / 0.2 s after the plan starts at a = 0 (deviation)
    t_now = 10.0
    plan = (t_now, 0.001, math.radians(5.0) + 0.2 * np.arange(2000) * 0.001)
    fc = f.forecast(plan, t_now)
    assert fc["source"] == "plan"
    assert fc["time_to_limit_s"] == pytest.approx(0.55, abs=0.011)


def _scenario(tmp, seed, changes):
    from wingwatch.daemon.rig.scenario import scenario_dir, scenario_from_dict
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log

    doc = tomllib.loads((scenario_dir() / "stationary.toml").read_text())
    doc["scenario"].update({"duration_s": 70.0, "seed": seed, "name": "speed-step"})
    doc["motion"] = {"mean_deg": 5.0, "random": [{"rms_deg": 0.4, "band_hz": [0.05, 2.5],
                                                  "components": 64, "taper_s": 2.0}]}
    doc["events"] = changes
    return write_rig_log(VirtualRig(scenario_from_dict(doc)), tmp / f"s{seed}.wwlog")


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    from wingwatch.daemon.demo import ensure_reference

    return ensure_reference(tmp_path_factory.mktemp("ref"), load_config(), say=lambda m: None)


def test_flow_speed_change_is_caught_within_5_s_and_nothing_before(tmp_path, reference):
    from wingwatch.daemon.modelfile import load_model
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.service import make_pipeline

    t_event = 55.0
    log = _scenario(tmp_path, 7, [{"t_s": t_event, "kind": "flow-speed", "speed_m_s": 0.44,
                                  "ramp_s": 5.0}])
    ref = load_model(reference)
    res = replay_log(log, pipeline_factory=lambda c: make_pipeline(c, ref))
    warns = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WARNING]
    structural = [w for w in warns if w["warning_kind"] in
                  ("coefficient_drift", "mode_drift", "stale_model", "sensor_health")]
    assert not [w for w in structural if w["t"] < t_event], structural  # no false alarm before
    after = [w for w in structural if w["event"] == "raised" and w["t"] >= t_event]
    assert after, warns
    assert after[0]["t"] - t_event <= 5.0  # issue target: flow-speed change caught within 5 s
    assert all("advisory" in w["message"].lower() for w in warns)
    watch = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WATCH]
    assert watch and {"margin", "drift", "stale", "sensors"} <= set(watch[-1])


def test_controller_plan_reaches_the_margin_forecast_and_is_recorded(tmp_path):
    from test_identifier import frames, motion, outputs

    from wingwatch.daemon import replaylog as rl
    from wingwatch.daemon.plan import encode_plan
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.service import make_pipeline, make_recorder
    from wingwatch.daemon.pipeline import Session

    cfg = load_config()
    alpha, ad, add = motion(6000)
    msgs = list(frames(alpha, outputs(alpha, ad, add)))
    plan = encode_plan("mpc", 3.0, 0.01, np.full(200, math.radians(6.0)))
    bad_plan = (b"plan.mpc", b"\xc1")
    writer = make_recorder(cfg, path=tmp_path / "p.wwlog", source="daemon", start_unix=0.0)
    outs = []
    s = Session(make_pipeline(cfg), recorder=writer, sink=lambda t, p: outs.append(decode_message(p)))
    for i, m in enumerate(msgs):
        if i == 300:
            s.inbound(list(plan), 0.0)
            s.inbound(list(bad_plan), 0.0)
        s.inbound(list(m), 0.0)
    writer.close()
    assert s.pipeline.plans == 1 and s.pipeline.plans_rejected == 1
    watch = [m for m in outs if m["kind"] == "watch"]
    src = {round(m["t"]): m["margin"]["source"] for m in watch}
    assert any(v == "plan" for t, v in src.items() if 3 <= t <= 4.9)  # while the plan lasts
    assert src[max(src)] == "hold"  # after it has run out
    kinds = [r.kind for r in rl.LogReader.open(tmp_path / "p.wwlog")]
    assert kinds.count(rl.KIND_PLAN) == 1 and kinds.count(rl.KIND_REJECTED) == 1
    res = replay_log(tmp_path / "p.wwlog")  # the plan replays at its place in the stream
    assert res.session.pipeline.plans == 1
