"""Watchers: warning lifecycle, flutter margin, curvature forecast and margin warnings, a
flow-speed change on the virtual rig detected by the stale-model and drift watchers without
earlier false alarms, a curvature-gauge zero drift told from a stiffness change under motion, and
the watch stage's explicit state."""

from __future__ import annotations

import dataclasses
import math
import tomllib

import numpy as np
import pytest

from wingwatch.daemon.codec import decode_message
from wingwatch.daemon.config import load_config
from wingwatch.daemon.replaylog import KIND_WARNING, KIND_WATCH
from wingwatch.daemon.watch.margin import MarginForecaster
from wingwatch.daemon.watch.stage import flutter_margin, flutter_onset_q
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


def _binary_section_modes(U):
    """Plunge-pitch typical section with quasi-steady lift (lift slope 2 pi on a chord 0.5,
    lift 0.1 ahead of the axis, 1 % structural damping; invented numbers): its two modes as
    s = -b +- i w, lower frequency first, and the dynamic pressure."""
    import scipy.linalg  # noqa: F401

    qd = 0.5 * U * U
    M = np.array([[1.0, 0.05], [0.05, 0.02]])
    K = np.diag([40.0, 10.0])
    Ka = qd * 0.5 * 2 * np.pi * np.array([[0.0, 1.0], [0.0, -0.1]])
    Ca = qd * 0.5 * 2 * np.pi / U * np.array([[1.0, 0.0], [-0.1, 0.0]])
    Cs = 0.01 * K / np.sqrt(np.diag(K)).mean()
    Mi = np.linalg.inv(M)
    A = np.block([[np.zeros((2, 2)), np.eye(2)], [-Mi @ (K + Ka), -Mi @ (Cs + Ca)]])
    lam = np.linalg.eigvals(A)
    lam = lam[lam.imag > 0]
    lam = lam[np.argsort(lam.imag)]
    return -lam.real, lam.imag, qd


def test_flutter_onset_extrapolated_from_subcritical_points_matches_the_eigenvalues():
    """Reference: the flutter speed of the section from its eigenvalues (numpy.linalg.eigvals,
    the largest real part crossing zero, scipy.optimize.brentq). The Zimmerman-Weissenburger
    margin from points up to 56 % of the flutter dynamic pressure, extrapolated as a quadratic
    in dynamic pressure, must land within 5 % of it."""
    import scipy.optimize

    Uf = scipy.optimize.brentq(lambda U: -np.min(_binary_section_modes(U)[0]), 1.0, 30.0)
    qf = 0.5 * Uf * Uf
    q, F = [], []
    for U in np.linspace(0.4 * Uf, 0.75 * Uf, 10):
        b, w, qd = _binary_section_modes(U)
        q.append(qd)
        F.append(flutter_margin(b[0], w[0], b[1], w[1]))
    assert np.all(np.diff(F) < 0)  # the margin falls toward flutter
    assert flutter_onset_q(q, F) == pytest.approx(qf, rel=0.05)
    # not enough spread in q, too few points, or a margin that rises: no extrapolation
    assert math.isnan(flutter_onset_q([q[0]] * 10, F))
    assert math.isnan(flutter_onset_q(q[:5], F[:5]))
    assert math.isnan(flutter_onset_q(q, F[::-1]))


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
    # With the identifier's lag prior the model's regressor (here 0.018 rad: still lagging) and
    # the incidence (0.02 rad) differ: a hold holds the incidence, the lag taken as settled, so
    # the forecast is the steady curvature at the incidence, not at the lagging regressor.
    f.update(np.full(100, 0.018), np.zeros(100), np.zeros(100), np.outer(np.full(100, 0.018),
             [3.0, 10.0]), np.ones(100, bool), alpha=np.full(100, 0.02))
    assert f.forecast()["kappa_max_forecast"] == pytest.approx(0.9 + 10.0 * 0.02, abs=1e-6)


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


