"""Classical closed-form references for the virtual rig: thin-airfoil theory, Theodorsen, Wagner.

Used by the rig's checks, its documentation and the benchmark, and (Theodorsen's function) by the
identifier's circulatory-lag prior (``daemon/identify/lag.py``); nothing in the simulator calls them.

* T. Theodorsen, "General theory of aerodynamic instability and the mechanism of flutter", NACA
  Report 496 (1935): the lift deficiency function C(k) = H1(k) / (H1(k) + i H0(k)), H_n the Hankel
  functions of the second kind, and the lift of a thin airfoil pitching about x = a b from
  mid-chord, per unit dynamic pressure times chord, with alpha = alpha_0 exp(i k tau), tau = U t / b:

      C_L / alpha_0 = pi (i k + a k^2) + 2 pi C(k) (1 + (1/2 - a) i k).

* R. T. Jones, "Operational treatment of the nonuniform-lift theory in airplane dynamics", NACA
  Report 667 (1938): the approximation phi(s) = 1 - 0.165 e^{-0.0455 s} - 0.335 e^{-0.3 s} of
  Wagner's indicial lift function, s in semichords travelled (from memory).
* Euler-Bernoulli cantilever: f_n = (lambda_n^2 / (2 pi L^2)) sqrt(D / m) (R. D. Blevins, "Formulas
  for Natural Frequency and Mode Shape", 1979, table 8-1).

Examples
--------
>>> c = theodorsen(0.5)
>>> round(float(c.real), 4), round(float(c.imag), 4)
(0.5979, -0.1507)
"""

from __future__ import annotations

import numpy as np
from scipy.special import hankel2

__all__ = ["theodorsen", "theodorsen_pitch_lift", "theodorsen_noncirculatory", "wagner_jones",
           "cantilever_frequency"]


def theodorsen(k):
    """Theodorsen's function C(k) = H1(k) / (H1(k) + i H0(k)) (NACA Report 496, 1935)."""
    k = np.asarray(k, dtype=float)
    h1 = hankel2(1, k)
    h0 = hankel2(0, k)
    return h1 / (h1 + 1j * h0)


def theodorsen_noncirculatory(k, a: float):
    """Apparent-mass part of C_L / alpha_0 for pitch about ``a`` semichords aft of mid-chord."""
    k = np.asarray(k, dtype=float)
    return np.pi * (1j * k + a * k * k)


def theodorsen_pitch_lift(k, a: float):
    """Total C_L / alpha_0 (circulatory + apparent mass), pure pitch about x = a b."""
    k = np.asarray(k, dtype=float)
    return theodorsen_noncirculatory(k, a) + 2.0 * np.pi * theodorsen(k) * (1.0 + (0.5 - a) * 1j * k)


def wagner_jones(s):
    """R. T. Jones's approximation of Wagner's function (NACA Report 667, 1938; from memory)."""
    s = np.asarray(s, dtype=float)
    return 1.0 - 0.165 * np.exp(-0.0455 * s) - 0.335 * np.exp(-0.3 * s)


def cantilever_frequency(lam, length: float, rigidity: float, areal_mass: float):
    """Natural frequency in Hz of a uniform clamped-free strip, ``lam = beta_n L``."""
    lam = np.asarray(lam, dtype=float)
    return lam**2 / (2.0 * np.pi * length**2) * np.sqrt(rigidity / areal_mass)
