"""Unsteady lumped-vortex (vortex-panel) aerodynamics of a thin plate with a shed flat wake.

Implements the two-dimensional unsteady lumped-vortex method of J. Katz and A. Plotkin,
"Low-Speed Aerodynamics", 2nd ed., Cambridge University Press (2001), chapter 13 ("Unsteady
incompressible potential flow"), sections 13.8-13.9: N chordwise panels, a point vortex at the
quarter-point of each panel, a collocation point at its three-quarter point, the Kutta condition
enforced by shedding one wake vortex per time step placed a fraction of the step's travel behind the
trailing edge, and Kelvin's theorem (total circulation conserved) closing the system.

In this module the geometry is the small-disturbance (planar) one: the plate and its wake lie on the
chord line y = 0, the plate's pitch, pitch rate, pivot motion and bending enter only through the
normal wash at the collocation points, and the wake is the prescribed flat wake convected at the
free-stream speed. Then the bound-on-bound influence matrix is time invariant, every wake vortex
induces a purely normal velocity on the plate, and the induced velocity of a clockwise vortex of
strength ``g`` at x_v on a point x of the line is ``g / (2 pi (x_v - x))`` (positive upward).

The wake is stored in levels: the newest ``raw_count`` vortices as shed; older ones amalgamated
``merge`` at a time into one vortex (sum of circulation, placed at the |circulation|-weighted
centroid), up to ``levels`` levels of ``level_capacity`` vortices each; the oldest vortex of the last
level is dropped. Both operations carry a bound on the change of induced velocity they cause, which
the store accumulates (see :attr:`FlatWake.merge_error_bound`, docs/rig.md).

Examples
--------
Steady lift slope of a flat plate from four lumped vortices (exact for any panel count):

>>> import numpy as np
>>> geo = PanelGeometry(chord=1.0, n_panels=4)
>>> gamma = np.linalg.solve(geo.bound_influence, -np.ones(4))   # unit speed, alpha = 1 rad
>>> round(float(2.0 * gamma.sum()), 6)                          # C_L = 2 Gamma / (U c)
6.283185
"""

from __future__ import annotations

import numpy as np

__all__ = ["PanelGeometry", "FlatWake", "induced_normal_velocity"]

_INV_2PI = 1.0 / (2.0 * np.pi)


def induced_normal_velocity(x_points: np.ndarray, x_vortex: np.ndarray, gamma: np.ndarray) -> np.ndarray:
    """Upward velocity at points of the line y = 0 from clockwise point vortices on the same line.

    ``v(x) = sum_k gamma_k / (2 pi (x_k - x))`` (Katz & Plotkin (2001) eq. 2.68 for a point vortex,
    with clockwise circulation taken positive).
    """
    d = np.subtract.outer(x_vortex, x_points)  # (K, P)
    return _INV_2PI * (gamma @ (1.0 / d))


class PanelGeometry:
    """Uniform chordwise panelling of a plate of chord ``chord`` with its leading edge at x = 0.

    Attributes
    ----------
    h : float
        Panel length.
    x_vortex, x_colloc : ndarray
        Quarter-point and three-quarter-point stations, shape (N,).
    bound_influence : ndarray
        a_ij, the upward velocity at collocation point i from a unit vortex on panel j.
    cumulative : ndarray
        T with ``(T Gamma)_j`` the potential jump averaged over panel j: Katz & Plotkin (2001)
        eq. 13.37 take ``sum_{k <= j} Gamma_k`` (the jump downstream of the panel's vortex); the
        exact panel mean of the lumped-vortex jump is ``sum_{k < j} Gamma_k + 3/4 Gamma_j``, which
        removes an O(h) error in the apparent-mass lift (see docs/rig.md).
    """

    def __init__(self, chord: float, n_panels: int) -> None:
        if not chord > 0.0:
            raise ValueError("chord must be positive")
        if n_panels < 1:
            raise ValueError("n_panels must be at least 1")
        self.chord = float(chord)
        self.n_panels = int(n_panels)
        self.h = self.chord / self.n_panels
        x0 = self.h * np.arange(self.n_panels)
        self.x_vortex = x0 + 0.25 * self.h
        self.x_colloc = x0 + 0.75 * self.h
        self.x_centre = x0 + 0.5 * self.h
        self.panel_edges = np.append(x0, self.chord)
        self.bound_influence = _INV_2PI / np.subtract.outer(self.x_vortex, self.x_colloc).T
        # panel-mean potential jump: sum_{k<j} Gamma_k + (3/4) Gamma_j (vortex at the quarter point)
        self.cumulative = np.tril(np.ones((self.n_panels, self.n_panels)), -1) + 0.75 * np.eye(self.n_panels)

    def wake_influence(self, x_wake: float) -> np.ndarray:
        """Upward velocity at the collocation points from a unit vortex at ``x_wake``."""
        return _INV_2PI / (x_wake - self.x_colloc)


