"""Conditioning stage: raw channels to physical quantities through the calibrated channel map.

Each raw channel becomes an SI value, ``value = gain * raw + offset`` (``[channels]`` in the
configuration). The outputs the model is identified on are then formed from them:

- angle of attack ``alpha`` in rad, from the channel ``outputs.alpha``;
- lift coefficient ``C_L = L / (q S)`` from the lift force ``L``, the dynamic pressure ``q`` and
  the reference area ``S`` (definition of the lift coefficient; any aerodynamics text). Where
  ``q`` is below ``outputs.lift.min_dynamic_pressure_pa`` (flow off) C_L is undefined: the
  sample is NaN and counted in ``flow_off_samples``;
- curvature ``kappa = 2 epsilon / t`` from the surface strain ``epsilon`` of a plate of thickness
  ``t`` in pure bending (Euler-Bernoulli beam theory: surface strain = kappa * t / 2).

Derivatives of alpha (rate, acceleration) are the identification stage's business, with a
differentiating filter whose lag is documented there.

Examples
--------
>>> import numpy as np
>>> from wingwatch.daemon.config import load_config
>>> from wingwatch.daemon.codec import SensorFrame
>>> cfg = load_config()
>>> cm = ChannelMap(cfg)
>>> raw = np.array([[2.0, 0.915, 45.0, 300.0, 100.0]])  # deg, N, Pa, microstrain, microstrain
>>> b = cm.apply(SensorFrame("rig", 0, 0.0, 1000.0, cfg.streams["rig"].channels, raw))
>>> # default map: balance tare -0.015 N, S = 0.03 m^2, t = 0.6 mm
>>> round(float(b.alpha[0]), 6), round(float(b.lift[0]), 6), round(float(b.curvature[0]), 6)
(0.034907, 0.666667, 1.0)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wingwatch.daemon.codec import SensorFrame
from wingwatch.daemon.config import Config

__all__ = ["ConditionedBlock", "ChannelMap"]


@dataclass(frozen=True, eq=False)
class ConditionedBlock:
    """One frame's samples in physical units (arrays of length n)."""

    t: np.ndarray  # source time of each sample, s
    alpha: np.ndarray  # rad
    lift: np.ndarray  # lift coefficient C_L (NaN where the flow is off)
    curvature: np.ndarray  # 1/m at the configured strain station
    dynamic_pressure: np.ndarray  # Pa
    si: np.ndarray  # every channel in SI units, shape (n, channels)
    seq: int
    discontinuity: bool  # a gap, time gap or source restart came just before this block

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    def split(self, k: int) -> tuple["ConditionedBlock", "ConditionedBlock"]:
        """The first ``k`` samples and the rest (views; the discontinuity stays with the first).

        >>> import numpy as np
        >>> b = ConditionedBlock(*(np.arange(5.0) for _ in range(5)), np.zeros((5, 2)), 3, True)
        >>> head, tail = b.split(2)
        >>> head.t.tolist(), tail.t.tolist(), head.discontinuity, tail.discontinuity
        ([0.0, 1.0], [2.0, 3.0, 4.0], True, False)
        """
        if not 0 < k < self.n:
            raise ValueError(f"k must be between 1 and {self.n - 1}, got {k}")
        head = ConditionedBlock(self.t[:k], self.alpha[:k], self.lift[:k], self.curvature[:k],
                                self.dynamic_pressure[:k], self.si[:k], self.seq,
                                self.discontinuity)
        tail = ConditionedBlock(self.t[k:], self.alpha[k:], self.lift[k:], self.curvature[k:],
                                self.dynamic_pressure[k:], self.si[k:], self.seq, False)
        return head, tail


class ChannelMap:
    """Apply the configured channel map to frames of the conditioning stream."""

    def __init__(self, config: Config) -> None:
        self.config = config
        spec = config.conditioning_stream
        self.stream = spec.name
        self.rate_hz = spec.rate_hz
        self.channels = spec.channels
        idx = {c: i for i, c in enumerate(spec.channels)}
        gain = np.ones(len(spec.channels))
        offset = np.zeros(len(spec.channels))
        for name, ch in config.channels.items():
            if name in idx:
                gain[idx[name]] = ch.gain
                offset[idx[name]] = ch.offset
        self._gain, self._offset = gain, offset
        out = config.outputs
        self._i_alpha = idx[out.alpha]
        self._i_force = idx[out.lift.force]
        self._i_q = idx[out.lift.dynamic_pressure]
        self._i_strain = idx[out.curvature.strain]
        self._area = out.lift.reference_area_m2
        self._q_min = out.lift.min_dynamic_pressure_pa
        self._two_over_t = 2.0 / out.curvature.thickness_m
        self.reset()

    def reset(self) -> None:
        self.flow_off_samples = 0
        self.blocks = 0

    def accepts(self, frame: SensorFrame) -> bool:
        return frame.stream == self.stream

    def apply(self, frame: SensorFrame, discontinuity: bool = False) -> ConditionedBlock:
        return self._condition(frame.samples, frame.times(), frame.seq, discontinuity, 1)

    def apply_many(self, frames: list[SensorFrame], discontinuity: bool = False
                   ) -> ConditionedBlock:
        """Consecutive frames of the stream as one block: sample for sample what
        :meth:`apply` gives for each (the same arithmetic on the same values), with the
        counters advanced as if they had come one at a time."""
        if len(frames) == 1:
            return self.apply(frames[0], discontinuity)
        samples = np.concatenate([f.samples for f in frames])
        times = np.concatenate([f.times() for f in frames])
        return self._condition(samples, times, frames[-1].seq, discontinuity, len(frames))

    def _condition(self, raw: np.ndarray, times: np.ndarray, seq: int, discontinuity: bool,
                   n_frames: int) -> ConditionedBlock:
        si = raw * self._gain + self._offset  # value = gain * raw + offset
        q = si[:, self._i_q]
        flow_on = q >= self._q_min
        lift = np.full(q.shape[0], np.nan)  # C_L = L / (q S), only where the flow is on
        np.divide(si[:, self._i_force], q * self._area, out=lift, where=flow_on)
        self.flow_off_samples += q.shape[0] - int(np.count_nonzero(flow_on))
        self.blocks += n_frames
        kappa = self._two_over_t * si[:, self._i_strain]  # kappa = 2 eps / t (beam theory)
        return ConditionedBlock(
            t=times,
            alpha=si[:, self._i_alpha],
            lift=lift,
            curvature=kappa,
            dynamic_pressure=q,
            si=si,
            seq=seq,
            discontinuity=discontinuity,
        )

    def state_dict(self) -> dict[str, int]:
        return {"flow_off_samples": self.flow_off_samples, "blocks": self.blocks}

    def load_state_dict(self, state: dict[str, int]) -> None:
        self.flow_off_samples = int(state["flow_off_samples"])
        self.blocks = int(state["blocks"])
