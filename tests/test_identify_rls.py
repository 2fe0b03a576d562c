"""Block RLS: equality with batch least squares, forgetting, windup, intervals, state handling."""

import math

import numpy as np
import pytest
import scipy.signal
from numpy.testing import assert_allclose

from wingwatch.daemon.identify.rls import RecursiveLeastSquares, forgetting_factor


def regression(seed, n=1000, p=5, m=2, noise=0.1):
    rng = np.random.default_rng(seed)
    phi = rng.standard_normal((n, p)) * rng.uniform(0.5, 3.0, p)
    theta = rng.standard_normal((p, m))
    y = phi @ theta + noise * rng.standard_normal((n, m))
    return phi, y, theta


def run(est, phi, y, block):
    for k in range(0, phi.shape[0], block):
        est.update(phi[k : k + block], y[k : k + block])
    return est


def rel_err(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


def test_forgetting_factor_from_half_life():
    # definition: after half_life * rate samples the weight is 1/2
    lam = forgetting_factor(2.5, rate=400.0)
    assert lam**1000 == pytest.approx(0.5, rel=1e-12)
    assert forgetting_factor(math.inf) == 1.0
    with pytest.raises(ValueError):
        forgetting_factor(0.0)


def test_no_forgetting_equals_batch_lstsq_after_every_block():
    phi, y, _ = regression(0)
    est = RecursiveLeastSquares(5, 2, gate=0.0, prior_precision=0.0)
    for k in range(0, 1000, 10):
        est.update(phi[k : k + 10], y[k : k + 10])
        ref = np.linalg.lstsq(phi[: k + 10], y[: k + 10], rcond=None)[0]
        # Ljung & Soderstrom (1983): RLS with lam = 1 is the recursive form of least squares;
        # 1e-8 relative leaves room for the conditioning of the first 10-sample block
        assert rel_err(est.theta, ref) < 1e-8
    resid = y - phi @ ref
    # residual variance: SSE / (N - p) for ordinary least squares
    assert_allclose(est.residual_variance, (resid**2).sum(axis=0) / (1000 - 5), rtol=1e-9)
    assert est.effective_window == pytest.approx(1000.0, rel=1e-12)


def test_exponential_forgetting_equals_weighted_least_squares():
    phi, y, _ = regression(1)
    half_life = 150.0
    est = RecursiveLeastSquares(5, 2, half_life=half_life, gate=0.0, prior_precision=0.0)
    lam = est.lam
    for k in range(0, 1000, 25):
        est.update(phi[k : k + 25], y[k : k + 25])
        n = k + 25
        w = np.sqrt(lam ** np.arange(n - 1, -1, -1))[:, None]  # weights lam^(N-1-i)
        ref = np.linalg.lstsq(phi[:n] * w, y[:n] * w, rcond=None)[0]
        # Ljung & Soderstrom (1983) sec. 2.6: exponential forgetting = weighted least squares
        assert rel_err(est.theta, ref) < 1e-8
    n1 = (lam ** np.arange(1000)).sum()
    assert est.information == pytest.approx(est.information)  # finite
    assert est.effective_window == pytest.approx(n1**2 / (lam ** (2 * np.arange(1000))).sum())


@pytest.mark.parametrize("gate", [0.0, 0.1])
def test_block_size_independence(gate):
    phi, y, _ = regression(2, p=3)
    kw = dict(half_life=300.0, gate=gate, prior_precision=1e-3)
    one = run(RecursiveLeastSquares(3, 2, **kw), phi, y, 1000)
    many = run(RecursiveLeastSquares(3, 2, **kw), phi, y, 10)
    # exact exponential forgetting is block-size independent; rich data never trip the gate,
    # so the gated estimator is the same. 1e-10: rounding of two QR sequences
    assert rel_err(one.theta, many.theta) < 1e-10
    assert rel_err(one.covariance, many.covariance) < 1e-10
    assert rel_err(one.residual_variance, many.residual_variance) < 1e-10


def test_a_priori_errors_use_the_previous_estimate():
    phi, y, _ = regression(3)
    est = RecursiveLeastSquares(5, 2, half_life=200.0)
    run(est, phi[:500], y[:500], 50)
    before = est.theta
    errors = est.update(phi[500:510], y[500:510])
    # a-priori (before-update) errors e = y - Theta_(k-1)^T phi
    assert_allclose(errors, y[500:510] - phi[500:510] @ before, rtol=0, atol=0)
    assert not np.array_equal(est.theta, before)


def hold_scenario(gate, seed=7):
    """10 s rich excitation, 60 s hold at a constant regressor, 1 s of rich data, at 1 kHz."""
    rate = 1000.0
    rng = np.random.default_rng(seed)
    truth = np.array([[5.5, 0.8], [1.2, -0.3], [0.05, 0.01], [0.02, -0.01]])

    def rich(n):
        t = rng.uniform(0, 100) + np.arange(n) / rate
        a = 0.1 * np.sin(2 * np.pi * 0.7 * t) + 0.05 * np.sin(2 * np.pi * 2.3 * t + 1.0)
        ad = 0.1 * 2 * np.pi * 0.7 * np.cos(2 * np.pi * 0.7 * t) + 0.05 * 2 * np.pi * 2.3 * np.cos(
            2 * np.pi * 2.3 * t + 1.0
        )
        add = rng.standard_normal(n) * 0.5
        return np.column_stack([a, ad, add, np.ones(n)])

    def noisy(phi):
        return phi @ truth + 0.02 * rng.standard_normal((phi.shape[0], 2))

    est = RecursiveLeastSquares(4, 2, half_life=2.0, rate=rate, gate=gate)
    block = 20
    for _ in range(500):  # 10 s
        phi = rich(block)
        est.update(phi, noisy(phi))
    theta_before = est.theta
    lower, upper = est.intervals(0.99)
    trace_before = np.trace(est.covariance)
    hold = np.tile([0.08, 0.0, 0.0, 1.0], (block, 1))
    trace_max = trace_before
    for _ in range(3000):  # 60 s hold
        est.update(hold, noisy(hold))
        trace_max = max(trace_max, np.trace(est.covariance))
    excitation_hold = est.excitation
    theta_hold = est.theta
    for _ in range(50):  # 1 s of rich data again
        phi = rich(block)
        est.update(phi, noisy(phi))
    return dict(
        truth=truth, before=theta_before, hold=theta_hold, after=est.theta,
        lower=lower, upper=upper, trace_before=trace_before, trace_max=trace_max,
        excitation_hold=excitation_hold,
    )


def test_long_constant_hold_without_windup():
    out = hold_scenario(gate=0.1)
    # windup protection (after Kulhavy 1987): unexcited directions are not forgotten, so the
    # covariance cannot grow during the hold (factor 1.5 allows the excited direction to move)
    assert out["trace_max"] < 1.5 * out["trace_before"]
    assert out["excitation_hold"] < 1e-6
    half = 0.5 * (out["upper"] - out["lower"])
    # estimates move by less than their 99 % interval half-width when excitation resumes
    assert np.all(np.abs(out["after"] - out["before"]) < half)
    assert np.all(np.abs(out["hold"] - out["before"]) < half)
    assert np.all(np.abs(out["after"] - out["truth"]) < 2 * half)


def test_plain_forgetting_winds_up_in_the_same_hold():
    out = hold_scenario(gate=0.0)
    # the scenario is a real windup case: 60 s = 30 half-lives forget 2^-30 of the information
    # in the unexcited directions, so the covariance trace grows by many orders of magnitude
    assert out["trace_max"] > 1e4 * out["trace_before"]


def test_interval_coverage_without_forgetting():
    hits = total = 0
    for seed in range(200):
        rng = np.random.default_rng(1000 + seed)
        phi = np.column_stack([rng.standard_normal(60), rng.uniform(-1, 1, 60), np.ones(60)])
        truth = np.array([[1.0], [-2.0], [0.5]])
        y = phi @ truth + 0.3 * rng.standard_normal((60, 1))
        est = run(RecursiveLeastSquares(3, 1, gate=0.0, prior_precision=0.0), phi, y, 10)
        lo, hi = est.intervals(0.95)
        hits += int(np.sum((lo <= truth) & (truth <= hi)))
        total += truth.size
    # exact Student-t intervals of ordinary least squares: 95 % nominal; 600 Bernoulli trials
    # have a standard deviation of 0.9 %, so [0.92, 0.98] is a +-3.3 sigma band
    assert 0.92 <= hits / total <= 0.98


def test_interval_coverage_with_forgetting():
    hits = total = 0
    for seed in range(60):
        rng = np.random.default_rng(2000 + seed)
        n = 1500
        phi = np.column_stack([rng.standard_normal(n), np.ones(n)])
        truth = np.array([[2.0, -1.0], [0.3, 0.1]])
        y = phi @ truth + 0.2 * rng.standard_normal((n, 2))
        est = run(RecursiveLeastSquares(2, 2, half_life=100.0, gate=0.0), phi, y, 50)
        lo, hi = est.intervals(0.95)
        hits += int(np.sum((lo <= truth) & (truth <= hi)))
        total += truth.size
    # effective-window intervals (Kish n1^2/n2) are approximate: accept 85-100 % (brief)
    assert 0.85 <= hits / total <= 1.0


def test_long_run_stays_exact_and_positive_definite():
    rng = np.random.default_rng(9)
    p, blocks, n = 4, 200, 1000
    truth = rng.standard_normal((p, 1))
    est = RecursiveLeastSquares(p, 1, gate=0.0, prior_precision=0.0)
    phi_all, y_all = [], []
    for _ in range(blocks):  # 2e5 samples, the scale of hours at the rig's rate
        phi = rng.standard_normal((n, p)) + 5.0
        y = phi @ truth + 0.05 * rng.standard_normal((n, 1))
        est.update(phi, y)
        phi_all.append(phi)
        y_all.append(y)
    ref = np.linalg.lstsq(np.vstack(phi_all), np.vstack(y_all), rcond=None)[0]
    assert rel_err(est.theta, ref) < 1e-8  # Ljung & Soderstrom: lam = 1 equals batch LS
    P = est.covariance
    np.linalg.cholesky(P)  # positive definite (raises otherwise)
    assert_allclose(P, P.T, rtol=0, atol=0)  # symmetric by construction (R_f^-1 R_f^-T)


def test_transform_keeps_what_was_learned():
    rng = np.random.default_rng(11)
    n = 600
    phi = rng.standard_normal((n, 4))
    y = phi @ rng.standard_normal((4, 2)) + 0.1 * rng.standard_normal((n, 2))
    T = rng.standard_normal((2, 2)) + 2 * np.eye(2)
    phi_t = phi.copy()
    phi_t[:, 1:3] = phi[:, 1:3] @ T.T  # x' = T x for the state columns 1, 2
    kw = dict(half_life=400.0, gate=0.0, prior_precision=0.0)
    a = run(RecursiveLeastSquares(4, 2, **kw), phi[:300], y[:300], 30)
    b = run(RecursiveLeastSquares(4, 2, **kw), phi_t[:300], y[:300], 30)
    a.transform(T, columns=slice(1, 3))
    # the transformed estimator is the one fitted on transformed data (rounding only)
    assert rel_err(a.theta, b.theta) < 1e-10
    assert rel_err(a.covariance, b.covariance) < 1e-9
    assert_allclose(a.predict(phi_t[300:]), b.predict(phi_t[300:]), rtol=1e-9, atol=1e-12)
    run(a, phi_t[300:], y[300:], 30)
    run(b, phi_t[300:], y[300:], 30)
    assert rel_err(a.theta, b.theta) < 1e-10


def test_excitation_measure():
    rng = np.random.default_rng(12)
    est = RecursiveLeastSquares(3, 1, half_life=200.0)
    phi = rng.standard_normal((2000, 3))
    run(est, phi, phi @ np.ones((3, 1)), 20)
    # orthogonal unit-power regressors: correlation matrix near identity
    assert est.excitation > 0.7
    hold = np.tile([0.3, 1.0, -0.2], (20, 1))
    for _ in range(400):
        est.update(hold, hold @ np.ones((3, 1)))
    assert est.excitation < 1e-6  # one direction only


def test_state_dict_round_trip_and_reset():
    phi, y, _ = regression(13)
    est = run(RecursiveLeastSquares(5, 2, half_life=100.0), phi[:500], y[:500], 10)
    saved = est.state_dict()
    twin = RecursiveLeastSquares(5, 2, half_life=100.0)
    twin.load_state_dict(saved)
    run(est, phi[500:], y[500:], 10)
    run(twin, phi[500:], y[500:], 10)
    assert np.array_equal(est.theta, twin.theta)  # exact round trip
    assert np.array_equal(est.covariance, twin.covariance)
    est.reset()
    fresh = RecursiveLeastSquares(5, 2, half_life=100.0)
    for key, value in fresh.state_dict().items():
        assert np.array_equal(est.state_dict()[key], value), key
    with pytest.raises(ValueError):
        RecursiveLeastSquares(4, 2).load_state_dict(saved)


def test_constructor_and_update_validation():
    with pytest.raises(ValueError, match="n_regressors"):
        RecursiveLeastSquares(0)
    with pytest.raises(ValueError, match="gate"):
        RecursiveLeastSquares(2, gate=1.0)
    with pytest.raises(ValueError, match="half_life"):
        RecursiveLeastSquares(2, half_life=-1.0)
    est = RecursiveLeastSquares(2, 1)
    with pytest.raises(ValueError, match="phi"):
        est.update(np.zeros((3, 3)), np.zeros(3))
    with pytest.raises(ValueError, match="finite"):
        est.update(np.array([[1.0, np.nan]]), np.zeros(1))
    assert est.update(np.zeros((0, 2)), np.zeros(0)).shape == (0, 1)


def test_batch_means_intervals_cover_with_autocorrelated_noise():
    # Monte Carlo check of interval coverage (the definition of a 95 % interval; no external
    # value): y = 2 x + 1 + e with a slowly varying regressor and AR(1) noise (rho 0.9), the
    # situation of a kHz sample rate with coloured residuals. The white-noise intervals are far
    # too narrow there; the batch-means sandwich (Newey and West, Econometrica 55(3), 1987, in
    # its non-overlapping-batch form) must cover about 95 % of the time.
    rng = np.random.default_rng(11)
    n, reps = 20000, 120
    hits_white = hits_robust = 0
    for _ in range(reps):
        x = scipy.signal.lfilter([1.0], [1.0, -0.995], rng.standard_normal(n)) * 0.1
        e = scipy.signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal(n)) * 0.05
        phi = np.column_stack([x, np.ones(n)])
        y = (2.0 * x + 1.0 + e)[:, None]
        white = RecursiveLeastSquares(2, 1, prior_precision=0.0)
        robust = RecursiveLeastSquares(2, 1, prior_precision=0.0, ci_batch=500)
        for k in range(0, n, 100):
            white.update(phi[k:k + 100], y[k:k + 100])
            robust.update(phi[k:k + 100], y[k:k + 100])
        np.testing.assert_allclose(robust.theta, white.theta)  # the estimate itself is unchanged
        lo, hi = white.intervals(0.95)
        hits_white += lo[0, 0] <= 2.0 <= hi[0, 0]
        lo, hi = robust.intervals(0.95)
        hits_robust += lo[0, 0] <= 2.0 <= hi[0, 0]
    assert hits_white / reps < 0.75  # the white-noise form undercovers badly here
    assert 0.85 <= hits_robust / reps <= 1.0  # the acceptable coverage band


def test_batch_state_round_trips_and_transforms():
    rng = np.random.default_rng(12)
    est = RecursiveLeastSquares(3, 2, half_life=500.0, ci_batch=50)
    for _ in range(30):
        phi = rng.standard_normal((40, 3))
        est.update(phi, phi @ rng.standard_normal((3, 2)) * 0.1 + rng.standard_normal((40, 2)))
    twin = RecursiveLeastSquares(3, 2, half_life=500.0, ci_batch=50)
    twin.load_state_dict(est.state_dict())
    np.testing.assert_array_equal(twin.stderr, est.stderr)
    phi = rng.standard_normal((40, 3))
    yv = rng.standard_normal((40, 2))
    est.update(phi, yv)
    twin.update(phi, yv)
    np.testing.assert_array_equal(twin.stderr, est.stderr)
    assert np.any(est.inflation != 1.0)  # the robust part is live in this test
    # a change of basis of the last two regressors keeps what was learned, scores included
    T = np.array([[2.0, 0.5], [0.0, 1.0]])
    est.transform(T, columns=slice(1, 3))
    assert np.all(np.isfinite(est.stderr))
