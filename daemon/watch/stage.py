"""The watch stage: drift, stale model, sensor health and curvature margin (all advisory).

It runs after the identification stage and reads its explicit state (the model in service,
the window estimate of every slow update, the aligned samples of every block). Detectors:

- **Coefficient drift**: at every slow update, the interpretable columns (quasi-steady, rate,
  added mass; lift and curvature) are estimated over the data since the previous slow update on
  a transient basis frozen when the baseline starts (:mod:`.basis`: the identifier's realisation
  in service changes from one slow update to the next, and with it the split between the
  quasi-steady column and the slow states). Each estimate's standardised deviation from the
  baseline, ``z = (theta_w - theta_0) / sqrt(s_0^2 + (tol theta_0)^2)``, feeds a two-sided
  CUSUM (Page 1954). Windows use disjoint data, so ``z`` is close to independent from one
  evaluation to the next, as the CUSUM design assumes. The tolerance term is the modelling band
  within which a coefficient counts as unchanged (``watch.coefficient_tolerance``). Thresholds
  come from the target false-alarm rate through Siegmund's approximation of the average run
  length (see :mod:`.cusum` and docs/watch.md): at most ``watch.false_alarm_per_hours`` hours
  between false alarms over all statistics together (Bonferroni split).
- **Mode drift**: the tracked mode nearest the reference's dominant mode, frequency and damping
  against the reference within relative tolerances, same CUSUM treatment; and a damping trend:
  damping regressed on dynamic pressure over the recent updates, extrapolated to zero damping
  (the dynamic pressure at which the mode would lose its damping), advisory when the
  extrapolation falls within ``watch.damping_q_margin`` times the present dynamic pressure.
  When the model in service has two oscillatory modes, the Zimmerman-Weissenburger flutter
  margin of the two closest in frequency (J. Aircraft 1(4), 1964; :func:`flutter_margin`) is
  tracked against dynamic pressure and extrapolated to zero (:func:`flutter_onset_q`), with
  the same advisory rule.
- **Stale model**: the reference model (the one the controller started with) run on the live
  data; the ratio of its prediction residual rms over each slow-update window to its residual
  level at calibration; "the controller's model no longer fits" when the ratio stays above
  ``watch.stale_ratio``.
- **Sensor health**: per strain/force/pressure channel, a stuck channel (no variation at all
  over a window where it normally varies), a noise-level change (window noise against the
  first minute's), and zero drift of the curvature gauge, told from a structural change under
  motion: a zero shift moves the curvature *level* at the operating point (the level row of the
  frozen-basis estimate) and nothing else, while a stiffness or flow change also moves the
  curvature's gain to alpha or the lift. A CUSUM on the curvature level finds the shift; three
  witnesses (curvature gain, lift level, lift gain), averaged since the CUSUM's change point,
  decide whether anything else moved (Bonferroni-corrected two-sided z tests). A suspected zero
  drift suspends the curvature and modal drift statistics, so it is not reported as structural
  drift, and raises a sensor-health advisory.
- **Curvature margin**: :class:`.margin.MarginForecaster` every block.

Every warning carries the advisory caution and defers to the facility's safety procedures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import ndtri

from wingwatch.daemon.condition import ConditionedBlock
from wingwatch.daemon.config import Config
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.identifier import OnlineIdentifier
from wingwatch.daemon.identify.modes import modal_parameters
from wingwatch.daemon.pipeline import Output
from wingwatch.daemon.watch.basis import FrozenBasisWindow, level_only, solve_window
from wingwatch.daemon.watch.cusum import Cusum, threshold_for_arl
from wingwatch.daemon.watch.margin import MarginForecaster
from wingwatch.daemon.watch.warnings import WarningBook

__all__ = ["WatchSettings", "Watcher", "flutter_margin", "flutter_onset_q", "WATCH_DEFAULTS"]

WATCH_DEFAULTS: dict[str, Any] = {
    "period_s": 0.5,
    "false_alarm_per_hours": 8.0,
    "cusum_k": 0.5,
    "coefficient_tolerance": 0.03,
    "mode_freq_tolerance": 0.05,
    "mode_damping_tolerance": 0.3,
    "stale_ratio": 2.5,
    "margin_horizon_s": 1.0,
    "margin_advisory": 0.25,
    "margin_caution": 0.10,
    "damping_q_margin": 1.5,
    "dwell_s": 2.0,
    "noise_ratio": 3.0,
    "baseline_s": 60.0,
    "rearm_s": 30.0,
    "watch_rate_and_added_mass": 1.0,
    "zero_shift_tolerance": 0.0005,
    "zero_shift_witness_alpha": 0.001,
}

COEFS = (("quasi_steady", 0), ("rate", 1), ("added_mass", 2))
OUTS = ("lift", "curvature")
LEVEL = 3  # the level row of the frozen-basis estimate (basis.ROWS)
#: (row, output) of the witnesses of a structural change: curvature gain, lift level, lift gain
WITNESSES = ((0, 1), (LEVEL, 0), (0, 0))


def _unpack(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Window fits as stored (one flat row each: columns 4 x 2, the level row of G, the level
    row of b) back into ``theta`` (n, 4, 2), ``G[level]`` (n, 4) and ``b[level]`` (n, 2)."""
    rows = np.atleast_2d(rows)
    return rows[:, :8].reshape(-1, 4, 2), rows[:, 8:12], rows[:, 12:14]


def flutter_margin(b1: float, w1: float, b2: float, w2: float) -> float:
    """Zimmerman-Weissenburger flutter margin for two modes ``s = -b_i +- i w_i``.

    F = ((w2^2 - w1^2)/2 + (b2^2 - b1^2)/2)^2 + 4 b1 b2 ((w2^2 + w1^2)/2 + 2 ((b2 + b1)/2)^2)
        - ((b2 - b1)/(b2 + b1) (w2^2 - w1^2)/2 + 2 ((b2 + b1)/2)^2)^2

    (N. H. Zimmerman and J. T. Weissenburger, "Prediction of flutter onset speed based on flight
    testing at subcritical speeds", J. Aircraft 1(4), 1964). F -> 0 at flutter.

    >>> round(flutter_margin(0.5, 2.0, 0.2, 3.0), 4)
    7.751
    """
    bs = (b2 + b1) / 2.0
    d = (w2 * w2 - w1 * w1) / 2.0
    return ((d + (b2 * b2 - b1 * b1) / 2.0) ** 2
            + 4.0 * b1 * b2 * ((w2 * w2 + w1 * w1) / 2.0 + 2.0 * bs * bs)
            - ((b2 - b1) / (b2 + b1) * d + 2.0 * bs * bs) ** 2)


