"""The transient part of the model from data: decimated OKID, then ERA, back at the sample rate.

The wake-circulation and bending transients of a plate in water are slow beside a 1 kHz sample
rate (bending modes of a few Hz, wake time constants of seconds), so a Markov sequence at the
sample rate would need thousands of terms. The record is therefore block-averaged by an
integer ``decimate`` (the same boxcar on input and output, so the input-output relation is kept
below the new Nyquist frequency), the observer Markov parameters are fitted there (OKID: Juang,
Phan, Horta and Longman, J. Guidance, Control and Dynamics 16(2), 1993), the system Markov
parameters recovered and realised by ERA (Juang and Pappa, J. Guidance, Control and Dynamics
8(5), 1985), and the realisation is carried back to the sample rate exactly through continuous
time: with ``M = [[A_d, B_d], [0, I]]``, ``log(M) / dt_d = [[A_c, B_c], [0, 0]]`` and
``expm([[A_c, B_c], [0, 0]] dt) = [[A, B], [0, I]]`` (zero-order hold; C. Van Loan, "Computing
integrals involving the matrix exponential", IEEE Trans. Automatic Control 23(3), 1978).

Both the calibration and the online slow layer call :func:`realise_transient`, so the reference
model and the online updates come from the same code.

Examples
--------
>>> import scipy.signal
>>> Ac = np.array([[0.0, 1.0], [-(2 * np.pi * 3.0) ** 2, -2 * 0.1 * 2 * np.pi * 3.0]])
>>> Ad, Bd, *_ = scipy.signal.cont2discrete((Ac, np.array([[0.0], [1.0]]), np.eye(2), np.zeros((2, 1))),
...                                          0.01, method="zoh")
>>> A1, B1 = resample_realisation(Ad, Bd, 0.01, 0.001)
>>> A_ref = scipy.linalg.expm(Ac * 0.001)
>>> bool(np.allclose(A1, A_ref, atol=1e-10))
True
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from wingwatch.daemon.errors import IdentificationError
from wingwatch.daemon.identify.era import HankelFactors, Realisation, choose_rank, era, hankel_factors

__all__ = [
    "TransientFit",
    "MarkovEstimate",
    "decimate_mean",
    "resample_realisation",
    "fir_markov",
    "JointEstimate",
    "fir_markov_joint",
    "estimate_markov",
    "markov_draws",
    "serial_inflation",
    "estimate_markov_joint",
    "realise",
    "realise_transient",
]


@dataclass(frozen=True, eq=False)
class TransientFit:
    """A transient realisation at the sample rate, and what it came from.

    ``A`` (r x r), ``B`` (r x 1), ``C`` (n_out x r) at sample time ``dt``; ``hankel_sv`` from the
    ERA at the decimated rate; ``realisation`` is that decimated ERA result itself.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    dt: float
    rank: int
    hankel_sv: np.ndarray
    decimate: int
    realisation: Realisation


