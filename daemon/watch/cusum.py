"""Two-sided CUSUM change detection with thresholds designed from a target false-alarm rate.

Page's cumulative sum (E. S. Page, "Continuous inspection schemes", Biometrika 41, 1954) on a
standardised statistic ``z`` (zero mean, unit variance while nothing has changed)::

    S+_n = max(0, S+_{n-1} + z_n - k)        # upward shift
    S-_n = max(0, S-_{n-1} - z_n - k)        # downward shift
    alarm when S+_n > h or S-_n > h

The average run length (ARL) of the one-sided scheme for a mean shift ``mu`` of ``z`` comes
from Siegmund's approximation (D. Siegmund, "Sequential Analysis", Springer, 1985, eq. for the
CUSUM ARL with the corrected boundary ``b = h + 1.166``)::

    ARL(delta) = (exp(-2 delta b) + 2 delta b - 1) / (2 delta^2),   delta = mu - k  (!= 0)
    ARL(0)     = b^2

and for the two-sided scheme 1/ARL = 1/ARL+ + 1/ARL- (M. Basseville and I. Nikiforov,
"Detection of Abrupt Changes", 1993, section 5.2). :func:`threshold_for_arl` inverts it, so a
detector is configured by the false-alarm rate an engineer can accept, not by a bare ``h``.

Examples
--------
>>> round(siegmund_arl(4.0, 0.5), 1), round(siegmund_arl(4.0, 0.5, two_sided=True), 1)
(338.1, 169.0)
>>> round(threshold_for_arl(469.0, 0.5), 2)
5.0
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

__all__ = ["siegmund_arl", "threshold_for_arl", "Cusum", "CusumState"]

_B_CORR = 1.166  # Siegmund's boundary correction for Gaussian increments


def siegmund_arl(h: float, k: float, shift: float = 0.0, *, two_sided: bool = False) -> float:
    """Average run length of a CUSUM with threshold ``h`` and reference ``k`` (Siegmund 1985).

    ``shift`` is the mean of the standardised statistic (0: in control).
    """
    if h <= 0:
        raise ValueError("h must be positive")
    if k < 0:
        raise ValueError("k must not be negative")
    b = h + _B_CORR

    def one(delta: float) -> float:
        if abs(delta) < 1e-12:
            return b * b
        x = -2.0 * delta * b
        if x > 700:  # exp overflow: the run length is astronomically long
            return math.inf
        return (math.exp(x) + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)

    up = one(shift - k)
    if not two_sided:
        return up
    down = one(-shift - k)
    return 1.0 / (1.0 / up + 1.0 / down)


def threshold_for_arl(arl: float, k: float = 0.5, *, two_sided: bool = True) -> float:
    """The threshold ``h`` whose in-control ARL (Siegmund) equals ``arl`` samples."""
    if arl <= 1:
        raise ValueError("arl must exceed one sample")
    f = lambda h: math.log(siegmund_arl(h, k, two_sided=two_sided)) - math.log(arl)  # noqa: E731
    hi = 1.0
    while f(hi) < 0:
        hi *= 2.0
        if hi > 1e4:
            raise ValueError("no threshold reaches that run length")
    return brentq(f, 1e-6, hi, xtol=1e-10)


@dataclass(frozen=True)
class CusumState:
    s_up: np.ndarray
    s_down: np.ndarray
    alarm: np.ndarray  # bool per statistic: above threshold now
    n: int


class Cusum:
    """Two-sided CUSUM over a vector of standardised statistics (one detector per entry).

    Parameters
    ----------
    n : int
        How many statistics are watched side by side.
    k : float
        Reference value (half the shift, in standard deviations, to be detected fastest).
    h : float
        Threshold; see :func:`threshold_for_arl`.
    """

    def __init__(self, n: int, k: float = 0.5, h: float = 5.0) -> None:
        if n < 1:
            raise ValueError("n must be at least 1")
        if k < 0:
            raise ValueError("k must not be negative")
        if h <= 0:
            raise ValueError("h must be positive")
        self.n, self.k, self.h = int(n), float(k), float(h)
        self.reset()

    def reset(self) -> None:
        self.s_up = np.zeros(self.n)
        self.s_down = np.zeros(self.n)
        self.count = 0

    def update(self, z: np.ndarray) -> np.ndarray:
        """Feed one vector (or rows of vectors) of statistics; returns the alarm flags after it."""
        z = np.atleast_2d(np.asarray(z, dtype=float))
        if z.shape[1] != self.n:
            raise ValueError(f"expected {self.n} statistics per row, got {z.shape[1]}")
        for row in z:
            ok = np.isfinite(row)
            r = np.where(ok, row, 0.0)
            self.s_up = np.where(ok, np.maximum(0.0, self.s_up + r - self.k), self.s_up)  # Page (1954)
            self.s_down = np.where(ok, np.maximum(0.0, self.s_down - r - self.k), self.s_down)
            self.count += 1
        return self.alarm

    @property
    def alarm(self) -> np.ndarray:
        return (self.s_up > self.h) | (self.s_down > self.h)

    @property
    def statistic(self) -> np.ndarray:
        """max(S+, S-) per entry, to compare with ``h``."""
        return np.maximum(self.s_up, self.s_down)

    def restart(self, mask: np.ndarray | None = None) -> None:
        """Zero the sums (all, or where ``mask``) after an alarm is handled."""
        if mask is None:
            self.s_up[:] = 0.0
            self.s_down[:] = 0.0
        else:
            self.s_up[mask] = 0.0
            self.s_down[mask] = 0.0

    def snapshot(self) -> CusumState:
        return CusumState(self.s_up.copy(), self.s_down.copy(), self.alarm.copy(), self.count)

    def state_dict(self) -> dict:
        return {"s_up": self.s_up.tolist(), "s_down": self.s_down.tolist(), "count": self.count}

    def load_state_dict(self, state: dict) -> None:
        self.s_up = np.array(state["s_up"], dtype=float)
        self.s_down = np.array(state["s_down"], dtype=float)
        self.count = int(state["count"])
