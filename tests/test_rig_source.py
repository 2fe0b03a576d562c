"""The virtual rig as a frame source: determinism, framing, sensors and scripted faults."""

from dataclasses import replace

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from wingwatch.daemon.rig.scenario import CHANNELS, load_scenario
from wingwatch.daemon.rig.source import TRUTH_KEYS, VirtualRig

FAULTS = """
[scenario]
name = "faults"
description = "every sensor fault in three seconds"
duration_s = 3.0
seed = 99

[numerics]
n_panels = 12

[motion]
mean_deg = 4.0

[[motion.random]]
rms_deg = 0.3
band_hz = [0.2, 3.0]
components = 16
taper_s = 0.2

[[events]]
t_s = 0.5
kind = "gauge-drift"
channel = "strain_root"
rate_ue_per_s = 10.0

[[events]]
t_s = 1.0
kind = "dropout"
channel = "balance_lift"
duration_s = 0.2

[[events]]
t_s = 1.5
kind = "stuck"
channel = "strain_mid"
duration_s = 0.3

[[events]]
t_s = 2.0
kind = "lost-frames"
count = 3

[[events]]
t_s = 2.5
kind = "stiffness"
factor = 0.85
ramp_s = 0.0
"""


@pytest.fixture(scope="module")
def faults(tmp_path_factory):
    p = tmp_path_factory.mktemp("sc") / "faults.toml"
    p.write_text(FAULTS)
    return p


def collect(rig, **kw):
    frames = list(rig.frames(**kw))
    samples = np.concatenate([f.samples for f in frames])
    truth = {k: np.concatenate([f.truth[k] for f in frames]) for k in TRUTH_KEYS}
    return frames, samples, truth


def test_same_seed_gives_identical_frames_and_another_seed_does_not(faults):
    a = collect(VirtualRig(faults))
    b = collect(VirtualRig(faults))
    c = collect(VirtualRig(faults, seed=100))
    assert [f.seq for f in a[0]] == [f.seq for f in b[0]]
    assert_array_equal(a[1], b[1])  # bit for bit, NaNs in the same places
    for k in TRUTH_KEYS:
        assert_array_equal(a[2][k], b[2][k])
    assert not np.array_equal(a[1], c[1], equal_nan=True)


def test_motion_seed_fixes_the_manoeuvre_and_leaves_the_noise_to_the_seed(faults):
    a = collect(VirtualRig(faults, seed=5, motion_seed=7))
    b = collect(VirtualRig(faults, seed=6, motion_seed=7))
    c = collect(VirtualRig(faults, seed=5, motion_seed=8))
    assert_array_equal(a[2]["alpha"], b[2]["alpha"])  # the same manoeuvre
    assert not np.array_equal(a[1], b[1], equal_nan=True)  # other sensor noise
    assert not np.array_equal(a[2]["alpha"], c[2]["alpha"])
    d = collect(VirtualRig(faults, seed=5))  # without it, the motion comes from the seed
    assert not np.array_equal(a[2]["alpha"], d[2]["alpha"])
    with pytest.raises(Exception, match="motion_seed"):
        VirtualRig(faults, motion_seed=-1)


def test_frame_length_does_not_change_any_value(faults):
    # frame length 7 puts the internal blocks on other boundaries; the run must be the same
    sc = load_scenario(faults)
    _, s10, t10 = collect(VirtualRig(sc), include_lost=True)
    _, s7, t7 = collect(VirtualRig(replace(sc, frame_samples=7)), include_lost=True)
    assert_array_equal(s10, s7)
    assert_array_equal(t10["kappa_root"], t7["kappa_root"])


def test_framing_clock_and_lost_frames(faults):
    rig = VirtualRig(faults)
    frames = list(rig.frames())
    assert rig.channels == CHANNELS and rig.frame_samples == 10 and rig.rate_hz == 1000.0
    seqs = [f.seq for f in frames]
    # 300 frames of 10 samples; frames 200, 201, 202 (t0 = 2.00-2.02 s) never leave the rig
    assert len(frames) == 297 and 200 not in seqs and 203 in seqs
    assert np.diff(seqs).max() == 4
    for f in frames:
        assert f.samples.shape == (10, 5) and f.samples.dtype == np.float64
        assert f.t0 == pytest.approx(f.seq * 10 / 1000.0, abs=1e-12)
        assert_allclose(f.truth["t"], f.t0 + np.arange(10) / 1000.0, atol=1e-12)
    everything = list(rig.frames(include_lost=True))
    assert [f.seq for f in everything] == list(range(300))
    assert [f.seq for f in everything if f.truth["lost"]] == [200, 201, 202]


