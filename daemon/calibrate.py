"""Calibration: the interpretable reference model from a pitch-up manoeuvre.

The procedure of the empirical state-space representation of Theodorsen's model and its
extension to lift and deformation (J. Fluids and Structures 38, 2013; AIAA Journal, 2023): the
outputs ``y = [C_L, curvature]`` about the pre-manoeuvre operating point are

    y = K_qs alpha + K_rate alpha_dot + K_am alpha_ddot + C x + bias,   x' = A x + B alpha_dot

1. Conditioning: alpha, C_L and curvature from the channel map; alpha_dot and alpha_ddot from
   a Savitzky-Golay differentiator (Savitzky and Golay, Analytical Chemistry 36(8), 1964),
   applied zero-lag offline (the causal output shifted back by its lag); its lag and white-noise
   gains are reported. Biases are removed using the quiet pre-manoeuvre segment.
2. Point reads (the published procedure): ``K_qs`` from the settled end of the hold,
   ``K_am`` at the instant of peak pitch acceleration (where alpha and alpha_dot are still
   small), ``K_rate`` at the instant of peak pitch rate (after removing the other two).
3. Whole-manoeuvre estimate, the model's coefficients: the columns and the transient's Markov
   parameters (impulse response of pitch rate, at a decimated rate) fitted together, the
   impulse response under the tuned-correlated kernel prior and the columns free, the prior's
   hyperparameters by restricted maximum likelihood
   (:func:`wingwatch.daemon.identify.transient.fir_markov_joint`). Reading the columns first
   and realising what is left (or an unregularised fit of columns and transient together)
   leaves the circulation lag inside the columns: on the rigid rig the added-mass column came
   out 7-9 % above Theodorsen's value that way, within 1 % this way. The point reads are
   reported beside; a large spread between the two is a warning sign.
4. Transient: ERA (Juang and Pappa, 1985) of those Markov parameters at each candidate rank,
   carried back to the sample rate; then C and the bias by least squares given (A, B) and the
   columns.
5. Rank: the error on a separate test manoeuvre for every candidate rank when one is given
   (the smallest rank within 10 % of the best), otherwise the Hankel singular values.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import decode_sensor_frame
from wingwatch.daemon.condition import ChannelMap
from wingwatch.daemon.config import Config, config_from_recorded
from wingwatch.daemon.errors import FrameRejected, IdentificationError
from wingwatch.daemon.identify.differentiate import differentiate, lag_of, noise_gain, savgol_kernels
from wingwatch.daemon.identify.era import choose_rank
from wingwatch.daemon.identify.interpretable import regressor, simulate_states
from wingwatch.daemon.identify.transient import MarkovEstimate, estimate_markov_joint, realise
from wingwatch.daemon.modelfile import COEFFICIENT_KEYS, OUTPUT_KEYS, ReferenceModel
from wingwatch.daemon.version import __version__

__all__ = ["CalibrationError", "Record", "Segments", "Calibration", "load_record",
           "find_segments", "calibrate", "contributions", "predict"]

DEFAULT_WINDOW = 41  # Savitzky-Golay window, samples (41 ms at 1 kHz)
DEFAULT_ORDER = 3


class CalibrationError(IdentificationError):
    """The log cannot give a reference model; the message says what is missing and what to do."""


@dataclass(frozen=True, eq=False)
class Record:
    """A conditioned, contiguous record: aligned alpha, its derivatives and the two outputs."""

    t: np.ndarray
    alpha: np.ndarray
    alpha_dot: np.ndarray
    alpha_ddot: np.ndarray
    y: np.ndarray  # (n, 2): C_L, curvature
    rate_hz: float
    path: str
    sha256: str
    config: Config
    window: int
    order: int

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    @property
    def lag(self) -> int:
        return lag_of(self.window)

    @property
    def noise_gain(self) -> list[float]:
        """White-noise gain of the value, rate and acceleration outputs (per s^d)."""
        return [float(g) for g in noise_gain(savgol_kernels(self.window, self.order,
                                                             1.0 / self.rate_hz))]


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    for p in rl.segment_paths(path):
        with open(p, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
    return h.hexdigest()


def load_record(path: str | Path, *, config: Config | None = None, window: int = DEFAULT_WINDOW,
                order: int = DEFAULT_ORDER) -> Record:
    """Read the conditioning stream of a log into one contiguous, differentiated record."""
    reader = rl.LogReader.open(path)
    if config is None:
        try:
            config = config_from_recorded(reader.header["config"], source=f"{path} (recorded configuration)")
        except KeyError:
            raise CalibrationError(f"{path}: the log header holds no configuration; pass --config "
                                   "with the channel map.") from None
    cmap = ChannelMap(config)
    blocks = []
    expected = None
    gaps = 0
    for rec in reader:
        if rec.kind != rl.KIND_INBOUND:
            continue
        try:
            f = decode_sensor_frame(rec.topic, rec.payload, max_bytes=config.limits.max_payload_bytes,
                                    max_channels=config.limits.max_channels,
                                    max_samples=config.limits.max_frame_samples)
        except FrameRejected:
            continue
        if not cmap.accepts(f):
            continue
        if f.channels != cmap.channels:
            missing = sorted(set(cmap.channels) - set(f.channels))
            raise CalibrationError(
                f"{path}: frames of stream '{f.stream}' lack channel(s) {', '.join(missing) or '?'} "
                "that the channel map needs; record them, or pass --config with a channel map "
                "for this log."
            )
        if expected is not None and abs(f.t0 - expected) > 0.5 / f.rate:
            gaps += 1
        expected = f.t_end
        blocks.append(cmap.apply(f))
    if not blocks:
        raise CalibrationError(f"{path}: the log holds no accepted frames of stream "
                               f"'{cmap.stream}'; nothing to calibrate from.")
    if gaps:
        raise CalibrationError(f"{path}: the record has {gaps} gap(s); calibration needs a "
                               "contiguous manoeuvre. Record it again or cut the log to a clean "
                               "stretch (wingwatch replay --from/--to).")
    t = np.concatenate([b.t for b in blocks])
    alpha = np.concatenate([b.alpha for b in blocks])
    y = np.column_stack([np.concatenate([b.lift for b in blocks]),
                         np.concatenate([b.curvature for b in blocks])])
    if not np.all(np.isfinite(y)):
        bad = int(np.count_nonzero(~np.isfinite(y[:, 0])))
        raise CalibrationError(f"{path}: {bad} samples have no lift coefficient (dynamic pressure "
                               "below outputs.lift.min_dynamic_pressure_pa: flow off?); calibrate "
                               "with the flow running.")
    rate = cmap.rate_hz
    if t.size < 4 * window:
        raise CalibrationError(f"{path}: only {t.size} samples; a calibration needs seconds of data.")
    out, _ = differentiate(alpha, window, order, 1.0 / rate)
    lag = lag_of(window)
    # The outputs pass through the same smoothing (value) kernel as alpha, so that ratios such
    # as y / alpha_ddot compare signals of the same bandwidth.
    ys = np.column_stack([differentiate(y[:, j], window, order, 1.0 / rate)[0][:, 0]
                          for j in range(y.shape[1])])
    # Zero-lag offline: the causal output at k estimates the input at k - lag.
    return Record(t=t[:-lag], alpha=out[lag:, 0], alpha_dot=out[lag:, 1], alpha_ddot=out[lag:, 2],
                  y=ys[lag:], rate_hz=rate, path=str(path), sha256=_sha256(Path(path)),
                  config=config, window=window, order=order)


@dataclass(frozen=True)
class Segments:
    quiet: slice
    start: int  # first sample of the manoeuvre
    end: int  # first sample of the hold after it
    settled: slice
    peak_acc: int
    peak_rate: int
    alpha0: float
    delta_alpha: float
    bias: np.ndarray  # outputs at the operating point (quiet mean)


def find_segments(rec: Record, *, min_step_deg: float = 0.5, quiet_s: float = 0.5,
                  settle_fraction: float = 0.25, settle_tol: float = 0.005) -> Segments:
    """Find the quiet lead-in, the manoeuvre, the settled end and the peak instants.

    Raises CalibrationError naming what is missing: no quiet lead-in, no pitch-up, a step too
    small, a record that never settles.
    """
    a = rec.alpha
    n0 = max(int(0.2 * rec.rate_hz), 10)
    a0 = float(np.median(a[:n0]))
    final = float(np.median(a[-max(int(0.1 * a.size), 10):]))
    step = final - a0
    if abs(step) < math.radians(min_step_deg):
        peak = float(np.max(np.abs(a - a0)))
        if peak < math.radians(min_step_deg):
            raise CalibrationError(
                f"{rec.path}: no pitch-up manoeuvre found (alpha moves at most "
                f"{math.degrees(peak):.2f} deg); record a smoothed ramp of a few degrees, then a hold.")
        raise CalibrationError(
            f"{rec.path}: the manoeuvre does not end in a hold at a new angle (net step "
            f"{math.degrees(step):.2f} deg, below {min_step_deg} deg); calibrate on a pitch-up and hold.")
    moving = np.flatnonzero(np.abs(a - a0) > 0.02 * abs(step))
    start = int(moving[0])
    arrived = np.flatnonzero(np.abs(a - final) > 0.02 * abs(step))
    end = int(arrived[-1]) + 1 if arrived.size else start
    quiet_end = start - int(0.05 * rec.rate_hz)
    if quiet_end < quiet_s * rec.rate_hz:
        raise CalibrationError(
            f"{rec.path}: the manoeuvre starts {rec.t[start] - rec.t[0]:.2f} s into the record; "
            f"calibration needs at least {quiet_s} s of quiet before it to remove biases.")
    quiet = slice(0, quiet_end)
    hold = rec.n - end
    if hold < 2 * rec.rate_hz:
        raise CalibrationError(f"{rec.path}: the hold after the manoeuvre lasts only "
                               f"{hold / rec.rate_hz:.2f} s; hold the new angle until the response "
                               "settles (several seconds).")
    q_len = int(settle_fraction * hold)
    s0 = rec.n - q_len
    settled = slice(s0, rec.n)
    before = slice(s0 - q_len, s0)
    bias = rec.y[quiet].mean(axis=0)
    dy = rec.y - bias
    # Settled means the outputs no longer move: the mean over the last part of the hold differs
    # from the mean over the part before it by less than settle_tol of the response (a slowly
    # creeping wake would bias the quasi-steady column low).
    noise = rec.y[quiet].std(axis=0)
    for j, name in enumerate(OUTPUT_KEYS):
        last = float(dy[settled, j].mean())
        change = abs(last - float(dy[before, j].mean()))
        if abs(last) < 5.0 * noise[j]:
            continue  # no response above the noise (a rigid plate's curvature): nothing to settle
        if change > settle_tol * abs(last):
            span = q_len / rec.rate_hz
            raise CalibrationError(
                f"{rec.path}: the {name} response has not settled by the end of the record (it "
                f"still moves {100 * change / abs(last):.1f} % between the last two {span:.1f} s "
                "stretches of the hold); hold longer before ending the manoeuvre.")
    # Peak pitch rate over the manoeuvre; peak pitch acceleration in the accelerating phase
    # before it (the deceleration peak at the end of the ramp has the wake fully under way).
    lead = max(start - int(0.1 * rec.rate_hz), quiet_end)
    sgn = 1.0 if step > 0 else -1.0
    win = slice(lead, end + int(0.2 * rec.rate_hz))
    peak_rate = lead + int(np.argmax(sgn * rec.alpha_dot[win]))
    peak_acc = lead + int(np.argmax(sgn * rec.alpha_ddot[lead:peak_rate + 1]))
    return Segments(quiet=quiet, start=start, end=end, settled=settled, peak_acc=peak_acc,
                    peak_rate=peak_rate, alpha0=a0, delta_alpha=step, bias=bias)


def find_lead_in(rec: Record, *, quiet_s: float = 0.5) -> Segments:
    """The operating point of a test manoeuvre (any motion) from its quiet lead-in."""
    a = rec.alpha
    n0 = max(int(0.2 * rec.rate_hz), 10)
    a0 = float(np.median(a[:n0]))
    dev = np.abs(a - a0)
    if dev.max() < math.radians(0.2):
        raise CalibrationError(f"{rec.path}: alpha hardly moves in the test record; give a test "
                               "manoeuvre (pitch-up, hold, pitch-down).")
    start = int(np.flatnonzero(dev > 0.02 * dev.max())[0])
    quiet_end = start - int(0.05 * rec.rate_hz)
    if quiet_end < quiet_s * rec.rate_hz:
        raise CalibrationError(f"{rec.path}: the test manoeuvre needs at least {quiet_s} s of "
                               "quiet before it (its operating point).")
    q = slice(0, quiet_end)
    return Segments(quiet=q, start=start, end=rec.n, settled=slice(rec.n, rec.n), peak_acc=start,
                    peak_rate=start, alpha0=a0, delta_alpha=float(a[np.argmax(dev)] - a0),
                    bias=rec.y[q].mean(axis=0))


def _noise_check(rec: Record, seg: Segments) -> list[str]:
    """Refuse a manoeuvre whose lift is lost in the noise; note an output without response."""
    q = seg.quiet
    noise = rec.y[q].std(axis=0)
    resp = np.abs(rec.y[seg.settled].mean(axis=0) - seg.bias)
    notes = []
    for j, name in enumerate(OUTPUT_KEYS):
        if resp[j] < 3.0 * noise[j]:
            msg = (f"{rec.path}: the {name} response to the manoeuvre ({resp[j]:.3g}) is lost in "
                   f"its noise ({noise[j]:.3g} rms)")
            if name == "lift":
                raise CalibrationError(msg + "; use a larger step or check the lift channels.")
            notes.append(msg + f": its coefficients are near zero (a rigid article?) or the "
                         f"{name} channel is not connected")
    return notes


def point_read(rec: Record, seg: Segments) -> dict[str, np.ndarray]:
    """The published point reads of the coefficient columns."""
    a = rec.alpha - seg.alpha0
    dy = rec.y - seg.bias
    k_qs = dy[seg.settled].mean(axis=0) / a[seg.settled].mean()  # settled end
    w = max(2, int(0.002 * rec.rate_hz))  # a few samples around each instant, against noise

    def at(i: int, x: np.ndarray) -> np.ndarray:
        return x[max(i - w, 0):i + w + 1].mean(axis=0)

    # At the peak pitch acceleration and at the peak pitch rate, the response less the
    # quasi-steady term is K_am alpha_ddot + K_rate alpha_dot (the transient still small):
    # two instants, two unknowns per output. Neither alpha_dot at the first instant nor
    # alpha_ddot at the second is exactly zero for a smoothed ramp, so both are solved together.
    i, j = seg.peak_acc, seg.peak_rate
    M = np.array([[at(i, rec.alpha_ddot), at(i, rec.alpha_dot)],
                  [at(j, rec.alpha_ddot), at(j, rec.alpha_dot)]])
    rhs = np.vstack([at(i, dy) - k_qs * at(i, a), at(j, dy) - k_qs * at(j, a)])
    if abs(np.linalg.det(M)) < 1e-12 * np.abs(M).max() ** 2:
        raise CalibrationError(f"{rec.path}: the peak pitch acceleration and the peak pitch rate "
                               "fall together; use a smoothed ramp.")
    k_am, k_rate = np.linalg.solve(M, rhs)
    return {"quasi_steady": k_qs, "rate": k_rate, "added_mass": k_am}


def _lag1_inflation(res: np.ndarray) -> np.ndarray:
    """Variance inflation ``n / n_eff = (1 + rho) / (1 - rho)`` for residuals with lag-1
    autocorrelation ``rho``, per column (common practice, no source)."""
    rho = np.array([np.corrcoef(res[:-1, j], res[1:, j])[0, 1] for j in range(res.shape[1])])
    rho = np.clip(np.nan_to_num(rho), 0.0, 0.999)
    return (1 + rho) / (1 - rho)


@dataclass(frozen=True, eq=False)
class Columns:
    """The coefficient columns from the joint estimate (step 4), with their one-sigma errors."""

    beta: np.ndarray  # (3, 2): quasi-steady, rate, added-mass rows; C_L, curvature columns
    sd: np.ndarray  # (3, 2)
    markov: MarkovEstimate
    hyper: list


def joint_columns(rec: Record, seg: Segments, *, decimate: int, markov_s: float,
                  min_lags: int) -> Columns:
    """Step 4: the columns and the transient's Markov parameters in one regularised fit."""
    a = rec.alpha - seg.alpha0
    dy = rec.y - seg.bias
    F = np.column_stack([a, rec.alpha_dot, rec.alpha_ddot])
    try:
        est, je = estimate_markov_joint(rec.alpha_dot, F, dy, rec.rate_hz, decimate=decimate,
                                        markov_s=markov_s, min_lags=min_lags)
    except IdentificationError as exc:
        raise CalibrationError(f"{rec.path}: {exc}; use a longer record or a richer "
                               "manoeuvre.") from None
    infl = _lag1_inflation(je.residual)
    sd = np.sqrt(np.maximum(np.diagonal(je.beta_cov, axis1=1, axis2=2).T * infl, 0.0))
    return Columns(beta=je.beta, sd=sd, markov=est, hyper=je.hyper)


