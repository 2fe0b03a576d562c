"""Full-order coupled simulator of a chordwise-flexible plate pitching in a uniform stream.

Aerodynamics: the unsteady lumped-vortex method with a shed flat wake of J. Katz and A. Plotkin,
"Low-Speed Aerodynamics", 2nd ed. (2001), sections 13.8-13.9 (see :mod:`.vortex`); the panel
pressure jump comes from the unsteady Bernoulli equation, their eq. (13.37):

    dp_j = rho [ U Gamma_j / h + d/dt sum_{k<=j} Gamma_k ],

so the added-mass (non-circulatory) loads come out of the physics. Structure: Euler-Bernoulli
chordwise bending in clamped-free modes (R. D. Blevins, "Formulas for Natural Frequency and Mode
Shape", 1979; see :mod:`.beam`) with modal damping, loaded by the panel pressures and by the inertial
loads of the prescribed pitching motion, written in the plate's rotating frame
(``m (w_tt - alpha_tt xi - alpha_t^2 w)`` plus the spin tension). Low-Reynolds-number and separation
effects: an empirical lift-slope factor after the laminar displacement-thickness scaling
``delta*/c ~ Re^-1/2`` (H. Blasius, "Grenzschichten in Fluessigkeiten mit kleiner Reibung", 1908)
and a Kirchhoff-flow separation factor ``((1 + sqrt f)/2)^2`` with a smooth separation-point law
(J. G. Leishman and T. S. Beddoes, "A semi-empirical model for dynamic stall", J. American
Helicopter Society 34(3), 1989, eq. 7, here without its lags).

Time stepping is monolithic ("strongly coupled"): at every step the bound circulation, the shed
wake vortex and the modal coordinates are the unknowns of ONE linear system, the panel method being
linear in circulation. Both the structural inertia and the Bernoulli time derivative use the same
second-order backward difference (BDF2, C. W. Gear, "Numerical Initial Value Problems in Ordinary
Differential Equations", 1971), so the fluid's added mass enters the discrete equations exactly as
the plate's own mass does and the step is A-stable whatever the added-mass ratio; a staggered
(explicit) scheme would amplify by about minus the added-mass ratio per step (P. Causin, J.-F.
Gerbeau and F. Nobile, "Added-mass effect in the design of partitioned algorithms for
fluid-structure problems", Comput. Methods Appl. Mech. Engrg. 194, 2005), which is about 10 here.
Between parameter changes the step is a fixed linear map: it is assembled once, the system matrix is
LU-factorised (scipy.linalg.lu_factor) and folded into one matrix-vector product per step.

All quantities are per unit span, SI units, angles in radians, x measured from the leading edge.

Examples
--------
>>> sim = PlateSimulator(Article(n_modes=0), viscous=ViscousModel(low_re=False, stall=False),
...                      flow_speed=0.3, dt=1e-3)
>>> round(float(sim.steady_state(1e-4)["C_L"]) / 1e-4, 4)     # thin-airfoil slope 2 pi
6.2832
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from wingwatch.daemon.rig.beam import Cantilever
from wingwatch.daemon.rig.vortex import FlatWake, PanelGeometry

__all__ = [
    "Article",
    "Fluid",
    "Numerics",
    "ViscousModel",
    "PlateSimulator",
    "low_re_factor",
    "separation_factor",
]

#: pieces of the plate shorter than this fraction of the chord are treated as rigid
RIGID_PIECE_FRACTION = 0.05


@dataclass(frozen=True)
class Article:
    """The test article: a thin uniform plate clamped at its pitch pivot (defaults: our strip).

    ``pivot`` and the gauge stations are chord fractions from the leading edge.
    """

    name: str = "Quillfin strip"
    chord_m: float = 0.10
    span_m: float = 0.30
    thickness_m: float = 0.6e-3
    youngs_modulus_pa: float = 2.40e9
    density_kg_m3: float = 1200.0
    poisson_ratio: float = 0.37
    pivot: float = 0.0
    n_modes: int = 3
    damping_ratio: float = 0.02
    root_gauge: float = 0.10
    mid_gauge: float = 0.50

    @property
    def rigidity(self) -> float:
        """Plate flexural rigidity per unit span D = E t^3 / (12 (1 - nu^2)), N m."""
        return self.youngs_modulus_pa * self.thickness_m**3 / (12.0 * (1.0 - self.poisson_ratio**2))

    @property
    def areal_mass(self) -> float:
        """Mass per unit area rho_s t, kg/m^2."""
        return self.density_kg_m3 * self.thickness_m


@dataclass(frozen=True)
class Fluid:
    """The working fluid (defaults: fresh water near 20 C)."""

    density_kg_m3: float = 998.0
    kinematic_viscosity_m2_s: float = 1.0e-6


@dataclass(frozen=True)
class Numerics:
    """Discretisation: panels, shed-vortex placement, wake store, steps per output sample."""

    n_panels: int = 32
    shed_fraction: float = 0.25
    substeps: int = 1
    wake_raw: int = 160
    wake_merge: int = 2
    wake_level_capacity: int = 32
    wake_levels: int = 12


@dataclass(frozen=True)
class ViscousModel:
    """Empirical low-Reynolds-number and separation corrections (both switchable off)."""

    low_re: bool = True
    re_coefficient: float = 12.0
    stall: bool = True
    stall_angle_deg: float = 14.0
    stall_width_deg: float = 2.0


def low_re_factor(reynolds: float, coefficient: float = 12.0) -> float:
    """Lift-slope factor ``eta = 1 - coefficient / sqrt(Re)`` (our empirical law; see docs/rig.md).

    >>> round(float(low_re_factor(3.0e4)), 4)
    0.9307
    """
    if reynolds <= 0.0:
        return 1.0
    return max(0.0, 1.0 - coefficient / np.sqrt(reynolds))


def separation_factor(alpha, stall_angle: float, width: float):
    """Kirchhoff factor ``((1 + sqrt f)/2)^2`` with ``f = (1 + e^{-a1/S}) / (1 + e^{(|alpha|-a1)/S})``.

    f is the trailing-edge separation point (1 = attached); normalised so that the factor is exactly
    one at zero incidence. After Leishman & Beddoes (1989), eq. 7, with a logistic f of our own.

    >>> round(float(separation_factor(0.0, np.radians(14.0), np.radians(2.0))), 6)
    1.0
    """
    a = np.abs(alpha)
    f = (1.0 + np.exp(-stall_angle / width)) / (1.0 + np.exp((a - stall_angle) / width))
    return (0.5 * (1.0 + np.sqrt(np.minimum(f, 1.0)))) ** 2


@dataclass
class _Piece:
    beam: Cantilever
    direction: float  # +1: aft of the pivot (s = x - x_p); -1: fore (s = x_p - x)
    start: int  # first modal index


@dataclass
class _Params:
    flow_speed: float
    stiffness_factor: float = 1.0
    added_mass: float = 0.0  # kg per metre of span
    added_mass_at: float = 1.0  # chord fraction


class PlateSimulator:
    """Monolithic panel-method / modal-structure stepper of the pitching flexible plate.

    Parameters
    ----------
    article, fluid, numerics, viscous : dataclasses
        Test article, fluid, discretisation and empirical corrections.
    flow_speed : float
        Free-stream speed U, m/s (zero with a zero fluid density gives the structure alone).
    dt : float
        Output sample period, s; the internal step is ``dt / numerics.substeps``.

    Notes
    -----
    Prescribed kinematics: pitch angle alpha(t) about the pivot, with its rates supplied by the
    caller at each step. Outputs per step: lift per unit span (N/m), curvature at the two gauge
    stations (1/m). ``n_states`` counts the full order (bound and wake vortices, modal states).
    """

    def __init__(self, article: Article = Article(), fluid: Fluid = Fluid(),
                 numerics: Numerics = Numerics(), viscous: ViscousModel = ViscousModel(),
                 flow_speed: float = 0.4, dt: float = 1.0e-3) -> None:
        self.article = article
        self.fluid = fluid
        self.numerics = numerics
        self.viscous = viscous
        self.dt_sample = float(dt)
        self.dt = float(dt) / numerics.substeps
        self.geometry = PanelGeometry(article.chord_m, numerics.n_panels)
        self._make_structure()
        self.wake = FlatWake(self.geometry.x_colloc, article.chord_m, numerics.wake_raw, numerics.wake_merge,
                             numerics.wake_level_capacity, numerics.wake_levels)
        self._params = _Params(flow_speed=float(flow_speed))
        self._built_key = None
        self._build()
        self.reset(0.0)

    # ================================================================= structure
    def _make_structure(self) -> None:
        a = self.article
        c = a.chord_m
        xp = a.pivot * c
        pieces: list[_Piece] = []
        start = 0
        for direction, length in ((+1.0, c - xp), (-1.0, xp)):
            if a.n_modes > 0 and length >= RIGID_PIECE_FRACTION * c:
                pieces.append(_Piece(Cantilever(length, a.n_modes), direction, start))
                start += a.n_modes
        self.pieces = pieces
        self.n_modes = start
        self.x_pivot = xp
        g = self.geometry
        self.xi_colloc = g.x_colloc - xp  # lever arm of the collocation points about the pivot
        m = a.areal_mass
        nm = self.n_modes
        self.mass_struct = np.zeros((nm, nm))
        self.stiff_nominal = np.zeros((nm, nm))
        self.spin_stiff = np.zeros((nm, nm))
        self.pitch_load = np.zeros(nm)
        for p in pieces:
            sl = slice(p.start, p.start + p.beam.n_modes)
            self.mass_struct[sl, sl] = m * p.beam.mass_integrals()
            self.stiff_nominal[sl, sl] = a.rigidity * p.beam.stiffness_integrals()
            self.spin_stiff[sl, sl] = m * p.beam.centrifugal_integrals()
            # inertial load of the pitch acceleration: m alpha_tt xi, xi = direction * s
            self.pitch_load[sl] = m * p.direction * p.beam.first_moment()
        # modal values at collocation points and panel integrals of the mode shapes
        self.phi_colloc = self.mode_values(g.x_colloc)  # (N, nm)
        self.slope_colloc = self.mode_slopes(g.x_colloc)  # dw/dx, (N, nm)
        self.panel_load = np.zeros((nm, g.n_panels))  # int over panel j of phi_i dx
        for p in pieces:
            sl = slice(p.start, p.start + p.beam.n_modes)
            sa = np.clip(p.direction * (g.panel_edges[:-1] - xp), 0.0, p.beam.length)
            sb = np.clip(p.direction * (g.panel_edges[1:] - xp), 0.0, p.beam.length)
            lo, hi = np.minimum(sa, sb), np.maximum(sa, sb)  # the fore piece runs backwards in x
            self.panel_load[sl, :] = p.beam.integral(hi) - p.beam.integral(lo)
        gauges = np.array([a.root_gauge, a.mid_gauge]) * c
        self.curv_gauges = self.mode_curvatures(gauges)  # (2, nm)

    def _piece_s(self, p: _Piece, x: np.ndarray):
        s = p.direction * (np.asarray(x, dtype=float) - self.x_pivot)
        on = (s >= 0.0) & (s <= p.beam.length + 1e-15)
        if p.direction < 0:
            on &= s > 0.0  # the pivot point itself belongs to the aft piece
        return s, on

    def _modal(self, x, which: str) -> np.ndarray:
        x = np.atleast_1d(np.asarray(x, dtype=float))
        out = np.zeros((x.size, self.n_modes))
        for p in self.pieces:
            s, on = self._piece_s(p, x)
            vals = getattr(p.beam, which)(s).T * on[:, None]
            if which == "slope":
                vals = vals * p.direction
            out[:, p.start:p.start + p.beam.n_modes] = vals
        return out

    def mode_values(self, x) -> np.ndarray:
        """Deflection w (up) at chord stations ``x`` per unit modal coordinate, shape (len(x), n)."""
        return self._modal(x, "shape")

    def mode_slopes(self, x) -> np.ndarray:
        """dw/dx at chord stations ``x`` per unit modal coordinate."""
        return self._modal(x, "slope")

    def mode_curvatures(self, x) -> np.ndarray:
        """d^2w/dx^2 at chord stations ``x`` per unit modal coordinate."""
        return self._modal(x, "curvature")

    def in_vacuo_frequencies(self) -> np.ndarray:
        """Natural frequencies of the structure alone, Hz (with the present stiffness and mass)."""
        if self.n_modes == 0:
            return np.zeros(0)
        M, K, _ = self._structural_matrices()
        w2 = scipy.linalg.eigh(K, M, eigvals_only=True)
        return np.sqrt(np.maximum(w2, 0.0)) / (2.0 * np.pi)

    def _structural_matrices(self):
        pr = self._params
        M = self.mass_struct.copy()
        load = self.pitch_load.copy()
        if pr.added_mass > 0.0 and self.n_modes:
            xa = pr.added_mass_at * self.article.chord_m
            ph = self.mode_values([xa])[0]
            M += pr.added_mass * np.outer(ph, ph)
            load = load + pr.added_mass * (xa - self.x_pivot) * ph
        K = pr.stiffness_factor * self.stiff_nominal
        return M, K, load

    # ================================================================= parameters
    @property
    def flow_speed(self) -> float:
        return self._params.flow_speed

    @property
    def stiffness_factor(self) -> float:
        return self._params.stiffness_factor

    @property
    def added_mass(self) -> float:
        return self._params.added_mass

    @property
    def reynolds(self) -> float:
        return self.flow_speed * self.article.chord_m / self.fluid.kinematic_viscosity_m2_s

    @property
    def eta(self) -> float:
        """Low-Reynolds-number lift-slope factor in force (1 when switched off)."""
        if not self.viscous.low_re:
            return 1.0
        return low_re_factor(self.reynolds, self.viscous.re_coefficient)

    def set_parameters(self, flow_speed: float | None = None, stiffness_factor: float | None = None,
                       added_mass: float | None = None, added_mass_at: float | None = None) -> None:
        """Change flow speed, stiffness factor or added mass (kg per metre of span) mid-run.

        The state (circulations, wake, deflections) carries over; the step map is reassembled only
        if something changed.
        """
        pr = self._params
        if flow_speed is not None:
            pr.flow_speed = float(flow_speed)
        if stiffness_factor is not None:
            pr.stiffness_factor = float(stiffness_factor)
        if added_mass is not None:
            pr.added_mass = float(added_mass)
        if added_mass_at is not None:
            pr.added_mass_at = float(added_mass_at)
        self._build()

    # ================================================================= assembly
    def _build(self) -> None:
        pr = self._params
        key = (pr.flow_speed, pr.stiffness_factor, pr.added_mass, pr.added_mass_at)
        if key == self._built_key:
            return
        self._built_key = key
        g = self.geometry
        N, nm = g.n_panels, self.n_modes
        dt = self.dt
        U = pr.flow_speed
        rho = self.fluid.density_kg_m3
        eta = self.eta
        M, K, load = self._structural_matrices()
        zeta = self.article.damping_ratio
        # modal damping 2 zeta omega_i on the (diagonal) modal mass and stiffness
        C = np.diag(2.0 * zeta * np.sqrt(np.maximum(np.diag(K) * np.diag(M), 0.0))) if nm else M
        self._M, self._K, self._C, self._load = M, K, C, load
        c1 = 3.0 / (2.0 * dt)  # BDF2: y'_{n+1} = (3 y_{n+1} - 4 y_n + y_{n-1}) / (2 dt)
        self._c1 = c1
        x_shed = g.chord + self.numerics.shed_fraction * U * dt
        self._x_shed = x_shed
        T = g.cumulative
        P = self.panel_load
        # ---- unknowns z = [Gamma_1..N, Gamma_wake_new, q_1..nm]
        nz = N + 1 + nm
        A = np.zeros((nz, nz))
        # no-penetration at the collocation points (Katz & Plotkin 13.8): induced upwash equals
        #   -U eta F sin(alpha) + U eta w' - alpha_t xi + w_t
        A[:N, :N] = g.bound_influence
        A[:N, N] = g.wake_influence(x_shed)
        A[:N, N + 1:] = -(U * eta * self.slope_colloc + c1 * self.phi_colloc)
        # Kelvin: sum Gamma_{n+1} + Gamma_wake_new = sum Gamma_n (Katz & Plotkin eq. 13.30)
        A[N, :N] = 1.0
        A[N, N] = 1.0
        # modal equations M q_tt + C q_t + K q = P dp + loads, with dp from eq. 13.37 (BDF2 in time)
        A[N + 1:, :N] = -rho * P @ (U / g.h * np.eye(N) + c1 * T)
        A[N + 1:, N + 1:] = c1 * c1 * M + c1 * C + K
        # ---- extended state s = [G_n, G_{n-1}, q_n, q_{n-1}, v_n, v_{n-1}, w_wake, u_inc, at, att, cf]
        o = self._offsets(N, nm)
        ne = o["end"]
        R = np.zeros((nz, ne))
        # known part of the BDF2 velocity: v_known = (-4 q_n + q_{n-1}) / (2 dt)
        Vk = np.zeros((nm, ne))
        Vk[:, o["q"]:o["q"] + nm] = -4.0 / (2.0 * dt) * np.eye(nm)
        Vk[:, o["q1"]:o["q1"] + nm] = 1.0 / (2.0 * dt) * np.eye(nm)
        Ak = np.zeros((nm, ne))  # known part of the BDF2 acceleration from v
        Ak[:, o["v"]:o["v"] + nm] = -4.0 / (2.0 * dt) * np.eye(nm)
        Ak[:, o["v1"]:o["v1"] + nm] = 1.0 / (2.0 * dt) * np.eye(nm)
        Gk = np.zeros((N, ne))  # known part of the BDF2 circulation rate
        Gk[:, o["G"]:o["G"] + N] = -4.0 / (2.0 * dt) * np.eye(N)
        Gk[:, o["G1"]:o["G1"] + N] = 1.0 / (2.0 * dt) * np.eye(N)
        R[:N] = self.phi_colloc @ Vk
        R[:N, o["w"]:o["w"] + N] -= np.eye(N)
        R[:N, o["u"]] = -1.0
        R[:N, o["at"]] = -self.xi_colloc
        R[N, o["G"]:o["G"] + N] = 1.0
        if nm:
            R[N + 1:] = rho * P @ T @ Gk - M @ (c1 * Vk + Ak) - C @ Vk
            R[N + 1:, o["att"]] += load
            R[N + 1:, o["cf"]:o["cf"] + nm] += self.mass_struct - self.spin_stiff
        lu = scipy.linalg.lu_factor(A, check_finite=False)
        Z = scipy.linalg.lu_solve(lu, R, check_finite=False)  # z = Z @ s
        # ---- outputs y = B @ s: new state block, shed vortex, lift / cos(alpha), gauge curvature
        ns = o["w"]
        B = np.zeros((ns + 4, ne))
        B[o["G"]:o["G"] + N] = Z[:N]
        B[o["G1"]:o["G1"] + N, o["G"]:o["G"] + N] = np.eye(N)
        Zq = Z[N + 1:]
        B[o["q"]:o["q"] + nm] = Zq
        B[o["q1"]:o["q1"] + nm, o["q"]:o["q"] + nm] = np.eye(nm)
        B[o["v"]:o["v"] + nm] = c1 * Zq + Vk
        B[o["v1"]:o["v1"] + nm, o["v"]:o["v"] + nm] = np.eye(nm)
        B[ns] = Z[N]
        # lift per span / cos(alpha) = h sum_j dp_j = rho (U sum Gamma + h 1'T dGamma/dt)
        wT = g.h * T.sum(axis=0)
        B[ns + 1] = rho * (U * Z[:N].sum(axis=0) + wT @ (c1 * Z[:N] + Gk))
        if nm:
            B[ns + 2:ns + 4] = self.curv_gauges @ Zq
        # the spin term's slot holds alpha_t^2 (2 q_n - q_{n-1}): y = B0 s + alpha_t^2 (Bc s)
        Wcf = np.zeros((nm, ne))
        Wcf[:, o["q"]:o["q"] + nm] = 2.0 * np.eye(nm)
        Wcf[:, o["q1"]:o["q1"] + nm] = -np.eye(nm)
        Bc = B[:, o["cf"]:o["cf"] + nm] @ Wcf
        B0 = B.copy()
        B0[:, o["cf"]:o["cf"] + nm] = 0.0
        self._B = B
        self._B0 = B0
        # Bc only reads q_n and q_{n-1}, which sit next to each other in s
        self._Bcq = np.ascontiguousarray(Bc[:, o["q"]:o["q"] + 2 * nm])
        self._off = o
        self._system = A
        # steady problem (for initial states): same rows without time derivatives and wake
        As = np.zeros((N + nm, N + nm))
        As[:N, :N] = g.bound_influence
        As[:N, N:] = -U * eta * self.slope_colloc
        As[N:, :N] = -rho * U / g.h * P
        As[N:, N:] = K
        self._steady = As

    @staticmethod
    def _offsets(N: int, nm: int) -> dict:
        o = {}
        pos = 0
        for name, size in (("G", N), ("G1", N), ("q", nm), ("q1", nm), ("v", nm), ("v1", nm),
                           ("w", N), ("u", 1), ("at", 1), ("att", 1), ("cf", nm)):
            o[name] = pos
            pos += size
        o["end"] = pos
        return o

    # ================================================================= state
    def incidence_wash(self, alpha):
        """Free-stream part of the required upwash magnitude, ``U eta F(alpha) sin(alpha)``."""
        v = self.viscous
        f = separation_factor(alpha, np.radians(v.stall_angle_deg), np.radians(v.stall_width_deg)) \
            if v.stall else 1.0
        return self.flow_speed * self.eta * f * np.sin(alpha)

    def steady_state(self, alpha: float) -> dict:
        """Steady aeroelastic solution at incidence ``alpha`` (starting vortex at infinity)."""
        g = self.geometry
        N, nm = g.n_panels, self.n_modes
        rhs = np.zeros(N + nm)
        rhs[:N] = -self.incidence_wash(alpha)
        sol = np.linalg.solve(self._steady, rhs)
        gamma, q = sol[:N], sol[N:]
        U = self.flow_speed
        lift = self.fluid.density_kg_m3 * U * gamma.sum() * np.cos(alpha)
        qdyn = 0.5 * self.fluid.density_kg_m3 * U * U
        kappa = self.curv_gauges @ q if nm else np.zeros(2)
        return {"gamma": gamma, "q": q, "lift": lift,
                "C_L": lift / (qdyn * g.chord) if qdyn > 0 else 0.0, "kappa": kappa}

    def reset(self, alpha0: float = 0.0, q0: np.ndarray | None = None) -> None:
        """Start from the steady state at ``alpha0`` (plate at rest, wake at infinity).

        ``q0`` overrides the initial modal deflection (for free-vibration checks).
        """
        o = self._off
        N, nm = self.geometry.n_panels, self.n_modes
        st = self.steady_state(alpha0) if self.flow_speed > 0 else {"gamma": np.zeros(N), "q": np.zeros(nm)}
        s = np.zeros(o["end"])
        s[o["G"]:o["G"] + N] = st["gamma"]
        s[o["G1"]:o["G1"] + N] = st["gamma"]
        q = st["q"] if q0 is None else np.asarray(q0, dtype=float)
        s[o["q"]:o["q"] + nm] = q
        s[o["q1"]:o["q1"] + nm] = q
        self._s = s
        self.wake.reset()
        self.initial_circulation = float(st["gamma"].sum())
        self.time = 0.0

    @property
    def bound_circulation(self) -> np.ndarray:
        o = self._off
        return self._s[o["G"]:o["G"] + self.geometry.n_panels].copy()

    @property
    def modal_coordinates(self) -> np.ndarray:
        o = self._off
        return self._s[o["q"]:o["q"] + self.n_modes].copy()

    @property
    def modal_velocities(self) -> np.ndarray:
        o = self._off
        return self._s[o["v"]:o["v"] + self.n_modes].copy()

    @property
    def n_states(self) -> int:
        """Full order now: bound circulations (two levels of history), wake vortices, modal states."""
        return 2 * self.geometry.n_panels + 4 * self.n_modes + 2 * self.wake.n

    # ================================================================= stepping
    def run(self, alpha: np.ndarray, alpha_dot: np.ndarray, alpha_ddot: np.ndarray):
        """Advance one output sample per entry of the kinematics arrays (each at the sample's end).

        Returns
        -------
        lift : ndarray
            Lift per unit span, N/m.
        kappa : ndarray
            Curvature at (root, mid) gauge stations, shape (n, 2), 1/m.
        """
        alpha = np.asarray(alpha, dtype=float)
        n = alpha.size
        sub = self.numerics.substeps
        if sub > 1:
            # sub-steps need the kinematics inside the sample: the caller passes them per sub-step
            raise ValueError("run() takes sub-step kinematics via run_substeps()")
        return self._run_steps(alpha, np.asarray(alpha_dot, float), np.asarray(alpha_ddot, float), n)

    def run_substeps(self, alpha, alpha_dot, alpha_ddot):
        """Like :meth:`run` but the arrays hold every internal step; returns every ``substeps``-th."""
        alpha = np.asarray(alpha, dtype=float)
        lift, kappa = self._run_steps(alpha, np.asarray(alpha_dot, float),
                                      np.asarray(alpha_ddot, float), alpha.size)
        k = self.numerics.substeps
        return lift[k - 1::k], kappa[k - 1::k]

    def _run_steps(self, alpha, alpha_dot, alpha_ddot, n):
        o = self._off
        N, nm = self.geometry.n_panels, self.n_modes
        s = self._s
        B0 = self._B0
        Bcq = self._Bcq
        ns = o["w"]
        iq, iq2 = o["q"], o["q"] + 2 * nm
        wake = self.wake
        U = self.flow_speed
        step_len = U * self.dt
        x_shed = self._x_shed
        u_inc = self.incidence_wash(alpha)
        cos_a = np.cos(alpha)
        lift = np.empty(n)
        kappa = np.zeros((n, 2))
        iw, iu, iat, iatt = o["w"], o["u"], o["at"], o["att"]
        spin = alpha_dot * alpha_dot
        for i in range(n):
            s[iw:iw + N] = wake.normal_velocity()
            s[iu] = u_inc[i]
            s[iat] = alpha_dot[i]
            s[iatt] = alpha_ddot[i]
            # spin softening/stiffening alpha_t^2 (M - K_g) q, with q extrapolated (2 q_n - q_{n-1})
            y = B0 @ s
            if nm and spin[i] != 0.0:
                y += spin[i] * (Bcq @ s[iq:iq2])
            s[:ns] = y[:ns]
            wake.shed_and_convect(x_shed, y[ns], step_len)
            lift[i] = y[ns + 1] * cos_a[i]
            kappa[i, 0] = y[ns + 2]
            kappa[i, 1] = y[ns + 3]
        self.time += n * self.dt
        return lift, kappa

    def total_circulation(self) -> float:
        """Bound + stored wake + dropped circulation (Kelvin: stays at its initial value)."""
        return float(self.bound_circulation.sum() + self.wake.total_circulation
                     + self.wake.dropped_circulation)