# ------------------------------------------------------------------------- rig scenarios
def _rig_run(tmp, reference, name, seed, duration, events, motion=None, watch=None, truth=False):
    """A purpose-made rig scenario at the 5 deg operating point, recorded and replayed through
    the daemon's pipeline; returns (warnings, watch messages, pipeline, true root curvature)."""
    from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame
    from wingwatch.daemon.modelfile import load_model
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.rig.scenario import scenario_dir, scenario_from_dict
    from wingwatch.daemon.rig.source import VirtualRig
    from wingwatch.daemon.service import make_pipeline, record_frames

    doc = tomllib.loads((scenario_dir() / "stationary.toml").read_text())
    doc["scenario"].update({"duration_s": duration, "seed": seed, "name": name})
    doc["motion"] = motion or {"mean_deg": 5.0, "random": [
        {"rms_deg": 0.4, "band_hz": [0.05, 2.5], "components": 64, "taper_s": 2.0}]}
    doc["events"] = events
    rig = VirtualRig(scenario_from_dict(doc))
    kappa, times = [], []

    def msgs():
        for f in rig.frames():
            if truth:
                kappa.append(np.asarray(f.truth["kappa_root"]))
                times.append(np.asarray(f.truth["t"]))
            fr = SensorFrame("rig", f.seq, f.t0, rig.rate_hz, rig.channels, f.samples)
            yield (*encode_sensor_frame(fr), f.t0)

    cfg = load_config()
    log = tmp / f"{name}.wwlog"
    record_frames(msgs(), cfg, log, start_unix=0.0, source="rig")
    if watch:
        cfg = dataclasses.replace(cfg, watch={**cfg.watch, **watch})
    ref = load_model(reference)
    res = replay_log(log, config=cfg, pipeline_factory=lambda c: make_pipeline(c, ref))
    warns = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WARNING]
    watches = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WATCH]
    k = np.abs(np.concatenate(kappa)) if kappa else np.zeros(0)
    tk = np.concatenate(times) if times else np.zeros(0)
    return warns, watches, res.session.pipeline, (tk, k)


# Gauge zero drift against a stiffness change: the same seeded run (5 deg, 0.4 deg rms random
# pitch), the same event time, one with the root gauge's zero drifting and one with the plate
# 15 % softer. The first validated model comes at about 22 s; the first baseline starts
# watch.rearm_s (30 s) later and lasts 40 s here (shortened from 60 s to keep the test short),
# so the watch is armed by about 92 s and the event comes at 100 s.
T_EVENT = 100.0
DISCRIMINATION = {"seed": 7, "duration": 125.0, "watch": {"baseline_s": 40.0}}
# 0.3 microstrain/s: a fast thermal zero drift (rig units; the campaign's is 0.08); on the
# 0.6 mm plate that is 2 x 0.3e-6 / 0.6e-3 = 1e-3 1/m per second of curvature (kappa = 2 eps / t,
# beam theory), about 0.1 % of the operating curvature per second.
GAUGE_EVENT = {"t_s": T_EVENT, "kind": "gauge-drift", "channel": "strain_root", "rate_ue_per_s": 0.3}
STIFF_EVENT = {"t_s": T_EVENT, "kind": "stiffness", "factor": 0.85, "ramp_s": 2.0}
STRUCTURAL = ("coefficient_drift", "mode_drift", "damping_trend")


def _zero_drift(w):
    return w["warning_kind"] == "sensor_health" and w["quantity"].endswith(".zero")


def test_gauge_zero_drift_is_sensor_health_not_structural(tmp_path, reference):
    warns, watches, _, _ = _rig_run(tmp_path, reference, "gauge", events=[GAUGE_EVENT],
                                    **DISCRIMINATION)
    raised = [w for w in warns if w["event"] == "raised"]
    zero = [w for w in raised if _zero_drift(w)]
    # the zero drift is reported as a sensor fault of the curvature gauge, after it starts
    assert zero and zero[0]["quantity"] == "strain_root.zero", warns
    assert all(w["t"] >= T_EVENT for w in zero)
    assert zero[0]["level"] == "advisory" and "advisory" in zero[0]["message"].lower()
    # ... and never as a structural change: no coefficient or mode drift warning of any kind
    assert not [w for w in warns if w["warning_kind"] in STRUCTURAL], warns
    # the watch state names the gauge and shows the curvature level moving upward (the rig's
    # drift is positive microstrain, so positive curvature), with the witnesses quiet
    last = watches[-1]
    assert last["sensors"]["strain_root"]["state"] == "zero_drift"
    assert last["drift"]["zero_shift.curvature"]["z"] > 0
    assert last["drift"]["zero_shift.curvature"]["cusum"] > last["drift"]["zero_shift.curvature"]["threshold"]


