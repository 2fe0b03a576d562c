"""Online identification stage: keeps the interpretable lift-and-curvature model current.

The model is the calibration's (``daemon/calibrate.py``)::

    y - y0 = K_qs (alpha - alpha0) + K_rate alpha_dot + K_am alpha_ddot + C x + bias,
    x[k+1] = A x[k] + B alpha_dot[k]

- **Conditioning**: a causal Savitzky-Golay differentiator (Savitzky and Golay 1964) gives
  alpha, alpha_dot and alpha_ddot with a fixed lag; the outputs pass through the same value
  kernel, so every signal carries the same delay (and the same bandwidth as in calibration).
- **Fast layer** (every block): recursive least squares (Ljung and Soderstrom, "Theory and
  Practice of Recursive Identification", 1983) on the regressor
  ``[alpha, alpha_dot, alpha_ddot, x, 1]`` for both outputs, with exponential forgetting set
  by a half-life and gated directional forgetting against windup (Kulhavy 1987), in the
  square-root information form of :mod:`wingwatch.daemon.identify.rls`. The transient states
  ``x`` come from running the current (A, B) on alpha_dot. With ``identify.lift_lag_chord_m``
  set, the first regressor is alpha seen through Wagner's function instead of alpha itself
  (the circulatory-lag prior, :mod:`wingwatch.daemon.identify.lag`), so that ``K_qs`` is the
  steady slope; published models then carry the lag states appended to the transient.
- **Slow layer** (every ``slow_period_s`` of sample time): on the last ``slow_window_s``, the
  residual after the interpretable terms is realised anew (regularised least-squares Markov
  parameters and ERA, Juang and Pappa 1985; :mod:`wingwatch.daemon.identify.transient`), rank
  chosen from the Hankel singular values with hysteresis. The fast layer moves to the new basis:
  with the same rank by the state transformation that maps the old states onto the new ones over
  the window (least squares) and :meth:`RecursiveLeastSquares.transform`, so nothing learned is
  lost; with a new rank, by refitting the estimator over the window.
- **Change points**: when the fast layer's one-step errors jump for two periods running
  (``change_ratio``), the window restarts at the change and candidates wait for
  ``3.2 x markov_s`` of the new dynamics, so that no model is realised from a window holding
  two plants (:meth:`_detect_change`).
- **Intervals**: the fast layer's autocorrelation-robust ones, the scatter of per-window
  estimates (:class:`_WindowSpread`), and, in quadrature, the spread of the columns over
  realisations of posterior draws of the Markov parameters (:meth:`_realisation_spread`);
  docs/identification.md.
- **Validity gate**: a candidate is published to the controller only when it is finite, stable
  with margin, predicts the recent window (a-priori, one-step errors of the fast layer) within
  ``max_nrmse``, has coefficients within physical bounds and has seen enough excitation. A
  rejected candidate keeps the previous model in service and is published with its reason.
- **Modes**: continuous-time frequency and damping from the eigenvalues of A, tracked across
  updates by frequency proximity, MAC (Allemang and Brown 1982) and damping with
  ``scipy.optimize.linear_sum_assignment`` (:class:`~wingwatch.daemon.identify.modes.ModeTracker`).

Samples are gathered into blocks of ``block_s`` of sample time before they are processed (the
decision rhythm depends only on sample counts, so live and replay agree exactly).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist
from typing import Any

import numpy as np

from wingwatch.daemon.condition import ConditionedBlock
from wingwatch.daemon.config import Config
from wingwatch.daemon.errors import ConfigError, IdentificationError
from wingwatch.daemon.identify.differentiate import DelayLine, SavgolDifferentiator
from wingwatch.daemon.identify.era import era, hankel_factors_near
from wingwatch.daemon.identify.interpretable import simulate_states
from wingwatch.daemon.identify.lag import THIN_AIRFOIL_SLOPE, CirculatoryLag
from wingwatch.daemon.identify.modes import ModeTracker, modal_parameters
from wingwatch.daemon.identify.rls import RecursiveLeastSquares
from wingwatch.daemon.identify.transient import (estimate_markov, markov_draws, realise,
                                                 resample_realisation)
from wingwatch.daemon.modelfile import COEFFICIENT_KEYS, OUTPUT_KEYS, ReferenceModel, load_model
from wingwatch.daemon.pipeline import Output

__all__ = ["IdentifySettings", "OnlineIdentifier", "ModelState", "IDENTIFY_DEFAULTS"]

#: Defaults of the [identify] table (documented in configs/wingwatch.toml).
IDENTIFY_DEFAULTS: dict[str, Any] = {
    "reference_model": "",
    "diff_window": 41,
    "diff_order": 3,
    "block_s": 0.1,
    "half_life_s": 30.0,
    "gate": 0.1,
    "ci_batch_s": 2.0,
    "slow_period_s": 2.0,
    "slow_lag_s": 0.5,
    "slow_window_s": 20.0,
    "decimate": 20,
    "markov_s": 5.0,
    "max_rank": 10,
    "rank_energy": 0.95,
    "fit_half_life_s": 5.0,
    "max_nrmse": 0.25,
    "min_rate_rms_deg_s": 0.3,
    "max_spectral_radius": 0.99999,
    "qs_lift_bounds": [0.0, 12.6],
    "realisation_draws": 8,
    "realisation_every": 5,
    "lift_lag_chord_m": 0.0,
    "lift_lag_density_kg_m3": 0.0,
    "lift_lag_scale": 0.0,
    "change_ratio": 4.0,
}

#: Float keys for which 0 is allowed (off, or "derive it").
_ZERO_OK_FLOATS = ("gate", "ci_batch_s", "lift_lag_chord_m", "lift_lag_density_kg_m3",
                   "lift_lag_scale", "change_ratio")

#: Two-sided 95 % normal quantile.
_Z975 = NormalDist().inv_cdf(0.975)

#: Whole-number keys for which 0 is allowed (it turns the feature off).
_ZERO_OK_INTS = ("realisation_draws",)


@dataclass(frozen=True)
class IdentifySettings:
    reference_model: str
    diff_window: int
    diff_order: int
    block_s: float
    half_life_s: float
    gate: float
    ci_batch_s: float
    slow_period_s: float
    slow_lag_s: float
    slow_window_s: float
    decimate: int
    markov_s: float
    max_rank: int
    rank_energy: float
    fit_half_life_s: float
    max_nrmse: float
    min_rate_rms_deg_s: float
    max_spectral_radius: float
    qs_lift_bounds: tuple[float, float]
    realisation_draws: int
    realisation_every: int
    lift_lag_chord_m: float
    lift_lag_density_kg_m3: float
    lift_lag_scale: float
    change_ratio: float

    @classmethod
    def from_config(cls, config: Config) -> "IdentifySettings":
        raw = dict(IDENTIFY_DEFAULTS)
        where = config.source
        for k, v in config.identify.items():
            if k not in IDENTIFY_DEFAULTS:
                raise ConfigError(f"{where}: key 'identify.{k}' is not a known key (allowed here: "
                                  f"{', '.join(sorted(IDENTIFY_DEFAULTS))}).")
            raw[k] = v
        out: dict[str, Any] = {}
        for k, default in IDENTIFY_DEFAULTS.items():
            v = raw[k]
            key = f"'identify.{k}'"
            if isinstance(default, str):
                if not isinstance(v, str):
                    raise ConfigError(f"{where}: key {key} must be a string (a path, or empty).")
            elif isinstance(default, list):
                if (not isinstance(v, list) or len(v) != 2
                        or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
                        or not v[0] < v[1]):
                    raise ConfigError(f"{where}: key {key} must be [low, high] with low < high.")
                v = (float(v[0]), float(v[1]))
            elif isinstance(default, int) and not isinstance(default, bool):
                least = 0 if k in _ZERO_OK_INTS else 1
                if isinstance(v, bool) or not isinstance(v, int) or v < least:
                    raise ConfigError(f"{where}: key {key} must be a whole number of at least "
                                      f"{least}.")
            else:
                finite_ok = math.isfinite(v) if isinstance(v, (int, float)) else False
                if k == "half_life_s" and isinstance(v, float) and v == math.inf:
                    finite_ok = True  # inf: no forgetting (batch least squares, for checks)
                zero_ok = k in _ZERO_OK_FLOATS  # 0 turns the feature off (or derives it)
                if (isinstance(v, bool) or not isinstance(v, (int, float)) or not finite_ok
                        or v < 0 or (v == 0 and not zero_ok)):
                    raise ConfigError(f"{where}: key {key} must be a positive number.")
                v = float(v)
            out[k] = v
        if out["diff_window"] % 2 == 0 or out["diff_window"] <= out["diff_order"] + 1:
            raise ConfigError(f"{where}: key 'identify.diff_window' must be odd and larger than "
                              "diff_order + 1.")
        if not 2 <= out["diff_order"] <= 6:
            raise ConfigError(f"{where}: key 'identify.diff_order' must be 2 to 6.")
        if out["slow_window_s"] < 3.2 * out["markov_s"]:
            raise ConfigError(f"{where}: key 'identify.slow_window_s' must be at least 3.2 x "
                              "markov_s (the Markov fit needs that many samples).")
        if out["slow_lag_s"] >= out["slow_period_s"]:
            raise ConfigError(f"{where}: key 'identify.slow_lag_s' must be below slow_period_s (a "
                              "candidate is applied before the next one is started).")
        if not 0 <= out["gate"] < 1:
            raise ConfigError(f"{where}: key 'identify.gate' must be in [0, 1).")
        if out["max_spectral_radius"] >= 1:
            raise ConfigError(f"{where}: key 'identify.max_spectral_radius' must be below 1.")
        if out["lift_lag_chord_m"] > 0 and out["lift_lag_density_kg_m3"] <= 0:
            raise ConfigError(f"{where}: key 'identify.lift_lag_density_kg_m3' must be set (the "
                              "fluid's density, for the flow speed) when lift_lag_chord_m is.")
        if 0 < out["change_ratio"] <= 1:
            raise ConfigError(f"{where}: key 'identify.change_ratio' must be 0 (off) or above 1.")
        if out["lift_lag_scale"] > 1:
            raise ConfigError(f"{where}: key 'identify.lift_lag_scale' must be at most 1 (0: the "
                              "reference's lift slope over 2 pi).")
        return cls(**out)


@dataclass(frozen=True, eq=False)
class ModelState:
    """A model as published: transient (A, B, C) and the coefficient columns."""

    model_id: str
    seq: int
    status: str
    t: float
    A: np.ndarray
    B: np.ndarray
    theta: np.ndarray  # (4 + r, 2)
    lower: np.ndarray
    upper: np.ndarray


class _Ring:
    """Fixed-capacity ring of rows (oldest overwritten), for the slow layer's window."""

    def __init__(self, capacity: int, width: int) -> None:
        self.buf = np.zeros((capacity, width))
        self.cap = capacity
        self.n = 0  # rows written in all
        self.head = 0

    def extend(self, rows: np.ndarray) -> None:
        k = rows.shape[0]
        if k >= self.cap:
            self.buf[:] = rows[-self.cap:]
            self.head = 0
        else:
            end = self.head + k
            if end <= self.cap:
                self.buf[self.head:end] = rows
            else:
                first = self.cap - self.head
                self.buf[self.head:] = rows[:first]
                self.buf[:k - first] = rows[first:]
            self.head = end % self.cap
        self.n += k

    def clear(self) -> None:
        self.n = 0
        self.head = 0

    def keep_last(self, k: int) -> None:
        """Drop all but the newest ``k`` rows."""
        if k < self.size:
            rows = self.view()[self.size - k:] if k > 0 else np.zeros((0, self.buf.shape[1]))
            self.clear()
            self.extend(rows)

    @property
    def size(self) -> int:
        return min(self.n, self.cap)

    def view(self) -> np.ndarray:
        if self.n < self.cap:
            return self.buf[:self.n].copy()
        return np.concatenate([self.buf[self.head:], self.buf[:self.head]])


