"""Modal parameters from a discrete A, MAC, and the mode tracker."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.linalg import block_diag, expm

from wingwatch.daemon.identify.modes import ModeTracker, mac, mac_matrix, modal_parameters


def continuous_modes(freqs_hz, zetas, real_poles=()):
    blocks = []
    for f, z in zip(freqs_hz, zetas):
        wn = 2 * np.pi * f
        blocks.append(np.array([[0.0, 1.0], [-wn * wn, -2 * z * wn]]))  # x'' + 2 z wn x' + wn^2 x
    for p in real_poles:
        blocks.append(np.array([[p]]))
    return block_diag(*blocks)


def test_known_continuous_poles_are_recovered():
    dt = 1e-3
    freqs, zetas = [1.5, 4.0, 12.0], [0.02, 0.05, 0.1]
    Ac = continuous_modes(freqs, zetas, real_poles=[-30.0])
    Ad = expm(Ac * dt)  # exact zero-order-hold discretisation: z = exp(s dt)
    m = modal_parameters(Ad, dt)
    osc = m.oscillatory
    # s = log(z) / dt inverts z = exp(s dt) exactly (no aliasing: all |Im s| dt < pi)
    assert_allclose(m.frequency_hz[osc], freqs, rtol=1e-9)
    assert_allclose(m.damping[osc], zetas, rtol=1e-8)
    # the real pole s = -30 rad/s: |s| / 2 pi Hz, damping 1
    assert_allclose(m.frequency_hz[~osc], [30.0 / (2 * np.pi)], rtol=1e-9)
    assert_allclose(m.damping[~osc], [1.0], rtol=1e-12)
    assert len(m) == 4


def test_against_python_control_damp():
    ct = pytest.importorskip("control")
    rng = np.random.default_rng(3)
    A = rng.standard_normal((6, 6))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    dt = 0.002
    wn, zeta, poles = ct.damp(ct.ss(A, np.ones((6, 1)), np.ones((1, 6)), 0, dt), doprint=False)
    keep = poles.imag >= 0
    order = np.lexsort((zeta[keep], wn[keep]))
    m = modal_parameters(A, dt)
    # python-control maps discrete poles the same way: wn = |log(z) / dt|, zeta = -Re(s) / wn
    assert_allclose(2 * np.pi * m.frequency_hz, wn[keep][order], rtol=1e-10)
    assert_allclose(m.damping, zeta[keep][order], rtol=1e-9, atol=1e-12)


def test_modes_do_not_depend_on_state_basis_and_participation():
    dt = 1e-3
    Ac = continuous_modes([2.0, 9.0], [0.03, 0.04])
    Ad = expm(Ac * dt)
    B = np.array([[0.0], [1.0], [0.0], [1.0]])
    C = np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]])  # output o sees mode o only
    rng = np.random.default_rng(5)
    T = rng.standard_normal((4, 4)) + 3 * np.eye(4)
    Ti = np.linalg.inv(T)
    a = modal_parameters(Ad, dt, C=C, B=B)
    b = modal_parameters(T @ Ad @ Ti, dt, C=C @ Ti, B=T @ B)
    assert_allclose(a.frequency_hz, b.frequency_hz, rtol=1e-10)
    # output shapes C v are basis independent up to a complex scale: MAC = 1 (Allemang & Brown)
    for i in range(2):
        assert mac(a.shapes[:, i], b.shapes[:, i]) == pytest.approx(1.0, abs=1e-10)
    # each output's impulse-response energy comes from its own mode
    assert_allclose(a.participation, np.eye(2), atol=1e-9)
    assert_allclose(b.participation, np.eye(2), atol=1e-9)


def test_mac_values():
    rng = np.random.default_rng(0)
    v = rng.standard_normal(5) + 1j * rng.standard_normal(5)
    # Allemang & Brown (1982): MAC(v, c v) = 1 for any complex scale c; orthogonal vectors 0
    assert mac(v, v) == pytest.approx(1.0, abs=1e-15)
    assert mac(v, (2.0 - 3.0j) * v) == pytest.approx(1.0, abs=1e-14)
    assert mac([1.0, 1.0, 0.0], [1.0, -1.0, 5.0]) == 0.0
    assert mac([1.0, 0.0], [1.0, 1.0]) == pytest.approx(0.5, abs=1e-15)
    assert mac(np.zeros(3), v[:3]) == 0.0
    M = mac_matrix(np.eye(3), np.eye(3))
    assert_allclose(M, np.eye(3), atol=0)


def test_tracker_keeps_labels_when_modes_are_reordered():
    tr = ModeTracker()
    assert tr.update([1.5, 4.0, 12.0], [0.02, 0.05, 0.1]).tolist() == [1, 2, 3]
    # same modes, slightly moved and listed in another order
    assert tr.update([12.3, 1.52, 3.9], [0.1, 0.02, 0.05]).tolist() == [3, 1, 2]
    assert_allclose(tr.frequencies, [1.52, 3.9, 12.3])
    # a new mode appears: it gets a fresh label, the others keep theirs
    assert tr.update([4.0, 7.0, 1.5, 12.0], [0.05, 0.01, 0.02, 0.1]).tolist() == [2, 4, 1, 3]


def test_tracker_uses_shapes_when_frequencies_cross():
    tr = ModeTracker(freq_tol=0.2, mac_min=0.6)
    shapes0 = np.array([[1.0, 0.0], [0.0, 1.0]])
    assert tr.update([5.0, 5.1], [0.02, 0.02], shapes0).tolist() == [1, 2]
    # frequencies swap; shapes tell which is which (MAC 0.998 vs 0.002)
    shapes1 = np.array([[0.05, 1.0], [1.0, 0.05]])
    assert tr.update([5.0, 5.1], [0.02, 0.02], shapes1).tolist() == [2, 1]
    # without shapes the frequency distance alone decides
    tr2 = ModeTracker(freq_tol=0.2)
    tr2.update([5.0, 5.1], [0.02, 0.02])
    assert tr2.update([5.0, 5.1], [0.02, 0.02]).tolist() == [1, 2]


def test_tracker_tells_a_spurious_neighbour_by_its_damping():
    # A tracked mode at 6.42 Hz, damping ratio 0.25; the next realisation has two modes near
    # it with the same (two-output) shape: the spurious one, listed first and nearer in
    # frequency, with damping 0.08, and the real one, 2.2 % away, with 0.22 (the case seen on
    # the rig's stiff strip). Damping in the cost keeps the label on the real one.
    shape = np.array([[1.0], [0.9]])
    tr = ModeTracker()
    assert tr.update([6.42], [0.25], shape).tolist() == [1]
    both = np.hstack([shape, shape])
    assert tr.update([6.44, 6.56], [0.08, 0.22], both).tolist() == [2, 1]
    # with damping left out, frequency alone decides (the spurious one takes the label)
    tr0 = ModeTracker(damp_tol=0.0)
    tr0.update([6.42], [0.25], shape)
    assert tr0.update([6.44, 6.56], [0.08, 0.22], both).tolist() == [1, 2]


def test_tracker_retires_missing_modes_and_is_bounded():
    tr = ModeTracker(max_missed=2, max_tracks=4)
    tr.update([2.0, 8.0], [0.01, 0.01])
    for _ in range(3):
        tr.update([2.0], [0.01])
    assert tr.labels.tolist() == [1]  # mode 2 absent for 3 > max_missed updates: retired
    assert tr.update([8.0], [0.01]).tolist() == [3]  # comes back as a new mode
    tr.update(np.arange(1.0, 40.0, 3.0), np.full(13, 0.01))
    assert len(tr.labels) <= 4  # bounded memory
    saved = tr.state_dict()
    twin = ModeTracker(max_missed=2, max_tracks=4)
    twin.load_state_dict(saved)
    new = ([1.0, 4.0], [0.01, 0.01])
    assert tr.update(*new).tolist() == twin.update(*new).tolist()


def test_tracker_and_modal_parameters_validation():
    with pytest.raises(ValueError):
        ModeTracker(freq_tol=0.0)
    with pytest.raises(ValueError):
        ModeTracker(mac_min=1.0)
    with pytest.raises(ValueError):
        ModeTracker(damp_tol=-0.1)
    with pytest.raises(ValueError):
        ModeTracker().update([1.0, 2.0], [0.1])
    with pytest.raises(ValueError):
        modal_parameters(np.eye(2), 0.0)
    with pytest.raises(ValueError):
        modal_parameters(np.ones((2, 3)), 0.1)
