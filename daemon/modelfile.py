"""Reference model files: the calibration's output and the daemon's starting point.

A model file is one JSON document (UTF-8), readable without wingwatch. Version 1::

    {
      "format": "wingwatch-model", "version": 1,
      "dt": 0.001,                         sample time of the discrete model, s
      "rank": 8,
      "input": "alpha_dot", "outputs": ["lift", "curvature"],
      "A": [[...]], "B": [[...]], "C": [[...]],     r x r, r x 1, 2 x r (nested lists)
      "coefficients": {"quasi_steady": {"lift": .., "curvature": ..}, "rate": {..},
                       "added_mass": {..}, "bias": {..}},
      "uncertainty":  same keys: one standard deviation of each coefficient,
      "units": {"quasi_steady": "per rad", "rate": "per rad/s", "added_mass": "per rad/s^2",
                "lift": "1", "curvature": "1/m"},
      "operating_point": {"alpha_rad": .., "lift": .., "curvature": ..},
      "hankel_sv": [...], "errors_by_rank": {"4": {"lift": .., "curvature": ..}, ...},
      "point_read": {...}, "differentiator": {"window": 41, "order": 3, "lag_samples": 20},
      "provenance": {"log": "...", "log_sha256": "...", "test_log": .., "config": {...},
                     "software_version": "...", "created_utc": "..."}
    }

The model is ``y - operating_point = K_qs (alpha - alpha_0) + K_rate alpha_dot + K_am alpha_ddot
+ C x + bias`` with ``x[k+1] = A x[k] + B alpha_dot[k]``. Floats are written with Python's
shortest round-trip representation, so save then load is exact. :func:`load_model` refuses a
truncated file, a wrong format or version, wrong shapes, non-finite values and an unstable A,
each with one sentence naming the file and the field.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from wingwatch.daemon.errors import ModelFileError

__all__ = ["ReferenceModel", "save_model", "load_model", "model_from_dict", "MODEL_FORMAT",
           "MODEL_VERSION",
           "COEFFICIENT_KEYS", "OUTPUT_KEYS"]

MODEL_FORMAT = "wingwatch-model"
MODEL_VERSION = 1
COEFFICIENT_KEYS = ("quasi_steady", "rate", "added_mass", "bias")
OUTPUT_KEYS = ("lift", "curvature")
UNITS = {"quasi_steady": "per rad", "rate": "per rad/s", "added_mass": "per rad/s^2",
         "bias": "output units", "lift": "1", "curvature": "1/m"}


@dataclass(frozen=True, eq=False)
class ReferenceModel:
    """The interpretable reference model (arrays; coefficient vectors are [lift, curvature])."""

    dt: float
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    k_qs: np.ndarray
    k_rate: np.ndarray
    k_am: np.ndarray
    bias: np.ndarray
    sd: dict[str, np.ndarray]  # one standard deviation per coefficient group
    operating_point: dict[str, float]
    hankel_sv: np.ndarray = field(default_factory=lambda: np.zeros(0))
    errors_by_rank: dict[int, dict[str, float]] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)  # point_read, differentiator, provenance

    @property
    def rank(self) -> int:
        return int(self.A.shape[0])

    def coefficient(self, key: str) -> np.ndarray:
        return {"quasi_steady": self.k_qs, "rate": self.k_rate, "added_mass": self.k_am,
                "bias": self.bias}[key]

    def as_dict(self) -> dict[str, Any]:
        def pair(v: np.ndarray) -> dict[str, float]:
            return {k: float(x) for k, x in zip(OUTPUT_KEYS, v)}

        d: dict[str, Any] = {
            "format": MODEL_FORMAT,
            "version": MODEL_VERSION,
            "dt": float(self.dt),
            "rank": self.rank,
            "input": "alpha_dot",
            "outputs": list(OUTPUT_KEYS),
            "A": self.A.tolist(),
            "B": self.B.reshape(self.rank, 1).tolist(),
            "C": self.C.tolist(),
            "coefficients": {k: pair(self.coefficient(k)) for k in COEFFICIENT_KEYS},
            "uncertainty": {k: pair(self.sd[k]) for k in COEFFICIENT_KEYS},
            "units": dict(UNITS),
            "operating_point": {k: float(v) for k, v in self.operating_point.items()},
            "hankel_sv": [float(x) for x in self.hankel_sv],
            "errors_by_rank": {str(r): {k: float(v) for k, v in e.items()}
                               for r, e in sorted(self.errors_by_rank.items())},
        }
        d.update(self.extra)
        return d


def save_model(model: ReferenceModel, path: str | Path) -> Path:
    """Write the model file atomically (a partial file never replaces a good one)."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(json.dumps(model.as_dict(), indent=1, allow_nan=False) + "\n", "utf-8")
    tmp.replace(p)
    return p


def _matrix(d: dict[str, Any], key: str, shape: tuple[int, int], where: str) -> np.ndarray:
    try:
        a = np.array(d[key], dtype=float)
    except KeyError:
        raise ModelFileError(f"{where}: field '{key}' is missing.") from None
    except (TypeError, ValueError):
        raise ModelFileError(f"{where}: field '{key}' is not a matrix of numbers.") from None
    if a.shape != shape:
        raise ModelFileError(f"{where}: field '{key}' has shape {a.shape}, expected {shape}.")
    if not np.all(np.isfinite(a)):
        raise ModelFileError(f"{where}: field '{key}' holds NaN or infinite values.")
    return a


