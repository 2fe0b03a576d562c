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

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from wingwatch.daemon.errors import IdentificationError
from wingwatch.daemon.identify.era import Realisation, choose_rank, era

__all__ = ["TransientFit", "decimate_mean", "resample_realisation", "fir_markov", "realise_transient"]


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

    Raises IdentificationError when A has an eigenvalue on or near the negative real axis (no
    real continuous-time model: the decimated rate is too low for the data).
    """
    A = np.atleast_2d(np.asarray(A, dtype=float))
    B = np.asarray(B, dtype=float).reshape(A.shape[0], -1)
    n, m = B.shape
    ev = np.linalg.eigvals(A)
    if np.any((np.abs(ev.imag) < 1e-9) & (ev.real <= 0.0)):
        raise IdentificationError(
            "the transient has a pole on the negative real axis at the decimated rate; "
            "lower the decimation factor"
        )
    M = np.zeros((n + m, n + m))
    M[:n, :n] = A
    M[:n, n:] = B
    M[n:, n:] = np.eye(m)
    L = scipy.linalg.logm(M)
    if np.max(np.abs(np.imag(L))) > 1e-6 * max(1.0, np.max(np.abs(L))):
        raise IdentificationError("the transient realisation has no real continuous-time form")
    L = np.real(L) * (dt_to / dt_from)  # [[A_c, B_c], [0, 0]] * dt_to
    E = scipy.linalg.expm(L)
    return E[:n, :n], E[:n, n:]


def fir_markov(u: np.ndarray, r: np.ndarray, n_lags: int, ridge: float = 1e-6) -> np.ndarray:
    """Markov parameters ``h_0 .. h_L`` of ``r(k) = sum_j h_j u(k-j)`` by least squares.

    This is the OKID regression (Juang et al. 1993, eq. 9) with no output terms: the observer
    gain is zero, so the fitted parameters are the system Markov parameters themselves and no
    recursion is needed. ``ridge`` adds ``ridge * trace(V^T V) / L`` to the normal equations
    (Tikhonov), which only matters when the input does not excite every lag.

    Shape diagram, one row per time k = L .. N-1::

        r(k)^T     =  [ u(k)  u(k-1)  ...  u(k-L) ]  @  [ h_0^T ; h_1^T ; ... ; h_L^T ]
      (rows x n_out)          (rows x (L+1))               ((L+1) x n_out)

    Returns an array of shape ``(L + 1, n_out, 1)`` (``markov[0]`` is the direct term).
    """
    u = np.asarray(u, dtype=float).reshape(-1)
    r = np.asarray(r, dtype=float)
    r = r[:, None] if r.ndim == 1 else r
    n = u.shape[0]
    if n - n_lags < 2 * (n_lags + 1):
        raise IdentificationError(
            f"the window has {n} samples, too few for {n_lags} Markov parameters "
            f"(needs at least {3 * (n_lags + 1) + n_lags})"
        )
    V = np.lib.stride_tricks.sliding_window_view(u, n_lags + 1)[:, ::-1]  # [u(k) .. u(k-L)]
    R = r[n_lags:]
    G = V.T @ V
    G[np.diag_indices_from(G)] += ridge * np.trace(G) / (n_lags + 1)
    H = scipy.linalg.solve(G, V.T @ R, assume_a="pos")  # (V^T V + lam I) h = V^T r
    return H[:, :, None]


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
    ridge: float = 1e-6,
    previous_rank: int | None = None,
) -> TransientFit:
    """Realise the transient from input ``u`` (pitch rate) to residual outputs ``r``.

    Block-average by ``decimate``, fit ``markov_s`` seconds of Markov parameters by least
    squares (:func:`fir_markov`), realise them by ERA, carry the result back to the sample
    rate (:func:`resample_realisation`).

    Why not the observer terms of full OKID: on noisy data the fitted observer (ARX) part has
    spurious roots outside the unit circle as soon as the observer order exceeds the system's
    (measured here: |root| up to 1.6 at order 4-20 with 0.1 % output noise), so extending the
    Markov sequence by the OKID recursion diverges, and the observer realisation's recovery
    ``A = Abar - G C`` amplifies the truncation error. Plain least-squares Markov parameters
    over a window of several seconds at the decimated rate avoid both.

    Parameters
    ----------
    rank : int, optional
        Fixed rank; by default chosen from the Hankel singular values
        (:func:`~wingwatch.daemon.identify.era.choose_rank` with ``energy``, ``gap``,
        ``max_rank`` and hysteresis on ``previous_rank``). A chosen (not fixed) rank whose
        realisation is unstable or has a pole on the negative real axis (a noise state at the
        decimated Nyquist frequency) is lowered one at a time until it is valid.
    """
    if decimate < 1:
        raise ValueError("decimate must be at least 1")
    u = np.asarray(u, dtype=float).reshape(-1)
    r = np.asarray(r, dtype=float)
    r = r[:, None] if r.ndim == 1 else r
    if r.shape[0] != u.shape[0]:
        raise ValueError("u and r must have the same number of samples")
    dt = 1.0 / rate_hz
    dt_d = dt * decimate
    ud = decimate_mean(u, decimate)
    rd = decimate_mean(r, decimate)
    n_lags = max(int(round(markov_s / dt_d)), 2 * max_rank + 2)
    mk = fir_markov(ud, rd, n_lags, ridge)
    rows = n_lags // 2
    cols = n_lags - rows
    cap = min(max_rank, rows * mk.shape[1], cols)
    first = era(mk, 1, rows, cols)  # for the singular values
    fixed = rank is not None
    if rank is None:
        rank = choose_rank(first.hankel_sv, energy=energy, gap=gap, max_rank=cap,
                           previous=previous_rank)
    if not 1 <= rank <= cap:
        raise IdentificationError(f"rank {rank} is outside 1..{cap} for this window")
    why = ""
    for r_try in range(rank, 0 if not fixed else rank - 1, -1):
        real = era(mk, r_try, rows, cols)
        if np.max(np.abs(np.linalg.eigvals(real.A))) >= 1.0:
            why = (f"the rank-{r_try} transient realisation is unstable; the window is too noisy "
                   "or too poorly excited for that rank")
            continue
        try:
            A, B = resample_realisation(real.A, real.B, dt_d, dt)
        except IdentificationError as exc:
            why = str(exc)
            continue
        rank = r_try  # a rank whose extra state is a noise pole is lowered until it is valid
        break
    else:
        raise IdentificationError(why)
    return TransientFit(A=A, B=B, C=real.C.copy(), dt=dt, rank=rank, hankel_sv=real.hankel_sv,
                        decimate=decimate, realisation=real)