class _WindowSpread:
    """Exponentially weighted scatter of the per-window column estimates (one per slow update).

    Each slow-update window's batch estimate of the interpretable columns (``_window_estimate``,
    in the basis in service then) is close to independent of the others. Their weighted mean,
    with the fast layer's forgetting per window (``lam = 0.5^(slow_period / half_life)``),
    estimates the same thing as the RLS columns, and the scatter between windows gives its
    variance: weighted variance ``v = sum w (x - m)^2 / (W - W2 / W)`` (reliability weights),
    ``var(m) = v W2 / W^2``, with ``n_eff = W^2 / W2`` windows (Kish). Unlike the covariance of
    the fast layer, which is conditional on one transient realisation (A, B), this includes what
    the slow layer's re-realisations move the columns by. Student-t with ``n_eff - 1`` degrees
    of freedom; nothing until 5 effective windows exist.
    """

    MIN_WINDOWS = 5.0

    def __init__(self, lam: float) -> None:
        self.lam = float(lam)
        self.w = 0.0
        self.w2 = 0.0
        self.s1: np.ndarray | None = None
        self.s2: np.ndarray | None = None

    def add(self, x: np.ndarray) -> None:
        x = np.asarray(x, dtype=float)
        if not np.all(np.isfinite(x)):
            return
        lam = self.lam
        if self.s1 is None or self.s1.shape != x.shape:
            self.s1, self.s2 = np.zeros_like(x), np.zeros_like(x)
        self.w = lam * self.w + 1.0
        self.w2 = lam * lam * self.w2 + 1.0
        self.s1 = lam * self.s1 + x
        self.s2 = lam * self.s2 + x * x

    @property
    def n_eff(self) -> float:
        return self.w * self.w / self.w2 if self.w2 > 0 else 0.0

    def var_of_mean(self) -> np.ndarray | None:
        if self.s1 is None or self.n_eff < self.MIN_WINDOWS:
            return None
        m = self.s1 / self.w
        v = np.maximum(self.s2 / self.w - m * m, 0.0) * self.w / (self.w - self.w2 / self.w)
        return v * self.w2 / (self.w * self.w)

    def half_width(self, level: float) -> np.ndarray | None:
        var = self.var_of_mean()
        if var is None:
            return None
        from scipy.stats import t as student_t  # imported here: scipy.stats is slow to load

        return np.sqrt(var) * student_t.ppf(0.5 + level / 2.0, self.n_eff - 1.0)

    def state_dict(self) -> dict[str, Any]:
        # lam is not state: it follows the configuration (slow period, half-life)
        return {"w": self.w, "w2": self.w2,
                "s1": None if self.s1 is None else self.s1.copy(),
                "s2": None if self.s2 is None else self.s2.copy()}

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.w, self.w2 = float(st["w"]), float(st["w2"])
        self.s1 = None if st["s1"] is None else np.array(st["s1"], dtype=float).reshape(4, 2)
        self.s2 = None if st["s2"] is None else np.array(st["s2"], dtype=float).reshape(4, 2)


def _pair(v: np.ndarray) -> dict[str, float]:
    return {k: float(x) for k, x in zip(OUTPUT_KEYS, v)}