def test_sensor_faults(faults):
    frames, s, truth = collect(VirtualRig(faults), include_lost=True)
    t = truth["t"]
    col = {c: i for i, c in enumerate(CHANNELS)}
    # dropout: NaN on balance_lift for exactly [1.0, 1.2) s, nowhere else
    nan = np.isnan(s[:, col["balance_lift"]])
    assert_array_equal(nan, (t >= 1.0 - 1e-9) & (t < 1.2 - 1e-9))
    assert not np.isnan(np.delete(s, col["balance_lift"], axis=1)).any()
    # stuck: strain_mid holds the last reading before 1.5 s for 0.3 s
    stuck = (t >= 1.5 - 1e-9) & (t < 1.8 - 1e-9)
    held = s[stuck, col["strain_mid"]]
    assert np.all(held == s[np.argmax(stuck) - 1, col["strain_mid"]])
    assert np.std(s[~stuck, col["strain_mid"]][-300:]) > 0
    # zero drift: 10 microstrain per second from 0.5 s on strain_root (noise 0.6 ue averages out)
    err = s[:, col["strain_root"]] - truth["strain_root_ue"]
    late = t > 0.5
    slope = np.polyfit(t[late], err[late], 1)[0]
    assert abs(slope - 10.0) < 0.2
    assert abs(np.mean(err[t < 0.5])) < 0.2
    # stiffness event lands in the truth
    assert np.all(truth["stiffness_factor"][t >= 2.5 - 1e-9] == 0.85)
    assert np.all(truth["stiffness_factor"][t < 2.5 - 1e-9] == 1.0)


def test_channels_convert_to_the_truth_through_the_channel_map():
    rig = VirtualRig("stationary", duration_s=1.0)
    _, s, truth = collect(rig)
    sc = rig.scenario
    col = {c: i for i, c in enumerate(CHANNELS)}
    area = sc.article.chord_m * sc.article.span_m  # reference_area_m2 of configs/wingwatch.toml
    thick = sc.article.thickness_m  # thickness_m of configs/wingwatch.toml
    # alpha = pitch_enc * pi / 180, to the encoder's half-LSB (14 bits over 360 deg)
    lsb = np.radians(360.0 / 2**14)
    assert np.max(np.abs(np.radians(s[:, col["pitch_enc"]]) - truth["alpha"])) <= 0.5 * lsb + 1e-12
    # C_L = balance_lift / (q_pitot * S): balance offset 0.015 N and noise 0.004 N over q S ~ 2.4 N
    cl = s[:, col["balance_lift"]] / (s[:, col["q_pitot"]] * area)
    assert abs(np.mean(cl - truth["C_L"])) < 0.015 / (80 * area) + 1e-3
    assert np.std(cl - truth["C_L"]) < 5e-3
    # kappa = 2 * strain * 1e-6 / t (beam theory), the gauge's noise 0.6 ue -> 2e-3 1/m
    kappa = 2 * s[:, col["strain_root"]] * 1e-6 / thick
    assert np.std(kappa - truth["kappa_root"]) < 3e-3
    assert_allclose(truth["strain_root_ue"], truth["kappa_root"] * thick / 2 * 1e6, rtol=1e-12)
    # q_pitot = rho U^2 / 2
    assert_allclose(truth["q_pa"], 0.5 * sc.fluid.density_kg_m3 * truth["flow_speed"] ** 2, rtol=1e-12)


def test_truth_is_complete_and_events_are_reported(faults):
    rig = VirtualRig(faults)
    kinds = [e["kind"] for e in rig.events]
    assert kinds == ["gauge-drift", "dropout", "stuck", "lost-frames", "stiffness"]
    seen = []
    for f in rig.frames(include_lost=True):
        assert set(TRUTH_KEYS) <= set(f.truth)
        seen += [(f.seq, e["kind"]) for e in f.truth["events"]]
    assert seen == [(50, "gauge-drift"), (100, "dropout"), (150, "stuck"), (200, "lost-frames"),
                    (250, "stiffness")]


def test_flow_speed_ramp_and_added_mass(tmp_path):
    p = tmp_path / "ramp.toml"
    p.write_text("""
[scenario]
name = "ramp"
description = "speed ramp then a clip-on mass"
duration_s = 2.0
[numerics]
n_panels = 12
[motion]
mean_deg = 4.0
[[events]]
t_s = 0.5
kind = "flow-speed"
speed_m_s = 0.44
ramp_s = 0.5
[[events]]
t_s = 1.5
kind = "added-mass"
mass_kg = 0.01
""")
    _, s, truth = collect(VirtualRig(p))
    U, t = truth["flow_speed"], truth["t"]
    assert np.all(U[t < 0.5] == 0.4) and np.all(U[t >= 1.0] == pytest.approx(0.44))
    assert np.all(np.diff(U) >= 0)  # smoothed ramp, monotone
    # q grows as U^2: (0.44 / 0.4)^2 = 1.21 (Bernoulli)
    assert np.mean(s[t > 1.2, 2]) / np.mean(s[t < 0.5, 2]) == pytest.approx(1.21, rel=0.01)
    assert np.all(truth["added_mass_kg"][t >= 1.5] == 0.01)
    # the lift follows the dynamic pressure up (same angle, higher q)
    assert np.mean(truth["lift_n"][(t > 1.2) & (t < 1.5)]) > 1.1 * np.mean(truth["lift_n"][t < 0.5])
