"""Checks of the rig's panel aerodynamics against thin-airfoil theory, Wagner and Theodorsen.

All runs here use a rigid plate (no modes) with the low-Reynolds-number and separation factors
switched off, so the simulator is the bare unsteady lumped-vortex method.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from wingwatch.daemon.rig.plate import Article, Numerics, PlateSimulator, ViscousModel
from wingwatch.daemon.rig.theory import (theodorsen, theodorsen_noncirculatory, theodorsen_pitch_lift,
                                         wagner_jones)

U = 0.3
CHORD = 0.1
B = CHORD / 2
INVISCID = ViscousModel(low_re=False, stall=False)


def rigid(n_panels=32, pivot=0.0, dt=1e-3, **wake):
    return PlateSimulator(Article(n_modes=0, pivot=pivot), numerics=Numerics(n_panels=n_panels, **wake),
                          viscous=INVISCID, flow_speed=U, dt=dt)


def cl(sim, lift):
    return lift / (0.5 * sim.fluid.density_kg_m3 * sim.flow_speed**2 * CHORD)


@pytest.mark.parametrize("n_panels", [1, 2, 4, 16, 64])
def test_steady_lift_slope_is_two_pi(n_panels):
    sim = rigid(n_panels)
    alpha = 1e-3
    slope = sim.steady_state(alpha)["C_L"] / alpha
    # thin-airfoil theory (Glauert): dC_L/dalpha = 2 pi. The lumped-vortex 1/4-3/4 rule is exact
    # for a flat plate at any panel count (Katz & Plotkin 2001, sec. 11.1), so the only departure
    # is the cos(alpha) projection of the normal force, 5e-7 at alpha = 1e-3: rtol 1e-6.
    assert_allclose(slope, 2 * np.pi, rtol=1e-6)


def test_time_stepped_lift_settles_on_two_pi():
    # the time-stepping solver, not the steady solve: a smoothed ramp, then a long hold; by then the
    # starting vortex is 300 semichords away and only its 1/s tail is left
    sim = rigid(16, dt=5e-3)
    n = 10000
    t = np.arange(1, n + 1) * sim.dt
    a0 = 0.01
    s = np.clip(t / 0.2, 0, 1)
    alpha = a0 * s * s * s * (10 - 15 * s + 6 * s * s)
    lift, _ = sim.run(alpha, np.gradient(alpha, sim.dt), np.zeros(n))
    slope = cl(sim, lift[-1]) / a0
    # thin-airfoil theory 2 pi; after s = 300 semichords the Wagner tail left is of order 1/s
    # (about 0.3 %; the deficiency of an indicial response decays algebraically), so rtol 1 %
    assert_allclose(slope, 2 * np.pi, rtol=0.01)
    assert slope < 2 * np.pi  # approached from below, as Wagner's function is


def test_low_re_and_separation_factors_lower_the_slope():
    def sim(low_re, stall):
        return PlateSimulator(Article(n_modes=0), numerics=Numerics(n_panels=16),
                              viscous=ViscousModel(low_re=low_re, stall=stall), flow_speed=U)
    base, re_only, both = sim(False, False), sim(True, False), sim(True, True)
    a = 1e-3
    ratio = re_only.steady_state(a)["C_L"] / base.steady_state(a)["C_L"]
    # the documented empirical law eta = 1 - 12/sqrt(Re), Re = U c / nu = 3e4 (docs/rig.md);
    # the panel method is linear, so the ratio is eta to rounding: rtol 1e-9
    assert_allclose(ratio, 1 - 12 / np.sqrt(U * CHORD / 1e-6), rtol=1e-9)
    hi = np.radians(14.0)
    sep = both.steady_state(hi)["C_L"] / re_only.steady_state(hi)["C_L"]
    # Kirchhoff flow (Leishman & Beddoes 1989, eq. 7): at the separation angle the logistic
    # f = (1 + e^-7)/2, factor ((1 + sqrt f)/2)^2 ~ 0.728
    f = (1 + np.exp(-7.0)) / 2
    assert_allclose(sep, ((1 + np.sqrt(f)) / 2) ** 2, rtol=1e-9)
    # near the operating point the separation factor is within 1 % of one (mild nonlinearity)
    op = np.radians(5.0)
    assert 0.99 < both.steady_state(op)["C_L"] / re_only.steady_state(op)["C_L"] < 1.0


def test_theodorsen_function_table_values():
    # Theodorsen, NACA Report 496 (1935), recomputed with scipy.special.hankel2 (brief's table)
    assert_allclose(theodorsen(0.1), 0.8319 - 0.1723j, atol=6e-5)
    assert_allclose(theodorsen(0.5), 0.5979 - 0.1507j, atol=6e-5)
    assert_allclose(theodorsen(1.0), 0.5394 - 0.1003j, atol=6e-5)


def test_theodorsen_pitch_lift_table_values():
    # The brief lists "pure pitch about the mid-chord": 5.3197 - 0.2457i, 3.8377 + 2.5023i,
    # 2.4486 + 5.9009i. Theodorsen's formula (NACA Report 496) gives exactly these for the pivot at
    # a = -1/2, i.e. the QUARTER chord; about the mid-chord (a = 0) it gives 5.2813 - 0.5071i at
    # k = 0.1. We check the values against the quarter-chord pivot.
    assert_allclose(theodorsen_pitch_lift(0.1, -0.5), 5.3197 - 0.2457j, atol=6e-5)
    assert_allclose(theodorsen_pitch_lift(0.5, -0.5), 3.8377 + 2.5023j, atol=6e-5)
    assert_allclose(theodorsen_pitch_lift(1.0, -0.5), 2.4486 + 5.9009j, atol=6e-5)
    assert abs(theodorsen_pitch_lift(0.1, 0.0) - (5.3197 - 0.2457j)) > 0.2


def harmonic_response(k, pivot, n_panels, steps_per_cycle=400, cycles=4):
    w = k * U / B
    period = 2 * np.pi / w
    sim = rigid(n_panels, pivot=pivot, dt=period / steps_per_cycle)
    n = steps_per_cycle * cycles
    t = np.arange(1, n + 1) * sim.dt
    a0 = np.radians(1.0)
    lift, _ = sim.run(a0 * np.sin(w * t), a0 * w * np.cos(w * t), -a0 * w * w * np.sin(w * t))
    c = cl(sim, lift)
    last = t > (cycles - 1) * period  # one cycle after three of transient
    X = np.column_stack([np.sin(w * t[last]), np.cos(w * t[last]), np.ones(last.sum())])
    co = np.linalg.lstsq(X, c[last], rcond=None)[0]
    # alpha = Im(a0 e^{i w t}), so C_L = Re(H) a0 sin + Im(H) a0 cos
    return (co[0] + 1j * co[1]) / a0


@pytest.mark.parametrize("k, tol", [(0.1, 0.01), (0.5, 0.02), (1.0, 0.03)])
def test_harmonic_pitch_matches_theodorsen(k, tol):
    # pivot at the quarter chord (a = -1/2), 64 panels, 400 steps per cycle, 4 cycles
    a = -0.5
    H = harmonic_response(k, 0.25, 64)
    # total lift: Theodorsen (1935) formula, recomputed with scipy (the brief's table values)
    assert abs(H - theodorsen_pitch_lift(k, a)) / abs(theodorsen_pitch_lift(k, a)) < tol
    # circulatory part: subtract the apparent-mass terms pi (i k + a k^2) and divide by the
    # quasi-steady 2 pi (1 + (1/2 - a) i k): what is left is Theodorsen's C(k), amplitude and phase.
    # Tolerance: the lumped-vortex error is O(h / b) k (about 1.5 k / N measured at 16-64 panels)
    Cm = (H - theodorsen_noncirculatory(k, a)) / (2 * np.pi * (1 + (0.5 - a) * 1j * k))
    C = theodorsen(k)
    assert abs(abs(Cm) / abs(C) - 1) < tol
    assert abs(np.angle(Cm) - np.angle(C)) < tol + 0.01  # rad; |phase(C)| is 0.18-0.25 rad here


def test_harmonic_error_falls_with_panels():
    # convergence of the discretisation toward Theodorsen at k = 1 (mid-chord pivot, a = 0)
    errs = [abs(harmonic_response(1.0, 0.5, n, steps_per_cycle=200, cycles=3) - theodorsen_pitch_lift(1.0, 0.0))
            for n in (12, 24, 48)]
    assert errs[0] > errs[1] > errs[2]
    assert errs[2] < 0.6 * errs[1]  # first-order: halving h roughly halves the error


def test_wagner_indicial_lift():
    sim = rigid(80, dt=2e-3)  # U dt = h / 2 with 80 panels
    a0 = 0.01
    n = int(20 * B / U / sim.dt)
    lift, _ = sim.run(np.full(n, a0), np.zeros(n), np.zeros(n))
    s = U * np.arange(1, n + 1) * sim.dt / B  # semichords travelled
    phi = cl(sim, lift) / (2 * np.pi * a0 * np.cos(a0))
    keep = s > 0.05  # the added-mass impulse of the first two (BDF2) steps excluded
    # Wagner's function starts at one half (R. T. Jones, NACA Report 667, 1938; from memory);
    # the panel method's start is blurred over a few panel lengths (h = 0.025 b): 0.06
    assert abs(np.interp(0.1, s, phi) - 0.5) < 0.06
    # exact Wagner values phi(1) = 0.6006, phi(5) = 0.7882, phi(10) = 0.8750 (Bisplinghoff, Ashley
    # and Halfman 1955, from memory): 2 %, the lumped-vortex O(h) error at 80 panels
    for sv, ref in ((1.0, 0.6006), (5.0, 0.7882), (10.0, 0.8750)):
        assert abs(np.interp(sv, s, phi) / ref - 1) < 0.02
    # Jones's approximation along the curve, s in [1, 20]: within 3 % (Jones itself is within
    # about 0.008 of the exact function, the rest is discretisation)
    band = keep & (s >= 1.0)
    assert np.max(np.abs(phi[band] / wagner_jones(s[band]) - 1)) < 0.03
    # monotone build-up, up to the amalgamation steps of the far wake (budget 2e-4, docs/rig.md)
    assert np.all(np.diff(phi[band]) > -2e-4)


def test_kelvin_total_circulation_is_conserved():
    sim = rigid(20, dt=1e-3)
    n = 3000
    t = np.arange(1, n + 1) * sim.dt
    sim.run(0.05 * np.sin(5 * t), 0.25 * np.cos(5 * t), -1.25 * np.sin(5 * t))
    # Kelvin's theorem: bound + wake (+ dropped) circulation stays at its initial value (zero)
    scale = np.abs(sim.bound_circulation).sum()
    assert abs(sim.total_circulation() - sim.initial_circulation) < 1e-12 * max(scale, 1.0)
    assert sim.wake.n > 100


def test_fast_wake_evaluation_matches_direct_sum():
    sim = rigid(32, dt=1e-3)
    n = 6000
    t = np.arange(1, n + 1) * sim.dt
    sim.run(0.05 * np.sin(3 * t), 0.15 * np.cos(3 * t), -0.45 * np.sin(3 * t))
    w = sim.wake
    fast, direct = w.normal_velocity(), w.normal_velocity_direct()
    assert w.fast_raw and w.fast_far
    # the far levels use Chebyshev interpolation designed for 1e-7 relative error
    assert np.max(np.abs(fast - direct)) < 1e-6 * np.max(np.abs(direct))


def test_amalgamation_changes_lift_by_less_than_its_bound():
    # same run with the default amalgamated wake and with a wake kept raw for 12 chords
    def run(**wake):
        sim = rigid(16, dt=2e-3, **wake)
        n = 2000
        t = np.arange(1, n + 1) * sim.dt
        lift, _ = sim.run(0.05 * np.sin(4 * t), 0.2 * np.cos(4 * t), -0.8 * np.sin(4 * t))
        return sim, cl(sim, lift)
    _, coarse = run()
    sim_f, fine = run(wake_raw=2000, wake_levels=0)
    assert sim_f.wake.counts[0] == 2000 and sim_f.wake.merge_error_bound == 0.0
    # the difference is set by the far wake only; 0.2 % of the lift amplitude is our budget
    assert np.max(np.abs(coarse[-500:] - fine[-500:])) < 2e-3 * np.max(np.abs(fine))
