"""Grid and step convergence of the rig on the calibration manoeuvre (the reference model's input).

The first 7 s of the calibration scenario (quiet hold, the 0.4 s pitch-up at t = 5 s, 1.6 s of
hold) carry both peaks; the rest of the 25 s run is a settling hold and is left out for speed.
"""

from dataclasses import replace

import numpy as np
import pytest

from wingwatch.daemon.rig.plate import PlateSimulator
from wingwatch.daemon.rig.scenario import Motion, load_scenario

SECONDS = 7.0


def peaks(n_panels=None, substeps=1):
    sc = load_scenario("calibration")
    num = replace(sc.numerics, n_panels=n_panels or sc.numerics.n_panels, substeps=substeps)
    sim = PlateSimulator(sc.article, sc.fluid, num, sc.viscous, flow_speed=sc.flow_speed_m_s,
                         dt=1.0 / sc.rate_hz)
    motion = Motion(sc.motion, np.random.default_rng(0))
    n = int(SECONDS * sc.rate_hz)
    ts = (-1 + (np.arange(n * substeps) + 1.0) / substeps) / sc.rate_hz
    a, ad, add = motion.evaluate(ts)
    sim.reset(a[0])
    lift, kappa = sim.run_substeps(a, ad, add) if substeps > 1 else sim.run(a, ad, add)
    return np.max(lift), np.max(kappa[:, 0])


@pytest.fixture(scope="module")
def base():
    return peaks()


def test_halving_the_time_step_changes_peaks_by_under_one_percent(base):
    fine = peaks(substeps=2)
    # BDF2 is second order: measured change 0.02 % (lift) and 0.2 % (root curvature); the brief's
    # convergence criterion is 1-2 %, we hold the step to 1 %
    assert abs(fine[0] / base[0] - 1) < 0.01
    assert abs(fine[1] / base[1] - 1) < 0.01


def test_doubling_the_panels_changes_peaks_by_under_two_percent(base):
    fine = peaks(n_panels=64)
    # the lumped-vortex method converges at first order in h; the brief's criterion: 2 %
    assert abs(fine[0] / base[0] - 1) < 0.02
    assert abs(fine[1] / base[1] - 1) < 0.02
    # and the change does shrink with the grid (32 -> 64 smaller than 16 -> 32)
    coarse = peaks(n_panels=16)
    assert abs(fine[1] - base[1]) < abs(base[1] - coarse[1])