def test_stiffness_step_is_structural_not_gauge(tmp_path, reference):
    warns, _, _, _ = _rig_run(tmp_path, reference, "stiffness", events=[STIFF_EVENT],
                              **DISCRIMINATION)
    raised = [w for w in warns if w["event"] == "raised"]
    drift = [w for w in raised if w["warning_kind"] == "coefficient_drift"]
    assert not [w for w in raised if w["warning_kind"] in STRUCTURAL + ("stale_model",)
                and w["t"] < T_EVENT], warns  # no false alarm before the step
    assert drift, warns
    assert drift[0]["t"] - T_EVENT <= 10.0  # issue 7 target: the stiffness step within 10 s
    # the curvature quasi-steady column moves (a softer plate bends more per radian)
    assert any(w["quantity"] == "quasi_steady.curvature" for w in drift)
    assert not [w for w in warns if _zero_drift(w)], warns  # not taken for a gauge fault


def test_watch_state_round_trips_exactly_and_reset_equals_fresh(tmp_path, reference):
    """state_dict / load_state_dict through the checkpoint's wire form in the middle of a gauge
    drift (zero-shift CUSUM and witness sums live), then both pipelines continue identically."""
    import msgpack

    from wingwatch.daemon import replaylog as rl
    from wingwatch.daemon.codec import _from_wire, _to_wire
    from wingwatch.daemon.modelfile import load_model
    from wingwatch.daemon.pipeline import Session
    from wingwatch.daemon.rig.scenario import scenario_dir, scenario_from_dict
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log
    from wingwatch.daemon.service import make_pipeline
    from wingwatch.daemon.watch.stage import Watcher

    doc = tomllib.loads((scenario_dir() / "stationary.toml").read_text())
    doc["scenario"].update({"duration_s": 118.0, "seed": 7, "name": "gauge-state"})
    doc["motion"] = {"mean_deg": 5.0, "random": [{"rms_deg": 0.4, "band_hz": [0.05, 2.5],
                                                  "components": 64, "taper_s": 2.0}]}
    doc["events"] = [GAUGE_EVENT]
    log = write_rig_log(VirtualRig(scenario_from_dict(doc)), tmp_path / "g.wwlog")
    cfg = load_config()
    cfg = dataclasses.replace(cfg, watch={**cfg.watch, "baseline_s": 40.0})
    ref = load_model(reference)
    records = [r for r in rl.LogReader.open(log) if r.kind in (rl.KIND_INBOUND, rl.KIND_REJECTED)]
    # 10-sample frames at 1 kHz: frame index = 100 x time; three frames into an identifier
    # block, so that the watcher holds samples of a block not yet processed
    cut = int(113.0 * 100) + 3
    out_a: list[bytes] = []
    s1 = Session(make_pipeline(cfg, ref), sink=lambda t, p: out_a.append(p))
    for rec in records[:cut]:
        s1.replay_record(rec)
    w1 = s1.pipeline.stages[-1]
    assert isinstance(w1, Watcher)
    assert w1.base is not None and w1.cusum_zero.statistic[0] > 0  # the new state is live
    assert sum(a.shape[0] for a in w1.acc_si) == 30

    def packed(state):
        return msgpack.packb(_to_wire(state), use_bin_type=True)

    wire = _from_wire(msgpack.unpackb(packed(s1.pipeline.state_dict()), raw=False))
    p2 = make_pipeline(cfg, ref)
    p2.load_state_dict(wire)
    assert packed(p2.stages[-1].state_dict()) == packed(w1.state_dict())
    out_b: list[bytes] = []
    s2 = Session(p2, sink=lambda t, p: out_b.append(p))
    s2.pub_seq = dict(s1.pub_seq)
    n_before = len(out_a)
    for rec in records[cut:]:
        s1.replay_record(rec)
        s2.replay_record(rec)
    assert len(out_a) - n_before == len(out_b) > 10
    assert out_a[n_before:] == out_b  # byte for byte
    w2 = p2.stages[-1]
    assert packed(w2.state_dict()) == packed(w1.state_dict())
    assert w1.gauge_suspect  # the run went through the gauge verdict after the cut
    # reset equals a fresh stage on the same identifier
    w1.reset()
    assert packed(w1.state_dict()) == packed(Watcher(cfg, w1.ident).state_dict())


