"""Euler-Bernoulli cantilever bending modes of the chordwise-flexible plate.

Implements the clamped-free eigenfunctions of Euler-Bernoulli beam theory, in the form tabulated by
R. D. Blevins, "Formulas for Natural Frequency and Mode Shape" (1979), table 8-1, case
"clamped-free": ``cos(lambda) cosh(lambda) = -1`` with roots lambda_n = beta_n L = 1.8751, 4.6941,
7.8548, 10.9955, ... and mode shapes

    phi_n(s) = cosh(beta s) - cos(beta s) - sigma_n (sinh(beta s) - sin(beta s)),
    sigma_n = (cosh(lambda) + cos(lambda)) / (sinh(lambda) + sin(lambda)),

with s measured from the clamp. Shapes are normalised so that ``int_0^L phi_n^2 ds = L``; then the
modal mass of a uniform strip is ``m L`` and the modal stiffness ``D beta_n^4 L`` (orthogonality).

The plate bends along its chord in cylindrical bending, so the beam's flexural rigidity is the plate
rigidity per unit span ``D = E t^3 / (12 (1 - nu^2))``. Everything here is per unit span.

Examples
--------
>>> import numpy as np
>>> np.round(cantilever_eigenvalues(3), 4)
array([1.8751, 4.6941, 7.8548])
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import brentq

__all__ = ["cantilever_eigenvalues", "Cantilever"]


def cantilever_eigenvalues(n_modes: int) -> np.ndarray:
    """Roots lambda_n = beta_n L of ``1 + cos(x) cosh(x) = 0`` (clamped-free beam).

    The n-th root lies in ((n-1) pi, n pi); the function is divided by cosh(x) to stay finite.
    """
    if n_modes < 0:
        raise ValueError("n_modes must be non-negative")

    def f(x: float) -> float:
        return np.cos(x) + 1.0 / np.cosh(x)

    return np.array([brentq(f, (i - 1) * np.pi, i * np.pi, xtol=1e-14) for i in range(1, n_modes + 1)])


class Cantilever:
    """Clamped-free uniform strip of length ``length`` with ``n_modes`` Euler-Bernoulli modes.

    Parameters
    ----------
    length : float
        Length from the clamp to the free end, m.
    n_modes : int
        Number of retained bending modes.
    """

    def __init__(self, length: float, n_modes: int) -> None:
        if not length > 0.0:
            raise ValueError("length must be positive")
        self.length = float(length)
        self.n_modes = int(n_modes)
        self.lam = cantilever_eigenvalues(self.n_modes)
        self.beta = self.lam / self.length
        lam = self.lam
        self.sigma = (np.cosh(lam) + np.cos(lam)) / (np.sinh(lam) + np.sin(lam))

    # ----------------------------------------------------------------- shapes and derivatives
    def _parts(self, s: np.ndarray):
        s = np.clip(np.asarray(s, dtype=float), 0.0, self.length)
        bs = self.beta[:, None] * s[None, :]
        return bs, np.cosh(bs), np.cos(bs), np.sinh(bs), np.sin(bs)

    def shape(self, s) -> np.ndarray:
        """phi_n(s), shape (n_modes, len(s)) (Blevins table 8-1)."""
        _, ch, c, sh, si = self._parts(np.atleast_1d(s))
        return ch - c - self.sigma[:, None] * (sh - si)

    def slope(self, s) -> np.ndarray:
        """d phi_n / ds."""
        _, ch, c, sh, si = self._parts(np.atleast_1d(s))
        return self.beta[:, None] * (sh + si - self.sigma[:, None] * (ch - c))

    def curvature(self, s) -> np.ndarray:
        """d^2 phi_n / ds^2."""
        _, ch, c, sh, si = self._parts(np.atleast_1d(s))
        return self.beta[:, None] ** 2 * (ch + c - self.sigma[:, None] * (sh + si))

    def integral(self, s) -> np.ndarray:
        """int_0^s phi_n(s') ds' (exact antiderivative)."""
        _, ch, c, sh, si = self._parts(np.atleast_1d(s))
        return (sh - si - self.sigma[:, None] * (ch + c - 2.0)) / self.beta[:, None]

    # ----------------------------------------------------------------- modal integrals
    def _gauss(self, n: int = 96):
        x, w = np.polynomial.legendre.leggauss(n)
        s = 0.5 * self.length * (x + 1.0)
        return s, 0.5 * self.length * w

    def mass_integrals(self) -> np.ndarray:
        """int_0^L phi_i phi_j ds (equals L times the identity by orthogonality)."""
        s, w = self._gauss()
        p = self.shape(s)
        return (p * w) @ p.T

    def stiffness_integrals(self) -> np.ndarray:
        """int_0^L phi_i'' phi_j'' ds (equals beta^4 L on the diagonal)."""
        s, w = self._gauss()
        p = self.curvature(s)
        return (p * w) @ p.T

    def first_moment(self) -> np.ndarray:
        """int_0^L s phi_i ds, the load of a unit uniform acceleration field growing with s."""
        s, w = self._gauss()
        return self.shape(s) @ (w * s)

    def centrifugal_integrals(self) -> np.ndarray:
        """int_0^L (L^2 - s^2)/2 phi_i' phi_j' ds: geometric stiffness of the spin tension.

        A strip spinning at rate Omega about its clamp carries the tension
        ``N(s) = m Omega^2 (L^2 - s^2) / 2``; its work term ``int N w'^2 / 2`` gives this matrix.
        """
        s, w = self._gauss()
        p = self.slope(s)
        return (p * (w * 0.5 * (self.length**2 - s**2))) @ p.T
