"""Scenario files: the shipped set loads, and every non-physical input is refused up front."""

import math

import numpy as np
import pytest

from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.rig.scenario import (EVENT_KINDS, Motion, list_scenarios, load_scenario,
                                           scenario_dir, smooth_step)
from wingwatch.daemon.rig.source import VirtualRig

REQUIRED = {"calibration", "test-manoeuvre", "random-pitch", "stationary", "campaign"}

BASE = """
[scenario]
name = "probe"
description = "a probe"
duration_s = 1.0
"""


def write(tmp_path, text, name="probe.toml"):
    p = tmp_path / name
    p.write_text(BASE + text if not text.lstrip().startswith("[scenario]") else text)
    return p


def test_shipped_scenarios_load_and_list():
    names = dict(list_scenarios())
    assert REQUIRED <= set(names)
    for name in names:
        sc = load_scenario(name)
        assert sc.name == name
        assert "\n" not in names[name] and names[name]
        assert sc.rate_hz == 1000.0 and sc.frame_samples == 10
    camp = load_scenario("campaign")
    kinds = {e.kind for e in camp.events}
    assert kinds == set(EVENT_KINDS)  # the default run carries one of every scripted event
    assert camp.duration_s >= 600
    stiff = [e for e in camp.events if e.kind == "stiffness"][0]
    assert stiff.get("factor") == pytest.approx(0.85)


def test_unknown_scenario_is_refused():
    with pytest.raises(ConfigError, match="unknown scenario 'nowhere'"):
        load_scenario("nowhere")


@pytest.mark.parametrize("text, key", [
    ("[article]\nyoungs_modulus_pa = -2.4e9\n", "article.youngs_modulus_pa"),
    ("[article]\nchord_m = 0.0\n", "article.chord_m"),
    ("[article]\npivot = 1.2\n", "article.pivot"),
    ("[article]\nthickness_m = -1e-3\n", "article.thickness_m"),
    ("[fluid]\nspeed_m_s = 0.0\n", "fluid.speed_m_s"),
    ("[article]\ncolour = 'red'\n", "article.colour"),
    ("[numerics]\nn_panels = 'many'\n", "numerics.n_panels"),
    ("[[events]]\nt_s = 0.5\nkind = 'stiffness'\nfactor = -0.1\n", "events[0].factor"),
    ("[[events]]\nt_s = 0.5\nkind = 'meteor'\n", "events[0].kind"),
    ("[[events]]\nt_s = 0.5\nkind = 'dropout'\nchannel = 'sonar'\nduration_s = 1.0\n", "events[0].channel"),
    ("[[events]]\nt_s = 0.5\nkind = 'flow-speed'\n", "events[0].speed_m_s"),
    ("[[motion.random]]\nrms_deg = 1.0\nband_hz = [3.0, 1.0]\n", "motion.random[0].band_hz"),
])
def test_non_physical_parameters_are_refused(tmp_path, text, key):
    p = write(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_scenario(p)
    msg = str(err.value)
    assert key in msg and str(p) in msg  # names the parameter and the file
    assert msg.count(". ") == 0  # one sentence


def test_time_step_too_large_is_refused(tmp_path):
    p = write(tmp_path, "[scenario]\nname = 'p'\ndescription = 'd'\nduration_s = 1.0\nrate_hz = 50.0\n")
    with pytest.raises(ConfigError, match="rate_hz.*too large"):
        load_scenario(p)
    # the same refusal when the rate comes from the command line
    with pytest.raises(ConfigError, match="too large"):
        VirtualRig("calibration", rate_hz=40.0)
    # and a flow-speed event that raises U beyond the Courant limit for this step
    q = write(tmp_path, "[scenario]\nname = 'p'\ndescription = 'd'\nduration_s = 9.0\nrate_hz = 300.0\n"
              "[[events]]\nt_s = 1.0\nkind = 'flow-speed'\nspeed_m_s = 2.0\n", "fast.toml")
    with pytest.raises(ConfigError, match="Courant"):
        load_scenario(q)


def test_event_after_the_end_is_refused(tmp_path):
    p = write(tmp_path, "[[events]]\nt_s = 5.0\nkind = 'lost-frames'\ncount = 2\n")
    with pytest.raises(ConfigError, match="after the end"):
        load_scenario(p)


def test_bad_overrides_are_refused():
    with pytest.raises(ConfigError, match="seed"):
        VirtualRig("calibration", seed=-1)
    with pytest.raises(ConfigError, match="duration_s"):
        VirtualRig("calibration", duration_s=0.0)


def test_smooth_ramp_derivatives_are_consistent():
    tau = np.linspace(-0.2, 1.2, 14001)
    s, ds, d2s = smooth_step(tau)
    h = tau[1] - tau[0]
    # central differences of the quintic (error ~ h^2 * 60 / 6 ~ 1e-7 away from the kinks at 0
    # and 1, where the one-step kink in the second derivative costs at most h * 60)
    assert np.max(np.abs(np.gradient(s, h) - ds)) < 1e-5
    assert np.max(np.abs(np.gradient(ds, h) - d2s)) < 0.01
    assert s[0] == 0.0 and s[-1] == 1.0 and ds[0] == 0.0 and ds[-1] == 0.0


def test_motion_derivatives_are_exact():
    sc = load_scenario("random-pitch")
    m = Motion(sc.motion, np.random.default_rng(5))
    t = np.linspace(0.0, 8.0, 80001)
    a, ad, add = m.evaluate(t)
    h = t[1] - t[0]
    inner = slice(1, -1)  # central differences only (error ~ h^2 |alpha'''| / 6, about 1e-8 here)
    assert np.max(np.abs(np.gradient(a, h) - ad)[inner]) < 1e-5 * np.max(np.abs(ad))
    assert np.max(np.abs(np.gradient(ad, h) - add)[inner]) < 1e-4 * np.max(np.abs(add))
    # the multisine's rms inside the full-amplitude part is the scenario's rms (1 deg), within the
    # spread of a 48-64 line multisine over a finite window (10 %)
    full = t > sc.motion.random[0].taper_s
    rms = np.degrees(np.std(a[full]))
    assert 0.6 < rms < 1.4
    assert math.isclose(np.degrees(np.mean(a[full])), sc.motion.mean_deg, abs_tol=0.5)


def test_scenario_dir_holds_only_valid_files():
    for p in scenario_dir().glob("*.toml"):
        load_scenario(p)
