"""CUSUM: Siegmund's ARL approximation against the published table values, and the detector's
simulated run lengths on Gaussian data against the approximation."""

from __future__ import annotations

import numpy as np
import pytest

from wingwatch.daemon.watch.cusum import Cusum, siegmund_arl, threshold_for_arl


@pytest.mark.parametrize(
    "h, one, two",
    # Siegmund, "Sequential Analysis" (1985), CUSUM ARL approximation, k = 0.5, unit-variance
    # Gaussian: h=4 -> 338 one-sided / 169 two-sided; h=5 -> 938 / 469 (values in the brief,
    # recomputed from the formula).
    [(4.0, 338, 169), (5.0, 938, 469)],
)
def test_siegmund_table(h, one, two):
    assert siegmund_arl(h, 0.5) == pytest.approx(one, abs=0.6)
    assert siegmund_arl(h, 0.5, two_sided=True) == pytest.approx(two, abs=0.6)


def test_siegmund_shift_and_inverse():
    # Siegmund (1985): a 1-sigma shift, h = 5, two-sided: ARL about 10.3
    assert siegmund_arl(5.0, 0.5, 1.0, two_sided=True) == pytest.approx(10.3, abs=0.05)
    for arl in (169.0, 469.0, 1e5):
        h = threshold_for_arl(arl, 0.5)
        assert siegmund_arl(h, 0.5, two_sided=True) == pytest.approx(arl, rel=1e-8)


def _run_lengths(h, shift, chains=4000, steps=4000, seed=1):
    rng = np.random.default_rng(seed)
    c = Cusum(chains, k=0.5, h=h)
    first = np.full(chains, -1)
    for t in range(steps):
        alarm = c.update(rng.standard_normal(chains) + shift)
        new = alarm & (first < 0)
        first[new] = t + 1
        if (first > 0).all():
            break
    assert (first > 0).mean() > 0.99  # nearly every chain alarmed within the horizon
    return first[first > 0]


@pytest.mark.parametrize("h, shift", [(4.0, 0.0), (5.0, 1.0), (3.0, 0.0)])
def test_simulated_arl_within_20_percent_of_siegmund(h, shift):
    # Siegmund's approximation is accurate to a few percent for Gaussian increments; the issue
    # asks for agreement within 20 %. With 4000 chains the Monte Carlo error of the mean is
    # about 1.6 % (run lengths are roughly geometric: sd ~ mean).
    rl = _run_lengths(h, shift)
    assert rl.mean() == pytest.approx(siegmund_arl(h, 0.5, shift, two_sided=True), rel=0.20)


def test_cusum_state_round_trip_and_restart():
    rng = np.random.default_rng(3)
    a = Cusum(3, 0.5, 4.0)
    a.update(rng.standard_normal((50, 3)) + [0.0, 2.0, -2.0])
    assert a.alarm.tolist() == [False, True, True]
    b = Cusum(3, 0.5, 4.0)
    b.load_state_dict(a.state_dict())
    z = rng.standard_normal((10, 3))
    assert np.array_equal(a.update(z), b.update(z))
    assert np.array_equal(a.statistic, b.statistic)
    a.restart(np.array([False, True, False]))
    assert a.s_up[1] == 0 and a.s_down[1] == 0


def test_invalid_parameters_name_themselves():
    with pytest.raises(ValueError, match="h must"):
        Cusum(1, 0.5, 0.0)
    with pytest.raises(ValueError, match="k must"):
        siegmund_arl(4.0, -1.0)
