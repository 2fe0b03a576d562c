"""The circulatory lift lag as a fixed prior: the quasi-steady regressor seen through Wagner's function.

Why. The circulatory lift of a wing approaches its steady value slowly after a change of
incidence: Wagner's indicial function rises from 1/2 at the start to 1 with an algebraic tail
(about 3 % short 40 semichords later, 1.4 % after 80; the virtual rig's step response is 1.9 %
short after 5 s, 0.9 % after 10 s). The transient states ``x`` of the model are realised from
Markov parameters over a few seconds (``identify.markov_s``), so they cannot carry that tail;
and a free slow state is collinear with ``alpha`` when the pitching has no power below the
tail's frequencies, so the data cannot fix it either. Regressing on ``alpha`` itself, the
quasi-steady column then settles on the slope at the bottom of the excited band, 5-11 % below
the steady slope on the rig (docs/identification.md).

What. With the lag known from theory, the quasi-steady regressor becomes the incidence seen
through the indicial function, scaled:

    z(t) = alpha(t) - s * sum_i w_i x_i(t),     dx_i/dt = -beta_i (U / b) x_i + alpha_dot(t)

so that a step of ``alpha`` gives ``z = alpha (1 - s (1 - Phi(U t / b)))`` with
``Phi(tau) = 1 - sum_i w_i exp(-beta_i tau)`` Wagner's function in semichords ``b`` travelled at
flow speed ``U``. The model stays ``y = K_qs z + K_rate alpha_dot + K_am alpha_ddot + C x +
bias``: linear in the same unknowns, with the tail's shape fixed and its size tied to ``K_qs``,
so ``K_qs`` is the steady slope however little slow excitation there is. Equivalently (and so
it is published) ``K_qs alpha + C x + C_lag x_lag`` with the lag states appended to the
transient and ``C_lag = -s K_qs w``: the model class of the issue, with ``len(w)`` more states.

* The weights ``w_i`` (non-negative, summing to 1/2 so that ``Phi(0) = 1/2``) on fixed rates
  ``beta_i`` (log-spaced, 1e-3 to 3 per semichord) are fitted by linear least squares to
  Theodorsen's function ``C(k) = 1 - sum_i w_i i k / (i k + beta_i)``, the frequency-domain
  form of Wagner's function (T. Theodorsen, NACA Report 496, 1935; H. Wagner, ZAMM 5, 1925;
  the exponential form is R. T. Jones's, NACA Report 667, 1938, from memory). Eight terms fit
  ``C(k)`` within 2e-3 for reduced frequencies 1e-5 to 30.
* The scale ``s``: a flexible wing's lift feeds back on its incidence through its deformation
  (decambering, twist) much faster than the tail evolves, which shortens the tail by the ratio
  of the flexible to the rigid lift slope. ``s = K_qs,reference / (2 pi)`` (thin-airfoil
  theory's slope; from memory), or configured (``identify.lift_lag_scale``). On the virtual rig
  the step response's tail is 0.63 of Wagner's and 3.70 / 2 pi = 0.59.
* The flow speed ``U = sqrt(2 q / rho)`` from the measured dynamic pressure, per block, held
  when the flow is off.

The states are a plain diagonal recursion, vectorised per block (``scipy.signal.lfilter``, one
call per state), with explicit state in and out for checkpoints and replay.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.signal import lfilter

__all__ = ["WAGNER_RATES", "wagner_weights", "wagner_function", "CirculatoryLag"]

#: Decay rates of the exponential terms, per semichord travelled (fixed, log-spaced).
WAGNER_RATES = np.logspace(-3.0, 0.5, 8)
THIN_AIRFOIL_SLOPE = 2.0 * math.pi  # dC_L / d alpha per rad, thin-airfoil theory (from memory)

_weights_cache: np.ndarray | None = None


def wagner_weights() -> np.ndarray:
    """The weights ``w_i`` on :data:`WAGNER_RATES` (least squares on Theodorsen's function over
    reduced frequencies 1e-5 to 30, with ``sum w = 1/2`` enforced by a heavy row)."""
    global _weights_cache
    if _weights_cache is None:
        from wingwatch.daemon.rig.theory import theodorsen

        beta = WAGNER_RATES
        k = np.logspace(-5.0, 1.5, 400)
        M = -(1j * k[:, None]) / (1j * k[:, None] + beta[None, :])
        r = theodorsen(k) - 1.0
        heavy = 1e3
        A = np.vstack([M.real, M.imag, heavy * np.ones((1, beta.size))])
        b = np.concatenate([r.real, r.imag, [heavy * 0.5]])
        _weights_cache = np.linalg.lstsq(A, b, rcond=None)[0]
    return _weights_cache.copy()


def wagner_function(tau) -> np.ndarray:
    """``Phi(tau) = 1 - sum_i w_i exp(-beta_i tau)``, tau in semichords travelled."""
    tau = np.asarray(tau, dtype=float)
    w = wagner_weights()
    return 1.0 - np.exp(-np.multiply.outer(tau, WAGNER_RATES)) @ w


class CirculatoryLag:
    """The lag states and the lagged quasi-steady regressor ``z`` (module docstring).

    Parameters
    ----------
    chord_m : float
        Chord ``c`` of the article (semichord ``b = c / 2``).
    density_kg_m3 : float
        Fluid density (flow speed from the dynamic pressure).
    scale : float
        ``s`` in (0, 1].
    rate_hz : float
        Sample rate.
    """

    def __init__(self, chord_m: float, density_kg_m3: float, scale: float, rate_hz: float) -> None:
        self.b = 0.5 * float(chord_m)
        self.rho = float(density_kg_m3)
        self.scale = float(scale)
        self.dt = 1.0 / float(rate_hz)
        self.w = wagner_weights()
        self.x = np.zeros(WAGNER_RATES.size)
        self.speed: float | None = None  # m/s, from the last block with flow

    @property
    def n_states(self) -> int:
        return int(self.x.size)

    def reset(self) -> None:
        """After a discontinuity: the lag starts from rest (as if alpha had been held)."""
        self.x = np.zeros_like(self.x)

    def _rates(self) -> np.ndarray:
        return WAGNER_RATES * (self.speed / self.b)  # per second

    def apply(self, a: np.ndarray, ad: np.ndarray, q: np.ndarray | None) -> np.ndarray:
        """``z`` for one block: ``a`` the incidence (deviation), ``ad`` its rate, ``q`` the
        dynamic pressure (Pa) for the flow speed. Before any flow is seen the lag is idle
        (``z = a``; those samples are masked from the regression anyway)."""
        if q is not None and q.size:
            qm = float(np.nanmean(q)) if np.any(np.isfinite(q)) else float("nan")
            if math.isfinite(qm) and qm > 0.0:
                self.speed = math.sqrt(2.0 * qm / self.rho)
        if self.speed is None:
            return np.asarray(a, dtype=float).copy()
        p, g = self._discrete()
        lag = np.zeros(len(a))
        for i in range(self.x.size):
            # s_i(k+1) = p s_i(k) + g ad(k); lag(k) uses s_i(k) (before ad(k) acts, as the
            # transient states do): y[n] = p y[n-1] + g u[n-1], with the state as zi
            xi, zf = lfilter([0.0, g[i]], [1.0, -p[i]], ad, zi=[self.x[i]])
            self.x[i] = zf[0]
            lag += self.w[i] * xi
        return a - self.scale * lag

    def _discrete(self) -> tuple[np.ndarray, np.ndarray]:
        """Per-state pole ``p`` and input gain ``g`` of the sampled recursion (the rate held
        over a sample); at rest before any flow is seen: ``p = 1``, ``g = dt``."""
        lam = self._rates() if self.speed is not None else np.zeros_like(self.w)
        p = np.exp(-lam * self.dt)
        safe = np.where(lam > 0, lam, 1.0)
        g = np.where(lam > 0, -np.expm1(-lam * self.dt) / safe, self.dt)
        return p, g

    def state_space(self, k_qs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The lag as states to append to the transient ``x(k+1) = A x(k) + B alpha_dot(k)``,
        at the current flow speed: ``(A_lag, B_lag, C_lag)`` with ``C_lag = -s k_qs w^T``
        (2 x m), so that ``K_qs z = K_qs alpha + C_lag x_lag``. The states are :attr:`x`."""
        p, g = self._discrete()
        return np.diag(p), g, -self.scale * np.outer(np.asarray(k_qs, dtype=float), self.w)

    def state_dict(self) -> dict[str, Any]:
        return {"x": self.x.copy(), "speed": self.speed, "scale": self.scale}

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.x = np.asarray(st["x"], dtype=float).reshape(self.w.shape).copy()
        self.speed = None if st.get("speed") is None else float(st["speed"])
        self.scale = float(st.get("scale", self.scale))