def _pairs(d: dict[str, Any], key: str, where: str) -> dict[str, np.ndarray]:
    tab = d.get(key)
    if not isinstance(tab, dict):
        raise ModelFileError(f"{where}: field '{key}' is missing or not a map.")
    out = {}
    for c in COEFFICIENT_KEYS:
        sub = tab.get(c)
        if not isinstance(sub, dict):
            raise ModelFileError(f"{where}: field '{key}.{c}' is missing.")
        vals = []
        for o in OUTPUT_KEYS:
            v = sub.get(o)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ModelFileError(f"{where}: field '{key}.{c}.{o}' must be a finite number.")
            vals.append(float(v))
        out[c] = np.array(vals)
    return out


def load_model(path: str | Path) -> ReferenceModel:
    """Read and validate a model file.

    Raises
    ------
    ModelFileError
        One sentence naming the file and the field at fault.
    """
    p = Path(path)
    where = str(p)
    try:
        text = p.read_text("utf-8")
    except FileNotFoundError:
        raise ModelFileError(f"{where}: model file not found.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ModelFileError(f"{where}: cannot read the model file ({exc}).") from None
    try:
        d = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ModelFileError(f"{where}: not a complete JSON document (truncated or damaged at "
                             f"line {exc.lineno}).") from None
    return model_from_dict(d, where)


def model_from_dict(d: Any, where: str = "<model>") -> ReferenceModel:
    """Validate a parsed model document (as in a file, or embedded in a log header)."""
    if not isinstance(d, dict) or d.get("format") != MODEL_FORMAT:
        raise ModelFileError(f"{where}: not a wingwatch model file (field 'format').")
    if d.get("version") != MODEL_VERSION:
        raise ModelFileError(f"{where}: model file version {d.get('version')!r} is not supported "
                             f"(this reads {MODEL_VERSION}).")
    rank = d.get("rank")
    if isinstance(rank, bool) or not isinstance(rank, int) or rank < 1:
        raise ModelFileError(f"{where}: field 'rank' must be a whole number of at least 1.")
    dt = d.get("dt")
    if isinstance(dt, bool) or not isinstance(dt, (int, float)) or not (dt > 0 and math.isfinite(dt)):
        raise ModelFileError(f"{where}: field 'dt' must be a positive number of seconds.")
    A = _matrix(d, "A", (rank, rank), where)
    B = _matrix(d, "B", (rank, 1), where)
    C = _matrix(d, "C", (len(OUTPUT_KEYS), rank), where)
    rho = float(np.max(np.abs(np.linalg.eigvals(A))))
    if rho >= 1.0:
        raise ModelFileError(f"{where}: field 'A' is unstable (spectral radius {rho:.6f} >= 1).")
    coef = _pairs(d, "coefficients", where)
    sd = _pairs(d, "uncertainty", where)
    op = d.get("operating_point", {})

    def _finite(v: Any) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)

    if not isinstance(op, dict) or not all(_finite(op.get(k)) for k in ("alpha_rad", "lift", "curvature")):
        raise ModelFileError(f"{where}: field 'operating_point' needs finite alpha_rad, lift and "
                             "curvature.")
    if d.get("input", "alpha_dot") != "alpha_dot":
        raise ModelFileError(f"{where}: field 'input' must be 'alpha_dot' (the transient's input).")
    if d.get("outputs", list(OUTPUT_KEYS)) != list(OUTPUT_KEYS):
        raise ModelFileError(f"{where}: field 'outputs' must be {list(OUTPUT_KEYS)}.")
    known = {"format", "version", "dt", "rank", "input", "outputs", "A", "B", "C", "coefficients",
             "uncertainty", "units", "operating_point", "hankel_sv", "errors_by_rank"}
    extras = {"point_read", "differentiator", "provenance"}
    for k in d:
        if k not in known and k not in extras:
            raise ModelFileError(f"{where}: field '{k}' is not part of model file version "
                                 f"{MODEL_VERSION}.")
    try:
        hsv = np.array(d.get("hankel_sv", []), dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise ModelFileError(f"{where}: field 'hankel_sv' must be a list of numbers.") from None
    ebr = d.get("errors_by_rank") or {}
    if not isinstance(ebr, dict):
        raise ModelFileError(f"{where}: field 'errors_by_rank' must be a map of rank to errors.")
    errors = {}
    for r, e in ebr.items():
        try:
            errors[int(r)] = {k: float(v) for k, v in e.items()}
        except (TypeError, ValueError, AttributeError):
            raise ModelFileError(f"{where}: field 'errors_by_rank.{r}' is not a map of numbers.") from None
    return ReferenceModel(
        dt=float(dt), A=A, B=B, C=C,
        k_qs=coef["quasi_steady"], k_rate=coef["rate"], k_am=coef["added_mass"],
        bias=coef["bias"], sd=sd,
        operating_point={k: float(op[k]) for k in ("alpha_rad", "lift", "curvature")},
        hankel_sv=hsv,
        errors_by_rank=errors,
        extra={k: v for k, v in d.items() if k in extras},
    )