def flutter_onset_q(q, F, min_points: int = 8) -> float:
    """Dynamic pressure at which the flutter margin ``F`` extrapolates to zero, or nan.

    ``F`` is fitted as a quadratic in the dynamic pressure ``q`` (for a two-degree-of-freedom
    system Zimmerman and Weissenburger show that it is one; from memory) by least squares
    (``numpy.polyfit``, on scaled values), and the smallest real root above the largest ``q``
    seen is returned. Nan with fewer than ``min_points`` points, when ``q`` has varied by less
    than 5 % of its mean, when the fit does not fall at the largest ``q``, or when it has no root
    ahead. Checked in tests/test_watch.py against the flutter point of a binary section found
    from its eigenvalues.
    """
    q = np.asarray(q, dtype=float)
    F = np.asarray(F, dtype=float)
    ok = np.isfinite(q) & np.isfinite(F)
    q, F = q[ok], F[ok]
    if q.size < min_points or np.ptp(q) <= 0.05 * max(float(np.mean(np.abs(q))), 1e-12):
        return float("nan")
    qs = float(np.max(np.abs(q)))
    fs = float(np.max(np.abs(F))) or 1.0
    c2, c1, c0 = np.polyfit(q / qs, F / fs, 2)
    x_top = float(np.max(q)) / qs
    if 2.0 * c2 * x_top + c1 >= 0.0:
        return float("nan")  # the margin is not falling as dynamic pressure rises
    roots = np.roots([c2, c1, c0])  # drops a zero leading coefficient itself (linear fit)
    ahead = [float(r.real) for r in roots
             if abs(r.imag) <= 1e-9 * max(abs(r.real), 1.0) and r.real > x_top]
    return min(ahead) * qs if ahead else float("nan")


@dataclass(frozen=True)
class WatchSettings:
    period_s: float
    false_alarm_per_hours: float
    cusum_k: float
    coefficient_tolerance: float
    mode_freq_tolerance: float
    mode_damping_tolerance: float
    stale_ratio: float
    margin_horizon_s: float
    margin_advisory: float
    margin_caution: float
    damping_q_margin: float
    dwell_s: float
    noise_ratio: float
    baseline_s: float
    rearm_s: float
    watch_rate_and_added_mass: float
    zero_shift_tolerance: float
    zero_shift_witness_alpha: float

    @classmethod
    def from_config(cls, config: Config) -> "WatchSettings":
        raw = dict(WATCH_DEFAULTS)
        for k, v in config.watch.items():
            if k not in WATCH_DEFAULTS:
                raise ConfigError(f"{config.source}: key 'watch.{k}' is not a known key (allowed "
                                  f"here: {', '.join(sorted(WATCH_DEFAULTS))}).")
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise ConfigError(f"{config.source}: key 'watch.{k}' must be a non-negative number.")
            raw[k] = float(v)
        for k in ("period_s", "false_alarm_per_hours", "margin_horizon_s", "stale_ratio"):
            if raw[k] <= 0:
                raise ConfigError(f"{config.source}: key 'watch.{k}' must be greater than zero.")
        if not 0 < raw["zero_shift_witness_alpha"] < 1:
            raise ConfigError(f"{config.source}: key 'watch.zero_shift_witness_alpha' must lie "
                              "between 0 and 1 (a test size).")
        if not raw["margin_caution"] < raw["margin_advisory"] < 1:
            raise ConfigError(f"{config.source}: keys 'watch.margin_caution' < "
                              "'watch.margin_advisory' < 1 must hold.")
        return cls(**{k: float(v) for k, v in raw.items()})