def _fit(rec: Record, seg: Segments, A: np.ndarray, B: np.ndarray, cols: Columns
         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Given the columns and (A, B): C and the bias by least squares.

    Returns theta (4 + r, 2) in :func:`regressor` order, its one-sigma errors and the residual.
    """
    a = rec.alpha - seg.alpha0
    X, _ = simulate_states(A, B[:, 0], rec.alpha_dot)
    phi = regressor(a, rec.alpha_dot, rec.alpha_ddot, X)
    dy = rec.y - seg.bias
    rest = dy - phi[:, :3] @ cols.beta
    Z = phi[:, 3:]  # states and the constant
    scale = np.sqrt(np.mean(Z * Z, axis=0))
    scale[scale == 0] = 1.0
    coef, _, rnk, sv = np.linalg.lstsq(Z / scale, rest, rcond=None)
    if rnk < Z.shape[1] or sv[0] > 1e10 * sv[-1]:
        raise CalibrationError(f"{rec.path}: the manoeuvre does not separate the transient states "
                               f"at rank {A.shape[0]}; use a richer manoeuvre or a lower rank.")
    coef = coef / scale[:, None]
    res = rest - Z @ coef
    n, p = Z.shape
    s2 = np.sum(res * res, axis=0) / max(n - p, 1)
    cov = np.linalg.pinv((Z / scale).T @ (Z / scale)) / np.outer(scale, scale)
    sd_z = np.sqrt(np.maximum(np.outer(np.diag(cov), s2 * _lag1_inflation(res)), 0.0))
    return np.vstack([cols.beta, coef]), np.vstack([cols.sd, sd_z]), res


def predict(model: ReferenceModel, rec: Record, seg: Segments | None = None) -> np.ndarray:
    """The model's output deviation on a record (about that record's own operating point)."""
    seg = seg or find_lead_in(rec)
    a = rec.alpha - seg.alpha0
    X, _ = simulate_states(model.A, model.B[:, 0], rec.alpha_dot)
    parts = contributions(model, a, rec.alpha_dot, rec.alpha_ddot, X)
    return sum(parts.values())


def contributions(model: ReferenceModel, a: np.ndarray, ad: np.ndarray, add: np.ndarray,
                  X: np.ndarray) -> dict[str, np.ndarray]:
    """The output split into its terms, each (n, 2)."""
    return {
        "quasi_steady": np.outer(a, model.k_qs),
        "rate": np.outer(ad, model.k_rate),
        "added_mass": np.outer(add, model.k_am),
        "transient": X @ model.C.T,
        "bias": np.broadcast_to(model.bias, (a.size, 2)),
    }


def _nrmse(err: np.ndarray, ref: np.ndarray) -> np.ndarray:
    return np.sqrt(np.mean(err * err, axis=0)) / np.maximum(np.sqrt(np.mean(ref * ref, axis=0)),
                                                            1e-300)


@dataclass
class Calibration:
    model: ReferenceModel
    point_read: dict[str, np.ndarray]
    errors_by_rank: dict[int, dict[str, float]]
    rank_reason: str
    spread_warnings: list[str]
    shares: dict[str, dict[str, float]]  # term -> output -> share of signal energy
    evaluated_on: str
    segments: Segments
    notes: list[str] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        m = self.model

        def pair(v: np.ndarray) -> dict[str, float]:
            return {k: float(x) for k, x in zip(OUTPUT_KEYS, v)}

        return {
            "rank": m.rank,
            "rank_reason": self.rank_reason,
            "quasi_steady": pair(m.k_qs),
            "rate": pair(m.k_rate),
            "added_mass": pair(m.k_am),
            "bias": pair(m.bias),
            "uncertainty": {k: pair(m.sd[k]) for k in COEFFICIENT_KEYS},
            "point_read": {k: pair(v) for k, v in self.point_read.items()},
            "spread_warnings": self.spread_warnings,
            "hankel_sv": [float(x) for x in m.hankel_sv],
            "errors_by_rank": {str(r): e for r, e in sorted(self.errors_by_rank.items())},
            "errors_evaluated_on": self.evaluated_on,
            "contributions": self.shares,
            "operating_point": m.operating_point,
            "differentiator": m.extra.get("differentiator"),
            "notes": self.notes,
        }


def calibrate(cal: Record, test: Record | None = None, *, rank: int | None = None,
              max_rank: int = 12, decimate: int = 20, markov_s: float = 5.0) -> Calibration:
    """Identify the reference model from ``cal``; score ranks on ``test`` when given."""
    seg = find_segments(cal)
    notes = _noise_check(cal, seg)
    pr = point_read(cal, seg)
    need_s = 3.2 * markov_s + 1.0
    if cal.n / cal.rate_hz < need_s:
        raise CalibrationError(
            f"{cal.path}: the record is {cal.n / cal.rate_hz:.1f} s long; realising the transient "
            f"needs at least {need_s:.0f} s (quiet lead-in, manoeuvre and a long hold).")
    cols = joint_columns(cal, seg, decimate=decimate, markov_s=markov_s, min_lags=2 * max_rank + 2)
    est = cols.markov
    cap = min(max_rank, est.max_rank)
    if rank is not None and not 1 <= rank <= cap:
        raise CalibrationError(f"--rank {rank} is outside 1..{cap} for this record.")

    tseg = find_lead_in(test) if test is not None else None
    target, tsg = (test, tseg) if test is not None else (cal, seg)
    target_dy = target.y - tsg.bias
    fits: dict[int, tuple[ReferenceModel, Any]] = {}
    errors: dict[int, dict[str, float]] = {}
    for r in range(1, cap + 1):
        try:
            tf = realise(est, r, max_rank=cap)
            theta, sd, _ = _fit(cal, seg, tf.A, tf.B, cols)
        except IdentificationError:
            continue
        m = _model(cal, seg, tf, theta, sd)
        e = _nrmse(predict(m, target, tsg) - target_dy, target_dy)
        errors[r] = {"lift": float(e[0]), "curvature": float(e[1])}
        fits[r] = (m, tf)
    if not fits:
        raise CalibrationError(f"{cal.path}: no rank gave a stable transient model; the manoeuvre "
                               "is too noisy or too small.")
    score = {r: max(e["lift"], e["curvature"]) for r, e in errors.items()}
    if rank is not None:
        if rank not in fits:
            raise CalibrationError(f"rank {rank} gives no stable model for this record; try "
                                   f"one of {sorted(fits)}.")
        chosen, reason = rank, f"rank {rank} given on the command line"
    elif test is not None:
        best = min(score.values())
        chosen = min(r for r, s in score.items() if s <= 1.10 * best)
        reason = (f"smallest rank whose test-manoeuvre error ({100 * score[chosen]:.2f} %, the "
                  f"larger of lift and curvature) is within 10 % of the best ({100 * best:.2f} % "
                  f"at rank {min(score, key=score.get)})")
    else:
        hsv_rank = choose_rank(est.hankel_sv, energy=0.99, gap=4.0, max_rank=cap)
        chosen = max(r for r in fits if r <= hsv_rank) if any(r <= hsv_rank for r in fits) else min(fits)
        reason = ("from the Hankel singular values (99 % of their sum, or the last drop of 4x "
                  "before it); pass --test LOG to choose by the error on a test manoeuvre")
    model, tf = fits[chosen]
    model = _with_extra(model, cal, test, errors, pr)

    spread = []
    for key, vals in pr.items():
        ls = model.coefficient(key)
        for j, out in enumerate(OUTPUT_KEYS):
            if abs(ls[j]) > 0 and abs(vals[j] - ls[j]) > 0.25 * abs(ls[j]) + 3 * model.sd[key][j]:
                spread.append(f"{key}.{out}: point read {vals[j]:.4g} differs from the "
                              f"whole-manoeuvre estimate {ls[j]:.4g} by more than 25 %")

    ta = target.alpha - tsg.alpha0
    X, _ = simulate_states(model.A, model.B[:, 0], target.alpha_dot)
    parts = contributions(model, ta, target.alpha_dot, target.alpha_ddot, X)
    energy = {k: np.sum(v * v, axis=0) for k, v in parts.items() if k != "bias"}
    tot = sum(energy.values())
    shares = {k: {o: float(v[j] / tot[j]) if tot[j] > 0 else 0.0 for j, o in enumerate(OUTPUT_KEYS)}
              for k, v in energy.items()}
    if test is None:
        notes.append("errors_by_rank are in-sample (on the calibration manoeuvre itself)")
    return Calibration(model=model, point_read=pr, errors_by_rank=errors, rank_reason=reason,
                       spread_warnings=spread, shares=shares,
                       evaluated_on="test manoeuvre" if test is not None else "calibration manoeuvre",
                       segments=seg, notes=notes)


def _model(rec: Record, seg: Segments, tf: Any, theta: np.ndarray, sd: np.ndarray) -> ReferenceModel:
    r = tf.A.shape[0]
    sdd = {"quasi_steady": sd[0], "rate": sd[1], "added_mass": sd[2], "bias": sd[-1]}
    return ReferenceModel(
        dt=1.0 / rec.rate_hz, A=tf.A, B=tf.B, C=theta[3:3 + r].T.copy(),
        k_qs=theta[0].copy(), k_rate=theta[1].copy(), k_am=theta[2].copy(), bias=theta[-1].copy(),
        sd=sdd,
        operating_point={"alpha_rad": seg.alpha0, "lift": float(seg.bias[0]),
                         "curvature": float(seg.bias[1])},
        hankel_sv=tf.hankel_sv,
    )


def _with_extra(m: ReferenceModel, cal: Record, test: Record | None,
                errors: dict[int, dict[str, float]], pr: dict[str, np.ndarray]) -> ReferenceModel:
    import datetime as _dt

    extra = {
        "point_read": {k: {o: float(v[j]) for j, o in enumerate(OUTPUT_KEYS)} for k, v in pr.items()},
        "differentiator": {"method": "savitzky-golay", "window": cal.window, "order": cal.order,
                           "lag_samples": cal.lag, "noise_gain": cal.noise_gain},
        "provenance": {
            "log": cal.path, "log_sha256": cal.sha256,
            "test_log": test.path if test is not None else None,
            "test_log_sha256": test.sha256 if test is not None else None,
            "config": cal.config.as_dict(), "software_version": __version__,
            "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        },
    }
    return ReferenceModel(dt=m.dt, A=m.A, B=m.B, C=m.C, k_qs=m.k_qs, k_rate=m.k_rate, k_am=m.k_am,
                          bias=m.bias, sd=m.sd, operating_point=m.operating_point,
                          hankel_sv=m.hankel_sv, errors_by_rank=errors, extra=extra)