class FlatWake:
    """Shed vortices of the flat wake, in shedding order (oldest first), with amalgamation.

    Positions are kept in a convected coordinate ``xi = x - D`` where ``D`` is the distance the
    stream has carried the wake so far, so convecting the whole wake is one addition to ``D``.

    The upwash at the collocation points is evaluated in two parts (see docs/rig.md):

    * the newest (raw) vortices: while the step length ``U dt`` has been constant for their whole
      life they sit on a fixed grid behind the trailing edge, so their influence is a precomputed
      matrix applied to their circulations; otherwise directly;
    * the amalgamated levels, all at least the raw zone's length behind the trailing edge: their
      upwash is a smooth (analytic) function along the chord, evaluated directly at ``P`` Chebyshev
      points and interpolated to the collocation points (L. N. Trefethen, "Approximation Theory and
      Approximation Practice", 2013, Theorem 8.2: error below ``4 M rho^-P / (rho - 1)`` with rho the
      Bernstein-ellipse parameter set by the nearest far vortex). ``P`` is chosen for a relative
      error below ``cheb_tol``; if that would need as many points as panels, directly.

    Parameters
    ----------
    x_colloc : ndarray
        Collocation points on which :meth:`normal_velocity` evaluates the wake's upwash.
    chord : float
        Plate chord; the trailing edge is at x = chord.
    raw_count : int
        Newest vortices kept exactly as shed.
    merge : int
        How many vortices of one level amalgamate into one vortex of the next.
    level_capacity : int
        Vortices held by each amalgamated level before its oldest ``merge`` move on.
    levels : int
        Number of amalgamated levels; beyond the last one vortices are dropped.
    cheb_tol : float
        Target relative error of the far-wake Chebyshev evaluation.
    batch : int
        Groups merged at once (amalgamation runs every ``merge * batch`` steps).
    """

    def __init__(self, x_colloc: np.ndarray, chord: float, raw_count: int = 160, merge: int = 2,
                 level_capacity: int = 32, levels: int = 12, cheb_tol: float = 1e-7,
                 batch: int = 8) -> None:
        if raw_count < 1 or merge < 2 or level_capacity < 1 or levels < 0:
            raise ValueError("wake store sizes must be positive (merge at least 2)")
        self.x_colloc = np.asarray(x_colloc, dtype=float)
        self.chord = float(chord)
        self.raw_count = int(raw_count)
        self.merge = int(merge)
        self.level_capacity = int(level_capacity)
        self.levels = int(levels)
        self.cheb_tol = float(cheb_tol)
        self.batch = int(batch)
        span = self.merge * self.batch
        self.capacity = self.raw_count + span + self.levels * (self.level_capacity + span) + 4
        self._trigger = self.raw_count + span if self.levels else self.raw_count + 1
        self._max_raw = self.raw_count + span
        self._grid_key = None
        self.reset()

    def reset(self) -> None:
        """Empty the wake (the starting vortex of a steady initial state is at infinity)."""
        self.xi = np.zeros(self.capacity)
        self.g = np.zeros(self.capacity)
        self.n = 0
        self.D = 0.0
        # counts[0] raw (newest, at the end of the arrays), counts[k] level k
        self.counts = [0] * (self.levels + 1)
        self._col = self.x_colloc[:, None]
        self._uniform = 0  # consecutive steps with the same (x_new, step length)
        self._last_step = None
        self.dropped_circulation = 0.0
        self.merge_error_bound = 0.0
        self.drop_error_bound = 0.0
        self.fast_raw = True
        self.fast_far = True

    @property
    def x(self) -> np.ndarray:
        """Present positions of the stored vortices (oldest first)."""
        return self.xi[: self.n] + self.D

    # ----------------------------------------------------------------- per step
    def _grid(self, x_new: float, step: float):
        key = (x_new, step)
        if key != self._grid_key:
            a = np.arange(self._max_raw - 1, -1, -1, dtype=float)  # ages, oldest first
            x_raw = x_new + (a + 1.0) * step
            self._raw_table = _INV_2PI / np.subtract.outer(x_raw, self.x_colloc).T
            # Chebyshev proxy points for the far levels, chosen for the raw zone's length
            c = self.chord
            d_min = max(self.raw_count * step, 1e-12)
            z = (c + d_min - 0.5 * c) / (0.5 * c)  # nearest far singularity, in half-chords
            rho = z + np.sqrt(z * z - 1.0)
            P = int(np.ceil(np.log(1.0 / self.cheb_tol) / np.log(rho))) + 1
            if P < self.x_colloc.size:
                k = np.arange(P)
                nodes = 0.5 * c * (1.0 - np.cos(np.pi * (k + 0.5) / P))  # Chebyshev points on [0, c]
                self._cheb_nodes = nodes[:, None]
                self._cheb_interp_scaled = _INV_2PI * _lagrange_matrix(nodes, self.x_colloc)
            else:
                self._cheb_nodes = None
            self._grid_key = key
        return self._raw_table

    def normal_velocity(self) -> np.ndarray:
        """Upwash of all stored wake vortices at the collocation points."""
        n = self.n
        if n == 0:
            return np.zeros(self.x_colloc.size)
        c0 = self.counts[0]
        nf = n - c0
        g = self.g
        if self._uniform >= c0 and self._last_step is not None:
            table = self._raw_table if self._last_step == self._grid_key else self._grid(*self._last_step)
            v = np.dot(table[:, table.shape[1] - c0:], g[nf:n])
            self.fast_raw = True
            if nf:
                nodes = self._cheb_nodes
                if nodes is not None:
                    u = np.dot(1.0 / ((self.xi[:nf] + self.D) - nodes), g[:nf])
                    v += np.dot(self._cheb_interp_scaled, u)
                    self.fast_far = True
                else:
                    v += np.dot(1.0 / ((self.xi[:nf] + self.D) - self._col), g[:nf]) * _INV_2PI
                    self.fast_far = False
            return v
        self.fast_raw = self.fast_far = False
        return np.dot(1.0 / ((self.xi[:n] + self.D) - self._col), g[:n]) * _INV_2PI

    def normal_velocity_direct(self) -> np.ndarray:
        """Reference evaluation of the same upwash, every vortex directly (for checks)."""
        if self.n == 0:
            return np.zeros(self.x_colloc.size)
        return induced_normal_velocity(self.x_colloc, self.x, self.g[: self.n])

    def shed_and_convect(self, x_new: float, gamma_new: float, distance: float) -> None:
        """Append the vortex just shed at ``x_new``, then move the whole wake by ``distance``."""
        n = self.n
        self.xi[n] = x_new - self.D
        self.g[n] = gamma_new
        self.n = n + 1
        self.counts[0] += 1
        self.D += distance
        key = (x_new, distance)
        if key == self._last_step:
            self._uniform += 1
        else:
            self._last_step = key
            self._uniform = 1
        if self.counts[0] >= self._trigger:
            self._amalgamate()

    # ----------------------------------------------------------------- bookkeeping
    def _amalgamate(self) -> None:
        # batched: once a level holds ``cap + merge * batch`` vortices, its oldest ``merge * batch``
        # become ``batch`` vortices of the next level (vectorised with one reshape)
        m, B = self.merge, self.batch
        level = 0
        x_te = self.chord
        while level < self.levels:
            cap = self.raw_count if level == 0 else self.level_capacity
            if self.counts[level] < cap + m * B:
                break
            i0 = self.n - sum(self.counts[: level + 1])
            k = m * B
            xs = self.xi[i0:i0 + k].reshape(B, m)
            gs = self.g[i0:i0 + k].reshape(B, m)
            w = np.abs(gs)
            wsum = w.sum(axis=1)
            gm = gs.sum(axis=1)
            # centroid that keeps the group's first moment sum(g x) (so its far field is exact to
            # dipole order) when it lies within the group; otherwise the |g|-weighted centroid
            safe = np.where(wsum > 0.0, wsum, 1.0)
            x_abs = np.where(wsum > 0.0, (xs * w).sum(axis=1) / safe, xs.mean(axis=1))
            gsafe = np.where(gm != 0.0, gm, 1.0)
            x_sig = (xs * gs).sum(axis=1) / gsafe
            inside = (gm != 0.0) & (x_sig <= xs[:, 0]) & (x_sig >= xs[:, -1])
            xm = np.where(inside, x_sig, x_abs)
            # bound on the change of upwash at any collocation point (docs/rig.md): a vortex moved
            # by at most the group's extent l changes the upwash at distance >= r by |g| l / (2 pi r^2)
            r = xs[:, -1] + self.D - x_te
            self.merge_error_bound += float(_INV_2PI * np.sum(wsum * (xs[:, 0] - xs[:, -1]) / (r * r)))
            n = self.n
            tail_x = self.xi[i0 + k:n].copy()
            tail_g = self.g[i0 + k:n].copy()
            self.xi[i0:i0 + B] = xm
            self.g[i0:i0 + B] = gm
            self.xi[i0 + B:i0 + B + tail_x.size] = tail_x
            self.g[i0 + B:i0 + B + tail_g.size] = tail_g
            self.n = n - k + B
            self.counts[level] -= k
            self.counts[level + 1] += B
            level += 1
        last = self.levels
        cap = self.raw_count if last == 0 else self.level_capacity
        drop = self.counts[last] - cap
        if drop > 0:
            g0 = self.g[:drop]
            self.dropped_circulation += float(g0.sum())
            self.drop_error_bound += float(_INV_2PI * np.sum(np.abs(g0) / (self.xi[:drop] + self.D - x_te)))
            n = self.n
            self.xi[: n - drop] = self.xi[drop:n].copy()
            self.g[: n - drop] = self.g[drop:n].copy()
            self.n = n - drop
            self.counts[last] -= drop

    @property
    def total_circulation(self) -> float:
        """Sum of the stored wake circulation (dropped vortices excluded)."""
        return float(self.g[: self.n].sum())

    @property
    def length(self) -> float:
        """Distance from the trailing edge to the oldest stored vortex."""
        return float(self.xi[0] + self.D - self.chord) if self.n else 0.0


def _lagrange_matrix(nodes: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Matrix L with ``L @ f(nodes) = p(x)``, p the polynomial interpolant (barycentric form)."""
    P = nodes.size
    w = np.ones(P)
    for j in range(P):
        w[j] = 1.0 / np.prod(nodes[j] - np.delete(nodes, j))
    d = np.subtract.outer(x, nodes)
    exact = np.isclose(d, 0.0, atol=1e-15)
    d[exact] = 1.0
    L = (w / d) / (w / d).sum(axis=1, keepdims=True)
    for i, j in zip(*np.nonzero(exact)):
        L[i] = 0.0
        L[i, j] = 1.0
    return L
