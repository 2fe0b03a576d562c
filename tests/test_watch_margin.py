"""The margin filter's block-lifted update equals its per-sample Kalman loop."""

from __future__ import annotations

import numpy as np
import pytest

from wingwatch.daemon.identify.interpretable import block_end_state
from wingwatch.daemon.watch.margin import MarginForecaster


def _model(rng, r=6):
    A = rng.standard_normal((r, r))
    A = 0.97 * A / np.max(np.abs(np.linalg.eigvals(A)))
    B = rng.standard_normal((r, 1))
    theta = np.vstack([[3.8, 10.0], [0.1, 0.4], [0.002, 0.004], 0.1 * rng.standard_normal((r, 2)),
                       [0.0, 0.0]])
    return A, B, theta


def _block(rng, n=100):
    a = 0.01 * rng.standard_normal(n)
    return a, rng.standard_normal(n), rng.standard_normal(n), 0.01 * rng.standard_normal((n, 2))


def test_lifted_update_equals_the_sample_loop():
    rng = np.random.default_rng(3)
    A, B, theta = _model(rng)
    fast, slow = MarginForecaster(2.0, 1.0, 1e-3), MarginForecaster(2.0, 1.0, 1e-3)
    for m in (fast, slow):
        m.set_model("m1", A, B, theta, 0.08, np.array([0.3, 0.9]), np.array([1e-4, 1e-3]))
    assert np.any(fast.gain != 0)  # a real filter, not open loop
    for _ in range(5):
        a, ad, add, dy = _block(rng)
        fast.update(a, ad, add, dy, np.ones(a.size, bool))  # all measured: the lifted path
        # reference: the plain per-sample filter written out here
        x = slow.x.copy()
        direct = np.outer(a, theta[0]) + np.outer(ad, theta[1]) + np.outer(add, theta[2]) + theta[-1]
        C = theta[3:9].T
        for k in range(a.size):
            x = x + slow.gain @ (dy[k] - (C @ x + direct[k]))
            x = A @ x + B[:, 0] * ad[k]
        slow.x = x
        np.testing.assert_allclose(fast.x, slow.x, rtol=1e-9, atol=1e-12)
    # a block with unmeasured samples takes the loop and still agrees with the written-out filter
    a, ad, add, dy = _block(rng)
    ok = np.ones(a.size, bool)
    ok[40:60] = False
    x = fast.x.copy()
    direct = np.outer(a, theta[0]) + np.outer(ad, theta[1]) + np.outer(add, theta[2]) + theta[-1]
    for k in range(a.size):
        if ok[k]:
            x = x + fast.gain @ (dy[k] - (theta[3:9].T @ x + direct[k]))
        x = A @ x + B[:, 0] * ad[k]
    fast.update(a, ad, add, dy, ok)
    np.testing.assert_allclose(fast.x, x, rtol=1e-9, atol=1e-12)


def test_block_end_state_equals_a_loop():
    rng = np.random.default_rng(4)
    A = 0.9 * np.linalg.qr(rng.standard_normal((4, 4)))[0]
    B = rng.standard_normal((4, 3))
    U = rng.standard_normal((37, 3))
    x0 = rng.standard_normal(4)
    x = x0.copy()
    for k in range(37):
        x = A @ x + B @ U[k]
    np.testing.assert_allclose(block_end_state(A, B, U, x0), x, rtol=1e-10, atol=1e-12)


def test_a_new_realisation_takes_over_with_the_state_in_its_own_basis():
    """Two realisations of the same dynamics need not share coordinates: after a switch to
    ``T A T^-1, T B, C T^-1`` with the identifier's state ``T x`` the central forecast is the
    same as if nothing had switched (the forecast is basis-free). A state kept from the old
    model would be read in the wrong basis and the forecast would jump."""
    rng = np.random.default_rng(11)
    A, B, theta = _model(rng)
    T = rng.standard_normal((6, 6)) + 3 * np.eye(6)
    Ti = np.linalg.inv(T)
    theta2 = theta.copy()
    theta2[3:9] = (theta[3:9].T @ Ti).T  # C' = C T^-1, stored as C'^T rows
    y0, r_var = np.array([0.3, 0.9]), np.array([1e-4, 1e-3])
    ref, switched, kept = (MarginForecaster(2.0, 1.0, 1e-3) for _ in range(3))
    for m in (ref, switched, kept):
        m.set_model("m1", A, B, theta, 0.08, y0, r_var)
        for seed in range(3):
            m.update(*_block(np.random.default_rng(seed)), np.ones(100, bool))
    x = ref.x.copy()
    assert np.linalg.norm(theta[3:9].T @ x) > 1e-3  # a state that matters to the outputs
    switched.set_model("m2", T @ A @ Ti, T @ B, theta2, 0.08, y0, r_var, x0=T @ x)
    kept.set_model("m2", T @ A @ Ti, T @ B, theta2, 0.08, y0, r_var)  # no state given
    f_ref, f_sw, f_kept = (m.forecast() for m in (ref, switched, kept))
    assert f_sw["kappa_max_forecast"] == pytest.approx(f_ref["kappa_max_forecast"], rel=1e-9)
    assert f_kept["kappa_max_forecast"] != pytest.approx(f_ref["kappa_max_forecast"], rel=1e-3)