# ------------------------------------------------------------------------- margin warnings
def test_no_margin_warning_below_70_percent_of_the_limit(tmp_path, reference):
    # A manoeuvre at the operating point: random pitching (0.2 deg rms) and a 0.9 deg pitch-up
    # held for 9 s. The rig's true root curvature stays below 70 % of the limit throughout, so
    # the curvature-margin watcher (advisory below 25 % predicted margin, i.e. a two-sigma upper
    # edge above 75 % of the limit) must stay silent. (70 %: the check; the 25 % advisory
    # margin is the configured default, watch.margin_advisory.)
    motion = {"mean_deg": 5.0,
              "random": [{"rms_deg": 0.2, "band_hz": [0.1, 2.5], "components": 48, "taper_s": 2.0}],
              "ramps": [{"start_s": 30.0, "duration_s": 1.0, "delta_deg": 0.9},
                        {"start_s": 40.0, "duration_s": 1.0, "delta_deg": -0.9}]}
    warns, watches, _, (_, kappa) = _rig_run(tmp_path, reference, "manoeuvre", 3, 60.0, [],
                                             motion=motion, truth=True)
    limit = load_config().outputs.curvature.limit_per_m
    assert kappa.max() < 0.70 * limit  # the scenario is what the test claims
    assert kappa.max() > 0.60 * limit  # ... and a real manoeuvre, not a hold at 47 %
    assert not [w for w in warns if w["warning_kind"] == "curvature_margin"], warns
    # the forecast saw the manoeuvre: its smallest predicted margin fell well below the margin
    # at the operating point, yet stayed above the advisory margin
    pm = [m["margin"]["predicted_min"] for m in watches if m["t"] > 3.0]
    assert 0.25 < min(pm) < np.median(pm) - 0.1


def test_creep_toward_the_limit_warns_at_least_1_s_ahead(tmp_path, reference):
    # A creep of 0.25 deg/s from 5 deg carries the true root curvature across the limit some
    # 20 s later; the first margin warning must come at least 1 s before the rig's true
    # crossing (issue 7's check).
    events = [{"t_s": 10.0, "kind": "pitch-creep", "rate_deg_per_s": 0.25, "duration_s": 30.0}]
    motion = {"mean_deg": 5.0,
              "random": [{"rms_deg": 0.2, "band_hz": [0.1, 2.5], "components": 48, "taper_s": 2.0}]}
    warns, _, _, (tk, kappa) = _rig_run(tmp_path, reference, "creep", 5, 45.0, events,
                                        motion=motion, truth=True)
    limit = load_config().outputs.curvature.limit_per_m
    over = np.flatnonzero(kappa >= limit)
    assert over.size  # the creep does reach the limit
    t_cross = float(tk[over[0]])
    margin = [w for w in warns if w["warning_kind"] == "curvature_margin" and w["event"] == "raised"]
    assert margin, warns
    assert margin[0]["t"] <= t_cross - 1.0
    assert all("advisory" in w["message"].lower() for w in margin)


def test_watcher_raises_the_flutter_advisory_from_the_model_in_service():
    """Two oscillatory modes of the section's model in service at rising dynamic pressure:
    the watcher tracks their margin and raises an advisory once the extrapolated flutter point
    is within damping_q_margin (1.5) of the present dynamic pressure; a state round trip keeps
    the history."""
    import scipy.optimize

    from wingwatch.daemon.identifier import OnlineIdentifier
    from wingwatch.daemon.watch.stage import Watcher

    cfg = load_config()
    w = Watcher(cfg, OnlineIdentifier(cfg))
    Uf = scipy.optimize.brentq(lambda U: -np.min(_binary_section_modes(U)[0]), 1.0, 30.0)
    raised, q_at = None, []
    for i, U in enumerate(np.linspace(0.4 * Uf, 0.85 * Uf, 16)):
        b, wd, qd = _binary_section_modes(U)
        wn = np.hypot(b, wd)
        modes = [{"id": 1 + j, "freq_hz": float(wn[j] / (2 * np.pi)), "damping": float(b[j] / wn[j])}
                 for j in range(2)]
        w.ident.in_service = {"model_id": f"M{i:06d}", "modes": modes}
        w.q_recent = qd
        q_at.append(qd)
        ev = [o.body for o in w._flutter(float(i))]
        if i == 9:
            st = w.state_dict()
        if ev and raised is None:
            raised = ev[0]
    assert raised is not None and raised["event"] == "raised" and raised["level"] == "advisory"
    assert raised["warning_kind"] == "damping_trend" and "advisory" in raised["message"].lower()
    assert raised["value"] == pytest.approx(0.5 * Uf * Uf, rel=0.05)  # the flutter dynamic pressure
    assert raised["value"] < 1.5 * q_at[int(raised["t"])]
    assert w.flutter["modes"] == [1, 2]
    w2 = Watcher(cfg, OnlineIdentifier(cfg))
    w2.load_state_dict(st)
    assert len(w2.flutter_hist) == 10 and w2.flutter_pair == [1, 2]
