"""Curvature margin: Kalman-filtered state of the model in service, forecast over a horizon.

The transient state of the model in service is estimated by a steady-state Kalman filter
(R. E. Kalman, "A new approach to linear filtering and prediction problems", Trans. ASME J.
Basic Engineering 82, 1960) on both measured outputs, with the gain from the discrete algebraic
Riccati equation (``scipy.linalg.solve_discrete_are``). The curvature is then forecast over the
horizon under the controller's announced alpha plan when there is one, otherwise under a hold of
the current angle. The uncertainty band is the state covariance propagated through the model (driven
by the unknown part of the pitch rate, at its recent rms) plus the residual variance of the fit. From the forecast:
margin now (the fraction of the limit left), predicted minimum margin over the horizon (on the
upper edge of a two-sigma band), time to the limit (first crossing of the central forecast) and
the quasi-steady allowable angle (where K_qs alone would reach the limit).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.linalg

__all__ = ["MarginForecaster"]


class MarginForecaster:
    """Kalman filter on the model in service and a curvature forecast (explicit state).

    Parameters
    ----------
    limit : float
        Curvature limit, 1/m (``outputs.curvature.limit_per_m``).
    horizon_s : float
        Forecast horizon, s.
    dt : float
        Sample time, s.
    step_s : float
        Forecast step, s.
    """

    def __init__(self, limit: float, horizon_s: float, dt: float, step_s: float = 0.01) -> None:
        if not limit > 0:
            raise ValueError("limit must be positive")
        if not horizon_s > 0:
            raise ValueError("horizon_s must be positive")
        self.limit = float(limit)
        self.horizon_s = float(horizon_s)
        self.dt = float(dt)
        self.sub = max(1, int(round(step_s / dt)))
        self.n_steps = max(1, int(math.ceil(horizon_s / (self.sub * dt))))
        self.model_key: Any = None
        self.reset()

    def reset(self) -> None:
        self.x = np.zeros(0)
        self.A = np.zeros((0, 0))
        self.B = np.zeros((0, 1))
        self.C = np.zeros((2, 0))
        self.theta = np.zeros((4, 2))
        self.gain = np.zeros((0, 2))
        self.P = np.zeros((0, 0))
        self.y0 = np.zeros(2)
        self.alpha0 = 0.0
        self.r_var = np.full(2, 1e-6)
        self.ad_sq = 0.0
        self.ad_n = 0.0
        self.last = {"a": 0.0, "ad": 0.0, "add": 0.0, "kappa": 0.0}

    def set_model(self, key: Any, A: np.ndarray, B: np.ndarray, theta: np.ndarray,
                  alpha0: float, y0: np.ndarray, r_var: np.ndarray,
                  x0: np.ndarray | None = None) -> None:
        """Switch to a model (A, B, theta rows [K_qs, K_rate, K_am, C^T, bias]).

        ``x0`` is the model's transient state now, in its own basis (the identifier carries its
        state into each new realisation). A state kept from the previous model would be read in
        the wrong basis: two realisations of the same rank need not share coordinates, and the
        forecast then jumps (on the rig: a forecast of twice the limit at a slow update while
        the curvature sat at half of it). Without ``x0`` a state of the right size is kept.
        """
        if key == self.model_key:
            return
        self.model_key = key
        r = A.shape[0]
        self.A, self.B = A, B.reshape(r, 1)
        self.theta = theta
        self.C = theta[3:3 + r].T
        self.alpha0 = float(alpha0)
        self.y0 = np.asarray(y0, dtype=float)
        self.r_var = np.maximum(np.asarray(r_var, dtype=float), 1e-12)
        if x0 is not None and np.shape(x0) == (r,):
            self.x = np.array(x0, dtype=float)
        elif self.x.shape != (r,):
            self.x = np.zeros(r)
        if r == 0:
            self.gain = np.zeros((0, 2))
            self.P = np.zeros((0, 0))
            return
        # Process noise: the transient is driven by alpha_dot, known to within the
        # differentiator's noise; a small Q keeps the filter responsive (common practice, no
        # source). Measurement noise: the residual variance of the model's fit.
        Q = self.B @ self.B.T * 1e-2 + 1e-12 * np.eye(r)
        Rm = np.diag(self.r_var)
        try:
            P = scipy.linalg.solve_discrete_are(self.A.T, self.C.T, Q, Rm)
            S = self.C @ P @ self.C.T + Rm
            self.gain = P @ self.C.T @ np.linalg.inv(S)  # steady-state Kalman gain
            self.P = P - self.gain @ self.C @ P
        except (np.linalg.LinAlgError, ValueError):
            self.gain = np.zeros((r, 2))  # no gain: open-loop simulation
            self.P = np.zeros((r, r))

    def _closed_loop(self) -> tuple[np.ndarray, np.ndarray]:
        """``F = A (I - L C)`` and ``G = [A L, B]`` of the filter on fully measured blocks."""
        key = (id(self.A), id(self.B), id(self.C), id(self.gain))
        if getattr(self, "_cl_key", None) != key:
            r = self.A.shape[0]
            F = self.A @ (np.eye(r) - self.gain @ self.C)
            G = np.column_stack([self.A @ self.gain, self.B[:, 0]])
            self._cl = (F, G)
            self._cl_key = key
            self._cl_hold = (self.A, self.B, self.C, self.gain)  # ids stay theirs while held
        return self._cl

    def _forecast_maps(self) -> tuple[np.ndarray, np.ndarray]:
        """``G[m] = C_curv Ah^m`` (m = 0..n) and ``g[m] = G[m] Bh`` for the forecast step
        ``Ah = A^sub``, ``Bh = sum_(j<sub) A^j B``; built once per model."""
        key = (id(self.A), id(self.C), self.n_steps, self.sub)
        if getattr(self, "_maps_key", None) != key:
            r = self.A.shape[0]
            Ah = np.linalg.matrix_power(self.A, self.sub)
            Bh = np.zeros(r)
            M = np.eye(r)
            for _ in range(self.sub):
                Bh += M @ self.B[:, 0]
                M = self.A @ M
            G = np.empty((self.n_steps + 1, r))
            row = self.C[1].copy()
            for m in range(self.n_steps + 1):
                G[m] = row
                row = row @ Ah
            self._maps = (G, G @ Bh)
            self._maps_key = key
            self._maps_hold = (self.A, self.C)  # keep the arrays alive so their ids stay theirs
        return self._maps

    def update(self, a: np.ndarray, ad: np.ndarray, add: np.ndarray, dy: np.ndarray,
               ok: np.ndarray, alpha: np.ndarray | None = None) -> None:
        """Run the filter over a block (deviations about the operating point).

        ``a`` is the quasi-steady regressor the model's columns multiply; ``alpha`` the
        incidence when they differ (the identifier's circulatory lag): a hold forecast holds
        the incidence and takes the lag as settled, the steady (conservative) side of it."""
        th = self.theta
        A, B, C, L = self.A, self.B[:, 0], self.C, self.gain
        x = self.x
        direct = np.outer(a, th[0]) + np.outer(ad, th[1]) + np.outer(add, th[2]) + th[-1]
        r = A.shape[0]
        if r and ok.all():
            # Every sample measured: with the steady-state gain the filter is time-invariant,
            # x+ = A (I - L C) x + A L (dy - direct) + B ad, so the state after the block is
            # F^n x + sum over the three inputs of their lifted maps (same as the loop below).
            from wingwatch.daemon.identify.interpretable import block_end_state

            F, G = self._closed_loop()
            w = np.column_stack([dy - direct, ad])
            x = block_end_state(F, G, w, x)
        elif r:
            for k in range(a.size):
                if ok[k]:
                    innov = dy[k] - (C @ x + direct[k])
                    x = x + L @ innov  # measurement update
                x = A @ x + B * ad[k]  # time update
        self.x = x
        if ok.any():
            # recent pitch-rate power, exponentially weighted (5 s half-life in samples)
            decay = 2.0 ** (-a.size * self.dt / 5.0)
            self.ad_sq = decay * self.ad_sq + float(np.sum(ad[ok] ** 2))
            self.ad_n = decay * self.ad_n + int(np.count_nonzero(ok))
        hold = a if alpha is None else alpha
        self.last = {"a": float(hold[-1]), "ad": float(ad[-1]), "add": float(add[-1]),
                     "kappa": float(dy[-1, 1] + self.y0[1])}

    def forecast(self, plan: tuple[float, float, np.ndarray] | None = None, t_now: float = 0.0
                 ) -> dict[str, Any]:
        """Curvature forecast and margins (see the module docstring)."""
        th = self.theta
        r = self.A.shape[0]
        h = self.sub * self.dt
        n = self.n_steps
        tt = (np.arange(n) + 1) * h
        # Future alpha deviation and its derivatives.
        if plan is not None:
            t0, pdt, alpha = plan
            times = t_now + tt
            a_abs = np.interp(times, t0 + pdt * np.arange(alpha.size), alpha)
            a = a_abs - self.alpha0
            ad = np.gradient(a, h) if n > 1 else np.zeros(n)
            add = np.gradient(ad, h) if n > 1 else np.zeros(n)
            source = "plan"
        else:
            a = np.full(n, self.last["a"])
            ad = np.zeros(n)
            add = np.zeros(n)
            source = "hold"
        x = self.x.copy()
        sigma_ad = math.sqrt(self.ad_sq / self.ad_n) if self.ad_n else 0.0
        direct = self.y0[1] + th[0, 1] * a + th[1, 1] * ad + th[2, 1] * add + th[-1, 1]
        if r:
            G, g = self._forecast_maps()
            # x_(k+1) = Ah^(k+1) x + sum_(j<=k) Ah^(k-j) Bh ad_j, seen through C (row 1):
            cx = G[1:] @ x + np.convolve(ad, g[:n])[:n]
            # P_(k+1) = Ah^(k+1) P Ah^(k+1)' + sigma^2 sum_(j<=k) Ah^j Bh Bh' Ah^j'
            cpc = np.einsum("kr,rs,ks->k", G[1:], self.P, G[1:]) + sigma_ad ** 2 * np.cumsum(g[:n] ** 2)
        else:
            cx = np.zeros(n)
            cpc = np.zeros(n)
        kap = direct + cx
        var = cpc + self.r_var[1]  # state uncertainty through the model, plus residual
        band = np.sqrt(var)
        upper = np.abs(kap) + 2.0 * band
        now = 1.0 - abs(self.last["kappa"]) / self.limit
        crossing = np.flatnonzero(np.abs(kap) >= self.limit)
        k_qs = th[0, 1]
        allow = None
        if abs(k_qs) > 1e-12:
            allow = math.degrees(self.alpha0 + (math.copysign(self.limit, k_qs) - self.y0[1]) / k_qs)
        return {
            "limit": self.limit,
            "now": float(now),
            "predicted_min": float(1.0 - upper.max() / self.limit),
            "time_to_limit_s": float(tt[crossing[0]]) if crossing.size else None,
            "horizon_s": self.horizon_s,
            "band": float(band[-1]),
            "allowable_alpha_deg": allow,
            "source": source,
            "kappa_now": self.last["kappa"],
            "kappa_max_forecast": float(np.abs(kap).max()),
        }

    def state_dict(self) -> dict[str, Any]:
        return {"x": self.x.copy(), "ad_sq": self.ad_sq, "ad_n": self.ad_n,
                "last": dict(self.last),
                "model_key": None if self.model_key is None else list(self.model_key),
                "A": self.A.copy(), "B": self.B.copy(), "theta": self.theta.copy(),
                "gain": self.gain.copy(), "P": self.P.copy(), "y0": self.y0.copy(),
                "alpha0": self.alpha0, "r_var": self.r_var.copy()}

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.x = np.array(st["x"], dtype=float)
        self.ad_sq = float(st["ad_sq"])
        self.ad_n = float(st["ad_n"])
        self.last = dict(st["last"])
        key = st["model_key"]
        self.model_key = None if key is None else tuple(key)
        r = int(np.asarray(st["x"]).size)
        self.A = np.asarray(st["A"], dtype=float).reshape(r, r)
        self.B = np.asarray(st["B"], dtype=float).reshape(r, 1)
        self.theta = np.asarray(st["theta"], dtype=float)
        self.C = self.theta[3:3 + r].T
        self.gain = np.asarray(st["gain"], dtype=float).reshape(r, 2)
        self.P = np.asarray(st["P"], dtype=float).reshape(r, r)
        self.y0 = np.asarray(st["y0"], dtype=float)
        self.alpha0 = float(st["alpha0"])
        self.r_var = np.asarray(st["r_var"], dtype=float)
