"""OKID: observer Markov parameters by least squares, then the recursion to system ones."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from wingwatch.daemon.errors import IdentificationError
from wingwatch.daemon.identify.era import era, markov_of
from wingwatch.daemon.identify.okid import ObserverMarkov, observer_markov, system_markov


def random_system(seed=6, r=6, n_out=2, n_in=1):
    rng = np.random.default_rng(seed)
    A0 = np.zeros((r, r))
    for i in range(r // 2):
        rad, ang = rng.uniform(0.6, 0.95), rng.uniform(0.2, 2.5)
        A0[2 * i : 2 * i + 2, 2 * i : 2 * i + 2] = rad * np.array(
            [[np.cos(ang), -np.sin(ang)], [np.sin(ang), np.cos(ang)]]
        )
    T = rng.standard_normal((r, r)) + 3 * np.eye(r)
    A = T @ A0 @ np.linalg.inv(T)
    B = rng.standard_normal((r, n_in))
    return A, B, rng.standard_normal((n_out, r)), rng.standard_normal((n_out, n_in))


def simulate(A, B, C, D, u, x0=None):
    x = np.zeros(A.shape[0]) if x0 is None else np.array(x0, dtype=float)
    y = np.empty((u.shape[0], C.shape[0]))
    for k in range(u.shape[0]):
        y[k] = C @ x + D @ u[k]
        x = A @ x + B @ u[k]
    return y


def test_observer_markov_equals_direct_lstsq():
    A, B, C, D = random_system()
    rng = np.random.default_rng(1)
    u = rng.standard_normal((400, 1))
    y = simulate(A, B, C, D, u) + 0.01 * rng.standard_normal((400, 2))
    p = 4
    fit = observer_markov(u, y, p)
    # reference: the regression of Juang et al. (1993) eq. 10 built row by row, numpy lstsq
    rows = []
    for k in range(p, 400):
        row = [u[k]]
        for j in range(1, p + 1):
            row.append(np.concatenate([u[k - j], y[k - j]]))
        rows.append(np.concatenate(row))
    theta = np.linalg.lstsq(np.array(rows), y[p:], rcond=None)[0]
    # same least-squares problem (noisy, full rank): agreement to rounding of a well-posed solve
    assert_allclose(fit.D, theta[:1].T, rtol=1e-9, atol=1e-11)
    assert_allclose(fit.ybar, theta[1:].reshape(p, 3, 2).transpose(0, 2, 1), rtol=1e-9, atol=1e-11)
    assert fit.order == p


@pytest.mark.parametrize("x0_scale", [0.0, 1.0])
def test_okid_recovers_system_markov_parameters_without_noise(x0_scale):
    A, B, C, D = random_system()
    rng = np.random.default_rng(2)
    u = rng.standard_normal((1500, 1))
    y = simulate(A, B, C, D, u, x0=x0_scale * rng.standard_normal(6))
    obs = observer_markov(u, y, order=6)  # order * n_out = 12 >= 6 states: deadbeat observer exists
    mk = system_markov(obs, 40)
    true = markov_of(A, B, C, D, 40)  # direct C A^k B
    # noise-free data: exact up to rounding of the least-squares solve (Juang et al. 1993)
    assert_allclose(mk, true, rtol=0, atol=1e-8 * np.abs(true).max())
    assert np.all(obs.residual_rms < 1e-10)


def test_okid_then_era_recovers_the_system():
    A, B, C, D = random_system()
    rng = np.random.default_rng(3)
    u = rng.standard_normal((1500, 1))
    y = simulate(A, B, C, D, u)
    mk = system_markov(observer_markov(u, y, order=5), 41)
    real = era(mk, 6)
    true = markov_of(A, B, C, D, 60)
    # realisation reproduces Markov parameters beyond the ones it was built from
    assert_allclose(real.markov(60), true, rtol=0, atol=1e-8 * np.abs(true).max())
    ev = np.sort_complex(np.linalg.eigvals(real.A))
    assert_allclose(ev, np.sort_complex(np.linalg.eigvals(A)), rtol=0, atol=1e-7)


def test_okid_on_fir_system_against_python_control_markov():
    ct = pytest.importorskip("control")
    # nilpotent A: the impulse response ends after two steps, so python-control's direct
    # (FIR least squares) Markov estimate is exact too (it assumes C A^k B = 0 for k > m - 2)
    A = np.array([[0.0, 1.0], [0.0, 0.0]])
    B = np.array([[0.0], [1.0]])
    C = np.array([[1.0, 2.0], [0.5, -1.0]])
    D = np.array([[0.3], [0.1]])
    rng = np.random.default_rng(4)
    u = rng.standard_normal((300, 1))
    y = simulate(A, B, C, D, u)
    ref = ct.markov(y.T, u.T, 5)  # shape (n_out, n_in, 5)
    ours = system_markov(observer_markov(u, y, order=3), 5)
    assert_allclose(ours, np.transpose(ref, (2, 0, 1)), rtol=0, atol=1e-10)


def test_system_markov_recursion_on_first_order_system():
    # x = y - d u gives y(k) = a y(k-1) + (b - a d) u(k-1) + d u(k),
    # so the observer Markov parameters are Ybar_1 = [b - a d, a]
    a, b, d = 0.7, 2.0, 0.5
    obs = ObserverMarkov(
        D=np.array([[d]]),
        ybar=np.array([[[b - a * d, a]]]),
        residual_rms=np.zeros(1),
        singular_values=np.ones(3),
    )
    mk = system_markov(obs, 6)[:, 0, 0]
    # first-order system x(k+1) = a x + b u, y = x + d u: Y_0 = d, Y_k = a^(k-1) b
    assert_allclose(mk, [d] + [b * a ** (k - 1) for k in range(1, 6)], rtol=1e-14)


def test_observer_markov_rejects_short_records():
    rng = np.random.default_rng(5)
    with pytest.raises(IdentificationError):
        observer_markov(rng.standard_normal(20), rng.standard_normal((20, 2)), order=8)
    with pytest.raises(ValueError):
        observer_markov(rng.standard_normal(20), rng.standard_normal(19), order=2)
    with pytest.raises(ValueError):
        observer_markov(np.full(50, np.nan), np.zeros(50), order=2)