def decimate_mean(x: np.ndarray, factor: int) -> np.ndarray:
    """Means of consecutive blocks of ``factor`` samples along axis 0 (a trailing part is dropped).

    >>> decimate_mean(np.arange(7.0), 3).tolist()
    [1.0, 4.0]
    """
    x = np.asarray(x, dtype=float)
    n = (x.shape[0] // factor) * factor
    return x[:n].reshape(n // factor, factor, *x.shape[1:]).mean(axis=1)


def resample_realisation(A: np.ndarray, B: np.ndarray, dt_from: float, dt_to: float
                         ) -> tuple[np.ndarray, np.ndarray]:
    """Carry a zero-order-hold discrete (A, B) from sample time ``dt_from`` to ``dt_to``.

    With ``A = exp(A_c dt_from)`` and ``p = dt_to / dt_from``, the same continuous system held
    over ``dt_to`` has ``A' = A^p`` (principal power) and
    ``B' = A_c^-1 (A' - I) B_c = (A' - I)(A - I)^-1 B``: all are functions of ``A_c`` and
    commute (zero-order hold, e.g. Franklin, Powell and Workman, "Digital Control of Dynamic
    Systems", 3rd ed. 1998, sec. 4.3.3, from memory). Both are evaluated in the eigenbasis
    ``A = V diag(lam) V^-1``: ``lam^p`` and ``(lam^p - 1) / (lam - 1) = expm1(p log lam) /
    expm1(log lam)``, which stays accurate for poles near 1 (slow modes).

    Why not ``scipy.linalg.logm``: it is not bit-reproducible. The same 11 x 11 matrix from the
    rig's slow layer gave two different last-bit results over 300 calls (scipy 1.17.1, with
    one BLAS thread as with two), and exact replay needs the same bytes every time. The
    eigenbasis route is only taken while ``V`` is well conditioned; a nearly defective ``A``
    (close repeated poles) falls back to the matrix logarithm of ``[[A, B], [0, I]]``.

    Raises IdentificationError when A has an eigenvalue on or near the negative real axis (no
    real continuous-time model: the decimated rate is too low for the data).
    """
    A = np.atleast_2d(np.asarray(A, dtype=float))
    B = np.asarray(B, dtype=float).reshape(A.shape[0], -1)
    n, m = B.shape
    ev, V = np.linalg.eig(A)
    if np.any((np.abs(ev.imag) < 1e-9) & (ev.real <= 0.0)):
        raise IdentificationError(
            "the transient has a pole on the negative real axis at the decimated rate; "
            "lower the decimation factor"
        )
    p = dt_to / dt_from
    try:
        Vinv = np.linalg.inv(V)
        cond = np.linalg.norm(V, 1) * np.linalg.norm(Vinv, 1)  # 1-norm condition number
    except np.linalg.LinAlgError:
        cond = np.inf
    if cond < 1e8:
        log_ev = np.log(ev.astype(complex))  # the check above keeps ev off the branch cut
        one = log_ev == 0  # a pole at 1 (an integrator) holds p steps of B
        ratio = np.where(one, p, np.expm1(p * log_ev) / np.where(one, 1.0, np.expm1(log_ev)))
        A_new = (V * np.exp(p * log_ev)) @ Vinv
        B_new = (V * ratio) @ (Vinv @ B)
        scale = max(1.0, float(np.max(np.abs(A_new))))
        if np.max(np.abs(A_new.imag)) > 1e-6 * scale:
            raise IdentificationError("the transient realisation has no real continuous-time form")
        return np.ascontiguousarray(A_new.real), np.ascontiguousarray(B_new.real)
    M = np.zeros((n + m, n + m))
    M[:n, :n] = A
    M[:n, n:] = B
    M[n:, n:] = np.eye(m)
    L = scipy.linalg.logm(M)
    if np.max(np.abs(np.imag(L))) > 1e-6 * max(1.0, np.max(np.abs(L))):
        raise IdentificationError("the transient realisation has no real continuous-time form")
    L = np.real(L) * p  # [[A_c, B_c], [0, 0]] * dt_to
    E = scipy.linalg.expm(L)
    return E[:n, :n], E[:n, n:]


def _tc_kernel(n: int, lam: float) -> np.ndarray:
    """Tuned-correlated kernel ``P_ij = lam^max(i, j)`` (Chen, Ohlsson and Ljung 2012)."""
    idx = np.arange(n)
    return lam ** np.maximum.outer(idx, idx)


@functools.lru_cache(maxsize=32)
def _tc_factor(n: int, lam: float) -> np.ndarray:
    """Cholesky factor of the TC kernel (cached: the online window keeps its size)."""
    L = np.linalg.cholesky(_tc_kernel(n, lam) + 1e-12 * np.eye(n))
    L.flags.writeable = False
    return L


@functools.lru_cache(maxsize=32)
def _tc_precision(n: int, lam: float) -> tuple[np.ndarray, np.ndarray, float]:
    """The TC kernel's inverse (tridiagonal: main and first off-diagonal) and its log-determinant,
    in closed form.

    ``P_ij = lam^max(i, j) = min(a_i, a_j)`` with ``a_i = lam^i`` decreasing, so in reversed
    index order ``P`` is the covariance of a Brownian motion sampled at the increasing times
    ``a_(n-1) < .. < a_0``. Its increments ``e_i = a_i - a_(i+1)`` (``e_(n-1) = a_(n-1)``) are
    independent, hence ``P^-1 = D^T diag(1 / e) D`` with ``D`` the first-difference matrix, and
    ``log det P = sum log e_i`` (derived here; checked against ``numpy.linalg.inv`` and
    ``slogdet`` in tests/test_identify_transient.py).
    """
    i = np.arange(n)
    e = lam ** i * (1.0 - lam)
    e[-1] = lam ** (n - 1)
    inv_e = 1.0 / e
    diag = inv_e.copy()
    diag[1:] += inv_e[:-1]
    off = -inv_e[:-1]  # entries (i, i + 1) and (i + 1, i)
    diag.flags.writeable = False
    off.flags.writeable = False
    return diag, off, float(np.sum(np.log(e)))


def _tc_precision_dense(n: int, lam: float) -> np.ndarray:
    """``P^-1`` of :func:`_tc_precision` as a dense matrix (for checks)."""
    diag, off, _ = _tc_precision(n, lam)
    return np.diag(diag) + np.diag(off, 1) + np.diag(off, -1)


DECAYS = (0.9, 0.95, 0.97, 0.98, 0.99, 0.995)
SCALES = tuple(10.0 ** np.arange(-8, 3))


def fir_markov(
    u: np.ndarray,
    r: np.ndarray,
    n_lags: int,
    *,
    hyper: list | None = None,
    chosen: list | None = None,
    posterior: list | None = None,
) -> np.ndarray:
    """Markov parameters ``h_0 .. h_L`` of ``r(k) = sum_j h_j u(k-j)``, kernel-regularised.

    The regression is the OKID one (Juang et al. 1993, eq. 9) with no output terms: the observer
    gain is zero, so the fitted parameters are the system Markov parameters themselves and no
    recursion is needed. A long impulse response from a short record is ill-posed, so each
    output's ``h`` gets the Gaussian prior of the tuned-correlated (TC) kernel,
    ``h ~ N(0, c P)``, ``P_ij = lam^max(i,j)`` (smooth, exponentially decaying responses; T. Chen,
    H. Ohlsson and L. Ljung, "On the estimation of transfer functions, regularizations and
    Gaussian processes - Revisited", Automatica 48(8), 2012; G. Pillonetto and G. De Nicolao,
    Automatica 46(1), 2010). The hyperparameters ``lam`` (from ``decays``) and ``c`` are chosen
    per output by maximising the marginal likelihood over the grid, with the noise variance
    taken from an unregularised fit. The estimate is the posterior mean::

        h = c P V^T (c V P V^T + s2 I)^-1 r = (V^T V + (s2 / c) P^-1)^-1 V^T r

    computed in the ``(L + 1)``-dimensional form with the TC kernel's tridiagonal inverse
    (:func:`_tc_precision`), so each grid point costs one Cholesky factorisation and no kernel
    products.

    Shape diagram, one row per time k = L .. N-1::

        r(k)^T     =  [ u(k)  u(k-1)  ...  u(k-L) ]  @  [ h_0^T ; h_1^T ; ... ; h_L^T ]
      (rows x n_out)          (rows x (L+1))               ((L+1) x n_out)

    ``hyper`` (one ``(decay index, scale index)`` pair per output, from an earlier call) makes
    the search local: a compass search on the grid from the previous choice, which stops where
    no axis neighbour is better (a warm start for the online slow layer). The pairs chosen are
    appended to ``chosen`` when it is given.
    When ``posterior`` is given, ``(U, s2, f)`` is appended per output at the chosen point: the
    upper Cholesky factor of ``K``, the noise variance and the serial-correlation inflation of
    the residual (:func:`serial_inflation`), so that the posterior covariance of that output's
    ``h`` is ``s2 K^-1 = s2 (U^T U)^-1`` with white noise and ``f`` times it with correlated
    noise (:func:`markov_draws`).

    Returns an array of shape ``(L + 1, n_out, 1)`` (``markov[0]`` is the direct term).
    """
    u = np.asarray(u, dtype=float).reshape(-1)
    r = np.asarray(r, dtype=float)
    r = r[:, None] if r.ndim == 1 else r
    n = u.shape[0]
    p = n_lags + 1
    rows = n - n_lags
    if rows < 2 * p:
        raise IdentificationError(
            f"the window has {n} samples, too few for {n_lags} Markov parameters "
            f"(needs at least {2 * p + n_lags})"
        )
    # [u(k) .. u(k-L)], copied: a product of contiguous arrays is about twice as fast
    V = np.ascontiguousarray(np.lib.stride_tricks.sliding_window_view(u, p)[:, ::-1])
    R = r[n_lags:]
    G = V.T @ V
    VtR = V.T @ R
    # Noise variance per output from the (barely) unregularised least-squares fit.
    G_ls = G + (1e-10 * np.trace(G) / p + 1e-300) * np.eye(p)
    h_ls = scipy.linalg.cho_solve(scipy.linalg.cho_factor(G_ls), VtR)
    dof = max(rows - p, 1)
    s2 = np.maximum(np.sum((R - V @ h_ls) ** 2, axis=0) / dof, 1e-30)
    base = np.trace(G) / p  # prior scale grid SCALES is in units of var(r) / mean power of u
    out = np.zeros((p, R.shape[1]))
    K = np.empty_like(G)
    for j in range(R.shape[1]):
        var_r = float(np.var(R[:, j])) or 1.0
        rr = float(R[:, j] @ R[:, j])
        b = VtR[:, j]
        tried: dict[tuple[int, int], tuple | None] = {}

        def evaluate(di: int, si: int) -> tuple | None:
            """-log marginal likelihood at grid point (di, si), the posterior mean, the factor."""
            if (di, si) in tried:
                return tried[di, si]
            q_diag, q_off, logdet_p = _tc_precision(p, DECAYS[di])
            c = SCALES[si] * var_r / max(base, 1e-300)
            # Posterior precision in the p-dimensional form (Woodbury; matrix determinant
            # lemma): K = V^T V + (s2 / c) P^-1, P^-1 tridiagonal, so no kernel products.
            g = s2[j] / c
            np.copyto(K, G)
            K.flat[::p + 1] += g * q_diag
            K.flat[1::p + 1] += g * q_off
            K.flat[p::p + 1] += g * q_off
            try:
                cf = scipy.linalg.cho_factor(K, check_finite=False)
            except np.linalg.LinAlgError:
                tried[di, si] = None
                return None
            h = scipy.linalg.cho_solve(cf, b, check_finite=False)
            quad = (rr - b @ h) / s2[j]  # r^T (s2 I + c V P V^T)^-1 r
            # log det(s2 I + c V P V^T) = rows log s2 + log det P + p log(c / s2) + log det K
            logdet = (rows * np.log(s2[j]) + logdet_p - p * np.log(g)
                      + 2.0 * np.sum(np.log(np.diag(cf[0]))))
            nll = 0.5 * (quad + logdet)  # -log p(r | lam, c), up to a constant
            tried[di, si] = (nll, h, (di, si), cf[0] if posterior is not None else None)
            return tried[di, si]

        best = (np.inf, None, None, None)
        start = tuple(hyper[j]) if hyper is not None and j < len(hyper) else None
        if start is not None and evaluate(*start) is not None:
            # Warm start: compass search on the grid from the previous choice (move to the
            # best of the four axis neighbours while it improves; Kolda, Lewis and Torczon,
            # SIAM Review 45(3), 2003): 5 factorisations when the choice stands.
            best = evaluate(*start)
            while True:
                d0, s0 = best[2]
                moved = best
                for dd, ds in ((-1, 0), (1, 0), (0, -1), (0, 1)):
                    di, si = d0 + dd, s0 + ds
                    if 0 <= di < len(DECAYS) and 0 <= si < len(SCALES):
                        res = evaluate(di, si)
                        if res is not None and res[0] < moved[0]:
                            moved = res
                if moved is best:
                    break
                best = moved
        else:
            for di in range(len(DECAYS)):
                for si in range(len(SCALES)):
                    res = evaluate(di, si)
                    if res is not None and res[0] < best[0]:
                        best = res
        if best[1] is None:  # pragma: no cover - the grid always holds a well-posed point
            raise IdentificationError("no kernel hyperparameter gave a well-posed Markov estimate")
        out[:, j] = best[1]
        if chosen is not None:
            chosen.append(best[2])
        if posterior is not None:
            e = R[:, j] - V @ best[1]  # residual of the posterior mean
            rho = float(e[1:] @ e[:-1] / max(float(e @ e), 1e-300))
            posterior.append((np.triu(best[3]), float(s2[j]), serial_inflation(rho)))
    return out[:, :, None]


def serial_inflation(rho: float) -> float:
    """Variance inflation ``(1 + rho) / (1 - rho)`` for residuals with lag-one autocorrelation
    ``rho``, at least 1 and at most 20.

    The white-noise posterior treats every decimated sample as independent; with AR(1) noise the
    variance of a regression coefficient is larger by ``(1 + rho phi) / (1 - rho phi)`` for a
    regressor with lag-one autocorrelation ``phi`` (the long-run variance of an AR(1) process;
    G. E. P. Box, G. M. Jenkins and G. C. Reinsel, "Time Series Analysis", sec. 3.2, from
    memory). Taking ``phi = 1`` (slowly varying regressors, as the lagged pitch rate is at the
    decimated rate) gives this factor, the conservative end.

    >>> serial_inflation(0.0), serial_inflation(0.6), serial_inflation(-0.5)
    (1.0, 4.0, 1.0)
    """
    if not np.isfinite(rho) or rho >= 1.0:
        return 20.0
    return float(min(max((1.0 + rho) / (1.0 - rho), 1.0), 20.0))


def markov_draws(est: "MarkovEstimate", n: int, rng: np.random.Generator, *,
                 serial: bool = True) -> np.ndarray:
    """``n`` draws of the Markov parameters from their posterior under the TC prior.

    Given the kernel hyperparameters, ``h`` of each output is Gaussian with mean
    ``est.markov`` and covariance ``s2 K^-1`` (:func:`fir_markov`; the posterior of Bayesian
    linear regression with a Gaussian prior, C. E. Rasmussen and C. K. I. Williams, "Gaussian
    Processes for Machine Learning", MIT Press 2006, eq. 2.8); a draw is
    ``h + sqrt(s2) U^-1 z`` with ``z`` standard normal, since ``cov(U^-1 z) = (U^T U)^-1``.
    With ``serial`` (the default) the covariance is widened by the residual's
    :func:`serial_inflation`, since the residuals of a decimated record are rarely white. The
    outputs are independent (separate fits). Returns shape ``(n, L + 1, n_out, 1)``.
    """
    if est.posterior is None:
        raise ValueError("this Markov estimate carries no posterior (fit it with estimate_markov)")
    mk = est.markov
    out = np.repeat(mk[None], n, axis=0)
    for j, (U, s2, inflation) in enumerate(est.posterior):
        z = rng.standard_normal((U.shape[0], n))
        e = scipy.linalg.solve_triangular(U, z, lower=False, check_finite=False)
        out[:, :, j, 0] += math.sqrt(s2 * (inflation if serial else 1.0)) * e.T
    return out


#: grid of kernel-to-noise variance ratios for :func:`fir_markov_joint`, in units of
#: 1 / (mean power of the prior-weighted regressors)
GAMMAS = tuple(10.0 ** np.arange(-4.0, 6.01, 0.5))


@dataclass(frozen=True, eq=False)
class JointEstimate:
    """Fixed-effect columns and a TC-regularised impulse response, estimated together."""

    beta: np.ndarray  # (q, n_out): coefficients of the fixed-effect columns
    beta_cov: np.ndarray  # (n_out, q, q): their covariance
    markov: np.ndarray  # (L + 1, n_out, 1): markov[0] = 0 (the direct term is a fixed effect)
    noise_var: np.ndarray  # (n_out,): residual variance at the decimated rate
    hyper: list  # (decay index, gamma index) chosen per output, for a warm start
    residual: np.ndarray  # (N - L, n_out): r less both parts, rows k = L .. N-1


def fir_markov_joint(u: np.ndarray, F: np.ndarray, r: np.ndarray, n_lags: int, *,
                     hyper: list | None = None) -> JointEstimate:
    """Columns ``beta`` and Markov parameters ``h_1 .. h_L`` of
    ``r(k) = F(k) beta + sum_{j>=1} h_j u(k-j) + e(k)``, estimated jointly.

    ``F`` holds instantaneous regressors (here alpha, alpha_dot, alpha_ddot and a constant); the
    impulse response gets the TC prior of :func:`fir_markov` (``h ~ N(0, c P)``), the columns a
    flat prior. Why jointly: over one smooth manoeuvre a free impulse response of pitch rate can
    mimic ``alpha_ddot`` (a derivative of its own input) and the direct rate term, so an
    unregularised fit of columns and transient together cannot tell them apart, and reading the
    columns first leaves the circulation lag inside them. With the prior, the data decide how
    much of the response is an instantaneous ``alpha_ddot`` term and how much a smooth, decaying
    lag. The hyperparameters (decay ``lam``, variance ratio ``gamma = c / s2``) maximise the
    restricted (REML) likelihood, the columns integrated out (D. A. Harville, "Maximum
    likelihood approaches to variance component estimation", J. American Statistical
    Association 72, 1977); ``s2`` is profiled. With ``W = V L`` (``P = L L^T``),
    ``S = I + gamma W W^T`` and ``M = I / gamma + W^T W``, everything is computed in the
    ``L``-dimensional form (Woodbury; matrix determinant lemma)::

        F^T S^-1 F = F^T F - (W^T F)^T M^-1 (W^T F),   log det S = L log gamma + log det M
        -2 log L_R = (n - q) log s2 + log det S + log det(F^T S^-1 F)
        beta = (F^T S^-1 F)^-1 F^T S^-1 r,   h = L M^-1 W^T (r - F beta),   cov(beta) = s2 (F^T S^-1 F)^-1

    Rows ``k = L .. N-1`` are used, as in :func:`fir_markov`. ``hyper`` (the ``hyper`` of an
    earlier estimate) limits the search to the grid neighbours of the earlier choice.
    """
    u = np.asarray(u, dtype=float).reshape(-1)
    F = np.asarray(F, dtype=float)
    r = np.asarray(r, dtype=float)
    r = r[:, None] if r.ndim == 1 else r
    n = u.shape[0]
    if F.shape[0] != n or r.shape[0] != n:
        raise ValueError("u, F and r must have the same number of samples")
    rows = n - n_lags
    q = F.shape[1]
    if rows < 2 * (n_lags + q):
        raise IdentificationError(
            f"the record has {n} samples, too few for {n_lags} Markov parameters and {q} columns")
    V = np.lib.stride_tricks.sliding_window_view(u, n_lags + 1)[:, ::-1][:, 1:]  # u(k-1) .. u(k-L)
    Fr, R = F[n_lags:], r[n_lags:]
    G, VF, VR = V.T @ V, V.T @ Fr, V.T @ R
    FF, FR, RR = Fr.T @ Fr, Fr.T @ R, np.sum(R * R, axis=0)
    n_out = R.shape[1]
    best: list = [None] * n_out
    if hyper is not None and len(hyper) == n_out:
        d_set = sorted({d for h in hyper for d in range(max(h[0] - 1, 0), min(h[0] + 2, len(DECAYS)))})
        g_set = sorted({g for h in hyper for g in range(max(h[1] - 1, 0), min(h[1] + 2, len(GAMMAS)))})
    else:
        d_set, g_set = list(range(len(DECAYS))), list(range(len(GAMMAS)))
    for di in d_set:
        lam = DECAYS[di]
        Lc = _tc_factor(n_lags, lam)
        GW = Lc.T @ G @ Lc
        WF, WR = Lc.T @ VF, Lc.T @ VR
        base = max(float(np.trace(GW)) / n_lags, 1e-300)
        for gi in g_set:
            gamma = GAMMAS[gi] / base
            try:
                cf = scipy.linalg.cho_factor(GW + np.eye(n_lags) / gamma)
            except np.linalg.LinAlgError:
                continue
            MWF = scipy.linalg.cho_solve(cf, WF)
            MWR = scipy.linalg.cho_solve(cf, WR)
            AF = FF - WF.T @ MWF
            try:
                cA = scipy.linalg.cho_factor(AF)
            except np.linalg.LinAlgError:
                continue
            logdet_S = n_lags * np.log(gamma) + 2.0 * np.sum(np.log(np.diag(cf[0])))
            logdet_A = 2.0 * np.sum(np.log(np.diag(cA[0])))
            for j in range(n_out):
                bF = FR[:, j] - WF.T @ MWR[:, j]
                beta = scipy.linalg.cho_solve(cA, bF)
                quad = RR[j] - WR[:, j] @ MWR[:, j] - bF @ beta
                s2 = max(quad, 1e-300) / (rows - q)
                nll = (rows - q) * np.log(s2) + logdet_S + logdet_A
                if best[j] is None or nll < best[j][0]:
                    z = MWR[:, j] - MWF @ beta
                    cov = s2 * scipy.linalg.cho_solve(cA, np.eye(q))
                    best[j] = (nll, beta, Lc @ z, cov, s2, (di, gi))
    beta_all = np.column_stack([b[1] for b in best])
    if any(b is None for b in best):  # pragma: no cover - the grid always holds a well-posed point
        raise IdentificationError("no kernel hyperparameter gave a well-posed joint estimate; "
                                  "the columns are collinear over this record")
    markov = np.zeros((n_lags + 1, n_out, 1))
    for j, b in enumerate(best):
        markov[1:, j, 0] = b[2]
    resid = R - Fr @ beta_all - V @ markov[1:, :, 0]
    return JointEstimate(beta=beta_all, beta_cov=np.stack([b[3] for b in best]), markov=markov,
                         noise_var=np.array([b[4] for b in best]),
                         hyper=[list(b[5]) for b in best], residual=resid)


@dataclass(frozen=True, eq=False)
class MarkovEstimate:
    """Markov parameters at the decimated rate, ready for ERA at any rank."""

    markov: np.ndarray  # (L + 1, n_out, 1)
    dt: float  # sample time of the original record
    decimate: int
    hankel_sv: np.ndarray
    hyper: list | None = None  # kernel hyperparameters chosen, for a warm start next time
    factors: HankelFactors | None = None  # SVD of the Hankel matrix, shared by every realise()
    posterior: list | None = None  # per output (U, s2, f): h ~ N(markov, f s2 (U^T U)^-1)

    @property
    def dt_decimated(self) -> float:
        return self.dt * self.decimate

    @property
    def hankel_shape(self) -> tuple[int, int]:
        n_lags = self.markov.shape[0] - 1
        return n_lags // 2, n_lags - n_lags // 2

    @property
    def max_rank(self) -> int:
        rows, cols = self.hankel_shape
        return min(rows * self.markov.shape[1], cols)


def estimate_markov(u: np.ndarray, r: np.ndarray, rate_hz: float, *, decimate: int = 20,
                    markov_s: float = 5.0, min_lags: int = 34, hyper: list | None = None,
                    posterior: bool = True) -> MarkovEstimate:
    """Decimate ``u`` (pitch rate) and ``r`` (outputs less the interpretable terms) and fit
    ``markov_s`` seconds of Markov parameters (:func:`fir_markov`); with ``posterior`` the
    estimate carries what :func:`markov_draws` needs."""
    if decimate < 1:
        raise ValueError("decimate must be at least 1")
    u = np.asarray(u, dtype=float).reshape(-1)
    r = np.asarray(r, dtype=float)
    r = r[:, None] if r.ndim == 1 else r
    if r.shape[0] != u.shape[0]:
        raise ValueError("u and r must have the same number of samples")
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(r))):
        raise IdentificationError("the window holds non-finite samples")
    dt = 1.0 / rate_hz
    n_lags = max(int(round(markov_s / (dt * decimate))), min_lags)
    chosen: list = []
    post: list | None = [] if posterior else None
    mk = fir_markov(decimate_mean(u, decimate), decimate_mean(r, decimate), n_lags, hyper=hyper,
                    chosen=chosen, posterior=post)
    rows, cols = n_lags // 2, n_lags - n_lags // 2
    fac = hankel_factors(mk, rows, cols)
    return MarkovEstimate(markov=mk, dt=dt, decimate=decimate, hankel_sv=fac.s, factors=fac,
                          hyper=[list(c) for c in chosen], posterior=post)


