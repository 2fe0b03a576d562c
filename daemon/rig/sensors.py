"""Sensor layer of the virtual rig: what the tunnel DAQ would read from the physics.

Channels (raw engineering units, frame column order):

* ``pitch_enc``: absolute pitch encoder, degrees, quantised to ``360 / 2**bits`` (signed, already
  unwrapped by the DAQ); no other noise.
* ``balance_lift``: force balance, N, for the wetted span: aerodynamic lift (inertial tares taken as
  removed by the DAQ) plus a zero offset and white noise.
* ``q_pitot``: dynamic pressure ``rho U^2 / 2`` from the pitot-static probe, Pa, white noise.
* ``strain_root``, ``strain_mid``: surface strain of a gauge on the lower (pressure) surface,
  microstrain, ``eps = kappa t / 2`` (Euler-Bernoulli pure bending: positive curvature stretches the
  lower fibre), white noise, optional thermal zero drift.

Scripted faults: zero drift of a strain gauge (microstrain per second from an event time), dropout
(NaN for a while), stuck (the last reading held for a while). Noise is drawn every frame with the
same shape whatever happens, so a seed fixes the values bit for bit. Gaussian noise comes from
``numpy.random.Generator.standard_normal`` (the ziggurat method, G. Marsaglia and W. W. Tsang, "The
ziggurat method for generating random variables", J. Statistical Software 5(8), 2000).
"""

from __future__ import annotations

import numpy as np

from wingwatch.daemon.rig.scenario import CHANNELS, SensorSpec

__all__ = ["SensorModel", "encoder_quantise"]

_COL = {name: i for i, name in enumerate(CHANNELS)}


def encoder_quantise(angle_deg, bits: int):
    """Round an angle to the encoder's least significant bit ``360 / 2**bits`` degrees.

    >>> float(encoder_quantise(1.0, 14))   # 46 LSB of 360/16384 deg
    1.0107421875
    """
    lsb = 360.0 / (1 << bits)
    return np.round(np.asarray(angle_deg) / lsb) * lsb


class SensorModel:
    """Turns true physical signals into raw channel samples, with noise and scripted faults.

    Parameters
    ----------
    spec : SensorSpec
        Noise, offset and resolution settings.
    events : sequence of Event
        The scenario's events; only gauge-drift, dropout and stuck concern this layer.
    rng : numpy.random.Generator
        The sensor noise stream.
    """

    def __init__(self, spec: SensorSpec, events, rng: np.random.Generator) -> None:
        self.spec = spec
        self.rng = rng
        self.drifts = [(e.t_s, _COL[e.get("channel")], e.get("rate_ue_per_s"))
                       for e in events if e.kind == "gauge-drift"]
        self.holds = [(e.t_s, e.t_s + e.get("duration_s"), _COL[e.get("channel")], e.kind)
                      for e in events if e.kind in ("dropout", "stuck")]
        self.reset()

    def reset(self) -> None:
        self._last = np.zeros(len(CHANNELS))
        self._stuck_value: dict[int, float] = {}

    def read(self, t: np.ndarray, alpha: np.ndarray, lift_n: np.ndarray, q_pa: np.ndarray,
             strain_root_ue: np.ndarray, strain_mid_ue: np.ndarray) -> np.ndarray:
        """Raw samples, shape (len(t), 5), for the true signals at sample times ``t``."""
        sp = self.spec
        n = t.size
        noise = self.rng.standard_normal((n, 4))
        out = np.empty((n, len(CHANNELS)))
        out[:, 0] = encoder_quantise(np.degrees(alpha), sp.encoder_bits)
        out[:, 1] = lift_n + sp.balance_offset_n + sp.balance_noise_n * noise[:, 0]
        out[:, 2] = q_pa + sp.q_noise_pa * noise[:, 1]
        out[:, 3] = strain_root_ue + sp.strain_noise_ue * noise[:, 2] + sp.strain_zero_drift_ue_per_s * t
        out[:, 4] = strain_mid_ue + sp.strain_noise_ue * noise[:, 3]
        for t0, col, rate in self.drifts:
            out[:, col] += rate * np.maximum(t - t0, 0.0)
        for k, (t0, t1, col, kind) in enumerate(self.holds):
            mask = (t >= t0) & (t < t1)
            if not mask.any():
                continue
            if kind == "dropout":
                out[mask, col] = np.nan
            else:
                if k not in self._stuck_value:
                    i0 = int(np.argmax(mask))
                    self._stuck_value[k] = float(out[i0 - 1, col]) if i0 > 0 else float(self._last[col])
                out[mask, col] = self._stuck_value[k]
        self._last = out[-1].copy()
        return out
