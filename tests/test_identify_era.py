"""ERA: block Hankel structure, exact recovery of a known system, balancing, rank rule."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from wingwatch.daemon.errors import IdentificationError
from wingwatch.daemon.identify.era import (
    block_hankel,
    choose_rank,
    era,
    markov_of,
    unexplained_fraction,
)


def random_system(seed=6, r=6, n_out=2, n_in=1):
    """A random stable discrete system with poles well inside the unit circle."""
    rng = np.random.default_rng(seed)
    poles = []
    for _ in range(r // 2):
        rad, ang = rng.uniform(0.6, 0.95), rng.uniform(0.2, 2.5)
        c, s_ = rad * np.cos(ang), rad * np.sin(ang)
        poles.append([[c, -s_], [s_, c]])
    A0 = np.zeros((r, r))
    for i, blk in enumerate(poles):
        A0[2 * i : 2 * i + 2, 2 * i : 2 * i + 2] = blk
    T = rng.standard_normal((r, r)) + 3 * np.eye(r)
    A = T @ A0 @ np.linalg.inv(T)
    B = rng.standard_normal((r, n_in))
    C = rng.standard_normal((n_out, r))
    D = rng.standard_normal((n_out, n_in))
    return A, B, C, D


def sorted_eig(A):
    ev = np.linalg.eigvals(A)
    return ev[np.lexsort((ev.imag, ev.real))]


def test_markov_of_matches_direct_powers():
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 8)
    # definition: Y_0 = D, Y_k = C A^(k-1) B (Juang & Pappa 1985)
    assert_allclose(mk[0], D, rtol=0, atol=0)
    for k in range(1, 8):
        assert_allclose(mk[k], C @ np.linalg.matrix_power(A, k - 1) @ B, rtol=1e-12, atol=1e-14)


def test_block_hankel_blocks_are_shifted_markov_parameters():
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 12)
    H = block_hankel(mk, 4, 3, shift=1)
    assert H.shape == (8, 3)
    for i in range(4):
        for j in range(3):
            # Juang & Pappa eq. 8: block (i, j) of H(k) is Y_(k + i + j + 1)
            assert_allclose(H[2 * i : 2 * i + 2, j : j + 1], mk[2 + i + j], rtol=0, atol=0)
    with pytest.raises(ValueError, match="needs"):
        block_hankel(mk, 7, 6)


def test_era_reproduces_markov_parameters_and_eigenvalues():
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 61)
    real = era(mk, 6)
    scale = np.abs(mk).max()
    # exact realisation of noise-free data: rounding only, so 1e-10 of the largest entry
    assert_allclose(real.markov(61), mk, rtol=0, atol=1e-10 * scale)
    assert_allclose(sorted_eig(real.A), sorted_eig(A), rtol=0, atol=1e-9)
    assert real.rank == 6 and real.A.shape == (6, 6) and real.B.shape == (6, 1)
    assert real.C.shape == (2, 6)
    # the 7th singular value is a numerical zero for a 6-state system
    assert real.hankel_sv[6] < 1e-12 * real.hankel_sv[0]


def test_era_realisation_is_balanced():
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 41)
    rows, cols = 20, 20
    real = era(mk, 6, rows=rows, cols=cols)
    obs = np.vstack([real.C @ np.linalg.matrix_power(real.A, k) for k in range(rows)])
    ctr = np.hstack([np.linalg.matrix_power(real.A, k) @ real.B for k in range(cols)])
    sigma = np.diag(real.hankel_sv[:6])
    # Juang & Pappa 1985, sec. on balanced realisation: O^T O = C C^T = Sigma for the finite
    # Hankel matrix; rounding only, relative to the largest singular value
    assert_allclose(obs.T @ obs, sigma, rtol=0, atol=1e-9 * sigma[0, 0])
    assert_allclose(ctr @ ctr.T, sigma, rtol=0, atol=1e-9 * sigma[0, 0])


def test_era_rank_too_high_for_data_raises():
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 41)
    with pytest.raises(IdentificationError):
        era(mk, 8)
    with pytest.raises(ValueError):
        era(mk, 6, rows=30, cols=30)


def test_era_against_python_control():
    ct = pytest.importorskip("control")
    if not hasattr(ct, "eigensys_realization"):
        pytest.skip("installed python-control has no ERA routine")
    A, B, C, D = random_system()
    mk = markov_of(A, B, C, D, 41)
    m = n = 12
    ref, S = ct.eigensys_realization(mk.transpose(1, 2, 0), 6, m=m, n=n)
    ours = era(mk, 6, rows=m, cols=n)
    # same Hankel matrix H(0) (python-control: m block rows, n block columns from Y_1)
    assert_allclose(ours.hankel_sv, S[: ours.hankel_sv.size], rtol=1e-10, atol=1e-13 * S[0])
    ref_mk = markov_of(ref.A, ref.B, ref.C, ref.D, 41)
    # both realisations are exact: Markov parameters agree to rounding
    assert_allclose(ours.markov(41), ref_mk, rtol=0, atol=1e-10 * np.abs(mk).max())
    assert_allclose(sorted_eig(ours.A), sorted_eig(ref.A), rtol=0, atol=1e-9)


def test_unexplained_fraction_definition():
    u = unexplained_fraction([4.0, 3.0, 2.0, 1.0])
    # u(r) = sum(s[r:]) / sum(s): 10/10, 6/10, 3/10, 1/10, 0
    assert_allclose(u, [1.0, 0.6, 0.3, 0.1, 0.0], rtol=1e-15)


def test_choose_rank_finds_true_rank_of_noise_free_system():
    A, B, C, D = random_system()
    sv = era(markov_of(A, B, C, D, 41), 6).hankel_sv
    # numerical zeros are never counted, so any energy target gives the true order
    assert choose_rank(sv, energy=1.0) == 6
    assert choose_rank(sv, energy=None) == 6
    assert choose_rank(sv, energy=0.5) < 6
    assert choose_rank(sv, energy=1.0, max_rank=4) == 4


def test_choose_rank_energy_gap_and_hysteresis():
    sv = np.array([10.0, 5.0, 1.0, 0.01, 0.009, 0.008, 0.007])
    u = unexplained_fraction(sv)
    r = choose_rank(sv, energy=0.999)
    assert u[r] <= 0.001 < u[r - 1]  # smallest rank meeting the target (rule 2)
    assert choose_rank(sv, energy=0.999, gap=50.0) == 3  # s[2] / s[3] = 100 is the last big drop
    assert choose_rank(sv, energy=0.999, gap=1000.0) == r  # no such drop: energy rank stands
    # hysteresis: previous rank 3 leaves u(3) = 0.0017 <= 4 * 0.001, so it is kept
    assert choose_rank(sv, energy=0.999, previous=3, band=4.0) == 3
    # without hysteresis (band 1) the rank moves to the energy rank
    assert choose_rank(sv, energy=0.999, previous=3, band=1.0) == r
    # previous rank clearly too small (u(2) = 0.065 > 4 * 0.001): moves up
    assert choose_rank(sv, energy=0.999, previous=2, band=4.0) == r
    # previous rank larger than needed, candidate not clearly sufficient: kept
    assert choose_rank(sv, energy=0.999, previous=6, band=4.0) == 6
    # candidate clearly sufficient (u(3) = 0.0017 < 0.01 / 4 = 0.0025): moves down
    assert choose_rank(sv, energy=0.99, previous=6, band=4.0) == 3


def test_choose_rank_rejects_bad_arguments():
    with pytest.raises(ValueError):
        choose_rank([1.0, 0.5], energy=1.5)
    with pytest.raises(ValueError):
        choose_rank([1.0, 0.5], gap=0.5)
    with pytest.raises(ValueError):
        choose_rank([1.0, -0.5])
    with pytest.raises(ValueError):
        choose_rank([1.0, 0.5], energy=None, previous=1)


def test_hankel_factors_near_gives_the_leading_svd_of_a_nearby_hankel_matrix():
    """Subspace iteration from the factors of a nearby Hankel matrix against numpy's full SVD
    (singular values and the realisation's Markov parameters), on a rank-4 system whose Markov
    parameters are perturbed by 1e-4 of their scale (a posterior draw, say)."""
    from wingwatch.daemon.identify.era import era, hankel_factors, hankel_factors_near, markov_of

    rng = np.random.default_rng(8)
    A = np.diag([0.92, 0.6, -0.2, 0.75]) + 0.04 * rng.standard_normal((4, 4))
    mk = markov_of(A, rng.standard_normal((4, 1)), rng.standard_normal((2, 4)), np.zeros((2, 1)),
                   41)
    near = hankel_factors(mk, 20, 20)
    draw = mk + 1e-4 * np.abs(mk).max() * rng.standard_normal(mk.shape)
    full = np.linalg.svd(block_hankel(draw, 20, 20), compute_uv=False)
    fac = hankel_factors_near(draw, 4, near)
    np.testing.assert_allclose(fac.s, full[:4], rtol=1e-9)
    a = era(draw, 4, 20, 20)
    scale = np.abs(a.markov(30)).max()
    # Orthogonal iteration converges like (s_5 / s_4)^(2k) after k steps (Golub and Van Loan,
    # sec. 8.2.4): here s_5 / s_4 is about 1e-2, so 2 steps leave about 1e-8 and 4 steps none.
    errs = [np.abs(era(draw, 4, 20, 20, factors=hankel_factors_near(draw, 4, near, k)).markov(30)
                   - a.markov(30)).max() / scale for k in (2, 4)]
    assert errs[0] < 1e-6 and errs[1] < 1e-12, errs
    assert fac.s.size == 4 and not fac.U.flags.writeable