def estimate_markov_joint(u: np.ndarray, F: np.ndarray, y: np.ndarray, rate_hz: float, *,
                          decimate: int = 20, markov_s: float = 5.0, min_lags: int = 34,
                          hyper: list | None = None) -> tuple[MarkovEstimate, JointEstimate]:
    """Decimate and fit columns ``F`` and ``markov_s`` seconds of Markov parameters of ``u``
    together (:func:`fir_markov_joint`); the Markov part ready for :func:`realise`."""
    if decimate < 1:
        raise ValueError("decimate must be at least 1")
    u = np.asarray(u, dtype=float).reshape(-1)
    F = np.asarray(F, dtype=float)
    y = np.asarray(y, dtype=float)
    y = y[:, None] if y.ndim == 1 else y
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(F)) and np.all(np.isfinite(y))):
        raise IdentificationError("the window holds non-finite samples")
    dt = 1.0 / rate_hz
    n_lags = max(int(round(markov_s / (dt * decimate))), min_lags)
    je = fir_markov_joint(decimate_mean(u, decimate), decimate_mean(F, decimate),
                          decimate_mean(y, decimate), n_lags, hyper=hyper)
    rows, cols = n_lags // 2, n_lags - n_lags // 2
    fac = hankel_factors(je.markov, rows, cols)
    est = MarkovEstimate(markov=je.markov, dt=dt, decimate=decimate, hankel_sv=fac.s, factors=fac,
                         hyper=[list(h) for h in je.hyper])
    return est, je


