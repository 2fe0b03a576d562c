"""Causal Savitzky-Golay differentiator and delay line."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy.signal import savgol_coeffs, savgol_filter

from wingwatch.daemon.identify.differentiate import (
    DelayLine,
    SavgolDifferentiator,
    differentiate,
    lag_of,
    noise_gain,
    savgol_kernels,
)


@pytest.mark.parametrize("window,order,pos", [(5, 2, None), (21, 3, None), (31, 4, 30), (16, 3, 4)])
def test_kernels_match_scipy_savgol_coeffs(window, order, pos):
    dt = 0.002
    ours = savgol_kernels(window, order, dt=dt, pos=pos)
    p = (window - 1) // 2 if pos is None else pos
    for d in range(3):
        ref = savgol_coeffs(window, order, deriv=d, delta=dt, pos=p, use="conv")
        # scipy.signal.savgol_coeffs (same least-squares fit); 1e-9 of the largest tap allows
        # for the pseudo-inverse of a different Vandermonde scaling
        assert_allclose(ours[d], ref, rtol=0, atol=1e-9 * np.abs(ref).max())


def test_causal_output_is_centred_savgol_filter_delayed_by_lag():
    rng = np.random.default_rng(0)
    x = np.cumsum(rng.standard_normal(400)) * 0.01
    dt, window, order = 0.001, 25, 3
    out, _ = differentiate(x, window, order, dt)
    lag = lag_of(window)
    for d in range(3):
        ref = savgol_filter(x, window, order, deriv=d, delta=dt)
        k = np.arange(window - 1, x.size)  # interior: full window available
        # scipy.signal.savgol_filter (symmetric filter) read lag samples back
        assert_allclose(out[k, d], ref[k - lag], rtol=1e-9, atol=1e-9 * np.abs(ref).max())


def test_polynomial_derivatives_are_exact():
    dt = 0.01
    t = np.arange(200) * dt
    x = 0.3 + 2.0 * t - 1.5 * t**2 + 0.7 * t**3
    out, _ = differentiate(x, window=15, order=3, dt=dt)
    lag = lag_of(15)
    tl = t[14:] - lag * dt
    # a degree-3 least-squares fit reproduces a cubic exactly (Savitzky & Golay 1964)
    assert_allclose(out[14:, 0], 0.3 + 2.0 * tl - 1.5 * tl**2 + 0.7 * tl**3, rtol=1e-10)
    assert_allclose(out[14:, 1], 2.0 - 3.0 * tl + 2.1 * tl**2, rtol=1e-9)
    assert_allclose(out[14:, 2], -3.0 + 4.2 * tl, rtol=1e-8, atol=1e-8)


@settings(max_examples=25, deadline=None)
@given(cuts=st.lists(st.integers(min_value=0, max_value=300), max_size=8))
def test_streaming_equals_batch_exactly(cuts):
    rng = np.random.default_rng(1)
    x = rng.standard_normal(300)
    whole, zf = differentiate(x, 21, 3, 1e-3)
    sg = SavgolDifferentiator(21, 3, rate=1000.0)
    edges = [0] + sorted(cuts) + [300]
    parts = [sg.update(x[a:b]) for a, b in zip(edges[:-1], edges[1:])]
    # the same floating-point operations per sample whatever the framing: bit-for-bit equal
    assert np.array_equal(np.vstack(parts), whole)
    assert np.array_equal(sg.state_dict()["zi"], zf)


def test_constant_past_start_gives_zero_derivatives():
    out, _ = differentiate(np.full(30, 2.5), 11, 2, 0.01)
    assert_allclose(out[:, 0], 2.5, rtol=1e-12)  # value taps sum to 1
    assert_allclose(out[:, 1:], 0.0, atol=1e-9)  # derivative taps sum to 0


def test_noise_gain_and_lag():
    window, order, dt = 21, 3, 0.001
    b = savgol_kernels(window, order, dt)
    gains = noise_gain(b)
    for d in range(3):
        ref = savgol_coeffs(window, order, deriv=d, delta=dt)
        assert gains[d] == pytest.approx(np.sqrt(np.sum(ref**2)), rel=1e-9)  # sqrt(sum b^2)
    rng = np.random.default_rng(2)
    noise = rng.standard_normal(200_000)
    out, _ = differentiate(noise, window, order, dt)
    # empirical std of filtered white noise; 200k samples give about 1 % sampling error
    assert_allclose(out[window:].std(axis=0), gains, rtol=0.03)
    assert lag_of(21) == 10 and lag_of(21, pos=20) == 0 and lag_of(16, pos=4) == 11
    assert SavgolDifferentiator(21, 3, 1000.0, pos=15).lag == 5


def test_delay_line_aligns_signals_with_the_differentiator():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((120, 2))
    dl = DelayLine(7, n_channels=2)
    parts = [dl.update(x[a : a + 13]) for a in range(0, 120, 13)]
    delayed = np.vstack(parts)
    assert np.array_equal(delayed[7:], x[:-7])  # out[k] = x[k - lag]
    assert np.array_equal(delayed[:7], np.repeat(x[:1], 7, axis=0))  # constant past
    # a quadratic passes a degree-2 fit unchanged, so the delayed raw signal and the smoothed
    # value coincide: the two paths are aligned
    t = np.arange(100) * 0.01
    sig = 1.0 + t - 2.0 * t**2
    sg = SavgolDifferentiator(11, 2, rate=100.0)
    line = DelayLine(sg.lag)
    smooth = np.concatenate([sg.update(sig[a : a + 10])[:, 0] for a in range(0, 100, 10)])
    raw = np.concatenate([line.update(sig[a : a + 10]) for a in range(0, 100, 10)])
    assert_allclose(smooth[10:], raw[10:], rtol=1e-12)


def test_state_round_trip_and_validation():
    x = np.sin(np.arange(50) * 0.1)
    sg = SavgolDifferentiator(9, 3, rate=50.0)
    sg.update(x[:20])
    twin = SavgolDifferentiator(9, 3, rate=50.0)
    twin.load_state_dict(sg.state_dict())
    assert np.array_equal(sg.update(x[20:]), twin.update(x[20:]))
    dl = DelayLine(3)
    dl.update(x[:5])
    dl2 = DelayLine(3)
    dl2.load_state_dict(dl.state_dict())
    assert np.array_equal(dl.update(x[5:]), dl2.update(x[5:]))
    with pytest.raises(ValueError):
        savgol_kernels(5, 5)
    with pytest.raises(ValueError):
        savgol_kernels(7, 1)  # order 1 cannot give a second derivative
    with pytest.raises(ValueError):
        SavgolDifferentiator(9, 3, rate=0.0)
    with pytest.raises(ValueError):
        DelayLine(-1)
