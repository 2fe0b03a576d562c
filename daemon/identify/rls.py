"""Block recursive least squares with exponential forgetting and windup protection.

The estimator solves, recursively and one frame of samples at a time, the weighted
least-squares problem of L. Ljung and T. Soderstrom, "Theory and Practice of Recursive
Identification", MIT Press, 1983 (section 2.6): for the multi-output regression
``y_k = Theta^T phi_k + e_k``,

    Theta_N = argmin  sum_i lam^(N-1-i) |y_i - Theta^T phi_i|^2  +  lam^N delta |Theta - Theta_0|^2

With ``lam = 1`` this is ordinary least squares, and the recursion reproduces the batch
solution after every frame.

Form. Instead of the covariance recursion ``P <- (P - K phi^T P) / lam`` (Ljung & Soderstrom
eq. 2.19), which loses symmetry and positive definiteness over days of data, the estimator keeps
the upper-triangular square-root factor ``F`` of the augmented information matrix::

    F^T F = [[R, r], [r^T, s]],   R = sum w_i phi_i phi_i^T,  r = sum w_i phi_i y_i^T,
                                   s = sum w_i y_i y_i^T

A frame of ``n`` samples is absorbed with one Householder QR of the stacked matrix
``[lam^(n/2) F ; diag(sqrt(w)) [Phi Y]]`` with in-frame weights ``w_i = lam^(n-1-i)``. That is
exact exponential forgetting, fully vectorised, independent of how the data are cut into
frames, and positive definite by construction. ``Theta = R_f^-1 z`` is a triangular solve and
the bottom-right block of ``F`` is the square root of the weighted residual sum of squares, so
no cancellation-prone ``s - r^T R^-1 r`` is ever formed.

Windup protection. With plain forgetting, a long hold at a constant regressor forgets the
information in every direction the data no longer excite, ``R`` becomes singular and the gain
explodes when excitation resumes. Directional forgetting (R. Kulhavy, "Restricted exponential
forgetting in real-time identification", Automatica 23(5), 1987) forgets only along the
directions the new data carry. Here it is applied frame-wise and gated by recent excitation:
``Q``, an exponentially weighted information matrix with a shorter half-life, is compared with
``R`` in whitened coordinates (eigenvalues ``nu_j`` of ``R_f^-T Q R_f^-1``). For stationary
rich data every ``nu_j`` sits near ``nu_ss = (1 - lam) / (1 - lam_q)``; a direction whose
``nu_j`` falls below ``gate * nu_ss`` is forgotten proportionally less, and an unexcited one
not at all. When every direction passes the gate (checked with one Cholesky factorisation of
``Q - gate nu_ss R``) the update is exactly exponential forgetting.

Confidence intervals. With ``n1 = sum w_i`` and ``n2 = sum w_i^2`` (the Kish effective window
is ``n1^2 / n2``; ``(1 + lam) / (1 - lam)`` in steady state) the residual variance is
``sigma^2 = SSE / (n1 - p n2 / n1)`` and ``cov(Theta) ~ sigma^2 (n2 / n1) R^-1``. Both are
exact least-squares formulas for ``lam = 1``; with forgetting they assume a stationary
regressor over the window. Intervals use Student's t with ``n1^2 / n2 - p`` degrees of freedom.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas, lapack

from wingwatch.daemon.errors import IdentificationError

__all__ = ["RecursiveLeastSquares", "RLSSnapshot", "forgetting_factor"]


def forgetting_factor(half_life: float, rate: float = 1.0) -> float:
    """Forgetting factor for a half-life: ``lam = 2^(-1 / (half_life * rate))``.

    Parameters
    ----------
    half_life : float
        Time after which old data carry half their weight, in seconds when ``rate`` is the
        sample rate in Hz (in samples with the default ``rate=1``). ``math.inf`` means no
        forgetting.
    rate : float
        Sample rate in Hz.

    Examples
    --------
    >>> round(forgetting_factor(1.0, rate=1000.0) ** 1000, 12)
    0.5
    >>> forgetting_factor(math.inf)
    1.0
    """
    if not half_life > 0:
        raise ValueError(f"half_life must be > 0, got {half_life}")
    if not (rate > 0 and math.isfinite(rate)):
        raise ValueError(f"rate must be a positive finite number, got {rate}")
    if math.isinf(half_life):
        return 1.0
    return 2.0 ** (-1.0 / (half_life * rate))  # lam = 2^(-1/(T_half f_s))


@dataclass(frozen=True, eq=False)
class RLSSnapshot:
    """Read-only summary of a :class:`RecursiveLeastSquares` estimator."""

    theta: np.ndarray
    stderr: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    level: float
    residual_variance: np.ndarray
    excitation: float
    effective_window: float
    n_samples: int


class _FrameCache:
    """Weights and a work buffer for one frame length (rebuilt when the length changes)."""

    __slots__ = ("n", "w", "sw", "wq", "sum_w", "sum_w2", "decay", "root_decay", "decay2",
                 "decay_q", "work", "upper")

    def __init__(self, n: int, lam: float, lam_q: float, q: int) -> None:
        ages = np.arange(n - 1, -1, -1, dtype=float)  # n-1-i
        w = lam**ages  # w_i = lam^(n-1-i)
        self.n = n
        self.w = w[:, None]
        self.sw = np.sqrt(w)[:, None]
        self.wq = (lam_q**ages)[:, None]
        self.sum_w = float(w.sum())
        self.sum_w2 = float((w * w).sum())
        self.decay = lam**n
        self.root_decay = lam ** (n / 2.0)
        self.decay2 = lam ** (2 * n)
        self.decay_q = lam_q**n
        self.work = np.empty((q + n, q), order="F")
        self.upper = np.triu(np.ones((q, q)))


class RecursiveLeastSquares:
    """Recursive least squares on ``y = Theta^T phi + e``, one frame at a time.

    Parameters
    ----------
    n_regressors : int
        Length ``p`` of the regressor ``phi``.
    n_outputs : int
        Number ``m`` of outputs (columns of ``Theta``).
    half_life : float
        Forgetting half-life in seconds at ``rate`` (samples when ``rate=1``); ``math.inf``
        (default) means no forgetting.
    rate : float
        Sample rate in Hz.
    gate : float
        Windup gate in [0, 1): directions receiving less than this fraction of their
        steady-state information are forgotten proportionally less. 0 disables the gate
        (plain exponential forgetting).
    excitation_half_life : float or None
        Half-life of the recent-information matrix ``Q`` used by the gate and by
        :attr:`excitation`, same units as ``half_life``. Default: ``half_life / 8``, or
        1024 samples without forgetting.
    prior_precision : float
        Weight ``delta`` of the prior ``Theta_0`` (information ``delta * I``); 0 is allowed,
        the estimate then stays at ``Theta_0`` until the data determine it.
    theta0 : array_like or None
        Prior estimate, shape ``(p, m)``; zeros by default.
    ci_batch : int
        Samples per batch of the autocorrelation-robust standard errors (see :attr:`stderr`);
        0 (default) gives the white-noise standard errors only.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> phi = rng.standard_normal((200, 2))
    >>> y = phi @ np.array([[1.5], [-0.5]]) + 0.01 * rng.standard_normal((200, 1))
    >>> est = RecursiveLeastSquares(2, 1, prior_precision=0.0)
    >>> for k in range(0, 200, 10):
    ...     _ = est.update(phi[k:k + 10], y[k:k + 10])
    >>> est.theta.round(3).ravel().tolist()
    [1.5, -0.499]
    """

    def __init__(
        self,
        n_regressors: int,
        n_outputs: int = 1,
        half_life: float = math.inf,
        rate: float = 1.0,
        gate: float = 0.1,
        excitation_half_life: float | None = None,
        prior_precision: float = 1e-6,
        theta0=None,
        ci_batch: int = 0,
    ) -> None:
        if int(ci_batch) != ci_batch or ci_batch < 0:
            raise ValueError(f"ci_batch must be a whole number >= 0, got {ci_batch}")
        self.ci_batch = int(ci_batch)
        if int(n_regressors) != n_regressors or n_regressors < 1:
            raise ValueError(f"n_regressors must be a positive integer, got {n_regressors}")
        if int(n_outputs) != n_outputs or n_outputs < 1:
            raise ValueError(f"n_outputs must be a positive integer, got {n_outputs}")
        if not 0.0 <= gate < 1.0:
            raise ValueError(f"gate must be in [0, 1), got {gate}")
        if not (prior_precision >= 0.0 and math.isfinite(prior_precision)):
            raise ValueError(f"prior_precision must be finite and >= 0, got {prior_precision}")
        self.n_regressors = int(n_regressors)
        self.n_outputs = int(n_outputs)
        self.half_life = float(half_life)
        self.rate = float(rate)
        self.gate = float(gate)
        self.lam = forgetting_factor(self.half_life, self.rate)
        if excitation_half_life is None:
            if math.isinf(self.half_life):
                excitation_half_life = 1024.0 / self.rate
            else:
                excitation_half_life = self.half_life / 8.0
        if not (excitation_half_life > 0 and math.isfinite(excitation_half_life)):
            raise ValueError(
                f"excitation_half_life must be positive and finite, got {excitation_half_life}"
            )
        self.excitation_half_life = float(excitation_half_life)
        self.lam_q = forgetting_factor(self.excitation_half_life, self.rate)
        self.prior_precision = float(prior_precision)
        p, m = self.n_regressors, self.n_outputs
        if theta0 is None:
            theta0 = np.zeros((p, m))
        theta0 = np.array(theta0, dtype=float).reshape(p, m)
        if not np.all(np.isfinite(theta0)):
            raise ValueError("theta0 contains non-finite values")
        self.theta0 = theta0
        # nu_ss = (1 - lam) / (1 - lam_q): whitened recent information in steady state.
        self._nu_ss = (1.0 - self.lam) / (1.0 - self.lam_q)
        self._cache: _FrameCache | None = None
        self.reset()

    # ----------------------------------------------------------------- state
    def reset(self) -> None:
        """Forget everything learned: back to the prior ``theta0`` with ``delta * I``."""
        p, m = self.n_regressors, self.n_outputs
        root = math.sqrt(self.prior_precision)
        F = np.zeros((p + m, p + m))
        F[:p, :p] = root * np.eye(p)  # R = delta I
        F[:p, p:] = root * self.theta0  # z = R_f Theta_0
        self._F = F
        self._theta = self.theta0.copy()
        self._Q = np.zeros((p, p))
        self._n1 = 0.0
        self._n2 = 0.0
        self._n_samples = 0
        self._solved = self.prior_precision > 0.0
        self._g = np.zeros((p, m))  # weighted score sum(w_k phi_k e_k) of the open batch
        self._S = np.zeros((m, p, p))  # sum over closed batches of W_b g_b g_b^T, per output
        self._b_count = 0  # samples in the open batch
        self._b1 = 0.0  # sum of batch weights W_b (aged like S)
        self._b2 = 0.0  # sum of W_b^2, for the effective number of batches
        self._infl = np.ones((p, m))  # variance inflation per coefficient (>= 1), held in holds
        self._gated = False  # the last frame's forgetting was gated (a weakly excited direction)

    def state_dict(self) -> dict:
        """Learned state as plain arrays and numbers (copies); see :meth:`load_state_dict`."""
        return {
            "n_regressors": self.n_regressors,
            "n_outputs": self.n_outputs,
            "F": self._F.copy(),
            "theta": self._theta.copy(),
            "Q": self._Q.copy(),
            "n1": self._n1,
            "n2": self._n2,
            "n_samples": self._n_samples,
            "solved": self._solved,
            "g": self._g.copy(),
            "S": self._S.copy(),
            "b_count": self._b_count,
            "b1": self._b1,
            "b2": self._b2,
            "infl": self._infl.copy(),
            "gated": self._gated,
        }

    def load_state_dict(self, state: dict) -> None:
        """Restore the state saved by :meth:`state_dict` (exactly)."""
        p, m = self.n_regressors, self.n_outputs
        if state.get("n_regressors") != p or state.get("n_outputs") != m:
            raise ValueError(
                f"state is for {state.get('n_regressors')} regressors and "
                f"{state.get('n_outputs')} outputs, estimator has {p} and {m}"
            )
        F = np.array(state["F"], dtype=float)
        theta = np.array(state["theta"], dtype=float)
        Q = np.array(state["Q"], dtype=float)
        if F.shape != (p + m, p + m) or theta.shape != (p, m) or Q.shape != (p, p):
            raise ValueError("state arrays have the wrong shapes")
        self._F, self._theta, self._Q = F, theta, Q
        self._n1 = float(state["n1"])
        self._n2 = float(state["n2"])
        self._n_samples = int(state["n_samples"])
        self._solved = bool(state["solved"])
        # states saved before the robust standard errors existed restore with none accumulated
        self._g = np.array(state.get("g", np.zeros((p, m))), dtype=float).reshape(p, m)
        self._S = np.array(state.get("S", np.zeros((m, p, p))), dtype=float).reshape(m, p, p)
        self._b_count = int(state.get("b_count", 0))
        self._b1 = float(state.get("b1", 0.0))
        self._b2 = float(state.get("b2", 0.0))
        self._infl = np.array(state.get("infl", np.ones((p, m))), dtype=float).reshape(p, m)
        self._gated = bool(state.get("gated", False))

    # ---------------------------------------------------------------- update
    def _frame(self, n: int) -> _FrameCache:
        cache = self._cache
        if cache is None or cache.n != n:
            cache = _FrameCache(n, self.lam, self.lam_q, self.n_regressors + self.n_outputs)
            self._cache = cache
        return cache

    def update(self, phi, y) -> np.ndarray:
        """Absorb one frame and return its a-priori prediction errors.

        Parameters
        ----------
        phi : array_like
            Regressors, shape ``(n, p)``.
        y : array_like
            Outputs, shape ``(n, m)`` (or ``(n,)`` when ``m == 1``).

        Returns
        -------
        numpy.ndarray
            ``y - phi @ Theta`` with the estimate from before this frame, shape ``(n, m)``.
        """
        p, m = self.n_regressors, self.n_outputs
        phi = np.asarray(phi, dtype=float)
        y = np.asarray(y, dtype=float)
        if phi.ndim != 2 or phi.shape[1] != p:
            raise ValueError(f"phi must have shape (n, {p}), got {phi.shape}")
        n = phi.shape[0]
        if y.ndim == 1 and m == 1:
            y = y[:, None]
        if y.shape != (n, m):
            raise ValueError(f"y must have shape ({n}, {m}), got {y.shape}")
        if n == 0:
            return np.zeros((0, m))
        errors = y - phi @ self._theta  # a-priori errors e_k = y_k - Theta_(k-1)^T phi_k
        if not math.isfinite(errors.sum()):  # any nan/inf in phi or y reaches the errors
            raise ValueError("phi and y must be finite")
        fc = self._frame(n)
        q = p + m
        G = fc.work
        self._Q *= fc.decay_q
        self._Q += (phi * fc.wq).T @ phi  # Q <- lam_q^n Q + Phi^T W_q Phi
        if self.lam < 1.0:
            self._forget(fc, G)
            np.multiply(phi, fc.sw, out=G[q:, :p])  # rows sqrt(w_i) phi_i^T
            np.multiply(y, fc.sw, out=G[q:, p:])  # rows sqrt(w_i) y_i^T
        else:
            G[:q] = self._F
            G[q:, :p] = phi
            G[q:, p:] = y
        qr, _, _, info = lapack.dgeqrf(G, overwrite_a=1)  # [lam^(n/2) F; W^1/2 [Phi Y]] = Q_h F'
        if info != 0:  # pragma: no cover - LAPACK argument error
            raise IdentificationError(f"QR update failed (LAPACK info {info})")
        self._F = qr[:q] * fc.upper  # keep the triangle, drop the Householder vectors
        self._n1 = fc.decay * self._n1 + fc.sum_w  # n1 <- lam^n n1 + sum w_i
        self._n2 = fc.decay2 * self._n2 + fc.sum_w2  # n2 <- lam^2n n2 + sum w_i^2
        self._n_samples += n
        self._solve()
        if self.ci_batch:  # scores from the a-posteriori residuals (the a-priori ones of a fresh
            # estimator are far from its residuals once it has data)
            self._batch_scores(phi, y - phi @ self._theta, fc)
        return errors

    def _batch_scores(self, phi: np.ndarray, errors: np.ndarray, fc: _FrameCache) -> None:
        """Accumulate the batch-means estimate of the score covariance (see :attr:`stderr`)."""
        self._g *= fc.decay
        self._g += phi.T @ (errors * fc.w)
        self._S *= fc.decay2
        self._b1 *= fc.decay2
        self._b2 *= fc.decay2 * fc.decay2
        self._b_count += phi.shape[0]
        if self._b_count < self.ci_batch:
            return
        g = self._g
        self._S += np.einsum("im,jm->mij", g, g)
        self._b1 += 1.0
        self._b2 += 1.0
        self._g = np.zeros_like(g)
        self._b_count = 0
        if self._gated or self.effective_batches < 5:
            return  # a weakly excited direction: keep the inflation learned while excited
        P = self.covariance
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # undetermined: nan
            white = np.diag(P)[:, None] * self.residual_variance[None, :] * (self._n2 / self._n1)
            robust = np.einsum("ij,mjk,ik->im", P, self._S, P)  # diag(P S_m P) per output
            ratio = robust / white
        ok = np.isfinite(ratio)
        self._infl[ok] = np.maximum(ratio[ok], 1.0)

    @property
    def effective_batches(self) -> float:
        """Effective number of closed batches in the forgetting window (Kish: b1^2 / b2)."""
        return self._b1 * self._b1 / self._b2 if self._b2 > 0 else 0.0

    def _forget(self, fc: _FrameCache, G: np.ndarray) -> None:
        """Write the forgotten factor into ``G[:q]`` (exponential, or gated by excitation)."""
        p = self.n_regressors
        q = p + self.n_outputs
        F = self._F
        self._gated = False
        if self.gate > 0.0:
            Rf = F[:p, :p]
            Z = self._Q - (self.gate * self._nu_ss) * (Rf.T @ Rf)  # Q - gate nu_ss R
            _, info = lapack.dpotrf(Z, lower=0, clean=0)
            if info != 0:  # some direction is weakly excited: gate the forgetting
                rtq = blas.dtrsm(1.0, Rf, self._Q, trans_a=1)  # R_f^-T Q
                X = blas.dtrsm(1.0, Rf, rtq, side=1)  # R_f^-T Q R_f^-1
                if math.isfinite(X.sum()):  # R_f invertible (always once prior or data exist)
                    nu, V, info3 = lapack.dsyevd(X, lower=0)  # X = V diag(nu) V^T
                    if info3 != 0:  # pragma: no cover - LAPACK convergence failure
                        raise IdentificationError(f"eigen-decomposition failed ({info3})")
                    g = np.clip(nu / (self.gate * self._nu_ss), 0.0, 1.0)  # gate per direction
                    self._gated = True
                    d = (1.0 - fc.decay) * g  # information fraction forgotten along v_j
                    c = 1.0 - np.sqrt(1.0 - d)  # (1 - c_j)^2 = 1 - d_j
                    top = F[:p]
                    G[:p] = top - V @ (c[:, None] * (V.T @ top))  # (I - V diag(c) V^T) [R_f z]
                    np.multiply(F[p:], fc.root_decay, out=G[p:q])  # residual block: lam^(n/2)
                    return
        np.multiply(F, fc.root_decay, out=G[:q])  # lam^(n/2) F: exact exponential forgetting

    # Triangular solves go through BLAS dtrsm rather than LAPACK dtrtrs: the OpenBLAS dtrtrs
    # may start worker threads even for tiny matrices, which costs about a millisecond per call
    # on a machine whose cores are busy (measured on the 2-core test host).
    def _solve(self) -> None:
        p = self.n_regressors
        Rf = self._F[:p, :p]
        if not self._solved:  # only possible with prior_precision = 0, before enough data
            diag = np.abs(np.diag(Rf))
            if diag.min() <= 1e-13 * diag.max() or diag.max() == 0.0:
                return  # not yet determined: keep the previous estimate
        theta = blas.dtrsm(1.0, Rf, self._F[:p, p:])  # Theta = R_f^-1 z
        if math.isfinite(theta.sum()):
            self._theta = theta
            self._solved = True

    def predict(self, phi) -> np.ndarray:
        """Predicted outputs ``phi @ Theta`` for regressors of shape ``(n, p)``."""
        return np.asarray(phi, dtype=float) @ self._theta

    def transform(self, T, columns=None) -> None:
        """Re-express part of the regressor in a new basis without losing what was learned.

        When the regressor entries ``x = phi[columns]`` are replaced by ``x' = T x`` (for
        instance transient states after a change of state basis), the estimator becomes the
        one that would have been obtained from the transformed data: ``Theta' = T_f^-T Theta``,
        ``R' = T_f R T_f^T`` with ``T_f`` the identity except for the block ``T``.

        Parameters
        ----------
        T : array_like
            Invertible matrix of shape ``(k, k)``.
        columns : slice, sequence of int or None
            The ``k`` regressor positions that ``T`` acts on; all by default.
        """
        p = self.n_regressors
        idx = np.arange(p)[columns] if columns is not None else np.arange(p)
        T = np.asarray(T, dtype=float)
        if T.shape != (idx.size, idx.size):
            raise ValueError(f"T must have shape ({idx.size}, {idx.size}), got {T.shape}")
        if not np.all(np.isfinite(T)) or np.linalg.cond(T) > 1e12:
            raise ValueError("T must be finite and well conditioned")
        Tf = np.eye(p)
        Tf[np.ix_(idx, idx)] = T
        F = self._F.copy()
        F[:p, :p] = F[:p, :p] @ Tf.T  # R_f' = R_f T_f^T, z unchanged
        self._F = np.triu(np.linalg.qr(F, mode="r"))
        self._Q = Tf @ self._Q @ Tf.T  # Q' = T_f Q T_f^T
        self._g = Tf @ self._g  # scores: phi' = T_f phi
        self._S = np.einsum("ij,mjk,lk->mil", Tf, self._S, Tf)  # S' = T_f S T_f^T
        worst = self._infl[idx].max(axis=0)  # the new state rows mix the old ones
        self._infl[idx] = worst
        self._theta = np.linalg.solve(Tf.T, self._theta)  # Theta' = T_f^-T Theta
        self._solve()

    # --------------------------------------------------------------- results
    @property
    def theta(self) -> np.ndarray:
        """Current estimate, shape ``(p, m)`` (a copy)."""
        return self._theta.copy()

    @property
    def n_samples(self) -> int:
        """Number of samples absorbed since the last reset."""
        return self._n_samples

    @property
    def effective_window(self) -> float:
        """Kish effective number of samples ``n1^2 / n2`` (the sample count when ``lam = 1``)."""
        return self._n1 * self._n1 / self._n2 if self._n2 > 0 else 0.0

    @property
    def information(self) -> np.ndarray:
        """Information matrix ``R`` (inverse of :attr:`covariance`), shape ``(p, p)``."""
        p = self.n_regressors
        Rf = self._F[:p, :p]
        return Rf.T @ Rf

    @property
    def covariance(self) -> np.ndarray:
        """Unscaled parameter covariance ``P = R^-1``, shape ``(p, p)``."""
        p = self.n_regressors
        inv, info = lapack.dtrtri(self._F[:p, :p], lower=0)
        if info != 0:
            return np.full((p, p), np.inf)
        return inv @ inv.T  # P = R_f^-1 R_f^-T

    @property
    def residual_variance(self) -> np.ndarray:
        """Residual variance per output ``SSE / (n1 - p n2 / n1)``; nan while undetermined."""
        p = self.n_regressors
        S = self._F[p:, p:]
        sse = np.sum(S * S, axis=0)  # diag(S^T S) = weighted residual sum of squares
        if self._n1 <= 0:
            return np.full(self.n_outputs, np.nan)
        dof = self._n1 - p * self._n2 / self._n1
        if dof <= 0:
            return np.full(self.n_outputs, np.nan)
        return sse / dof

    @property
    def stderr(self) -> np.ndarray:
        """Standard errors of ``Theta``, shape ``(p, m)``.

        White-noise form ``sqrt(diag(P) sigma^2 n2 / n1)``. With ``ci_batch`` the residuals may
        be autocorrelated (they are, at a kHz sample rate: unmodelled slow dynamics and coloured
        sensor noise), and the variance is ``diag(P S P)`` instead, ``S`` the sum over batches of
        ``ci_batch`` samples of the outer products of the weighted score
        ``g_b = sum_(k in b) w_k phi_k e_k`` (``e_k`` the residuals after each frame's update): the sandwich
        estimator with non-overlapping batches, a batch-means form of the
        autocorrelation-consistent covariance (W. K. Newey and K. D. West, Econometrica 55(3),
        1987). It is kept as a ratio to the white-noise variance per coefficient, at least 1,
        updated at every batch end once 5 effective batches exist, and held while the windup
        gate is active, so a hold neither narrows nor widens the intervals by itself.
        """
        var = self.residual_variance
        ratio = self._n2 / self._n1 if self._n1 > 0 else np.nan
        with np.errstate(invalid="ignore"):  # an undetermined estimate (inf covariance): nan
            white = np.diag(self.covariance)[:, None] * var[None, :] * ratio
        return np.sqrt(white * self._infl)

    @property
    def inflation(self) -> np.ndarray:
        """Variance inflation per coefficient from the batch-means estimate (1 = white)."""
        return self._infl.copy()

    def intervals(self, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
        """Two-sided confidence intervals ``(lower, upper)`` on ``Theta`` at ``level``."""
        if not 0.0 < level < 1.0:
            raise ValueError(f"level must be in (0, 1), got {level}")
        dof = self.effective_window - self.n_regressors
        if self.ci_batch and np.any(self._infl > 1.0):
            dof = min(dof, self.effective_batches - 1.0)  # the robust variance's own dof
        from scipy.stats import t as student_t  # imported here: scipy.stats is slow to load

        half = self.stderr * (student_t.ppf(0.5 + level / 2.0, dof) if dof > 0 else np.nan)
        return self._theta - half, self._theta + half

    @property
    def excitation(self) -> float:
        """Excitation of recent data: smallest eigenvalue of ``Q`` in correlation form.

        1 when the recent regressors are orthogonal with equal power; near 0 when some
        direction (or combination) of the regressor has not been excited over the last few
        ``excitation_half_life``.
        """
        Q = self._Q
        d = np.sqrt(np.diag(Q))
        if np.any(d <= 0):
            return 0.0
        corr = Q / d[:, None] / d[None, :]
        return float(max(np.linalg.eigvalsh(0.5 * (corr + corr.T))[0], 0.0))

    def excitation_of(self, columns) -> float:
        """:attr:`excitation` restricted to some regressor columns (e.g. the input terms).

        >>> est = RecursiveLeastSquares(3, 1, half_life=100.0)
        >>> rng = np.random.default_rng(1)
        >>> u = rng.standard_normal(400)
        >>> _ = est.update(np.column_stack([u, u, rng.standard_normal(400)]), u)
        >>> est.excitation_of([0, 2]) > 0.5, est.excitation_of([0, 1]) < 1e-9
        (True, True)
        """
        idx = np.asarray(columns, dtype=int)
        Q = self._Q[np.ix_(idx, idx)]
        d = np.sqrt(np.diag(Q))
        if np.any(d <= 0):
            return 0.0
        corr = Q / d[:, None] / d[None, :]
        return float(max(np.linalg.eigvalsh(0.5 * (corr + corr.T))[0], 0.0))

    def snapshot(self, level: float = 0.95) -> RLSSnapshot:
        """A frozen summary for publication."""
        lower, upper = self.intervals(level)
        return RLSSnapshot(
            theta=self.theta,
            stderr=self.stderr,
            lower=lower,
            upper=upper,
            level=float(level),
            residual_variance=self.residual_variance,
            excitation=self.excitation,
            effective_window=self.effective_window,
            n_samples=self._n_samples,
        )
