"""A receding-horizon (model predictive) lift tracker with a hard curvature limit.

An example controller for wingwatch users and for the closed-loop demo. Every control period
(50 ms of source time by default) it takes the latest valid model (from a
:class:`wingwatch.clients.feed.ModelFeed`, or a model given directly), predicts C_L and curvature
over a horizon (1 s at a 25 ms plan step), solves a small quadratic programme and applies the
first move; then it does it all again from the new state (receding horizon: J. B. Rawlings and
D. Q. Mayne, "Model Predictive Control: Theory and Design", 2009, chapter 1).

**Model.** The interpretable model that wingwatch publishes (``ww.model``; calibration file,
:class:`wingwatch.daemon.modelfile.ReferenceModel`)::

    y - y_0 = K_qs (alpha - alpha_0) + K_rate alpha_dot + K_am alpha_ddot + C x + bias
    x[k+1]  = A x[k] + B alpha_dot[k]

with ``y = [C_L, curvature]``. (A, B) is carried from the model's sample time to the plan step
by :func:`wingwatch.daemon.identify.transient.resample_realisation` (zero-order hold); over a
plan step the transient is driven by the mean pitch rate, the finite difference
``(alpha[k+1] - alpha[k]) / h`` of the planned angle.

**Actuator.** The decision variables are the commanded angles, one per control period (held,
piecewise constant). The pitch axis follows them through a linear second-order servo
(:class:`wingwatch.daemon.rig.source.ServoSpec`, the virtual rig's documented actuator), so the
planned angle, its rate and its acceleration are exact linear functions of the commands and of
the servo's present state. The plan that is published is the predicted pitch angle.

**Quadratic programme** over the commands ``u`` (M of them)::

    minimise   sum_k w_L (C_L[k] - r[k])^2 + w_u sum_j (u[j] - u[j-1])^2
    subject to |curvature[k]| <= (1 - backoff) limit          (hard)
               alpha_min <= alpha[k] <= alpha_max, alpha_min <= u[j] <= alpha_max  (hard)
               |alpha_dot[k]| <= 0.9 rate limit, |alpha_ddot[k]| <= 0.9 acceleration limit
                                        (so that the servo stays linear, as predicted)

solved by sequential least squares programming (D. Kraft, "A software package for sequential
quadratic programming", DFVLR-FB 88-28, 1988; ``scipy.optimize.minimize(method="SLSQP")``),
warm-started from the previous plan shifted by one move. When no command sequence can keep the
predicted curvature under the limit (a disturbance, a stale model) the curvature rows are
softened with one penalised slack variable and the move is marked ``softened``: the least
violation is flown, never an unconstrained one.

**State estimate.** The controller carries the servo's state and the transient state ``x``
forward with its own commands (an open-loop observer: both are stable, so an error in the
starting state decays). It keeps a short history of plan-step pitch rates so that a new model
(possibly of another rank) starts from the state it would have reached on the same motion.

Examples
--------
Track a lift step on a one-state toy model (C_L = 4 alpha, curvature = 10 alpha):

>>> import numpy as np
>>> toy = ControlModel(dt=0.001, A=np.array([[0.99]]), B=np.array([0.0]), C=np.zeros((2, 1)),
...                    k_qs=np.array([4.0, 10.0]), k_rate=np.zeros(2), k_am=np.zeros(2),
...                    bias=np.zeros(2), alpha0=0.0, y0=np.zeros(2))
>>> mpc = LiftTracker(toy, StepReference([0.0], [0.2]), curvature_limit=1.0)
>>> mpc.reset(0.0, 0.0)
>>> for _ in range(40):
...     move = mpc.step()
>>> round(4.0 * mpc.alpha, 3), move.status
(0.2, 'optimal')
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator, Sequence

import numpy as np
import scipy.linalg
import scipy.optimize

from wingwatch.daemon.identify.transient import resample_realisation
from wingwatch.daemon.rig.scenario import smooth_step
from wingwatch.daemon.rig.source import CommandSchedule, RigFrame, ServoSpec, VirtualRig

__all__ = ["ControlModel", "StepReference", "ModelLiftReference", "Move", "LiftTracker",
           "quasi_steady_command", "fly", "main"]


# ============================================================================ model
@dataclass(frozen=True, eq=False)
class ControlModel:
    """The model the controller predicts with (coefficient vectors are ``[lift, curvature]``)."""

    dt: float
    A: np.ndarray
    B: np.ndarray  # (r,)
    C: np.ndarray  # (2, r)
    k_qs: np.ndarray
    k_rate: np.ndarray
    k_am: np.ndarray
    bias: np.ndarray
    alpha0: float = 0.0
    y0: np.ndarray = field(default_factory=lambda: np.zeros(2))
    model_id: str = ""

    def __post_init__(self) -> None:
        r = np.asarray(self.A).shape[0] if np.asarray(self.A).size else 0
        if not (math.isfinite(self.dt) and self.dt > 0):
            raise ValueError(f"dt must be a positive sample time, not {self.dt!r}")
        if np.asarray(self.A).reshape(r, r).shape != (r, r) or np.asarray(self.B).size != r \
                or np.asarray(self.C).size != 2 * r:
            raise ValueError("A, B and C must have shapes r x r, r and 2 x r")
        for name in ("k_qs", "k_rate", "k_am", "bias", "y0"):
            if np.asarray(getattr(self, name)).shape != (2,):
                raise ValueError(f"{name} must be a pair [lift, curvature]")
        arrays = [self.A, self.B, self.C, self.k_qs, self.k_rate, self.k_am, self.bias, self.y0]
        if not all(np.all(np.isfinite(np.asarray(a, dtype=float))) for a in arrays) \
                or not math.isfinite(self.alpha0):
            raise ValueError("the model holds NaN or infinite values")
        if self.k_qs[0] == 0:
            raise ValueError("the model's quasi-steady lift coefficient is zero: lift cannot be steered")

    @property
    def rank(self) -> int:
        return int(np.asarray(self.B).size)

    @classmethod
    def from_reference(cls, m: Any, model_id: str = "reference") -> "ControlModel":
        """From a :class:`wingwatch.daemon.modelfile.ReferenceModel` (calibration, model file)."""
        op = m.operating_point
        r = m.A.shape[0]
        return cls(dt=float(m.dt), A=np.array(m.A, float), B=np.array(m.B, float).reshape(r),
                   C=np.array(m.C, float).reshape(2, r), k_qs=np.array(m.k_qs, float),
                   k_rate=np.array(m.k_rate, float), k_am=np.array(m.k_am, float),
                   bias=np.array(m.bias, float), alpha0=float(op.get("alpha_rad", 0.0)),
                   y0=np.array([op.get("lift", 0.0), op.get("curvature", 0.0)], float),
                   model_id=model_id)

    @classmethod
    def from_update(cls, u: Any) -> "ControlModel":
        """From a :class:`wingwatch.clients.feed.ModelUpdate` (a ``ww.model`` message).

        The message's coefficients refer to absolute alpha and outputs unless it carries an
        ``operating_point`` map (``alpha_rad``, ``lift``, ``curvature``), read from ``raw``.
        """
        co = u.coefficients

        def pair(key: str) -> np.ndarray:
            d = co.get(key) or {}
            return np.array([float(d.get("lift", 0.0)), float(d.get("curvature", 0.0))])

        op = u.raw.get("operating_point") if isinstance(u.raw, dict) else None
        op = op if isinstance(op, dict) else {}
        r = int(np.asarray(u.B).size)
        return cls(dt=float(u.dt), A=np.asarray(u.A, float).reshape(r, r),
                   B=np.asarray(u.B, float).reshape(r), C=np.asarray(u.C, float).reshape(2, r),
                   k_qs=pair("quasi_steady"), k_rate=pair("rate"), k_am=pair("added_mass"),
                   bias=pair("bias"), alpha0=float(op.get("alpha_rad", 0.0)),
                   y0=np.array([float(op.get("lift", 0.0)), float(op.get("curvature", 0.0))]),
                   model_id=str(u.model_id))

    @classmethod
    def of(cls, m: Any) -> "ControlModel":
        """Any supported model object: a ControlModel, a ReferenceModel or a ModelUpdate."""
        if isinstance(m, ControlModel):
            return m
        if hasattr(m, "operating_point") and hasattr(m, "k_qs"):
            return cls.from_reference(m)
        if hasattr(m, "coefficients") and hasattr(m, "raw"):
            return cls.from_update(m)
        raise TypeError(f"cannot control with a {type(m).__name__}")

    def steady(self, alpha: Any) -> np.ndarray:
        """Steady outputs ``[C_L, curvature]`` at constant ``alpha`` (the transient at rest)."""
        a = np.asarray(alpha, dtype=float)
        return np.multiply.outer(a - self.alpha0, self.k_qs) + self.bias + self.y0


def quasi_steady_command(model: ControlModel, lift: Any) -> np.ndarray:
    """The angle whose steady lift is ``lift``: the quasi-steady inverse of the model."""
    return model.alpha0 + (np.asarray(lift, dtype=float) - model.y0[0] - model.bias[0]) / model.k_qs[0]


# ======================================================================= reference
class StepReference:
    """A lift reference of smoothed steps: ``values[i]`` from ``times[i]`` on, each change a
    quintic ramp of ``ramp_s`` (T. Flash and N. Hogan, J. Neuroscience 5(7), 1985), starting at
    ``times[i]``. Before the first time the first value holds.

    >>> r = StepReference([0.0, 1.0], [0.1, 0.3], ramp_s=0.2)
    >>> [round(float(v), 3) for v in r(np.array([0.5, 1.1, 2.0]))]
    [0.1, 0.2, 0.3]
    """

    def __init__(self, times: Sequence[float], values: Sequence[float], ramp_s: float = 0.0) -> None:
        t = np.asarray(times, dtype=float)
        v = np.asarray(values, dtype=float)
        if t.ndim != 1 or t.shape != v.shape or t.size == 0:
            raise ValueError("times and values must be equal-length, non-empty sequences")
        if np.any(np.diff(t) <= 0) or not np.all(np.isfinite(t)) or not np.all(np.isfinite(v)):
            raise ValueError("times must be finite and increasing, values finite")
        if not (math.isfinite(ramp_s) and ramp_s >= 0):
            raise ValueError("ramp_s must be a non-negative number of seconds")
        self.times, self.values, self.ramp_s = t, v, float(ramp_s)

    def __call__(self, t: Any) -> np.ndarray:
        t = np.asarray(t, dtype=float)
        out = np.full(t.shape, self.values[0])
        for t0, a, b in zip(self.times[1:], self.values[:-1], self.values[1:]):
            if self.ramp_s > 0:
                s = smooth_step((t - t0) / self.ramp_s)[0]
            else:
                s = (t >= t0).astype(float)
            out = out + (b - a) * s
        return out

    @classmethod
    def parse(cls, text: str, ramp_s: float = 0.2) -> "StepReference":
        """From ``"t:CL,t:CL,..."`` (seconds from the controller's start, lift coefficient)."""
        try:
            pairs = [tuple(float(x) for x in item.split(":")) for item in text.split(",") if item.strip()]
            if not pairs or any(len(p) != 2 for p in pairs):
                raise ValueError
        except ValueError:
            raise ValueError(f"--lift {text!r}: expected t:CL pairs separated by commas") from None
        return cls([p[0] for p in pairs], [p[1] for p in pairs], ramp_s)


class ModelLiftReference:
    """A lift reference: the lift that ``model`` gives along a prescribed pitch programme.

    ``programme(t) -> (alpha, alpha_dot, alpha_ddot)`` (rad, rad/s, rad/s^2; vectorised in
    ``t``), for instance a scenario's scripted motion. The lift is the model's whole output on a
    grid ``t_k = t_start - warmup_s + k h``::

        C_L[k]  = y_0 + bias + K_qs (alpha_k - alpha_0) + K_rate alpha_dot_k + K_am alpha_ddot_k
                  + C_L x[k]
        x[k+1]  = A_h x[k] + B_h (alpha_{k+1} - alpha_k) / h

    with (A_h, B_h) the model's realisation carried to the step ``h`` (zero-order hold on the
    mean pitch rate over a step, as :class:`LiftTracker` predicts). The transient starts at rest
    ``warmup_s`` before ``t_start`` and has decayed into the programme's motion by then. A
    tracker that follows this reference with the same model flies the programme itself; with
    another model (a newer identification) it flies whatever angle gives that lift.

    The grid is computed on demand, in time order, and only the last ``keep_s`` before the
    newest query is kept (bounded memory); between grid points the lift is interpolated
    linearly, and a time before the kept grid takes its first value.

    >>> toy = ControlModel(dt=0.001, A=np.array([[0.9]]), B=np.array([0.0]), C=np.zeros((2, 1)),
    ...                    k_qs=np.array([4.0, 10.0]), k_rate=np.array([0.5, 0.0]),
    ...                    k_am=np.zeros(2), bias=np.zeros(2), alpha0=0.0, y0=np.zeros(2))
    >>> ramp = lambda t: (0.1 * np.asarray(t), np.full(np.shape(t), 0.1), np.zeros(np.shape(t)))
    >>> r = ModelLiftReference(toy, ramp, t_start=0.0)
    >>> [round(float(v), 6) for v in r(np.array([1.0, 2.0]))]  # 4 (0.1 t) + 0.5 (0.1)
    [0.45, 0.85]
    """

    def __init__(self, model: Any, programme: Callable[[np.ndarray], tuple], *, t_start: float,
                 step_s: float = 0.005, warmup_s: float = 10.0, keep_s: float = 5.0) -> None:
        m = ControlModel.of(model)
        for name, v in (("step_s", step_s), ("keep_s", keep_s)):
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a positive number of seconds")
        if not (isinstance(warmup_s, (int, float)) and math.isfinite(warmup_s) and warmup_s >= 0):
            raise ValueError("warmup_s must be a non-negative number of seconds")
        if not (isinstance(t_start, (int, float)) and math.isfinite(t_start)):
            raise ValueError("t_start must be a finite source time")
        if not callable(programme):
            raise ValueError("programme must be callable: t -> (alpha, alpha_dot, alpha_ddot)")
        self.model = m
        self.programme = programme
        self.step_s = float(step_s)
        self.keep_s = float(keep_s)
        self.t_first = float(t_start) - float(warmup_s)
        r = m.rank
        if r:
            Ah, Bh = resample_realisation(m.A, m.B.reshape(r, 1), m.dt, self.step_s)
            self._Ah, self._Bh = Ah, Bh[:, 0]
        else:
            self._Ah, self._Bh = np.zeros((0, 0)), np.zeros(0)
        self._x = np.zeros(r)
        self._a_prev: float | None = None
        self._k = 0  # index of the next grid point to compute
        self._t = np.zeros(0)
        self._r = np.zeros(0)

    def _extend(self, t_need: float) -> None:
        h, m = self.step_s, self.model
        n = max(200, int(math.ceil((t_need - (self.t_first + self._k * h)) / h)) + 1)
        tg = self.t_first + (self._k + np.arange(n)) * h
        a, ad, add = (np.asarray(v, dtype=float) for v in self.programme(tg))
        static = (m.y0[0] + m.bias[0] + m.k_qs[0] * (a - m.alpha0) + m.k_rate[0] * ad
                  + m.k_am[0] * add)
        out = np.empty(n)
        x, Ah, Bh, cl = self._x, self._Ah, self._Bh, m.C[0]
        a_prev = self._a_prev
        for i in range(n):
            if a_prev is not None:
                x = Ah @ x + Bh * ((a[i] - a_prev) / h)  # the mean rate over the step
            a_prev = float(a[i])
            out[i] = static[i] + cl @ x
        self._x, self._a_prev = x, a_prev
        self._k += n
        self._t = np.concatenate([self._t, tg])
        self._r = np.concatenate([self._r, out])

    def __call__(self, t: Any) -> np.ndarray:
        t = np.asarray(t, dtype=float)
        if t.size == 0:
            return np.zeros(t.shape)
        hi, lo = float(np.max(t)), float(np.min(t))
        if not (math.isfinite(hi) and math.isfinite(lo)):
            raise ValueError("reference times must be finite")
        if self._t.size == 0 or hi > self._t[-1]:
            self._extend(hi)
        keep = np.searchsorted(self._t, lo - self.keep_s)
        if keep > 0:  # bounded memory: forget what lies well before the query
            self._t, self._r = self._t[keep:], self._r[keep:]
        return np.interp(t, self._t, self._r)


# ============================================================================ QP
def solve_qp(P: np.ndarray, q: np.ndarray, A: np.ndarray, b: np.ndarray
             ) -> tuple[np.ndarray | None, int]:
    """Minimise ``u' P u / 2 + q' u`` subject to ``A u <= b`` (P symmetric positive definite).

    With ``P = L L'`` and ``v = L' u + L^-1 q`` the problem is the least-distance programme
    ``min |v|^2 subject to G v >= h``, which is solved exactly through one non-negative least
    squares problem (C. L. Lawson and R. J. Hanson, "Solving Least Squares Problems", 1974,
    chapter 23, algorithm LDP; NNLS by their active-set algorithm, chapter 23 section 3, as
    ``scipy.optimize.nnls``). Returns ``(u, iterations)``, or ``(None, 0)`` when the constraints
    admit no solution.

    >>> u, _ = solve_qp(np.eye(2), np.array([-1.0, -1.0]), np.array([[1.0, 1.0]]), np.array([1.0]))
    >>> np.round(u, 6).tolist()
    [0.5, 0.5]
    """
    L = np.linalg.cholesky(P)
    Linv = scipy.linalg.solve_triangular(L, np.eye(L.shape[0]), lower=True)
    w = Linv @ q  # v = L' u + w
    AL = A @ Linv.T  # A u = AL (v - w)
    G = -AL  # G v >= h
    h = -(b + AL @ w)
    n = G.shape[1]
    if h.size == 0 or np.all(h <= 0):
        v = np.zeros(n)  # the unconstrained optimum is feasible
        return Linv.T @ (v - w), 0
    E = np.vstack([G.T, h[None, :]])  # (n + 1) x m
    f = np.zeros(n + 1)
    f[n] = 1.0
    # column scaling keeps NNLS well conditioned when rows of A differ in units
    scale = np.sqrt(np.sum(E * E, axis=0))
    scale[scale == 0] = 1.0
    y, _ = scipy.optimize.nnls(E / scale, f, maxiter=50 * E.shape[1])
    r = (E / scale) @ y - f
    if abs(r[n]) < 1e-12:
        return None, 0  # |r| = 0: the constraints are inconsistent (Lawson and Hanson, 23.4)
    v = -r[:n] / r[n]
    return Linv.T @ (v - w), int(np.count_nonzero(y))


# ============================================================================ MPC
@dataclass(frozen=True, eq=False)
class Move:
    """One control step's decision and what the controller predicted with it."""

    t: float  # source time the command applies from, s
    command: float  # rad
    plan_t0: float
    plan_dt: float
    plan_alpha: np.ndarray  # predicted pitch angle at plan_t0 + k plan_dt, k = 0..N
    predicted_lift: np.ndarray  # at k = 1..N
    predicted_curvature: np.ndarray
    reference: np.ndarray  # lift reference at k = 1..N
    status: str  # "optimal", "softened" (curvature rows relaxed) or "fallback" (solver failed)
    iterations: int  # active constraints (ldp) or SLSQP iterations
    model_id: str


class LiftTracker:
    """Receding-horizon lift tracker with a hard curvature limit (see the module docstring).

    Parameters
    ----------
    model : ControlModel, ReferenceModel or ModelUpdate
        The prediction model (replace it with :meth:`set_model`).
    reference : callable
        Lift reference ``r(t)`` (source time, vectorised), e.g. a :class:`StepReference`.
    curvature_limit : float
        The deformation limit, 1/m (``outputs.curvature.limit_per_m``).
    alpha_bounds : (float, float)
        Hard bounds on the commanded and the predicted pitch angle, rad.
    horizon_s, plan_step_s, control_period_s : float
        Prediction horizon, prediction (and published plan) step, and control period, s. The
        period must be a whole number of plan steps and the horizon a whole number of periods.
    servo : ServoSpec
        The pitch actuator the commands go through (the virtual rig's by default).
    lift_sigma, move_sigma : float
        Weights as tolerated sizes: a lift error of ``lift_sigma`` per plan step costs as much
        as a command move of ``move_sigma`` rad.
    backoff : float
        Fraction of the limit kept free for model error and for peaks between plan steps.
    solver : {"ldp", "slsqp"}
        The QP solver: :func:`solve_qp` (exact, active-set; the default) or
        ``scipy.optimize.minimize(method="SLSQP")`` (D. Kraft, 1988; slower, for cross-checks).
    maxiter : int
        SLSQP iteration cap.
    """

    def __init__(self, model: Any, reference: Callable[[np.ndarray], np.ndarray], *,
                 curvature_limit: float, alpha_bounds: tuple[float, float] = (math.radians(-2.0),
                                                                              math.radians(10.0)),
                 horizon_s: float = 1.0, plan_step_s: float = 0.025, control_period_s: float = 0.05,
                 servo: ServoSpec | None = None, lift_sigma: float = 0.01,
                 move_sigma: float = math.radians(0.5), backoff: float = 0.05, solver: str = "ldp",
                 maxiter: int = 100, history_s: float = 10.0) -> None:
        if not (math.isfinite(curvature_limit) and curvature_limit > 0):
            raise ValueError("curvature_limit must be a positive number (1/m)")
        lo, hi = (float(b) for b in alpha_bounds)
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ValueError("alpha_bounds must be finite with alpha_bounds[0] < alpha_bounds[1]")
        for name, v in (("horizon_s", horizon_s), ("plan_step_s", plan_step_s),
                        ("control_period_s", control_period_s), ("lift_sigma", lift_sigma),
                        ("move_sigma", move_sigma), ("history_s", history_s)):
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a positive number")
        q = control_period_s / plan_step_s
        if abs(q - round(q)) > 1e-9 or round(q) < 1:
            raise ValueError("control_period_s must be a whole number of plan steps")
        M = horizon_s / control_period_s
        if abs(M - round(M)) > 1e-9 or round(M) < 1:
            raise ValueError("horizon_s must be a whole number of control periods")
        if not 0.0 <= backoff < 1.0:
            raise ValueError("backoff must be in [0, 1)")
        if solver not in ("ldp", "slsqp"):
            raise ValueError("solver must be 'ldp' or 'slsqp'")
        self.solver = solver
        if not callable(reference):
            raise ValueError("reference must be callable: r(t) -> lift")
        self.reference = reference
        self.curvature_limit = float(curvature_limit)
        self.alpha_bounds = (lo, hi)
        self.horizon_s = float(horizon_s)
        self.plan_step_s = float(plan_step_s)
        self.control_period_s = float(control_period_s)
        self.servo = servo or ServoSpec()
        self.lift_sigma = float(lift_sigma)
        self.move_sigma = float(move_sigma)
        self.backoff = float(backoff)
        self.maxiter = int(maxiter)
        self.history_s = float(history_s)
        self.q = int(round(q))  # plan steps per move
        self.n_moves = int(round(M))
        self.n_steps = self.q * self.n_moves
        self.model: ControlModel | None = None
        self.set_model(model)
        self.reset(0.0, float(np.clip(0.0, lo, hi)))

    # -- state --------------------------------------------------------------------------
    def reset(self, t: float, alpha: float, alpha_dot: float = 0.0) -> None:
        """Start at source time ``t`` with the pitch axis at ``alpha`` (rad), moving at
        ``alpha_dot``, its wake and bending at rest."""
        self.t = float(t)
        self._s = np.array([float(alpha), float(alpha_dot)])
        self._x = np.zeros(self.model.rank)
        self._u_prev = float(alpha)
        self._warm: np.ndarray | None = None
        self._hist: deque[float] = deque(maxlen=max(1, int(round(self.history_s / self.plan_step_s))))
        self.moves = 0
        self.softened = 0
        self.fallbacks = 0

    @property
    def alpha(self) -> float:
        """The carried estimate of the pitch angle now, rad."""
        return float(self._s[0])

    @property
    def state(self) -> dict[str, Any]:
        return {"t": self.t, "alpha": float(self._s[0]), "alpha_dot": float(self._s[1]),
                "x": self._x.copy(), "command": self._u_prev}

    def set_model(self, model: Any) -> None:
        """Predict with ``model`` from now on; the transient state is rebuilt from the recent
        motion (the states' meaning changes with the realisation)."""
        m = ControlModel.of(model)
        h = self.plan_step_s
        r = m.rank
        if r:
            Ah, Bh = resample_realisation(m.A, m.B.reshape(r, 1), m.dt, h)
            Bh = Bh[:, 0]
        else:
            Ah, Bh = np.zeros((0, 0)), np.zeros(0)
        self.model = m
        self._Ah, self._Bh = Ah, Bh
        self._build()
        if hasattr(self, "_hist"):
            x = np.zeros(r)
            for ad in self._hist:
                x = Ah @ x + Bh * ad
            self._x = x

    def _build(self) -> None:
        """The linear prediction ``out = H [z0; u] + h0`` for the rows lift, curvature, alpha,
        alpha_dot, alpha_ddot at plan steps 1..N (z0 = (alpha, alpha_dot, x) now)."""
        m, sv, h = self.model, self.servo, self.plan_step_s
        r, N, M, q = m.rank, self.n_steps, self.n_moves, self.q
        Phi, Gam = sv.discrete(h)
        w2, zw2 = sv.omega ** 2, 2.0 * sv.damping * sv.omega
        nz = 2 + r
        # one step of z = (alpha, alpha_dot, x) under a held command c:
        #   s+ = Phi s + Gam c;  x+ = A_h x + B_h (alpha+ - alpha) / h   (mean rate over the step)
        T = np.zeros((nz, nz))
        T[:2, :2] = Phi
        T[2:, 2:] = self._Ah
        T[2:, :2] = np.outer(self._Bh, Phi[0] - np.array([1.0, 0.0])) / h
        Tc = np.zeros(nz)
        Tc[:2] = Gam
        Tc[2:] = self._Bh * Gam[0] / h
        self._T, self._Tc = T, Tc
        nw = nz + M
        Z = np.zeros((nz, nw))
        Z[:, :nz] = np.eye(nz)
        rows = {k: np.zeros((N, nw)) for k in ("lift", "curvature", "alpha", "alpha_dot", "alpha_ddot")}
        rows["alpha_ddot_start"] = np.zeros((M, nw))  # just after each command change
        for k in range(N):
            j = k // q  # the move in force over plan step k
            if k % q == 0:
                st = -w2 * Z[0] - zw2 * Z[1]
                st[nz + j] += w2
                rows["alpha_ddot_start"][j] = st
            Z = T @ Z
            Z[:, nz + j] += Tc
            a, ad = Z[0], Z[1]
            add = -w2 * a - zw2 * ad
            add = add.copy()
            add[nz + j] += w2  # alpha_ddot at the step's end, under the command held over it
            for o, name in enumerate(("lift", "curvature")):
                rows[name][k] = m.k_qs[o] * a + m.k_rate[o] * ad + m.k_am[o] * add + m.C[o] @ Z[2:]
            rows["alpha"][k], rows["alpha_dot"][k], rows["alpha_ddot"][k] = a, ad, add
        self._rows = rows
        self._const = {"lift": m.bias[0] + m.y0[0] - m.k_qs[0] * m.alpha0,
                       "curvature": m.bias[1] + m.y0[1] - m.k_qs[1] * m.alpha0}
        self._nz = nz
        # constant parts of the QP
        G = rows["lift"][:, nz:]
        D = np.eye(M) - np.eye(M, k=-1)
        wl, wu = 1.0 / self.lift_sigma ** 2, 1.0 / self.move_sigma ** 2
        self._wl, self._wu, self._D = wl, wu, D
        self._P = 2.0 * (wl * G.T @ G + wu * D.T @ D) + 1e-9 * np.eye(M)
        lim = (1.0 - self.backoff) * self.curvature_limit
        rl, al = 0.9 * sv.rate_limit, 0.9 * sv.accel_limit
        lo, hi = self.alpha_bounds
        blocks = [("curvature", lim, lim), ("alpha", -lo, hi), ("alpha_dot", rl, rl),
                  ("alpha_ddot", al, al), ("alpha_ddot_start", al, al)]
        self._cons = blocks
        self._n_curv = 2 * N

    def _inequalities(self, z0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``A u <= b`` for the present state; the curvature rows come first."""
        nz = self._nz
        A, b = [], []
        for name, low, high in self._cons:
            R = self._rows[name]
            f = R[:, :nz] @ z0 + self._const.get(name, 0.0)
            G = R[:, nz:]
            A += [G, -G]
            b += [high - f, low + f]
        return np.vstack(A), np.concatenate(b)

    def predict(self, u: np.ndarray, z0: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """Predicted rows (lift, curvature, alpha, alpha_dot, alpha_ddot) for commands ``u``."""
        z0 = self._z0() if z0 is None else z0
        w = np.concatenate([z0, np.asarray(u, dtype=float)])
        return {k: R @ w + self._const.get(k, 0.0) for k, R in self._rows.items()}

    def _z0(self) -> np.ndarray:
        return np.concatenate([self._s, self._x])

    # -- one control step -----------------------------------------------------------------
    def step(self, t: float | None = None) -> Move:
        """Plan from source time ``t`` (default: the carried time), apply the first move and
        advance the carried state by one control period. Returns the :class:`Move`."""
        if t is not None:
            self.t = float(t)
        t0, h, N, M, nz = self.t, self.plan_step_s, self.n_steps, self.n_moves, self._nz
        z0 = self._z0()
        r = np.asarray(self.reference(t0 + h * np.arange(1, N + 1)), dtype=float)
        GL = self._rows["lift"][:, nz:]
        fL = self._rows["lift"][:, :nz] @ z0 + self._const["lift"]
        d0 = np.zeros(M)
        d0[0] = self._u_prev
        qv = 2.0 * (self._wl * GL.T @ (fL - r) - self._wu * self._D.T @ d0)
        P = self._P
        A, b = self._inequalities(z0)
        lo, hi = self.alpha_bounds
        if self._warm is None:
            u0 = np.full(M, self._u_prev)
        else:
            u0 = np.concatenate([self._warm[1:], self._warm[-1:]])
        u0 = np.clip(u0, lo, hi)
        u, it, status = self._solve(P, qv, A, b, u0)  # A, b: model rows; bounds added there
        self._warm = u
        self.moves += 1
        pred = self.predict(u, z0)
        plan_alpha = np.concatenate([[z0[0]], pred["alpha"]])
        move = Move(t=t0, command=float(u[0]), plan_t0=t0, plan_dt=h, plan_alpha=plan_alpha,
                    predicted_lift=pred["lift"], predicted_curvature=pred["curvature"],
                    reference=r, status=status, iterations=it, model_id=self.model.model_id)
        self._advance(float(u[0]))
        return move

    def _qp(self, P: np.ndarray, qv: np.ndarray, A: np.ndarray, b: np.ndarray,
            u0: np.ndarray) -> tuple[np.ndarray | None, int]:
        if self.solver == "ldp":
            return solve_qp(P, qv, A, b)
        res = scipy.optimize.minimize(
            lambda u: 0.5 * u @ P @ u + qv @ u, u0, jac=lambda u: P @ u + qv, method="SLSQP",
            constraints=[{"type": "ineq", "fun": lambda u: b - A @ u, "jac": lambda u: -A}],
            options={"maxiter": self.maxiter, "ftol": 1e-12})
        return (res.x if res.success else None), int(res.nit)

    def _solve(self, P: np.ndarray, qv: np.ndarray, A: np.ndarray, b: np.ndarray,
               u0: np.ndarray) -> tuple[np.ndarray, int, str]:
        lo, hi = self.alpha_bounds
        M = u0.size
        Ab = np.vstack([A, np.eye(M), -np.eye(M)])  # the command bounds as rows
        bb = np.concatenate([b, np.full(M, hi), np.full(M, -lo)])
        tol = 1e-7 * max(1.0, float(np.max(np.abs(bb))))
        u, it = self._qp(P, qv, Ab, bb, u0)
        if u is not None and float(np.max(Ab @ u - bb)) <= tol:
            return np.clip(u, lo, hi), it, "optimal"
        # no command sequence keeps every row: relax the curvature rows by one slack s >= 0
        # priced far above any tracking gain (an exact-penalty softening), keep the rest hard
        nc = self._n_curv
        rho = 1e3 * (1.0 + float(np.max(np.abs(qv))))
        As = np.hstack([Ab, np.zeros((Ab.shape[0], 1))])
        As[:nc, -1] = -1.0
        As = np.vstack([As, np.eye(1, M + 1, M) * -1.0])  # s >= 0
        bs = np.concatenate([bb, [0.0]])
        Ps = np.zeros((M + 1, M + 1))
        Ps[:M, :M] = P
        Ps[M, M] = 2.0 * rho
        qs = np.concatenate([qv, [rho]])
        v, it2 = self._qp(Ps, qs, As, bs, np.concatenate([u0, [1.0]]))
        if v is not None and float(np.max(As @ v - bs)) <= tol:
            self.softened += 1
            return np.clip(v[:M], lo, hi), it + it2, "softened"
        self.fallbacks += 1  # hold the previous command: the safest thing we know
        return np.full(M, self._u_prev), it + it2, "fallback"

    def _advance(self, c: float) -> None:
        T, Tc, h = self._T, self._Tc, self.plan_step_s
        z = self._z0()
        for _ in range(self.q):
            a_prev = z[0]
            z = T @ z + Tc * c
            self._hist.append((z[0] - a_prev) / h)
        self._s = z[:2].copy()
        self._x = z[2:].copy()
        self._u_prev = c
        self.t += self.control_period_s


# ============================================================ in-process closed loop
def fly(rig: VirtualRig, controller: Callable[[float], float | None], *,
        period_s: float = 0.05, schedule: CommandSchedule | None = None) -> Iterator[RigFrame]:
    """Run ``rig`` (built with ``command=schedule``) with a controller in the loop.

    Before the first frame and then whenever a frame ends on a control instant (every
    ``period_s`` of source time), ``controller(t)`` is asked for the command that applies from
    ``t`` on (None: no new command); it goes to ``schedule`` (the rig's command object).
    Yields the frames. Deterministic: the same rig and controller give the same frames.
    """
    sched = schedule if schedule is not None else rig.command
    if not isinstance(sched, CommandSchedule):
        raise ValueError("the rig must be built with command=CommandSchedule() (or pass schedule=)")
    rate = rig.rate_hz
    per = int(round(period_s * rate))
    if per < 1 or abs(per - period_s * rate) > 1e-6:
        raise ValueError("period_s must be a whole number of samples")

    def ask(k: int) -> None:
        t = k / rate
        c = controller(t)
        if c is not None:
            sched.push(t, c)

    ask(0)
    for f in rig.frames():
        yield f
        k_end = int(round(f.t0 * rate)) + f.samples.shape[0]  # sample index just after the frame
        if k_end % per == 0:
            ask(k_end)


# ============================================================================ live
def _parse_args(argv: Sequence[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(
        prog="python -m wingwatch.clients.examples.mpc",
        description="Example MPC lift tracker with a hard curvature limit, against a live wingwatch "
                    "daemon and the virtual rig (wingwatch rig --command-endpoint EP). Advisory "
                    "example code: not a safety system; the facility's procedures decide.")
    p.add_argument("--config", default=None, metavar="FILE",
                   help="daemon configuration (endpoints, outputs.curvature.limit_per_m)")
    p.add_argument("--command-endpoint", default="tcp://127.0.0.1:5604", metavar="EP",
                   help="the rig's command endpoint (default tcp://127.0.0.1:5604)")
    p.add_argument("--model", default=None, metavar="FILE",
                   help="control with this model file instead of the daemon's published model")
    p.add_argument("--lift", default="0:0.25,4:0.4,8:0.2,12:0.33", metavar="T:CL,...",
                   help="lift reference: steps at seconds from the start (default %(default)s)")
    p.add_argument("--ramp", type=float, default=0.2, metavar="S", help="step ramp time (0.2 s)")
    p.add_argument("--limit", type=float, default=None, metavar="PER_M",
                   help="curvature limit (default: the configuration's limit_per_m)")
    p.add_argument("--duration", type=float, default=20.0, metavar="S", help="run time (20 s)")
    p.add_argument("--alpha-start", type=float, default=None, metavar="DEG",
                   help="pitch angle at the start (default: the model's operating point)")
    p.add_argument("--alpha-min", type=float, default=-2.0, metavar="DEG")
    p.add_argument("--alpha-max", type=float, default=10.0, metavar="DEG")
    p.add_argument("--horizon", type=float, default=1.0, metavar="S")
    p.add_argument("--plan-step", type=float, default=0.025, metavar="S")
    p.add_argument("--period", type=float, default=0.05, metavar="S")
    p.add_argument("--controller", default="mpc", help="name on the plan topic (plan.NAME)")
    p.add_argument("--client-key", default=None, metavar="FILE")
    p.add_argument("--server-key", default=None, metavar="FILE")
    p.add_argument("--json", action="store_true", help="one JSON line per move on stdout")
    return p.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    """Run against a live daemon (model feed, plan topic) and rig (``cmd.alpha``)."""
    import zmq

    from wingwatch.clients.feed import ModelFeed
    from wingwatch.clients.plan import PlanPublisher
    from wingwatch.daemon.config import endpoint_is_loopback, load_config
    from wingwatch.daemon.errors import WingwatchError
    from wingwatch.daemon.modelfile import load_model
    from wingwatch.daemon.plan import encode_command

    args = _parse_args(argv)
    try:
        cfg = load_config(args.config)
        if not endpoint_is_loopback(args.command_endpoint):
            raise ValueError(f"--command-endpoint {args.command_endpoint!r} is not a loopback address")
        limit = args.limit if args.limit is not None else cfg.outputs.curvature.limit_per_m
        reference_rel = StepReference.parse(args.lift, args.ramp)
        fixed = ControlModel.from_reference(load_model(args.model), "file") if args.model else None
    except (WingwatchError, ValueError, OSError) as exc:
        sys.stderr.write(f"mpc: {exc}\n")
        return 2
    curve = None
    if args.client_key or args.server_key:
        from wingwatch.daemon.security import client_curve_options

        curve = client_curve_options(args.client_key, args.server_key)
    ctx = zmq.Context()
    feed = ModelFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, context=ctx, curve=curve)
    plans = PlanPublisher(cfg.endpoints.sensor, args.controller, context=ctx, curve=curve)
    cmd = ctx.socket(zmq.XPUB)
    cmd.setsockopt(zmq.LINGER, 500)
    cmd.connect(args.command_endpoint)
    tracker: LiftTracker | None = None
    start_t = None
    sys.stderr.write("mpc: example controller; advisory only, not a safety system. Waiting for the "
                     "daemon's heartbeat and a model...\n")
    try:
        lead = min(0.03, 0.5 * args.period)  # commands are sent this far ahead of their time
        deadline = time.monotonic() + args.duration + 30.0
        while time.monotonic() < deadline:
            feed.poll(0.005)
            status = feed.last_status
            model = fixed or (feed.model if not feed.lost else None)
            if status is None or status.get("t_sample") is None or feed.last_heartbeat is None:
                continue
            # source time now: the newest heartbeat's sample time plus the wall time since it
            t_src = float(status["t_sample"]) + (time.monotonic() - feed.last_heartbeat)
            if model is None:
                continue  # no valid model: send nothing, the rig holds the last command
            if tracker is None:
                cm = ControlModel.of(model)
                start_t = t_src
                a0 = math.radians(args.alpha_start) if args.alpha_start is not None else cm.alpha0
                tracker = LiftTracker(cm, lambda t: reference_rel(np.asarray(t) - start_t),
                                      curvature_limit=limit,
                                      alpha_bounds=(math.radians(args.alpha_min), math.radians(args.alpha_max)),
                                      horizon_s=args.horizon, plan_step_s=args.plan_step,
                                      control_period_s=args.period)
                tracker.reset(t_src + lead, a0)
            elif fixed is None and ControlModel.of(model).model_id != tracker.model.model_id:
                tracker.set_model(model)
            if t_src - start_t > args.duration:
                break
            if tracker.t - t_src > lead:
                continue  # the next control instant is not near yet
            mv = tracker.step()  # plans from the next control instant, a little ahead of now
            plans.send(mv.plan_t0, mv.plan_dt, mv.plan_alpha)
            cmd.send_multipart(list(encode_command(mv.t, mv.command)))  # the rig applies it at mv.t
            if args.json:
                sys.stdout.write(json.dumps({"t": mv.t, "command_deg": math.degrees(mv.command),
                                             "status": mv.status, "model_id": mv.model_id,
                                             "peak_curvature": float(np.max(np.abs(mv.predicted_curvature)))})
                                 + "\n")
                sys.stdout.flush()
    except KeyboardInterrupt:
        pass
    finally:
        cmd.close(linger=0)
        plans.close()
        feed.close()
        ctx.term()
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