class Watcher:
    """The watch stage (see the module docstring)."""

    def __init__(self, config: Config, identifier: OnlineIdentifier) -> None:
        self.config = config
        self._i_q = config.conditioning_stream.channels.index(config.outputs.lift.dynamic_pressure)
        self.ident = identifier
        self.settings = s = WatchSettings.from_config(config)
        self.limit = config.outputs.curvature.limit_per_m
        self.dt = identifier.dt
        self.period_n = max(1, int(round(s.period_s / self.dt)))
        slow_s = identifier.settings.slow_period_s
        evals = s.false_alarm_per_hours * 3600.0 / slow_s  # evaluations in the target interval
        self.n_coef_stats = len(COEFS) * len(OUTS)
        self.n_mode_stats = 2
        # Bonferroni: each statistic's in-control ARL is the number of its evaluations in the
        # target interval times the number of statistics (Siegmund's ARL, see cusum.py); the
        # curvature zero-shift statistic is one of them.
        total = self.n_coef_stats + self.n_mode_stats + 1
        self.h = threshold_for_arl(evals * total, s.cusum_k)
        # Witnesses of a structural change (curvature gain, lift level, lift gain): each is a
        # two-sided z test at size alpha / 3 (Bonferroni over the three).
        self.witness_z = float(ndtri(1.0 - s.zero_shift_witness_alpha / (2.0 * len(WITNESSES))))
        self.gauge_channel = config.outputs.curvature.strain
        self.base_n = max(5, int(round(s.baseline_s / slow_s)))
        ref = identifier.reference
        self.ref_mode = None
        if ref is not None and ref.rank:
            m = modal_parameters(ref.A, self.dt, C=ref.C, B=ref.B)
            if np.any(m.oscillatory) and m.participation is not None:
                osc = np.flatnonzero(m.oscillatory)
                j = osc[np.argmax(m.participation[1, osc])]  # dominant in curvature
                self.ref_mode = (float(m.frequency_hz[j]), float(m.damping[j]))
        self.reset()

    def reset(self) -> None:
        s = self.settings
        self.cusum_coef = Cusum(self.n_coef_stats, s.cusum_k, self.h)
        self.cusum_mode = Cusum(self.n_mode_stats, s.cusum_k, self.h)
        self.book = WarningBook(s.dwell_s)
        self.margin = MarginForecaster(self.limit, s.margin_horizon_s, self.dt)
        self.seen_seq = 0
        self.since_watch = 0
        self.last_z: dict[str, float] = {}
        self.stale = {"statistic": 0.0, "threshold": s.stale_ratio}
        self.ref_x = np.zeros(self.ident.reference.rank) if self.ident.reference is not None else None
        self.ref_sq = np.zeros(2)
        self.ref_n = 0
        self.ref_base: np.ndarray | None = None
        self.noise_base: np.ndarray | None = None
        self.noise_acc: list[float] = []
        self.noise_blocks = 0
        self.sensors: dict[str, dict[str, str]] = {}
        self.basis = FrozenBasisWindow()  # the drift watchers' window estimates
        self.basis_alt = FrozenBasisWindow()  # the other candidate basis, during a baseline
        self.base_acc_alt: list[np.ndarray] = []
        self.win_a = [0.0, 0]  # sum and count of alpha deviations in the current window
        self.cusum_zero = Cusum(1, s.cusum_k, self.h)
        # per CUSUM side (up, down): witness sums and counts since that side was last zero
        self.zero_wsum = np.zeros((2, len(WITNESSES)))
        self.zero_wn = np.zeros((2, len(WITNESSES)), dtype=int)
        self.gauge_suspect = False
        self.zero_info: dict[str, Any] = {}
        self.damp_hist: list[tuple[float, float]] = []  # (dynamic pressure, damping)
        self.flutter_hist: list[tuple[float, float]] = []  # (dynamic pressure, flutter margin)
        self.flutter_pair: list[int] | None = None  # mode ids of the pair in flutter_hist
        self.flutter: dict[str, Any] | None = None  # last flutter-margin state (watch message)
        self.plan: tuple[float, float, np.ndarray] | None = None
        self.q_recent = float("nan")
        # Channels of the samples since the identifier last processed a block (its next block):
        # the sensor-health and dynamic-pressure figures are over the identifier's block, never
        # over whichever frame happened to complete it.
        self.acc_si: list[np.ndarray] = []
        self.base: np.ndarray | None = None  # coefficient baseline (start of the run)
        self.base_sd: np.ndarray | None = None
        self.base_acc: list[np.ndarray] = []
        self.base_level: np.ndarray | None = None  # residual-mean levels (lift, curvature)
        self.base_level_sd: np.ndarray | None = None
        self.base_offset: dict[str, float] = {}
        self.base_t = 0.0
        self.first_model_t: float | None = None  # sample time of the first validated model
        self.base_since: float | None = None  # set when the drift watch re-armed
        self.alarm_run = np.zeros(self.n_coef_stats, dtype=int)
        self.mode_base: np.ndarray | None = None
        self.mode_sd: np.ndarray | None = None
        self.mode_acc: list[tuple[float, float]] = []
        self.mode_label: int | None = None
        self.margin_samples = 0

    def set_plan(self, plan: Any) -> None:
        """The controller's announced alpha plan (read by the curvature-margin forecast)."""
        self.plan = (float(plan.t0), float(plan.dt), np.asarray(plan.alpha, dtype=float))

    @property
    def model_id(self) -> str:
        m = self.ident.in_service
        return m["model_id"] if m else "none"

    # ----------------------------------------------------------------------------------------
    def update(self, block: ConditionedBlock) -> list[Output]:
        out: list[Output] = []
        lb = self.ident.last_block
        if lb is None or lb.get("_seen"):
            self.acc_si.append(block.si)
            self._restart_on(block)
            return out  # the identifier is still gathering this block
        lb["_seen"] = True
        # The pipeline cuts blocks at the identifier's boundaries (Pipeline.process_many): this
        # block either completed the identifier's block or, after a discontinuity, starts the
        # next one (the identifier processed what it had first).
        if block.discontinuity and self.ident.pending_n:
            si = self._take_acc()
            self.acc_si.append(block.si)
        else:
            self.acc_si.append(block.si)
            si = self._take_acc()
        q = si[:, self._i_q]
        if q.size:
            self.q_recent = float(np.nanmean(q))
        t_end = float(lb["t"][-1])
        # The block ran through the identifier's model of the time; a new model from the slow
        # update at its end takes over (with the identifier's state) from the next block on.
        self.margin.update(lb["a"], lb["ad"], lb["add"], lb["dy"], lb["ok"], lb["alpha"])
        self._track_model()
        self._reference_residual(lb)
        for basis in (self.basis, self.basis_alt):
            basis.add(lb["a"], lb["ad"], lb["add"], lb["dy"], lb["ok"])
        ok = lb["ok"]
        self.win_a[0] += float(np.sum(lb["a"][ok]))
        self.win_a[1] += int(np.count_nonzero(ok))
        self._sensor_health(si)
        if self.ident.candidate_seq != self.seen_seq:
            self.seen_seq = self.ident.candidate_seq
            out.extend(self._evaluate_window(t_end))
        out.extend(self._margin_warnings(t_end))
        self.since_watch += int(lb["a"].size)
        if self.since_watch >= self.period_n:
            self.since_watch = 0
            out.append(self._watch_message(t_end))
        self._restart_on(block)
        return out

    def _restart_on(self, block: ConditionedBlock) -> None:
        """After a gap or a source restart the identifier's transient states start from rest
        (the samples before it were processed first); the watchers' own simulations follow."""
        if block.discontinuity:
            self.basis.restart()
            self.basis_alt.restart()
            if self.ref_x is not None:
                self.ref_x = np.zeros_like(self.ref_x)

    def _track_model(self) -> None:
        ident = self.ident
        m = ident.in_service
        key = (m["model_id"], ident.rank) if m else ("none", ident.rank)
        s2 = ident.last_window["s2"] if ident.last_window else np.full(2, 1e-6)
        self.margin.set_model(key, ident.A, ident.B, ident.rls.theta, ident.alpha0 or 0.0,
                              ident.y0 if ident.y0 is not None else np.zeros(2), s2, x0=ident.x)

    def _reference_residual(self, lb: dict[str, Any]) -> None:
        ref = self.ident.reference
        if ref is None:
            return
        from wingwatch.daemon.identify.interpretable import simulate_states

        X, self.ref_x = simulate_states(ref.A, ref.B[:, 0], lb["ad"], self.ref_x)
        # the reference model is the calibration's: on the incidence itself
        pred = (np.outer(lb["alpha"], ref.k_qs) + np.outer(lb["ad"], ref.k_rate)
                + np.outer(lb["add"], ref.k_am) + X @ ref.C.T + ref.bias)
        e = (lb["dy"] - pred)[lb["ok"]]
        self.ref_sq += np.sum(e * e, axis=0)
        self.ref_n += e.shape[0]

    def _acc_array(self) -> np.ndarray:
        """The samples held for the identifier's next block, as one array."""
        acc = self.acc_si
        if not acc:
            return np.zeros((0, len(self.config.conditioning_stream.channels)))
        return acc[0] if len(acc) == 1 else np.concatenate(acc)

    def _take_acc(self) -> np.ndarray:
        si = self._acc_array()
        self.acc_si = []
        return si

    def _sensor_health(self, si: np.ndarray) -> None:
        """Sample-to-sample noise of every channel over the identifier's block ``si``."""
        names = self.config.conditioning_stream.channels
        if si.shape[0] < 3:
            return
        noise = np.std(np.diff(si, axis=0), axis=0)  # sample-to-sample noise per channel
        self.noise_blocks += 1
        if self.noise_base is None:
            self.noise_acc.append(noise)
            if len(self.noise_acc) >= 200:  # a baseline from the first part of the run
                self.noise_base = np.median(np.array(self.noise_acc), axis=0)
                self.noise_acc = []
            return
        for j, name in enumerate(names):
            if self.config.channels[name].quantity == "angle":
                continue  # an encoder at a hold reads a constant: not a fault
            base = self.noise_base[j]
            state, detail = "ok", ""
            if base > 0 and noise[j] == 0.0:
                state, detail = "stuck", f"{name} reads a constant value"
            elif base > 0 and noise[j] > self.settings.noise_ratio * base:
                state, detail = "noisy", f"{name} noise {noise[j] / base:.1f}x its baseline"
            self.sensors[name] = {"state": state, "detail": detail}

    # ----------------------------------------------------------------------------------------
    def _evaluate_window(self, t: float) -> list[Output]:
        out: list[Output] = []
        s = self.settings
        ident = self.ident
        ref = ident.reference
        # stale model: reference residual against its level at the start
        if self.ref_n:
            rms = np.sqrt(self.ref_sq / self.ref_n)
            if self.ref_base is None:
                self.ref_base = np.maximum(rms, 1e-9)
            ratios = rms / self.ref_base
            # A suspected gauge zero drift is reported as such; the lift alone then says
            # whether the controller's model still fits.
            ratio = float(ratios[0] if self.gauge_suspect else np.max(ratios))
            self.stale = {"statistic": ratio, "threshold": s.stale_ratio}
            self.ref_sq[:] = 0.0
            self.ref_n = 0
            level = "caution" if ratio > s.stale_ratio else None
            out += self.book.report("stale_model:reference", "stale_model", "prediction_rms_ratio",
                                    level, ratio, s.stale_ratio, t, self.model_id,
                                    f"The controller's model no longer fits: its prediction error "
                                    f"is {ratio:.1f}x its level at the start (advisory).")
        fit = self._window_fit(self.basis)
        fit_alt = self._window_fit(self.basis_alt) if self.basis_alt.frozen else None
        out += self._baseline_and_drift(t, fit, fit_alt)
        for name, st in self.sensors.items():
            bad = st["state"] in ("stuck", "noisy")
            out += self.book.report(f"sensor_health:{name}", "sensor_health", name,
                                    "advisory" if bad else None, 1.0 if bad else 0.0, 1.0, t,
                                    self.model_id,
                                    f"Sensor {st['detail'] or name}; check the channel (advisory).")
        # mode drift and damping trend
        out += self._modes(t)
        out += self._flutter(t)
        return out

    def _window_fit(self, basis: FrozenBasisWindow) -> np.ndarray | None:
        """This window on a frozen basis, as one flat row (see :func:`_unpack`): the columns
        (rows gain, rate, added mass, level; NaN when the window had too little motion to
        identify them, alpha holding) and the level row of the normal equations, from which
        the residual-mean level under any fixed columns follows (:func:`.basis.level_only`)."""
        G, b, n, rate_rms = basis.take()
        if not basis.frozen or n < 16:
            return None
        gains_ok = rate_rms >= math.radians(self.ident.settings.min_rate_rms_deg_s)
        theta = solve_window(G, b) if gains_ok else None
        if theta is None:
            theta = np.full((4, 2), np.nan)
        return np.concatenate([theta.ravel(), G[LEVEL], b[LEVEL]])

    def _freeze_basis(self) -> None:
        """Fix the transient basis of the drift watchers' window estimates for a baseline.

        Two candidates run through the baseline: the reference's realisation (a clean, settled
        calibration, though it may no longer describe the dynamics after a change) and the one
        the identifier holds now (fitted to the present data, though it may be immature at the
        start of a run). The one whose baseline scatter inflates the statistics least is kept
        (:meth:`_choose_basis`).
        """
        ident = self.ident
        ref = ident.reference
        a_c = self.win_a[0] / self.win_a[1] if self.win_a[1] else 0.0
        r = ident.rank
        own = (ident.A, ident.B.reshape(-1), ident.rls.theta[3:3 + r].T, a_c, ident.x)
        if ref is not None:
            # the reference's states have been simulated on the same data all along (ref_x)
            self.basis.freeze(ref.A, ref.B.reshape(-1), ref.C, a_c, self.ref_x)
            self.basis_alt.freeze(*own)
        else:
            self.basis.freeze(*own)
            self.basis_alt.reset()
        self.base_acc = []
        self.base_acc_alt = []

    def _baseline_of(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """Baseline statistics from its windows: mean and scatter of the columns, and of the
        residual-mean levels with the columns held at their baseline mean."""
        theta, G3, b3 = _unpack(rows)
        mean, sd = theta.mean(axis=0), theta.std(axis=0, ddof=1)
        lev = np.array([level_only(g, b, mean) for g, b in zip(G3, b3)])
        return {"mean": mean, "sd": sd, "level": lev.mean(axis=0), "level_sd": lev.std(axis=0, ddof=1)}

    def _scatter_score(self, bl: dict[str, np.ndarray]) -> float:
        """How much a basis's baseline scatter inflates the drift statistics: the sum over the
        quasi-steady gains and the curvature level of (scatter / tolerance band)^2."""
        s = self.settings
        tol_g = np.maximum(s.coefficient_tolerance * np.abs(bl["mean"][0]), 1e-12)
        tol_l = max(s.zero_shift_tolerance * self.limit, 1e-12)
        return float(np.sum((bl["sd"][0] / tol_g) ** 2) + (bl["level_sd"][1] / tol_l) ** 2)

    def _choose_basis(self) -> dict[str, np.ndarray]:
        """End of a baseline: keep the candidate basis with the smaller scatter score."""
        bl = self._baseline_of(np.array(self.base_acc))
        if self.basis_alt.frozen and len(self.base_acc_alt) == len(self.base_acc):
            alt = self._baseline_of(np.array(self.base_acc_alt))
            if self._scatter_score(alt) < self._scatter_score(bl):
                self.basis, self.basis_alt = self.basis_alt, self.basis
                bl = alt
        self.basis_alt.reset()
        self.base_acc, self.base_acc_alt = [], []
        return bl

    def _baseline_and_drift(self, t: float, fit: np.ndarray | None,
                            fit_alt: np.ndarray | None) -> list[Output]:
        """Coefficient drift and the curvature zero-shift test on this window's estimate."""
        out: list[Output] = []
        s = self.settings
        ident = self.ident
        ref = ident.reference
        self.win_a = [0.0, 0]
        if ident.accepted == 0:
            return out  # no validated model yet: the stream is not in a state to watch
        if self.first_model_t is None:
            self.first_model_t = t
        if not self.basis.frozen:
            # The start of the flow is a change like any other: the first baseline starts
            # watch.rearm_s after the first validated model, once the start-up wake (whose
            # influence decays only like 1/time) has mostly settled and the identifier's
            # realisation has matured into a useful candidate basis.
            if t - self.first_model_t >= s.rearm_s:
                self._freeze_basis()
            return out  # the first window on the new basis starts with the next one
        if fit is None:
            return out
        theta, G3, b3 = _unpack(fit[None])
        theta, G3, b3 = theta[0], G3[0], b3[0]
        gains_ok = bool(np.all(np.isfinite(theta)))
        s_coefs = ("quasi_steady", "rate", "added_mass") if s.watch_rate_and_added_mass else (
            "quasi_steady",)
        if self.base is None:
            if self.base_since is not None:  # re-baselining: let the old warnings clear
                for key, _ in COEFS:
                    for o in OUTS:
                        out += self.book.report(
                            f"coefficient_drift:{key}.{o}", "coefficient_drift", f"{key}.{o}",
                            None, 0.0, self.h, t, self.model_id,
                            "Drift watch re-armed on the new level (advisory).")
            self.gauge_suspect = False
            out += self.book.report("sensor_health:zero_drift", "sensor_health",
                                    f"{self.gauge_channel}.zero", None, 0.0, self.h, t,
                                    self.model_id, "Zero-shift watch re-armed (advisory).")
            if gains_ok:
                self.base_acc.append(fit.copy())
                if fit_alt is not None and np.all(np.isfinite(fit_alt)):
                    self.base_acc_alt.append(fit_alt.copy())
            if len(self.base_acc) >= self.base_n:
                bl = self._choose_basis()
                self.base, self.base_sd = bl["mean"], bl["sd"]
                self.base_level, self.base_level_sd = bl["level"], bl["level_sd"]
                self.base_t = t
                if ref is not None:
                    for key, row in COEFS:
                        for j, o in enumerate(OUTS):
                            r0 = ref.coefficient(key)[j]
                            self.base_offset[f"{key}.{o}"] = (float(self.base[row, j] / r0 - 1)
                                                              if r0 else 0.0)
            return out
        since = "the start of the run" if self.base_since is None else f"t = {self.base_t:.0f} s"
        level = level_only(G3, b3, self.base)  # residual mean under the baseline columns
        out += self._zero_shift(t, theta, level, gains_ok, since)
        z = np.full(self.n_coef_stats, np.nan)
        for i, (key, row) in enumerate(COEFS):
            for j, o in enumerate(OUTS):
                b0 = self.base[row, j]
                den = math.sqrt(self.base_sd[row, j] ** 2 + (s.coefficient_tolerance * b0) ** 2)
                zz = (theta[row, j] - b0) / den if den > 0 else 0.0
                if not gains_ok or (j == 1 and self.gauge_suspect) or key not in s_coefs:
                    zz = float("nan")  # no motion / sensor fault / not watched: no verdict
                z[i * 2 + j] = zz
                self.last_z[f"{key}.{o}"] = float(zz)
        alarms = self.cusum_coef.update(z)
        stat = self.cusum_coef.statistic
        for i, (key, row) in enumerate(COEFS):
            for j, o in enumerate(OUTS):
                k = i * 2 + j
                lvl = "caution" if alarms[k] else None
                b0 = self.base[row, j]
                pct = 100 * (theta[row, j] / b0 - 1) if b0 and gains_ok else 0.0
                out += self.book.report(
                    f"coefficient_drift:{key}.{o}", "coefficient_drift", f"{key}.{o}",
                    lvl, float(stat[k]), self.h, t, self.model_id,
                    f"The {key.replace('_', '-')} {o} coefficient has moved {pct:+.1f} % "
                    f"from its value at {since}, beyond its tolerance (advisory).")
        # Re-arm after a sustained change: once an alarm has held for watch.rearm_s, the new
        # level becomes the baseline (measured afresh, on the basis chosen then), so a later
        # change raises its own alarm. The offset to the calibration stays in ww.watch
        # baseline_offset.
        self.alarm_run = np.where(alarms, self.alarm_run + 1, 0)
        if s.rearm_s > 0 and np.any(self.alarm_run * ident.settings.slow_period_s >= s.rearm_s):
            self._rearm(t)
        return out

    def _rearm(self, t: float) -> None:
        self.base = None
        self.base_since = t
        self.cusum_coef.reset()
        self.alarm_run = np.zeros(self.n_coef_stats, dtype=int)
        self.cusum_zero.reset()
        self.zero_wsum[:] = 0.0
        self.zero_wn[:] = 0
        self._freeze_basis()

    def _zero_shift(self, t: float, theta: np.ndarray, level: np.ndarray, gains_ok: bool,
                    since: str) -> list[Output]:
        """Curvature gauge zero drift against a structural change (docs/watch.md).

        ``u`` is the deviation of the curvature's residual mean under the baseline columns
        (``level``) from its baseline value, standardised by its baseline scatter and the
        zero-shift tolerance band; a two-sided CUSUM finds a shift. While it is alarmed, the
        witnesses (curvature gain, lift level, lift gain, each in baseline standard deviations)
        are averaged since the alarmed side of the CUSUM was last zero (its estimate of the
        change time, Page 1954): ``Z = sum(w) / sqrt(n)`` is standard normal while the witness
        has not moved. The gauge is suspected when no ``|Z|`` exceeds the Bonferroni-corrected
        critical value.
        """
        s = self.settings
        base, sd = self.base, self.base_sd
        dl = float(level[1] - self.base_level[1])
        den = math.hypot(self.base_level_sd[1], s.zero_shift_tolerance * self.limit)
        u = dl / den if den > 0 else 0.0
        w = np.full(len(WITNESSES), np.nan)
        for i, (row, j) in enumerate(WITNESSES):
            if row == LEVEL:
                if self.base_level_sd[j] > 0:
                    w[i] = (level[j] - self.base_level[j]) / self.base_level_sd[j]
            elif gains_ok and sd[row, j] > 0:
                w[i] = (theta[row, j] - base[row, j]) / sd[row, j]
        was_zero = np.array([self.cusum_zero.s_up[0], self.cusum_zero.s_down[0]]) == 0.0
        self.cusum_zero.update(np.array([u]))
        now = np.array([self.cusum_zero.s_up[0], self.cusum_zero.s_down[0]])
        for side in range(2):
            if was_zero[side]:
                self.zero_wsum[side] = 0.0  # this side starts a new excursion here
                self.zero_wn[side] = 0
            if now[side] > 0:
                fin = np.isfinite(w)
                self.zero_wsum[side, fin] += w[fin]
                self.zero_wn[side, fin] += 1
        self.last_z["zero_shift.curvature"] = float(u)
        alarm = bool(self.cusum_zero.alarm[0])
        side = 0 if now[0] >= now[1] else 1
        n = self.zero_wn[side]
        Z = np.where(n > 0, self.zero_wsum[side] / np.sqrt(np.maximum(n, 1)), 0.0)
        moved = bool(np.any(np.abs(Z) > self.witness_z))
        self.gauge_suspect = alarm and not moved
        names = ("curvature_gain", "lift_level", "lift_gain")
        self.zero_info = {"level_change": dl, "witness_z": {k: float(v) for k, v in zip(names, Z)},
                          "witness_critical": self.witness_z, "suspect": self.gauge_suspect}
        pct = 100.0 * dl / self.limit
        return self.book.report(
            "sensor_health:zero_drift", "sensor_health", f"{self.gauge_channel}.zero",
            "advisory" if self.gauge_suspect else None, float(self.cusum_zero.statistic[0]),
            self.h, t, self.model_id,
            f"The {self.gauge_channel} gauge's zero seems to drift: the curvature at the operating "
            f"point has moved {dl:+.4f} 1/m ({pct:+.2f} % of the limit) from its value at {since} "
            f"while lift and the curvature's response to alpha have not. A sensor fault, not a "
            f"structural change: curvature drift statistics are suspended; check the gauge "
            f"(advisory).")

    def _modes(self, t: float) -> list[Output]:
        out: list[Output] = []
        s = self.settings
        m = self.ident.in_service
        if not m or self.ref_mode is None or not m.get("modes"):
            return out
        f0, z0 = self.ref_mode
        # Only lightly damped modes with a stable track make a modal verdict: a heavily damped
        # pole moves about from one realisation to the next without any physical change.
        modes = [x for x in m["modes"] if abs(x["freq_hz"] - f0) < 0.5 * f0 and x["damping"] < 0.3]
        if self.mode_label is not None:
            modes = [x for x in modes if x["id"] == self.mode_label]
        if not modes:
            if self.mode_base is None:
                self.mode_acc = []  # the track broke during the baseline: start it again
                self.mode_label = None
            return out
        near = min(modes, key=lambda x: abs(x["freq_hz"] - f0))
        self.mode_label = near["id"]
        # Like the coefficients: against the mode as the online estimator sees it at the start
        # of the run, standardised by its observed scatter and a relative tolerance.
        if self.mode_base is None:
            self.mode_acc.append((near["freq_hz"], near["damping"]))
            if len(self.mode_acc) >= self.base_n:
                arr = np.array(self.mode_acc)
                self.mode_base = arr.mean(axis=0)
                self.mode_sd = arr.std(axis=0, ddof=1)
                self.mode_acc = []
            return out
        fb, zb = self.mode_base
        zf = (near["freq_hz"] - fb) / math.hypot(self.mode_sd[0], s.mode_freq_tolerance * fb)
        zd = (near["damping"] - zb) / math.hypot(self.mode_sd[1],
                                                  s.mode_damping_tolerance * max(zb, 1e-3))
        if self.gauge_suspect:
            zf = zd = float("nan")
        self.last_z["mode.freq_hz"] = float(zf)
        self.last_z["mode.damping"] = float(zd)
        alarms = self.cusum_mode.update(np.array([zf, zd]))
        stat = self.cusum_mode.statistic
        for k, (q, val) in enumerate((("freq_hz", near["freq_hz"]), ("damping", near["damping"]))):
            ref_v = fb if q == "freq_hz" else zb
            out += self.book.report(f"mode_drift:{q}", "mode_drift", f"mode{near['id']}.{q}",
                                    "caution" if alarms[k] else None, float(stat[k]), self.h, t,
                                    self.model_id,
                                    f"Mode {near['id']} {q.replace('_hz', '')} is {val:.3g} against "
                                    f"{ref_v:.3g} at the start of the run (advisory).")
        if math.isfinite(self.q_recent):
            self.damp_hist.append((self.q_recent, near["damping"]))
            self.damp_hist = self.damp_hist[-30:]
        level = None
        q_zero = float("nan")
        if len(self.damp_hist) >= 8:
            arr = np.array(self.damp_hist)
            if np.ptp(arr[:, 0]) > 0.05 * max(np.mean(arr[:, 0]), 1e-9):
                slope, icpt = np.polyfit(arr[:, 0], arr[:, 1], 1)
                if slope < 0:
                    q_zero = -icpt / slope  # dynamic pressure of zero damping (extrapolated)
                    if q_zero < s.damping_q_margin * self.q_recent:
                        level = "advisory"
        out += self.book.report("damping_trend:mode", "damping_trend", "damping_zero_q_pa", level,
                                q_zero if math.isfinite(q_zero) else 0.0,
                                s.damping_q_margin * self.q_recent if math.isfinite(self.q_recent) else 0.0,
                                t, self.model_id,
                                f"Mode damping falls as dynamic pressure rises; extrapolated zero "
                                f"damping at {q_zero:.0f} Pa (advisory).")
        return out

    def _flutter(self, t: float) -> list[Output]:
        """Zimmerman-Weissenburger margin of the two oscillatory modes closest in frequency in
        the model in service, against dynamic pressure, extrapolated to zero. Oscillatory here:
        damping ratio below 0.9 (common practice, no source: the aerodynamic damping of a
        plunge-like mode is large well before flutter, so the drift watch's 0.3 would drop it)."""
        s = self.settings
        m = self.ident.in_service
        modes = [x for x in (m.get("modes") or [] if m else [])
                 if 0.0 < x["damping"] < 0.9 and x["freq_hz"] > 0.0]
        if len(modes) < 2 or not math.isfinite(self.q_recent):
            self.flutter = None
            return []
        modes.sort(key=lambda x: x["freq_hz"])
        k = int(np.argmin(np.diff([x["freq_hz"] for x in modes])))
        m1, m2 = modes[k], modes[k + 1]
        pair = [int(m1["id"]), int(m2["id"])]
        if pair != self.flutter_pair:  # another pair: its history starts afresh
            self.flutter_pair, self.flutter_hist = pair, []
        bw = []
        for x in (m1, m2):
            wn = 2.0 * math.pi * x["freq_hz"]
            bw += [x["damping"] * wn, wn * math.sqrt(1.0 - x["damping"] ** 2)]  # s = -b +- i w
        F = flutter_margin(*bw)
        self.flutter_hist = (self.flutter_hist + [(self.q_recent, F)])[-30:]
        arr = np.array(self.flutter_hist)
        q_zero = flutter_onset_q(arr[:, 0], arr[:, 1])
        self.flutter = {"modes": pair, "margin": F, "zero_q_pa": q_zero, "q_pa": self.q_recent}
        level = ("advisory" if math.isfinite(q_zero) and q_zero < s.damping_q_margin * self.q_recent
                 else None)
        return self.book.report(
            "damping_trend:flutter_margin", "damping_trend", "flutter_zero_q_pa", level,
            q_zero if math.isfinite(q_zero) else 0.0, s.damping_q_margin * self.q_recent, t,
            self.model_id,
            f"Modes {pair[0]} and {pair[1]} approach each other as dynamic pressure rises; the "
            f"flutter margin extrapolates to zero at {q_zero:.0f} Pa (advisory).")

    def _margin_warnings(self, t: float) -> list[Output]:
        s = self.settings
        plan = self.plan
        if plan is not None and plan[0] + plan[1] * (plan[2].size - 1) < t:
            plan = None  # the plan has run out: back to a hold of the present angle
        self.last_margin = fc = self.margin.forecast(plan, t)
        self.margin_samples += int(self.ident.last_block["a"].size)
        if self.margin_samples * self.dt < 2.0:
            return []  # the filter state is still settling from its start
        pm = fc["predicted_min"]
        level = None
        if fc["now"] <= 0.0:
            level = "limit"
        elif pm < s.margin_caution or fc["time_to_limit_s"] is not None:
            level = "caution"
        elif pm < s.margin_advisory:
            level = "advisory"
        ttl = fc["time_to_limit_s"]
        msg = (f"Curvature margin {100 * fc['now']:.0f} % now, {100 * pm:.0f} % predicted within "
               f"{s.margin_horizon_s:.1f} s" + (f"; limit reached in about {ttl:.1f} s" if ttl else "")
               + " (advisory).")
        return self.book.report("curvature_margin:root", "curvature_margin", "curvature_margin",
                                level, pm, s.margin_advisory, t, self.model_id, msg)

    def _watch_message(self, t: float) -> Output:
        fc = getattr(self, "last_margin", None) or self.margin.forecast(self.plan, t)
        drift = {k: {"z": v, "cusum": None, "threshold": self.h} for k, v in self.last_z.items()}
        stat_c = self.cusum_coef.statistic
        for i, (key, _) in enumerate(COEFS):
            for j, o in enumerate(OUTS):
                name = f"{key}.{o}"
                if name in drift:
                    drift[name]["cusum"] = float(stat_c[i * 2 + j])
        stat_m = self.cusum_mode.statistic
        for k, name in enumerate(("mode.freq_hz", "mode.damping")):
            if name in drift:
                drift[name]["cusum"] = float(stat_m[k])
        if "zero_shift.curvature" in drift:
            drift["zero_shift.curvature"]["cusum"] = float(self.cusum_zero.statistic[0])
        sensors = {k: dict(v) for k, v in self.sensors.items()}
        if self.gauge_suspect and sensors.get(self.gauge_channel, {}).get("state", "ok") == "ok":
            dl = self.zero_info.get("level_change", 0.0)
            sensors[self.gauge_channel] = {
                "state": "zero_drift",
                "detail": f"curvature level moved {dl:+.4f} 1/m with lift and gain unchanged"}
        return Output("watch", {
            "t": t, "model_id": self.model_id, "margin": fc, "drift": drift,
            "stale": dict(self.stale), "sensors": sensors,
            "baseline_offset": dict(self.base_offset),
            "flutter": None if self.flutter is None else dict(self.flutter),
        })

    # ----------------------------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        return {
            "cusum_coef": self.cusum_coef.state_dict(), "cusum_mode": self.cusum_mode.state_dict(),
            "book": self.book.state_dict(), "margin": self.margin.state_dict(),
            "seen_seq": self.seen_seq, "since_watch": self.since_watch,
            "last_z": dict(self.last_z), "stale": dict(self.stale),
            "ref_x": None if self.ref_x is None else self.ref_x.copy(),
            "ref_sq": self.ref_sq.copy(), "ref_n": self.ref_n,
            "ref_base": None if self.ref_base is None else self.ref_base.copy(),
            "noise_base": None if self.noise_base is None else self.noise_base.copy(),
            "noise_acc": [a.copy() for a in self.noise_acc], "noise_blocks": self.noise_blocks,
            "sensors": {k: dict(v) for k, v in self.sensors.items()},
            "gauge_suspect": self.gauge_suspect, "basis": self.basis.state_dict(),
            "basis_alt": self.basis_alt.state_dict(),
            "base_acc_alt": [a.copy() for a in self.base_acc_alt],
            "win_a": list(self.win_a), "cusum_zero": self.cusum_zero.state_dict(),
            "zero_wsum": self.zero_wsum.copy(), "zero_wn": self.zero_wn.copy(),
            "zero_info": {k: (dict(v) if isinstance(v, dict) else v)
                          for k, v in self.zero_info.items()},
            "damp_hist": list(self.damp_hist), "q_recent": self.q_recent,
            "acc_si": self._acc_array().copy(),
            "flutter_hist": list(self.flutter_hist), "flutter_pair": self.flutter_pair,
            "flutter": None if self.flutter is None else dict(self.flutter),
            "base": None if self.base is None else self.base.copy(),
            "base_level": None if self.base_level is None else self.base_level.copy(),
            "base_level_sd": None if self.base_level_sd is None else self.base_level_sd.copy(),
            "base_sd": None if self.base_sd is None else self.base_sd.copy(),
            "base_acc": [a.copy() for a in self.base_acc], "base_offset": dict(self.base_offset),
            "plan": None if self.plan is None else [self.plan[0], self.plan[1], self.plan[2].copy()],
            "mode_base": None if self.mode_base is None else self.mode_base.copy(),
            "mode_sd": None if self.mode_sd is None else self.mode_sd.copy(),
            "mode_acc": list(self.mode_acc), "mode_label": self.mode_label,
            "base_t": self.base_t, "base_since": self.base_since,
            "first_model_t": self.first_model_t,
            "alarm_run": self.alarm_run.copy(),
            "margin_samples": self.margin_samples,
        }

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.reset()
        self.cusum_coef.load_state_dict(st["cusum_coef"])
        self.cusum_mode.load_state_dict(st["cusum_mode"])
        self.book.load_state_dict(st["book"])
        self.margin.load_state_dict(st["margin"])
        self.seen_seq = int(st["seen_seq"])
        self.since_watch = int(st["since_watch"])
        self.last_z = dict(st["last_z"])
        self.stale = dict(st["stale"])
        self.ref_x = None if st["ref_x"] is None else np.array(st["ref_x"], dtype=float)
        self.ref_sq = np.array(st["ref_sq"], dtype=float)
        self.ref_n = int(st["ref_n"])
        self.ref_base = None if st["ref_base"] is None else np.array(st["ref_base"], dtype=float)
        self.noise_base = None if st["noise_base"] is None else np.array(st["noise_base"], dtype=float)
        self.noise_acc = [np.array(a, dtype=float) for a in st["noise_acc"]]
        self.noise_blocks = int(st["noise_blocks"])
        self.sensors = {k: dict(v) for k, v in st["sensors"].items()}
        self.gauge_suspect = bool(st["gauge_suspect"])
        self.basis.load_state_dict(st["basis"])
        self.basis_alt.load_state_dict(st["basis_alt"])
        self.base_acc_alt = [np.array(a, dtype=float) for a in st["base_acc_alt"]]
        self.win_a = [float(st["win_a"][0]), int(st["win_a"][1])]
        self.cusum_zero.load_state_dict(st["cusum_zero"])
        self.zero_wsum = np.array(st["zero_wsum"], dtype=float).reshape(2, len(WITNESSES))
        self.zero_wn = np.array(st["zero_wn"], dtype=int).reshape(2, len(WITNESSES))
        self.zero_info = {k: (dict(v) if isinstance(v, dict) else v)
                          for k, v in st["zero_info"].items()}
        self.damp_hist = [tuple(x) for x in st["damp_hist"]]
        self.flutter_hist = [tuple(x) for x in st.get("flutter_hist", [])]
        fp = st.get("flutter_pair")
        self.flutter_pair = None if fp is None else [int(i) for i in fp]
        fl = st.get("flutter")
        self.flutter = None if fl is None else dict(fl)
        self.q_recent = float(st["q_recent"])
        acc = np.array(st.get("acc_si", []), dtype=float).reshape(  # absent before 2026-12-03
            -1, len(self.config.conditioning_stream.channels))
        self.acc_si = [acc] if acc.shape[0] else []
        self.base = None if st["base"] is None else np.array(st["base"], dtype=float)
        self.base_level = (None if st["base_level"] is None
                           else np.array(st["base_level"], dtype=float))
        self.base_level_sd = (None if st["base_level_sd"] is None
                              else np.array(st["base_level_sd"], dtype=float))
        self.base_sd = None if st["base_sd"] is None else np.array(st["base_sd"], dtype=float)
        self.base_acc = [np.array(a, dtype=float) for a in st["base_acc"]]
        self.base_offset = dict(st["base_offset"])
        pl = st.get("plan")
        self.plan = None if pl is None else (float(pl[0]), float(pl[1]), np.asarray(pl[2], float))
        self.mode_base = None if st["mode_base"] is None else np.array(st["mode_base"], dtype=float)
        self.mode_sd = None if st["mode_sd"] is None else np.array(st["mode_sd"], dtype=float)
        self.mode_acc = [tuple(x) for x in st["mode_acc"]]
        self.mode_label = st["mode_label"]
        self.base_t = float(st["base_t"])
        self.base_since = st["base_since"]
        self.first_model_t = st["first_model_t"]
        self.alarm_run = np.asarray(st["alarm_run"], dtype=int)
        self.margin_samples = int(st["margin_samples"])
