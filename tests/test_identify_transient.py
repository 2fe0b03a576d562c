"""Transient realisation (decimated least-squares Markov parameters + ERA, back at the sample
rate) on a known continuous system, checked against scipy's zero-order-hold discretisation."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from wingwatch.daemon.errors import IdentificationError
from wingwatch.daemon.identify.modes import modal_parameters
from wingwatch.daemon.identify.transient import (fir_markov, fir_markov_joint, realise_transient,
                                                 resample_realisation)

RATE = 1000.0
W1, Z1, POLE = 2 * np.pi * 3.0, 0.05, -2.0  # a 3 Hz bending-like mode and a slow wake-like pole


def plant():
    Ac = np.array([[0, 1, 0], [-W1 * W1, -2 * Z1 * W1, 0], [0, 0, POLE]])
    Bc = np.array([[0.0], [1.0], [1.0]])
    Cc = np.array([[0.0, 0.02, 1.0], [5.0, 0.0, 0.3]])
    return Ac, Bc, Cc


def record(n=30000, noise=1e-3, seed=0):
    rng = np.random.default_rng(seed)
    Ac, Bc, Cc = plant()
    b, a = scipy.signal.butter(4, 20, fs=RATE)
    u = 5 * scipy.signal.lfilter(b, a, rng.standard_normal(n))
    sysd = scipy.signal.cont2discrete((Ac, Bc, Cc, np.zeros((2, 1))), 1 / RATE, method="zoh")
    _, y, _ = scipy.signal.dlsim(sysd[:4] + (1 / RATE,), u)
    y = y + rng.normal(0.0, noise * y.std(axis=0), y.shape)
    return u, y, sysd


def test_recovers_rank_modes_and_slow_pole():
    u, y, _ = record()
    fit = realise_transient(u, y, RATE, max_rank=8)
    assert fit.rank == 3  # the Hankel spectrum's gap after three states
    m = modal_parameters(fit.A, 1 / RATE)
    osc = np.argmax(m.frequency_hz)
    # Reference: the continuous plant itself (3.000 Hz, zeta = 0.05, real pole at -2 1/s).
    # Tolerances: 0.5 % in frequency, 5 % in damping, 3 % on the slow pole, set by the
    # boxcar-versus-hold mismatch of the decimation and 0.1 % output noise.
    assert m.frequency_hz[osc] == pytest.approx(3.0, rel=5e-3)
    assert m.damping[osc] == pytest.approx(Z1, rel=0.05)
    real = np.log(np.linalg.eigvals(fit.A).astype(complex)) * RATE
    slow = real[np.argmin(np.abs(real.imag))]
    assert slow.real == pytest.approx(POLE, rel=0.03)


def test_impulse_response_at_the_sample_rate():
    u, y, sysd = record()
    fit = realise_transient(u, y, RATE, rank=3)
    _, h_true = scipy.signal.dimpulse(sysd[:4] + (1 / RATE,), n=3000)
    _, h_fit = scipy.signal.dimpulse((fit.A, fit.B, fit.C, np.zeros((2, 1)), 1 / RATE), n=3000)
    # Reference: scipy.signal.dimpulse of the zero-order-hold plant. 10 %: the energy of the
    # error, dominated by the first few ms that a 50 Hz decimated model cannot resolve.
    for ht, hf in zip(h_true, h_fit):
        assert np.linalg.norm(hf - ht) / np.linalg.norm(ht) < 0.10


def test_fir_markov_exact_on_noise_free_fir():
    rng = np.random.default_rng(2)
    u = rng.standard_normal(2000)
    h = np.array([0.0, 1.0, 0.5, -0.25, 0.125])
    r = np.convolve(u, h)[:2000]
    mk = fir_markov(u, r, 6)
    np.testing.assert_allclose(mk[:, 0, 0], np.r_[h, 0.0, 0.0], atol=1e-10)  # numpy convolve


def test_joint_fit_separates_columns_from_a_smooth_lag():
    # A known system in the model class: y = 2 a + 0.3 a_dot + 0.05 a_ddot + sum_j h_j a_dot(k-j),
    # with a smooth decaying h (a first-order lag, the shape the TC prior describes). The input
    # is one smoothed step of a, as in a calibration pitch-up: there a free impulse response can
    # mimic a_ddot, so an unregularised joint fit is ill-posed; the prior must pick the columns.
    dt, n = 0.02, 1500
    t = np.arange(n) * dt
    a = 0.07 * 0.5 * (1 - np.cos(np.pi * np.clip((t - 5.0) / 0.4, 0, 1)))  # 0.4 s smoothed step
    ad, add = np.gradient(a, dt), np.gradient(np.gradient(a, dt), dt)
    h = -0.4 * 0.93 ** np.arange(1, 201) * dt * 20  # lag kernel, lags 1..200
    y = 2 * a + 0.3 * ad + 0.05 * add + np.convolve(ad, np.r_[0.0, h])[:n]
    rng = np.random.default_rng(5)
    y = y + 1e-4 * rng.standard_normal(n)
    je = fir_markov_joint(ad, np.column_stack([a, ad, add]), y, 200)
    # the truth is constructed here; tolerance 2 % of each column (the direct rate term and the
    # first lag of a smooth input trade off a little; common practice, no source)
    np.testing.assert_allclose(je.beta[:, 0], [2.0, 0.3, 0.05], rtol=0.02)
    assert np.linalg.norm(je.markov[1:, 0, 0] - h) < 0.05 * np.linalg.norm(h)
    assert je.markov[0, 0, 0] == 0.0  # the direct term is the rate column
    sd = np.sqrt(np.diagonal(je.beta_cov[0]))
    assert np.all(np.abs(je.beta[:, 0] - [2.0, 0.3, 0.05]) < 5 * sd + 1e-9)


def _zoh(Ac, Bc, dt):
    n = Ac.shape[0]
    A, B, *_ = scipy.signal.cont2discrete((Ac, Bc, np.eye(n), np.zeros((n, 1))), dt, method="zoh")
    return A, B


def test_resample_in_the_eigenbasis_matches_zoh_both_ways_and_is_repeatable(monkeypatch):
    """Down to the sample rate (the slow layer) and up to a controller step (the MPC example),
    a slow pole near 1 included; the eigenbasis route never calls scipy's logm, whose last
    bits vary from call to call on some of the slow layer's matrices (which broke exact
    replay), and gives the same bytes every time."""
    import scipy.linalg

    def no_logm(*a, **k):
        raise AssertionError("logm called for a well-conditioned realisation")

    monkeypatch.setattr(scipy.linalg, "logm", no_logm)
    Ac, Bc, _ = plant()
    Ac = scipy.linalg.block_diag(Ac, [[-0.05]])  # a very slow state: pole exp(-0.05 dt) ~ 1
    Bc = np.vstack([Bc, [[0.3]]])
    for dt_from, dt_to in ((0.02, 0.001), (0.001, 0.005)):
        A0, B0 = _zoh(Ac, Bc, dt_from)
        A1, B1 = resample_realisation(A0, B0, dt_from, dt_to)
        A1r, B1r = _zoh(Ac, Bc, dt_to)  # scipy cont2discrete (ZOH) as reference
        np.testing.assert_allclose(A1, A1r, atol=1e-11)
        np.testing.assert_allclose(B1, B1r, atol=1e-13)
        again = {resample_realisation(A0, B0, dt_from, dt_to)[1].tobytes() for _ in range(50)}
        assert again == {B1.tobytes()}


def test_resample_of_a_nearly_defective_realisation_falls_back_and_stays_exact(monkeypatch):
    # A 2 x 2 Jordan block (a repeated real pole): no eigenbasis, so the matrix logarithm of
    # the augmented system is used. Continuous form from log(lam I + N) = log(lam) I + N / lam.
    import scipy.linalg

    calls = []
    logm = scipy.linalg.logm
    monkeypatch.setattr(scipy.linalg, "logm", lambda M: calls.append(M.shape) or logm(M))
    lam, dt = 0.9, 0.02
    Ac = np.array([[np.log(lam), 1.0 / lam], [0.0, np.log(lam)]]) / dt
    Bc = np.array([[0.5], [1.0]])
    A0, B0 = _zoh(Ac, Bc, dt)
    A1, B1 = resample_realisation(A0, B0, dt, 0.001)
    assert calls == [(3, 3)]  # the fallback ran, on the augmented matrix
    A1r, B1r = _zoh(Ac, Bc, 0.001)
    np.testing.assert_allclose(A1, A1r, atol=1e-10)
    np.testing.assert_allclose(B1, B1r, atol=1e-12)


def test_resample_round_trip_and_refusals():
    Ac, Bc, _ = plant()
    A10, B10, *_ = scipy.signal.cont2discrete((Ac, Bc, np.eye(3), np.zeros((3, 1))), 0.01,
                                              method="zoh")
    A1, B1 = resample_realisation(A10, B10, 0.01, 0.001)
    A1r, B1r, *_ = scipy.signal.cont2discrete((Ac, Bc, np.eye(3), np.zeros((3, 1))), 0.001,
                                              method="zoh")
    np.testing.assert_allclose(A1, A1r, atol=1e-10)  # scipy cont2discrete (ZOH) as reference
    np.testing.assert_allclose(B1, B1r, atol=1e-12)
    with pytest.raises(IdentificationError, match="negative real axis"):
        resample_realisation(np.array([[-0.5]]), np.array([[1.0]]), 0.01, 0.001)
    with pytest.raises(IdentificationError, match="too few"):
        realise_transient(np.zeros(500), np.zeros((500, 2)), RATE)


def test_tc_kernel_inverse_and_log_determinant_in_closed_form():
    from wingwatch.daemon.identify.transient import _tc_kernel, _tc_precision, _tc_precision_dense

    # Reference: numpy.linalg.inv and slogdet of the kernel matrix itself.
    for n, lam in [(2, 0.5), (12, 0.9), (60, 0.97), (120, 0.995)]:
        P = _tc_kernel(n, lam)
        Q = _tc_precision_dense(n, lam)
        np.testing.assert_allclose(Q @ P, np.eye(n), atol=1e-9)
        np.testing.assert_allclose(Q, np.linalg.inv(P), rtol=1e-7, atol=1e-7 * np.abs(Q).max())
        assert _tc_precision(n, lam)[2] == pytest.approx(np.linalg.slogdet(P)[1], rel=1e-10)


def _textbook_kernel_grid(seed=7, n=160, lags=12):
    """A short noisy FIR record and, at every (decay, scale) grid point of fir_markov, the
    textbook N-dimensional log marginal likelihood r ~ N(0, c V P V^T + s2 I)
    (scipy.stats.multivariate_normal) and posterior mean c P V^T (c V P V^T + s2 I)^-1 r
    (Chen, Ohlsson and Ljung, Automatica 2012, eqs. 10-12, from memory)."""
    import scipy.stats

    from wingwatch.daemon.identify.transient import DECAYS, SCALES, _tc_kernel

    rng = np.random.default_rng(seed)
    u = rng.standard_normal(n)
    h_true = 0.8 ** np.arange(lags + 1) * np.sin(0.7 * np.arange(lags + 1))
    r = np.convolve(u, h_true)[:n] + 0.3 * rng.standard_normal(n)
    p = lags + 1
    V = np.lib.stride_tricks.sliding_window_view(u, p)[:, ::-1]
    R = r[lags:]
    h_ls, *_ = np.linalg.lstsq(V, R, rcond=None)
    s2 = np.sum((R - V @ h_ls) ** 2) / (R.size - p)
    base = np.trace(V.T @ V) / p
    ll = np.empty((len(DECAYS), len(SCALES)))
    mean = np.empty((len(DECAYS), len(SCALES), p))
    for di, lam in enumerate(DECAYS):
        P = _tc_kernel(p, lam)
        for si, sc in enumerate(SCALES):
            c = sc * np.var(R) / base
            S = c * V @ P @ V.T + s2 * np.eye(R.size)
            ll[di, si] = scipy.stats.multivariate_normal(np.zeros(R.size), S,
                                                         allow_singular=True).logpdf(R)
            mean[di, si] = c * P @ V.T @ np.linalg.solve(S, R)
    return u, r, lags, ll, mean


def test_fir_markov_is_the_marginal_likelihood_choice_and_posterior_mean():
    """The (L+1)-dimensional form against the textbook N-dimensional one over the same grid
    (_textbook_kernel_grid): the maximum-likelihood point and its posterior mean."""
    u, r, lags, ll, mean = _textbook_kernel_grid()
    chosen: list = []
    mk = fir_markov(u, r, lags, chosen=chosen)
    best = np.unravel_index(np.argmax(ll), ll.shape)
    assert tuple(chosen[0]) == tuple(best)
    np.testing.assert_allclose(mk[:, 0, 0], mean[best], rtol=1e-6, atol=1e-9)


def test_era_on_shared_hankel_factors_is_bit_identical():
    from wingwatch.daemon.identify.era import era, hankel_factors, markov_of

    rng = np.random.default_rng(3)
    A = np.diag([0.9, 0.5, -0.3, 0.7]) + 0.05 * rng.standard_normal((4, 4))
    mk = markov_of(A, rng.standard_normal((4, 1)), rng.standard_normal((2, 4)), np.zeros((2, 1)), 31)
    fac = hankel_factors(mk, 15, 15)
    U0 = fac.U.copy()
    for rank in (1, 2, 4, 3):
        a, b = era(mk, rank, 15, 15), era(mk, rank, 15, 15, factors=fac)
        for x, y in ((a.A, b.A), (a.B, b.B), (a.C, b.C), (a.hankel_sv, b.hankel_sv)):
            assert np.array_equal(x, y)
    assert np.array_equal(fac.U, U0)  # the sign fixing did not touch the shared factors
    other = era(mk, 2, 14, 16, factors=fac)  # another block shape: the factors are not used
    assert np.array_equal(other.A, era(mk, 2, 14, 16).A)


def test_state_map_matches_lstsq_and_is_minimum_norm_when_rank_deficient():
    from wingwatch.daemon.identifier import _state_map

    rng = np.random.default_rng(5)
    X = rng.standard_normal((3000, 5)) * np.array([1.0, 10.0, 0.1, 3.0, 1e-3])
    T = rng.standard_normal((5, 5))
    Y = X @ T + 1e-3 * rng.standard_normal((3000, 5))
    ref, *_ = np.linalg.lstsq(X, Y, rcond=None)  # reference: numpy's SVD least squares
    np.testing.assert_allclose(_state_map(X, Y), ref, rtol=1e-8, atol=1e-8 * np.abs(ref).max())
    Xd = np.column_stack([X[:, :3], X[:, 0] + X[:, 1]])  # a dependent column
    ref_d, *_ = np.linalg.lstsq(Xd, Y, rcond=1e-10)
    Td = _state_map(Xd, Y)
    assert np.all(np.isfinite(Td))  # not unique: the same least-squares residual is what counts
    assert np.linalg.norm(Xd @ Td - Y) == pytest.approx(np.linalg.norm(Xd @ ref_d - Y), rel=1e-9)


def test_markov_draws_have_the_textbook_posterior_mean_and_covariance():
    """Draws of the Markov parameters against the Gaussian posterior written out in the
    N-dimensional (function-space) form: mean c P V^T S^-1 r and covariance c P - c P V^T S^-1
    V P c with S = c V P V^T + s2 I (C. E. Rasmussen and C. K. I. Williams, "Gaussian Processes
    for Machine Learning", 2006, eqs. 2.8 and 2.24, from memory), at the hyperparameters
    fir_markov chose. 40000 draws: sampling error of a covariance entry about 1 % of the
    diagonal."""
    from wingwatch.daemon.identify.transient import (DECAYS, SCALES, MarkovEstimate, _tc_kernel,
                                                     markov_draws)

    rng = np.random.default_rng(5)
    n, lags = 200, 10
    u = rng.standard_normal(n)
    h_true = 0.7 ** np.arange(lags + 1) * np.cos(0.9 * np.arange(lags + 1))
    r = np.column_stack([np.convolve(u, h_true)[:n], np.convolve(u, -0.5 * h_true)[:n]])
    r = r + np.array([0.2, 0.05]) * rng.standard_normal((n, 2))
    chosen, post = [], []
    mk = fir_markov(u, r, lags, chosen=chosen, posterior=post)
    est = MarkovEstimate(markov=mk, dt=1.0, decimate=1, hankel_sv=np.zeros(0), posterior=post)
    D = markov_draws(est, 40000, np.random.Generator(np.random.PCG64(1)), serial=False)
    p = lags + 1
    V = np.lib.stride_tricks.sliding_window_view(u, p)[:, ::-1]
    R = r[lags:]
    base = np.trace(V.T @ V) / p
    for j in range(2):
        h_ls, *_ = np.linalg.lstsq(V, R[:, j], rcond=None)
        s2 = np.sum((R[:, j] - V @ h_ls) ** 2) / (R.shape[0] - p)
        di, si = chosen[j]
        cP = SCALES[si] * np.var(R[:, j]) / base * _tc_kernel(p, DECAYS[di])
        S = V @ cP @ V.T + s2 * np.eye(R.shape[0])
        mean = cP @ V.T @ np.linalg.solve(S, R[:, j])
        cov = cP - cP @ V.T @ np.linalg.solve(S, V @ cP)
        x = D[:, :, j, 0]
        np.testing.assert_allclose(mk[:, j, 0], mean, rtol=1e-6, atol=1e-9)
        assert np.abs(x.mean(axis=0) - mean).max() < 0.03 * np.sqrt(np.diag(cov)).max()
        err = np.abs(np.cov(x, rowvar=False) - cov).max()
        assert err < 0.03 * np.diag(cov).max(), (err, np.diag(cov).max())
    with pytest.raises(ValueError, match="posterior"):
        markov_draws(MarkovEstimate(markov=mk, dt=1.0, decimate=1, hankel_sv=np.zeros(0)), 2,
                     np.random.Generator(np.random.PCG64(1)))


def test_fir_markov_warm_start_ends_at_a_local_optimum_of_the_marginal_likelihood():
    """The warm start's compass search (Kolda, Lewis and Torczon, SIAM Review 2003) against the
    textbook log-likelihood of every grid point (_textbook_kernel_grid): from any start it ends
    at a point no axis neighbour beats, from the global optimum it stays there, and its
    estimate is that point's posterior mean."""
    from wingwatch.daemon.identify.transient import DECAYS, SCALES

    u, r, lags, ll, mean = _textbook_kernel_grid()
    best = np.unravel_index(np.argmax(ll), ll.shape)
    for start in [(0, 0), (5, 10), (2, 3), best]:
        chosen: list = []
        mk = fir_markov(u, r, lags, hyper=[list(start)], chosen=chosen)
        d, s = chosen[0]
        for dd, ds in ((-1, 0), (1, 0), (0, -1), (0, 1)):
            if 0 <= d + dd < len(DECAYS) and 0 <= s + ds < len(SCALES):
                assert ll[d, s] >= ll[d + dd, s + ds] - 1e-9
        np.testing.assert_allclose(mk[:, 0, 0], mean[d, s], rtol=1e-6, atol=1e-9)
        if start == best:
            assert (d, s) == tuple(best)


def test_posterior_widening_for_serially_correlated_residuals():
    """The residual's lag-one autocorrelation sets the widening (1 + rho) / (1 - rho) (AR(1)
    long-run variance; Box, Jenkins and Reinsel, from memory): about 1 for white noise, about
    4 for AR(1) noise with rho = 0.6 (rho estimated from 3000 samples: sd about 0.015), and
    the draws' spread follows it."""
    from wingwatch.daemon.identify.transient import MarkovEstimate, markov_draws

    rng = np.random.default_rng(12)
    n, lags = 3000, 10
    u = rng.standard_normal(n)
    h_true = 0.7 ** np.arange(lags + 1)
    clean = np.convolve(u, h_true)[:n]
    white = 0.2 * rng.standard_normal(n)
    ar = scipy.signal.lfilter([1.0], [1.0, -0.6], 0.2 * rng.standard_normal(n))
    infl = []
    for noise in (white, ar):
        post: list = []
        mk = fir_markov(u, clean + noise, lags, posterior=post)
        infl.append(post[0][2])
        est = MarkovEstimate(markov=mk, dt=1.0, decimate=1, hankel_sv=np.zeros(0), posterior=post)
        gen = np.random.Generator(np.random.PCG64(3))
        wide = markov_draws(est, 4000, gen).std(axis=0)
        narrow = markov_draws(est, 4000, np.random.Generator(np.random.PCG64(3)),
                              serial=False).std(axis=0)
        np.testing.assert_allclose(wide / narrow, np.sqrt(post[0][2]), rtol=1e-9)
    assert 1.0 <= infl[0] < 1.15
    assert infl[1] == pytest.approx(4.0, rel=0.2)