def realise(est: MarkovEstimate, rank: int | None = None, *, max_rank: int = 16,
            energy: float = 0.99, gap: float | None = 4.0, previous_rank: int | None = None
            ) -> TransientFit:
    """ERA of a :class:`MarkovEstimate` at ``rank`` (or a rank chosen from its Hankel singular
    values), carried back to the sample rate.

    A chosen (not fixed) rank whose realisation is unstable or has a pole on the negative real
    axis (a noise state at the decimated Nyquist frequency) is lowered one at a time until it is
    valid.
    """
    rows, cols = est.hankel_shape
    cap = min(max_rank, est.max_rank)
    fixed = rank is not None
    if rank is None:
        rank = choose_rank(est.hankel_sv, energy=energy, gap=gap, max_rank=cap,
                           previous=previous_rank)
    if not 1 <= rank <= est.max_rank:
        raise IdentificationError(f"rank {rank} is outside 1..{est.max_rank} for this window")
    why = ""
    for r_try in range(rank, rank - 1 if fixed else 0, -1):
        real = era(est.markov, r_try, rows, cols, factors=est.factors)
        if np.max(np.abs(np.linalg.eigvals(real.A))) >= 1.0:
            why = (f"the rank-{r_try} transient realisation is unstable; the window is too noisy "
                   "or too poorly excited for that rank")
            continue
        try:
            A, B = resample_realisation(real.A, real.B, est.dt_decimated, est.dt)
        except IdentificationError as exc:
            why = str(exc)
            continue
        return TransientFit(A=A, B=B, C=real.C.copy(), dt=est.dt, rank=r_try,
                            hankel_sv=real.hankel_sv, decimate=est.decimate, realisation=real)
    raise IdentificationError(why)


def realise_transient(
    u: np.ndarray,
    r: np.ndarray,
    rate_hz: float,
    *,
    rank: int | None = None,
    max_rank: int = 16,
    decimate: int = 20,
    markov_s: float = 5.0,
    energy: float = 0.99,
    gap: float | None = 4.0,
    previous_rank: int | None = None,
) -> TransientFit:
    """Realise the transient from input ``u`` (pitch rate) to residual outputs ``r``:
    :func:`estimate_markov` then :func:`realise`.

    Why not the observer terms of full OKID: on noisy data the fitted observer (ARX) part has
    spurious roots outside the unit circle as soon as the observer order exceeds the system's
    (measured here: |root| up to 1.6 at order 4-20 with 0.1 % output noise), so extending the
    Markov sequence by the OKID recursion diverges, and the observer realisation's recovery
    ``A = Abar - G C`` amplifies the truncation error. Regularised least-squares Markov
    parameters over a window of several seconds at the decimated rate avoid both.
    """
    est = estimate_markov(u, r, rate_hz, decimate=decimate, markov_s=markov_s,
                          min_lags=2 * max_rank + 2)
    return realise(est, rank, max_rank=max_rank, energy=energy, gap=gap,
                   previous_rank=previous_rank)