class OnlineIdentifier:
    """The identification stage of the pipeline (see the module docstring).

    Parameters
    ----------
    config : Config
        Sample rate and the [identify] table.
    reference : ReferenceModel, optional
        Start from it (normal); defaults to ``identify.reference_model`` when that names a file.
        Without one the stage runs cold, clearly flagged as having no reference.
    background : bool
        Run the slow layer's work on a worker thread between its snapshot and the sample count
        where it takes effect (the live daemon does, so frames are not held behind it). The
        outputs are the same either way.
    """

    def __init__(self, config: Config, reference: ReferenceModel | None = None, *,
                 background: bool = False) -> None:
        self.config = config
        self.background = bool(background)
        self._executor = None
        self._futures: dict[int, Any] = {}
        self.settings = s = IdentifySettings.from_config(config)
        self.rate = config.conditioning_stream.rate_hz
        self.dt = 1.0 / self.rate
        if reference is None and s.reference_model:
            reference = load_model(s.reference_model)
        if reference is not None and abs(reference.dt - self.dt) > 1e-9 * self.dt:
            raise ConfigError(f"the reference model's sample time {reference.dt} s does not match "
                              f"the stream's rate {self.rate} Hz; calibrate at the stream's rate.")
        self.reference = reference
        self.block_n = max(1, int(round(s.block_s * self.rate)))
        self.slow_n = max(1, int(round(s.slow_period_s * self.rate)))
        self.window_n = int(round(s.slow_window_s * self.rate))
        # after a change point the window restarts; the Markov fit needs 3.2 x markov_s of it
        self.min_window_n = min(self.window_n, int(math.ceil(3.2 * s.markov_s * self.rate)))
        self.lag_n = int(round(s.slow_lag_s * self.rate))
        self.fit_lam = 2.0 ** (-1.0 / (s.fit_half_life_s * self.rate))
        self.reset()

    # ----------------------------------------------------------------------------------------
    def reset(self) -> None:
        s = self.settings
        self.sg_alpha = SavgolDifferentiator(s.diff_window, s.diff_order, self.rate)
        self.sg_y = [SavgolDifferentiator(s.diff_window, s.diff_order, self.rate) for _ in range(2)]
        self.lag = self.sg_alpha.lag
        self.flow_delay = DelayLine(self.lag)
        ref = self.reference
        if ref is not None:
            self.alpha0 = float(ref.operating_point["alpha_rad"])
            self.y0 = np.array([ref.operating_point["lift"], ref.operating_point["curvature"]])
            A, B = ref.A.copy(), ref.B.reshape(-1, 1).copy()
            theta0 = np.vstack([ref.k_qs, ref.k_rate, ref.k_am, ref.C.T, ref.bias])
        else:
            self.alpha0 = None
            self.y0 = None
            A, B = np.zeros((0, 0)), np.zeros((0, 1))
            theta0 = np.zeros((4, 2))
        self.A, self.B = A, B
        self.x = np.zeros(A.shape[0])
        self.lift_lag = self._new_lag()
        self.markov_hyper: list | None = None  # kernel hyperparameters, warm start
        self.job: dict[str, Any] | None = None  # slow-layer candidate waiting for its sample count
        self._futures.clear()
        self.rls = self._new_rls(theta0)
        self.pending: list[ConditionedBlock] = []
        self.pending_n = 0
        self.samples = 0
        self.since_slow = 0
        self.settle_left = s.diff_window  # samples to skip while the filters fill
        self.ring = _Ring(self.window_n, 5)  # alpha, alpha_dot, alpha_ddot, y1, y2 (deviations)
        self.fit_e2 = np.zeros(2)
        self.fit_y2 = np.zeros(2)
        # The fast layer starts with no precision (the reference is a starting estimate, not
        # data), so its first estimates rest on a few nearly collinear samples and their a-priori
        # errors can be thousands of times the signal: they would dominate the fit measure for
        # many of its half-lives. Errors count from one fit half-life of clean data on (at most
        # a quarter of the slow window, so that the gate never sees an empty measure).
        self.fit_wait = int(round(min(s.fit_half_life_s, 0.25 * s.slow_window_s) * self.rate))
        self.fit_w = 0.0  # weight sum of the fit measure (its error variance is fit_e2 / fit_w)
        # Change points (see _detect_change): this slow period's blocks [ring rows, counted
        # samples, error energy (2), output energy (2), sample time], the fit measure at the
        # period's start, and the time of the change the window restarted at (None: no cut).
        self.period: list[list] = []
        self.fit_base: list | None = None
        self.prev_period: list | None = None  # [blocks, fit measure at its start]
        self.suspect: list | None = None  # [time, error ratio] of a change not yet confirmed
        self.cut_t: float | None = None
        self.cut_ratio = 0.0
        self.changes = 0
        self.candidate_seq = 0
        self.in_service: dict[str, Any] | None = None
        self.last_t = 0.0
        self.tracker = ModeTracker()
        self.rank_proposal = self.A.shape[0]
        self.announced = False
        self.rejections = 0
        self.accepted = 0
        self.rate_sq = 0.0  # pitch-rate energy since the last slow update (excitation gate)
        self.rate_n = 0
        self._clear_window()
        self.last_window: dict[str, Any] | None = None
        self.last_block: dict[str, Any] | None = None
        self.spread = _WindowSpread(0.5 ** (s.slow_period_s / s.half_life_s))
        self.realisation_sd: np.ndarray | None = None  # (3, 2): see _realisation_spread

    def _new_lag(self) -> CirculatoryLag | None:
        """The circulatory-lag prior on the quasi-steady regressor (identify.lift_lag_*;
        :mod:`wingwatch.daemon.identify.lag`), or None when it is off."""
        s = self.settings
        if s.lift_lag_chord_m <= 0:
            return None
        scale = s.lift_lag_scale
        if scale <= 0:  # from the reference's lift slope; a cold start takes a rigid wing's
            slope = float(self.reference.k_qs[0]) if self.reference is not None else 0.0
            scale = min(max(slope / THIN_AIRFOIL_SLOPE, 0.05), 1.0) if slope > 0 else 1.0
        return CirculatoryLag(s.lift_lag_chord_m, s.lift_lag_density_kg_m3, scale, self.rate)

    def _new_rls(self, theta0: np.ndarray) -> RecursiveLeastSquares:
        s = self.settings
        p = theta0.shape[0]
        # The reference is the starting estimate, not data: it carries no precision (the
        # transient-state columns are small numbers, so even 1e-3 would bias C measurably), and
        # models are published only after the slow layer has a full window of data.
        return RecursiveLeastSquares(p, 2, half_life=s.half_life_s, rate=self.rate, gate=s.gate,
                                     prior_precision=0.0, theta0=theta0,
                                     ci_batch=int(round(s.ci_batch_s * self.rate)))

    @property
    def rank(self) -> int:
        return int(self.A.shape[0])

    # ----------------------------------------------------------------------------------------
    def samples_to_boundary(self, discontinuity: bool = False) -> int:
        """How many samples of the next block to pass before this stage processes its block.

        The pipeline cuts incoming blocks there (:meth:`Pipeline.process_many`), so that every stage
        after this one sees the same pieces, and processes at the same samples, however the
        source cut its frames. After a discontinuity the samples gathered so far are processed
        first; the block that follows is then kept one sample short of a full block, so that one
        :meth:`update` processes at most once.
        """
        if discontinuity:
            return max(1, self.block_n - 1) if self.pending else self.block_n
        return max(1, self.block_n - self.pending_n)

    def update(self, block: ConditionedBlock) -> list[Output]:
        out: list[Output] = []
        if not self.announced:
            self.announced = True
            out.append(self._announce(float(block.t[0])))
        if block.discontinuity and self.pending:
            out.extend(self._process())
        if block.discontinuity:
            self._restart_filters()
        self.pending.append(block)
        self.pending_n += block.n
        if self.pending_n >= self.block_n:
            out.extend(self._process())
        return out

    def _restart_filters(self) -> None:
        """After a gap or a source restart: filters and transient state start afresh."""
        self.sg_alpha.reset()
        for f in self.sg_y:
            f.reset()
        self.flow_delay.reset()
        self.settle_left = self.settings.diff_window
        self.x = np.zeros(self.rank)
        if self.lift_lag is not None:
            self.lift_lag.reset()
        self.ring.clear()
        self.period = []
        self.prev_period = None
        self.suspect = None
        self.cut_t = None
        if self.job is not None:
            self.job["catchup"].append(None)

    def _process(self) -> list[Output]:
        blocks, self.pending, self.pending_n = self.pending, [], 0
        t = np.concatenate([b.t for b in blocks])
        alpha = np.concatenate([b.alpha for b in blocks])
        q = np.concatenate([b.dynamic_pressure for b in blocks])
        y = np.column_stack([np.concatenate([b.lift for b in blocks]),
                             np.concatenate([b.curvature for b in blocks])])
        n = t.size
        flow = np.isfinite(y).all(axis=1)
        y_f = np.where(flow[:, None], y, 0.0)  # the filters need finite input; masked below
        d = self.sg_alpha.update(alpha)  # value, rate, acceleration, delayed by lag
        ys = np.column_stack([self.sg_y[j].update(y_f[:, j])[:, 0] for j in range(2)])
        flow_d = self.flow_delay.update(flow.astype(float)) > 0.5  # aligned with the filters
        if self.alpha0 is None:  # cold start: the first data fix the operating point
            self.alpha0 = float(d[0, 0])
            self.y0 = ys[0].copy()
        alpha_dev = d[:, 0] - self.alpha0
        ad, add = d[:, 1], d[:, 2]
        dy = ys - self.y0
        # The quasi-steady regressor: alpha, or alpha through the circulatory lag (lag.py).
        a = alpha_dev if self.lift_lag is None else self.lift_lag.apply(alpha_dev, ad, q)
        X, self.x = simulate_states(self.A, self.B[:, 0], ad, self.x)  # lifted maps, cached
        ok = flow_d.copy()
        if self.settle_left:
            k = min(self.settle_left, n)
            ok[:k] = False
            self.settle_left -= k
        phi = np.column_stack([a, ad, add, X, np.ones(n)])
        if ok.any():
            e = self.rls.update(phi[ok], dy[ok])
            yc = dy[ok] - self.rls.theta[-1]
            if self.fit_wait:  # the estimator's start (see reset): not yet a prediction
                k = min(self.fit_wait, e.shape[0])
                e, yc = e[k:], yc[k:]
                self.fit_wait -= k
            w = self.fit_lam ** np.arange(e.shape[0] - 1, -1, -1)[:, None]
            decay = self.fit_lam ** e.shape[0]
            ee, yy = e * e, yc * yc
            self.fit_e2 = decay * self.fit_e2 + np.sum(w * ee, axis=0)
            self.fit_y2 = decay * self.fit_y2 + np.sum(w * yy, axis=0)
            self.fit_w = decay * self.fit_w + float(np.sum(w))
            self.period.append([int(np.count_nonzero(ok)), int(e.shape[0]), ee.sum(axis=0),
                                yy.sum(axis=0), float(t[0]) - self.lag * self.dt])
            self.ring.extend(np.column_stack([a, ad, add, dy])[ok])
            self.rate_sq += float(np.sum(ad[ok] ** 2))
            self.rate_n += int(np.count_nonzero(ok))
            po, yo = phi[ok], dy[ok]
            self.win_G += po.T @ po  # window statistics since the last slow update (watchers)
            self.win_b += po.T @ yo
            self.win_yy += np.sum(yo * yo, axis=0)
            self.win_n += po.shape[0]
        # What the watchers see of this block (aligned, deviations about the operating point).
        # "a" is the quasi-steady regressor the model's columns multiply; "alpha" the incidence
        # (they differ when the circulatory lag is on).
        self.last_block = {"t": t - self.lag * self.dt, "a": a, "alpha": alpha_dev, "ad": ad,
                           "add": add, "dy": dy, "X": X, "ok": ok}
        self.samples += n
        self.since_slow += n
        self.last_t = float(t[-1]) - self.lag * self.dt  # the newest sample the model has seen
        outputs: list[Output] = []
        if self.job is not None:
            self.job["catchup"].append((a, ad, add, dy, ok))
            self.job["elapsed"] += n
            if self.job["elapsed"] >= self.lag_n:
                outputs.extend(self._finish_job())
        if self.since_slow >= self.slow_n:
            self.since_slow = 0
            self._detect_change()
            self.last_window = self._window_estimate()
            if self.last_window is not None:
                self.spread.add(self.last_window["interpretable"])
            outputs.extend(self._slow_update())
            self.rate_sq, self.rate_n = 0.0, 0
            self._clear_window()
        return outputs

    def _clear_window(self) -> None:
        p = 4 + self.rank
        self.win_G = np.zeros((p, p))
        self.win_b = np.zeros((p, 2))
        self.win_yy = np.zeros(2)
        self.win_n = 0

    def _window_estimate(self) -> dict[str, Any] | None:
        """Batch least squares of the columns over the data since the last slow update, in the
        basis in service then: independent from window to window (the drift detectors' input).
        Standard errors from the residual variance (white-noise formula)."""
        p = self.win_G.shape[0]
        if self.win_n < 4 * p:
            return None
        G = self.win_G + 1e-12 * np.trace(self.win_G) / p * np.eye(p)
        try:
            cf = np.linalg.cholesky(G)
        except np.linalg.LinAlgError:
            return None
        theta = np.linalg.solve(G, self.win_b)
        sse = np.maximum(self.win_yy - np.sum(theta * self.win_b, axis=0), 0.0)
        s2 = sse / max(self.win_n - p, 1)
        Ginv_diag = np.sum(np.linalg.inv(cf) ** 2, axis=0)  # diag(G^-1) from the factor
        se = np.sqrt(np.outer(Ginv_diag, s2))
        # The interpretable columns with the transient output matrix held at the fast layer's
        # C: four unknowns per output, well determined even from a short window.
        idx = np.array([0, 1, 2, p - 1])
        fix = np.arange(3, p - 1)
        th_fix = self.rls.theta[fix] if fix.size else np.zeros((0, 2))
        Gii = self.win_G[np.ix_(idx, idx)] + 1e-12 * np.trace(self.win_G) / p * np.eye(4)
        rhs = self.win_b[idx] - self.win_G[np.ix_(idx, fix)] @ th_fix
        theta_i = np.linalg.solve(Gii, rhs)
        return {"theta": theta, "se": se, "n": self.win_n, "t": self.last_t, "s2": s2,
                "interpretable": theta_i}

    # ----------------------------------------------------------------------------------------
    @property
    def fit_nrmse(self) -> np.ndarray:
        """A-priori (one-step, before update) normalised RMS error, recent window."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(self.fit_e2 / np.maximum(self.fit_y2, 1e-300))

    def _detect_change(self) -> None:
        """At a slow-update boundary: restart the window at a change in the dynamics.

        A change of the plant (stiffness, flow speed, added mass) shows first in the fast
        layer's a-priori errors, long before its forgetting has moved the columns. When, for an
        output, the one-step error variance and the normalised error (error over output energy)
        of each of the last two slow periods exceed ``change_ratio^2`` times the fit measure's
        values before the first of them, the ring keeps only the samples from the first block
        of those two periods whose error variance does so, and candidates wait for ``3.2 x
        markov_s`` of the new dynamics instead of a whole window of mixed ones (the gate refuses
        most of those, whose refitted columns swing, and the ones it passes blend two plants).
        Both measures are needed: a hold lowers the error
        variance and raises the normalised error, renewed excitation the reverse. Two periods
        are needed because one-period spikes happen without a change: when the first online
        model replaces the reference's transient the errors can jump for one period (measured
        on the campaign: x3.5 in curvature, then x1.5); the candidate of a boundary after one
        period over waits (``suspect``). The ring refills to the full window from
        there. Change points are sought only in a full window (after the start or a
        discontinuity: the transient state restarts from zero and the errors are high for a
        while) or, after a change, once the first candidate of the new dynamics is due.
        Deterministic: block sums of the samples only.
        """
        s = self.settings
        period, self.period = self.period, []
        base = self.fit_base
        self.fit_base = [self.fit_e2.copy(), self.fit_y2.copy(), self.fit_w]
        prev, self.prev_period = self.prev_period, [period, base]
        if self.cut_t is not None and self.ring.size >= self.window_n:
            self.cut_t = None  # the window is whole again
        self.suspect = None
        if not (s.change_ratio > 0 and period and self.fit_wait == 0):
            return
        if self.ring.size < (self.window_n if self.cut_t is None else self.min_window_n):
            return  # still filling after the start, a discontinuity or the last change
        r2 = s.change_ratio ** 2

        def over(blocks, ref):
            """Which outputs' error variance and normalised error exceed r2 x those of the
            fit measure ``ref``, and the error variance ratio; (None, None) without a usable
            reference."""
            if ref is None or not ref[2] > 0:
                return None, None
            e2_0, y2_0 = np.asarray(ref[0]), np.asarray(ref[1])
            if not (np.all(e2_0 > 0) and np.all(y2_0 > 0)):
                return None, None
            var0, nr0 = e2_0 / float(ref[2]), e2_0 / y2_0
            n = sum(b[1] for b in blocks)
            if n == 0:
                return None, None
            e2 = np.sum([b[2] for b in blocks], axis=0)
            y2 = np.sum([b[3] for b in blocks], axis=0)
            with np.errstate(divide="ignore", invalid="ignore"):
                return ((e2 / n > r2 * var0) & (e2 / np.maximum(y2, 1e-300) > r2 * nr0),
                        e2 / n / var0)

        def first_over(blocks, j, ref):
            var0 = float(ref[0][j]) / float(ref[2])
            return next((i for i, b in enumerate(blocks) if b[1] and b[2][j] / b[1] > r2 * var0),
                        0)

        if prev is not None and prev[0]:
            hit_a, _ = over(prev[0], prev[1])
            hit_b, ratio = over(period, prev[1])
            if hit_a is not None and hit_b is not None and (hit_a & hit_b).any():
                j = int(np.argmax(np.where(hit_a & hit_b, ratio, -np.inf)))
                both = prev[0] + period
                first = first_over(both, j, prev[1])
                self.ring.keep_last(sum(b[0] for b in both[first:]))
                self.cut_t = float(both[first][4])
                self.cut_ratio = float(math.sqrt(ratio[j]))
                self.changes += 1
                self.prev_period = None  # the next test: after the new window's first candidate
                return
        # One period over: a suspected change; the candidate of this boundary waits for the
        # next period to confirm it (or not), so that no window across the change is realised.
        hit, ratio = over(period, base)
        if hit is not None and hit.any():
            j = int(np.argmax(np.where(hit, ratio, -np.inf)))
            self.suspect = [float(period[first_over(period, j, base)][4]),
                            float(math.sqrt(ratio[j]))]

    def _slow_update(self) -> list[Output]:
        """At a slow-update boundary: refuse at once, or snapshot the window for the slow layer.

        The candidate computed from the snapshot is applied ``slow_lag_s`` of samples later
        (:meth:`_finish_job`), after the fast layer has carried it over the samples in between.
        With ``background`` the work runs on a worker thread meanwhile, so that frames are not
        held behind it; either way the result, and when it takes effect, depend only on the
        samples.
        """
        s = self.settings
        reason = ""
        rms = math.degrees(math.sqrt(self.rate_sq / max(self.rate_n, 1)))
        if rms < s.min_rate_rms_deg_s:
            reason = (f"too little excitation since the last update (pitch-rate rms {rms:.2f} deg/s "
                      f"< {s.min_rate_rms_deg_s} deg/s): hold-only data cannot confirm a model")
        elif self.suspect is not None:
            reason = (f"the one-step error rose {self.suspect[1]:.1f} times in the last "
                      f"{s.slow_period_s:g} s: a possible change in the dynamics at t = "
                      f"{self.suspect[0]:.1f} s, to be confirmed by the next period before a "
                      f"window across it is realised")
        elif self.cut_t is not None and self.ring.size < self.min_window_n:
            reason = (f"only {self.ring.size / self.rate:.1f} s of data since a change in the "
                      f"dynamics at t = {self.cut_t:.1f} s (one-step error {self.cut_ratio:.1f} "
                      f"times its level before); the slow layer needs "
                      f"{self.min_window_n / self.rate:.1f} s of the new dynamics")
        elif self.cut_t is None and self.ring.size < self.window_n:
            reason = (f"only {self.ring.size / self.rate:.1f} s of clean data since the start or the "
                      f"last discontinuity; the slow layer needs {s.slow_window_s:.1f} s")
        if reason:
            self.candidate_seq += 1
            self.rejections += 1
            return [self._model_output(self.candidate_seq, "rejected", reason, self.A, self.B,
                                       self.rls, np.zeros(0))]
        job = self._snapshot_job()
        self.job = {"job": job, "elapsed": 0, "catchup": []}
        if self.background:
            self._futures[id(self.job)] = self._pool().submit(self._realise, job)
        if self.lag_n == 0:
            return self._finish_job()
        return []

    def _pool(self):
        if self._executor is None:
            from concurrent.futures import ThreadPoolExecutor

            self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="wingwatch-slow")
        return self._executor

    def _finish_job(self) -> list[Output]:
        """Apply the pending slow-layer candidate: catch up on the samples since its snapshot,
        gate it, and publish it (accepted or rejected)."""
        pending, self.job = self.job, None
        future = self._futures.pop(id(pending), None)
        self.candidate_seq += 1
        seq = self.candidate_seq
        reason = ""
        hsv = np.zeros(0)
        try:
            res = future.result() if future is not None else self._realise(pending["job"])
        except IdentificationError as exc:
            res, reason = None, str(exc)
        A_new, B_new, rls_new = self.A, self.B, None
        x_new = self.x
        if res is not None:
            self.markov_hyper, self.rank_proposal = res["hyper"], res["proposal"]
            A_new, B_new, rls_new, x_new, hsv = res["A"], res["B"], res["rls"], res["x"], res["hsv"]
            if res.get("draw_sd") is not None:  # a property of the recent data, gate or not
                self.realisation_sd = res["draw_sd"]
            for item in pending["catchup"]:  # what the fast layer saw since the snapshot
                if item is None:  # a discontinuity: the transient state restarts
                    x_new = np.zeros(A_new.shape[0])
                    continue
                a, ad, add, dy, ok = item
                X, x_new = simulate_states(A_new, B_new[:, 0], ad, x_new)
                if ok.any():
                    phi = np.column_stack([a, ad, add, X, np.ones(a.size)])
                    rls_new.update(phi[ok], dy[ok])
            reason = self._gate(A_new, rls_new)
        if reason:
            self.rejections += 1
            return [self._model_output(seq, "rejected", reason, self.A, self.B, self.rls, hsv)]
        self.A, self.B, self.rls, self.x = A_new, B_new, rls_new, x_new
        self.accepted += 1
        self._clear_window()  # the watchers' window statistics restart in the new basis
        return [self._model_output(seq, "accepted", "", self.A, self.B, self.rls, hsv)]

    def _snapshot_job(self) -> dict[str, Any]:
        """What the slow layer needs, copied at the slow-update boundary (see :meth:`_realise`)."""
        s = self.settings
        draws = s.realisation_draws > 0 and self.candidate_seq % s.realisation_every == 0
        return {"W": self.ring.view(), "rls": self.rls.state_dict(), "A": self.A.copy(),
                "B": self.B.copy(), "rank_proposal": self.rank_proposal,
                "hyper": self.markov_hyper,
                "draw_seed": self.candidate_seq + 1 if draws else None}

    def _realise(self, job: dict[str, Any]) -> dict[str, Any]:
        """The slow layer's work on a snapshot: Markov parameters, ERA, basis transfer or refit.

        A pure function of ``job`` (and the settings): it may run on a worker thread while the
        fast layer goes on, and gives the same result wherever it runs.
        """
        s = self.settings
        W = job["W"]
        a, ad, add, dy = W[:, 0], W[:, 1], W[:, 2], W[:, 3:5]
        A_old, B_old = job["A"], job["B"]
        r_old = int(A_old.shape[0])
        rls_old = self._new_rls(np.zeros((int(job["rls"]["n_regressors"]), 2)))
        rls_old.load_state_dict(job["rls"])
        th = rls_old.theta
        resid = dy - np.outer(a, th[0]) - np.outer(ad, th[1]) - np.outer(add, th[2]) - th[-1]
        est = estimate_markov(ad, resid, self.rate, decimate=s.decimate, markov_s=s.markov_s,
                              min_lags=2 * s.max_rank + 2, hyper=job["hyper"],
                              posterior=job.get("draw_seed") is not None)
        tf = realise(est, None, max_rank=s.max_rank, energy=s.rank_energy, gap=None,
                     previous_rank=r_old if r_old else None)
        # Debounce: a new rank is taken only when two slow updates in a row ask for it, so a
        # noisy Hankel spectrum does not flip the rank back and forth.
        proposal = tf.rank
        if r_old and proposal != r_old and proposal != job["rank_proposal"]:
            try:
                tf = realise(est, r_old, max_rank=s.max_rank)
            except IdentificationError:
                pass  # the old rank no longer realises: take the new one now
        A_new, B_new = tf.A, tf.B.reshape(-1, 1)
        r_new = tf.rank
        X_new, x_end = simulate_states(A_new, B_new[:, 0], ad)
        T = None
        if r_old == r_new and r_old > 0:
            # Map the old states onto the new ones over the window: X_new ~ X_old T^T.
            X_old, _ = simulate_states(A_old, B_old[:, 0], ad)
            Tt = _state_map(X_old, X_new)
            T = Tt.T
            if not np.all(np.isfinite(T)) or np.linalg.cond(T) > 1e8:
                T = None
            else:
                fit = np.linalg.norm(X_old @ Tt - X_new) / max(np.linalg.norm(X_new), 1e-300)
                if fit > 0.05:  # not the same dynamics in another basis: refit instead
                    T = None
        if T is not None:
            rls_new = self._new_rls(np.zeros((4 + r_new, 2)))
            rls_new.load_state_dict(job["rls"])
            rls_new.transform(T, columns=slice(3, 3 + r_new))
        else:
            # New rank (or a basis that does not map): refit over the window, from the current
            # coefficient columns and the ERA output matrix as prior.
            theta0 = np.vstack([th[0], th[1], th[2], tf.C.T, th[-1]])
            rls_new = self._new_rls(theta0)
            phi = np.column_stack([a, ad, add, X_new, np.ones(a.size)])
            step = 1000
            for k in range(0, a.size, step):
                rls_new.update(phi[k:k + step], dy[k:k + step])
        draw_sd = None
        if job.get("draw_seed") is not None:
            draw_sd = self._realisation_spread(est, r_new, W, job["draw_seed"])
        # The state at the end of the window: where the data of the snapshot end.
        return {"A": A_new, "B": B_new, "rls": rls_new, "x": x_end, "hsv": tf.hankel_sv,
                "proposal": proposal, "hyper": est.hyper, "draw_sd": draw_sd}

    def _realisation_spread(self, est, rank: int, W: np.ndarray, seed: int) -> np.ndarray | None:
        """How much the interpretable columns depend on which transient the window's data
        realise: their standard deviation over draws of the Markov parameters from the TC
        posterior (:func:`markov_draws`, widened for serially correlated residuals), each
        realised by ERA at the candidate's rank, carried to the sample rate, and the columns
        refitted under it by least squares on the window (the fast layer's regression, without
        forgetting). Shape ``(3, 2)``: quasi-steady,
        rate, added mass by output.

        The fast layer's intervals are conditional on one realisation; the spread of the columns
        over realisations is the other term of the law of total variance, ``var = E[var | real]
        + var(E[columns | real])``. Deterministic: the draws come from a generator seeded with
        the candidate's sequence number. Draws whose realisation is unstable or has no
        continuous-time form are left out (at high noise and rank, half of them or more); None
        when fewer than a quarter (at least 3) are left.
        """
        s = self.settings
        rows, cols = est.hankel_shape
        if (est.factors is None or est.posterior is None or rank < 1
                or rank > len(est.factors.s) - 2):
            return None
        F = np.column_stack([W[:, 0], W[:, 1], W[:, 2], np.ones(W.shape[0])])
        dy = W[:, 3:5]
        FF, Fy = F.T @ F, F.T @ dy  # the fixed part of the normal equations
        rng = np.random.Generator(np.random.PCG64(seed))
        betas = []
        for mk in markov_draws(est, s.realisation_draws, rng):
            try:
                fac = hankel_factors_near(mk, rank, est.factors)
                real = era(mk, rank, rows, cols, factors=fac)
                if (not np.all(np.isfinite(real.A))
                        or np.max(np.abs(np.linalg.eigvals(real.A))) >= 1.0):
                    continue
                A, B = resample_realisation(real.A, real.B, est.dt_decimated, est.dt)
            except (IdentificationError, np.linalg.LinAlgError):
                continue
            X, _ = simulate_states(A, B[:, 0], W[:, 1], chunk=128, cache=False)
            XF = X.T @ F
            G = np.block([[FF, XF.T], [XF, X.T @ X]])
            beta = _normal_solve(G, np.vstack([Fy, X.T @ dy]))
            if np.all(np.isfinite(beta)):
                betas.append(beta[:3])
        if len(betas) < max(3, s.realisation_draws // 4):
            return None
        return np.std(np.array(betas), axis=0, ddof=1)

    def _gate(self, A: np.ndarray, rls: RecursiveLeastSquares) -> str:
        s = self.settings
        th = rls.theta
        if not (np.all(np.isfinite(th)) and np.all(np.isfinite(A))):
            return "the candidate has non-finite entries"
        rho = float(np.max(np.abs(np.linalg.eigvals(A)))) if A.size else 0.0
        if rho >= s.max_spectral_radius:
            return (f"the transient is not stable with margin (spectral radius {rho:.6f} >= "
                    f"{s.max_spectral_radius})")
        fit = self.fit_nrmse
        worst = float(np.nanmax(fit)) if np.any(np.isfinite(fit)) else float("inf")
        if not worst <= s.max_nrmse:
            return (f"the recent one-step prediction error ({100 * worst:.1f} %) is above "
                    f"{100 * s.max_nrmse:.0f} %")
        lo, hi = s.qs_lift_bounds
        if not lo <= th[0, 0] <= hi:
            return (f"the quasi-steady lift coefficient {th[0, 0]:.3f} per rad is outside the "
                    f"physical bounds [{lo}, {hi}]")
        if self.reference is not None:
            for j, name in enumerate(("lift", "curvature")):
                ref = self.reference.k_qs[j]
                if ref != 0 and not 0.5 <= th[0, j] / ref <= 2.0:
                    return (f"the quasi-steady {name} coefficient {th[0, j]:.3g} is outside half to "
                            f"twice the reference's {ref:.3g}: not a physical change of this article")
        return ""

    # ----------------------------------------------------------------------------------------
    def _coefficients(self, rls: RecursiveLeastSquares) -> tuple[dict, dict]:
        th = rls.theta
        lo, hi = rls.intervals(0.95)
        half = self.spread.half_width(0.95)  # rows: quasi-steady, rate, added mass, bias
        lo, hi = lo.copy(), hi.copy()
        for i, r in enumerate((0, 1, 2, -1)):
            h = (hi[r] - lo[r]) / 2.0
            if half is not None:
                h = np.maximum(half[i], h)
            if self.realisation_sd is not None and r >= 0:
                # law of total variance: the conditional interval and the spread over
                # realisations add in quadrature (normal quantile for the latter)
                h = np.hypot(h, _Z975 * self.realisation_sd[r])
            lo[r], hi[r] = th[r] - h, th[r] + h
        rows = {"quasi_steady": 0, "rate": 1, "added_mass": 2, "bias": -1}
        coef = {k: _pair(th[i]) for k, i in rows.items()}
        intervals = {k: {o: [float(lo[i, j]), float(hi[i, j])] for j, o in enumerate(OUTPUT_KEYS)}
                     for k, i in rows.items()}
        return coef, intervals

    def _modes(self, A: np.ndarray, B: np.ndarray, C: np.ndarray) -> list[dict[str, Any]]:
        if A.size == 0:
            return []
        m = modal_parameters(A, self.dt, C=C, B=B)
        keep = m.oscillatory
        if not np.any(keep):
            return []
        f, z = m.frequency_hz[keep], m.damping[keep]
        shapes = m.shapes[:, keep]
        labels = self.tracker.update(f, z, shapes)
        part = m.participation[:, keep] if m.participation is not None else np.zeros((2, f.size))
        order = np.argsort(labels)
        return [{"id": int(labels[i]), "freq_hz": float(f[i]), "damping": float(z[i]),
                 "participation": [float(part[0, i]), float(part[1, i])]} for i in order]

    def _model_output(self, seq: int, status: str, reason: str, A, B, rls, hsv) -> Output:
        th = rls.theta
        r = A.shape[0]
        C = th[3:3 + r].T
        coef, intervals = self._coefficients(rls)
        modes = self._modes(A, B, C) if status != "rejected" else (
            self.in_service["modes"] if self.in_service else [])
        lag_info = None
        if self.lift_lag is not None:
            # Published in the model class of the calibration: the lag states appended to the
            # transient, their output matrix tied to the quasi-steady column (lag.py).
            Al, Bl, Cl = self.lift_lag.state_space(th[0])
            A = np.block([[A, np.zeros((r, Al.shape[0]))], [np.zeros((Al.shape[0], r)), Al]])
            B = np.vstack([np.asarray(B, dtype=float).reshape(r, 1), Bl.reshape(-1, 1)])
            C = np.hstack([C, Cl])
            lag_info = {"states": int(Al.shape[0]), "scale": self.lift_lag.scale,
                        "chord_m": self.settings.lift_lag_chord_m,
                        "speed_m_s": self.lift_lag.speed}
        body: dict[str, Any] = {
            "model_id": f"M{seq:06d}",
            "seq": seq,
            "status": status,
            "reason": reason,
            "t": self.last_t,
            "dt": self.dt,
            "rank": r,
            "input": "alpha_dot",
            "outputs": list(OUTPUT_KEYS),
            "A": A,
            "B": B,
            "C": C,
            "coefficients": coef,
            "intervals": intervals,
            "operating_point": {"alpha_rad": self.alpha0, "lift": float(self.y0[0]),
                                "curvature": float(self.y0[1])},
            "modes": modes,
            "fit": {"lift": float(self.fit_nrmse[0]), "curvature": float(self.fit_nrmse[1]),
                    "window_s": self.settings.fit_half_life_s},
            "excitation": float(rls.excitation_of([0, 1, 2])),
            "hankel_sv": np.asarray(hsv, dtype=float),
            "lift_lag": lag_info,
        }
        if self.reference is not None:
            ref = self.reference
            body["reference"] = {k: _pair(ref.coefficient(k)) for k in COEFFICIENT_KEYS}
            body["reference_sd"] = {k: _pair(ref.sd[k]) for k in COEFFICIENT_KEYS}
        else:
            body["reference"] = None
        if status != "rejected":
            self.in_service = body
        return Output("model", body)

    def _announce(self, t: float) -> Output:
        """Publish the starting point: the reference model, or a cold start flagged as such."""
        ref = self.reference
        if ref is None:
            body = {"model_id": "M000000", "seq": 0, "status": "rejected",
                    "reason": "running cold: no reference model loaded; the first validated "
                              "update will be the first model", "t": t, "dt": self.dt, "rank": 0,
                    "reference": None, "coefficients": {}, "intervals": {}, "modes": []}
            return Output("model", body)
        out = self._model_output(0, "reference", "", self.A, self.B, self.rls, ref.hankel_sv)
        out.body["t"] = t
        return out

    # ----------------------------------------------------------------------------------------
    def snapshot(self) -> dict[str, Any] | None:
        """The model in service (as published), or None."""
        return self.in_service

    def state_dict(self) -> dict[str, Any]:
        return {
            "sg_alpha": self.sg_alpha.state_dict(),
            "sg_y": [f.state_dict() for f in self.sg_y],
            "flow_delay": self.flow_delay.state_dict(),
            "alpha0": self.alpha0,
            "y0": None if self.y0 is None else self.y0.tolist(),
            "A": self.A.copy(), "B": self.B.copy(), "x": self.x.copy(),
            "rls": self.rls.state_dict(),
            "pending": [(b.t.copy(), b.alpha.copy(), b.lift.copy(), b.curvature.copy(),
                         b.discontinuity, b.dynamic_pressure.copy()) for b in self.pending],
            "lift_lag": None if self.lift_lag is None else self.lift_lag.state_dict(),
            "samples": self.samples, "since_slow": self.since_slow,
            "settle_left": self.settle_left,
            "fit_wait": self.fit_wait,
            "fit_w": self.fit_w,
            "period": [[b[0], b[1], b[2].copy(), b[3].copy(), b[4]] for b in self.period],
            "fit_base": None if self.fit_base is None else [self.fit_base[0].copy(),
                                                            self.fit_base[1].copy(),
                                                            self.fit_base[2]],
            "prev_period": None if self.prev_period is None else [
                [[b[0], b[1], b[2].copy(), b[3].copy(), b[4]] for b in self.prev_period[0]],
                None if self.prev_period[1] is None else [self.prev_period[1][0].copy(),
                                                          self.prev_period[1][1].copy(),
                                                          self.prev_period[1][2]]],
            "cut_t": self.cut_t, "cut_ratio": self.cut_ratio, "changes": self.changes,
            "suspect": None if self.suspect is None else list(self.suspect),
            "ring": {"buf": self.ring.buf.copy(), "n": self.ring.n, "head": self.ring.head},
            "fit_e2": self.fit_e2.copy(), "fit_y2": self.fit_y2.copy(),
            "candidate_seq": self.candidate_seq, "last_t": self.last_t,
            "tracker": self.tracker.state_dict(), "announced": self.announced,
            "markov_hyper": self.markov_hyper, "rank_proposal": self.rank_proposal,
            "rejections": self.rejections, "accepted": self.accepted,
            "rate_sq": self.rate_sq, "rate_n": self.rate_n,
            "win": [self.win_G.copy(), self.win_b.copy(), self.win_yy.copy(), self.win_n],
            "last_window": None if self.last_window is None else dict(self.last_window),
            "spread": self.spread.state_dict(),
            "realisation_sd": None if self.realisation_sd is None else self.realisation_sd.copy(),
            "in_service": self.in_service,
            "job": None if self.job is None else {
                "job": dict(self.job["job"]), "elapsed": self.job["elapsed"],
                "catchup": [None if c is None else tuple(np.array(v) for v in c)
                            for c in self.job["catchup"]]},
        }

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.reset()
        self.sg_alpha.load_state_dict(st["sg_alpha"])
        for f, s in zip(self.sg_y, st["sg_y"]):
            f.load_state_dict(s)
        self.flow_delay.load_state_dict(st["flow_delay"])
        self.alpha0 = st["alpha0"]
        self.y0 = None if st["y0"] is None else np.array(st["y0"], dtype=float)
        self.A = np.array(st["A"], dtype=float).reshape(np.shape(st["A"]))
        self.B = np.array(st["B"], dtype=float).reshape(self.A.shape[0], 1)
        self.x = np.array(st["x"], dtype=float).reshape(self.A.shape[0])
        rs = st["rls"]
        self.rls = self._new_rls(np.zeros((int(rs["n_regressors"]), 2)))
        self.rls.load_state_dict(rs)
        if self.lift_lag is not None and st.get("lift_lag") is not None:
            self.lift_lag.load_state_dict(st["lift_lag"])
        self.pending = []
        self.pending_n = 0
        for t, al, li, cu, disc, *rest in st["pending"]:
            t = np.asarray(t, dtype=float)
            q = np.asarray(rest[0], float) if rest else np.zeros(t.size)  # older: no q kept
            blk = ConditionedBlock(t=t, alpha=np.asarray(al, float), lift=np.asarray(li, float),
                                   curvature=np.asarray(cu, float), dynamic_pressure=q,
                                   si=np.zeros((t.size, 0)), seq=-1, discontinuity=bool(disc))
            self.pending.append(blk)
            self.pending_n += blk.n
        self.samples = int(st["samples"])
        self.since_slow = int(st["since_slow"])
        self.settle_left = int(st["settle_left"])
        self.fit_wait = int(st.get("fit_wait", 0))  # older checkpoints: counting already
        # older checkpoints: no change-point state (the detector starts at the next boundary)
        self.fit_w = float(st.get("fit_w", 0.0))
        self.period = [[int(b[0]), int(b[1]), np.asarray(b[2], float), np.asarray(b[3], float),
                        float(b[4])] for b in st.get("period", [])]
        fb = st.get("fit_base")
        self.fit_base = None if fb is None else [np.asarray(fb[0], float),
                                                 np.asarray(fb[1], float), float(fb[2])]
        pp = st.get("prev_period")
        self.prev_period = None if pp is None else [
            [[int(b[0]), int(b[1]), np.asarray(b[2], float), np.asarray(b[3], float),
              float(b[4])] for b in pp[0]],
            None if pp[1] is None else [np.asarray(pp[1][0], float), np.asarray(pp[1][1], float),
                                        float(pp[1][2])]]
        self.cut_t = None if st.get("cut_t") is None else float(st["cut_t"])
        self.suspect = None if st.get("suspect") is None else [float(x) for x in st["suspect"]]
        self.cut_ratio = float(st.get("cut_ratio", 0.0))
        self.changes = int(st.get("changes", 0))
        self.ring.buf = np.array(st["ring"]["buf"], dtype=float)
        self.ring.n = int(st["ring"]["n"])
        self.ring.head = int(st["ring"]["head"])
        self.fit_e2 = np.array(st["fit_e2"], dtype=float)
        self.fit_y2 = np.array(st["fit_y2"], dtype=float)
        self.candidate_seq = int(st["candidate_seq"])
        self.last_t = float(st["last_t"])
        self.tracker.load_state_dict(st["tracker"])
        self.announced = bool(st["announced"])
        self.markov_hyper = st["markov_hyper"]
        self.rank_proposal = int(st["rank_proposal"])
        self.rejections = int(st["rejections"])
        self.accepted = int(st["accepted"])
        self.rate_sq = float(st["rate_sq"])
        self.rate_n = int(st["rate_n"])
        G, b, yy, wn = st["win"]
        self.win_G, self.win_b = np.array(G, dtype=float), np.array(b, dtype=float)
        self.win_yy, self.win_n = np.array(yy, dtype=float), int(wn)
        lw = st.get("last_window")
        self.last_window = None if lw is None else {
            k: (np.asarray(v, dtype=float) if k in ("theta", "se", "s2", "interpretable") else v)
            for k, v in lw.items()}
        if st.get("spread") is not None:  # absent in a checkpoint of an earlier version
            self.spread.load_state_dict(st["spread"])
        rsd = st.get("realisation_sd")
        self.realisation_sd = None if rsd is None else np.array(rsd, dtype=float).reshape(3, 2)
        self.in_service = st["in_service"]
        jb = st.get("job")  # a candidate in flight is recomputed from its snapshot when due
        if jb is not None:
            j = jb["job"]
            self.job = {
                "job": {"W": np.asarray(j["W"], dtype=float), "rls": j["rls"],
                        "A": np.asarray(j["A"], dtype=float).reshape(np.shape(j["A"])),
                        "B": np.asarray(j["B"], dtype=float).reshape(np.shape(j["A"])[0], 1),
                        "rank_proposal": int(j["rank_proposal"]), "hyper": j["hyper"],
                        "draw_seed": None if j.get("draw_seed") is None else int(j["draw_seed"])},
                "elapsed": int(jb["elapsed"]),
                "catchup": [None if c is None else (np.asarray(c[0], float), np.asarray(c[1], float),
                                                    np.asarray(c[2], float), np.asarray(c[3], float),
                                                    np.asarray(c[4], bool)) for c in jb["catchup"]]}


def _normal_solve(G: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Least-squares solution from normal equations ``G z = rhs`` with the columns scaled to
    unit norm first; a singular ``G`` still gives the minimum-norm solution (pseudo-inverse of
    the scaled equations, rcond 1e-12)."""
    d = np.sqrt(np.maximum(np.diag(G), 0.0))
    d[d == 0.0] = 1.0
    z, *_ = np.linalg.lstsq(G / d[:, None] / d[None, :], rhs / d[:, None], rcond=1e-12)
    return z / d[:, None]


def _state_map(X_old: np.ndarray, X_new: np.ndarray) -> np.ndarray:
    """Least-squares ``Tt`` of ``X_new ~ X_old Tt`` from the normal equations
    (:func:`_normal_solve`: a tall, narrow factorisation costs about 20 times more
    single-threaded for no gain here: the fit is checked to 5 % and a badly conditioned ``T``
    is refused anyway). A rank-deficient ``X_old`` still gives a least-squares solution; its
    ``T`` is then refused by the condition check."""
    return _normal_solve(X_old.T @ X_old, X_old.T @ X_new)
