"""The virtual rig as a frame source: scenario -> physics -> sensors -> numbered sample frames.

It streams like a tunnel DAQ: block-sampled frames of ``frame_samples`` samples of the five raw
channels, numbered by ``seq``, stamped with the source clock ``t0`` (seconds, first sample of the
frame; the run's first sample is at t = 0). Lost-frame events skip sequence numbers. Each frame also
carries the noise-free truth. The run is deterministic: one ``numpy.random.SeedSequence`` (M. E.
O'Neill, "PCG: A family of simple fast space-efficient statistically good algorithms for random
number generation", 2014, the default generator's family) is spawned into a motion stream and a
sensor stream, so a seed fixes every value bit for bit and nothing reads the wall clock.

Parameter schedules: a flow-speed or stiffness event moves its parameter from the present value to
the new one along the quintic smoothed ramp of :func:`.scenario.smooth_step` over ``ramp_s``,
sampled as a staircase of :data:`PARAM_HOLD_S` holds; the simulator's step map is reassembled once
per hold (see docs/rig.md for the cost and the error).

Closed-loop pitch command (optional): with ``command`` set, an object with a method
``alpha_at(t) -> float | None``, the pitch axis follows the commanded angle through the
:class:`PitchServo` actuator model (a critically damped second-order servo with rate and
acceleration limits, so alpha, alpha_dot and alpha_ddot stay continuous and bounded) instead of
the scenario's motion. The command in force over each internal step is ``alpha_at`` at the step's
start (a zero-order hold). Before the first command the rig follows the scenario exactly; once
engaged, a ``None`` means "command the scenario's angle" (the servo rejoins it smoothly). The
rig then advances one frame at a time, so a controller that reads frame k can command frame k+1.
Same seed and same commands give the same values. :class:`CommandSchedule` is the in-process
command object; ``wingwatch rig --command-endpoint`` fills one from ``cmd.alpha`` messages.

Examples
--------
>>> rig = VirtualRig("calibration", duration_s=0.05)
>>> [f.seq for f in rig.frames()]
[0, 1, 2, 3, 4]
>>> rig.channels
('pitch_enc', 'balance_lift', 'q_pitot', 'strain_root', 'strain_mid')
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Iterator, Protocol

import numpy as np
import scipy.linalg

from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.rig.plate import PlateSimulator
from wingwatch.daemon.rig.scenario import (CHANNELS, Motion, Ramp, Scenario, load_scenario,
                                           smooth_step, validate_physics)
from wingwatch.daemon.rig.sensors import SensorModel

__all__ = ["RigFrame", "VirtualRig", "TRUTH_KEYS", "PARAM_HOLD_S", "ServoSpec", "PitchServo",
           "CommandSchedule", "PitchCommand", "rig_messages", "write_rig_log"]

#: during a flow-speed or stiffness ramp the parameter is held constant over steps of this length
PARAM_HOLD_S = 0.01

#: per-sample truth arrays carried by every frame
TRUTH_KEYS = ("t", "alpha", "alpha_dot", "alpha_ddot", "C_L", "lift_n", "kappa_root", "kappa_mid",
              "strain_root_ue", "strain_mid_ue", "flow_speed", "q_pa", "stiffness_factor",
              "added_mass_kg", "reynolds")


@dataclass(frozen=True)
class RigFrame:
    """One block of samples. ``samples`` has shape (n, 5) in :data:`CHANNELS` order.

    ``truth`` maps each of :data:`TRUTH_KEYS` to an array of n values, plus ``lost`` (bool: the
    frame was dropped by a lost-frames event, only seen with ``include_lost=True``) and ``events``
    (list of dicts of the events that start within this frame).
    """

    seq: int
    t0: float
    samples: np.ndarray
    truth: dict


@dataclass(frozen=True)
class ServoSpec:
    """The pitch actuator of the virtual rig (a model of our own making, docs/rig.md section 14).

    A second-order position servo, critically damped by default,
    ``alpha_ddot = omega^2 (c - alpha) - 2 zeta omega alpha_dot`` with ``omega = 2 pi natural_hz``,
    whose acceleration is clipped to ``accel_limit_deg_s2`` and whose rate is clipped to
    ``rate_limit_deg_s``. Inside the limits it is linear (a controller can model it exactly).
    """

    natural_hz: float = 4.0
    damping: float = 1.0
    rate_limit_deg_s: float = 60.0
    accel_limit_deg_s2: float = 1000.0

    def __post_init__(self) -> None:
        for name in ("natural_hz", "damping", "rate_limit_deg_s", "accel_limit_deg_s2"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
                raise ConfigError(f"servo {name} must be a positive number, not {v!r}")

    @property
    def omega(self) -> float:
        return 2.0 * math.pi * self.natural_hz

    @property
    def rate_limit(self) -> float:
        """rad/s"""
        return math.radians(self.rate_limit_deg_s)

    @property
    def accel_limit(self) -> float:
        """rad/s^2"""
        return math.radians(self.accel_limit_deg_s2)

    def continuous(self) -> tuple[np.ndarray, np.ndarray]:
        """The linear servo ``s' = F s + G c`` with ``s = (alpha, alpha_dot)``."""
        w, z = self.omega, self.damping
        return np.array([[0.0, 1.0], [-w * w, -2.0 * z * w]]), np.array([0.0, w * w])

    def discrete(self, dt: float) -> tuple[np.ndarray, np.ndarray]:
        """Exact zero-order-hold discretisation of :meth:`continuous` at step ``dt``
        (the matrix exponential of the augmented matrix; C. Van Loan, IEEE Trans. Automatic
        Control 23(3), 1978)."""
        F, G = self.continuous()
        M = np.zeros((3, 3))
        M[:2, :2] = F
        M[:2, 2] = G
        E = scipy.linalg.expm(M * dt)
        return E[:2, :2].copy(), E[:2, 2].copy()


class PitchServo:
    """The rig's pitch actuator, stepped at a fixed internal step ``dt``.

    Inside its limits each step is the exact zero-order-hold solution of the linear servo;
    when the linear step would exceed the acceleration or rate limit, the step is taken at the
    clipped acceleration (constant over the step) and the rate is clipped.

    >>> sv = PitchServo(ServoSpec(), 0.001)
    >>> sv.reset(0.0)
    >>> for _ in range(1000):
    ...     a, ad, add = sv.step(math.radians(2.0))
    >>> round(math.degrees(a), 6), abs(ad) < 1e-9
    (2.0, True)
    """

    def __init__(self, spec: ServoSpec, dt: float) -> None:
        if not (isinstance(dt, (int, float)) and math.isfinite(dt) and dt > 0):
            raise ValueError(f"dt must be a positive step, not {dt!r}")
        self.spec = spec
        self.dt = float(dt)
        Phi, Gam = spec.discrete(self.dt)
        self._Phi = [[float(Phi[0, 0]), float(Phi[0, 1])], [float(Phi[1, 0]), float(Phi[1, 1])]]
        self._Gam = [float(Gam[0]), float(Gam[1])]
        self._w2 = spec.omega ** 2
        self._2zw = 2.0 * spec.damping * spec.omega
        self.reset(0.0)

    def reset(self, alpha: float, alpha_dot: float = 0.0) -> None:
        self.alpha = float(alpha)
        self.alpha_dot = float(alpha_dot)

    def _accel(self, c: float, a: float, ad: float) -> float:
        return self._w2 * (c - a) - self._2zw * ad

    def step(self, c: float) -> tuple[float, float, float]:
        """Advance one step with command ``c`` (rad) held; returns (alpha, alpha_dot, alpha_ddot)
        at the step's end."""
        a, ad = self.alpha, self.alpha_dot
        amax, rmax, dt = self.spec.accel_limit, self.spec.rate_limit, self.dt
        P, g = self._Phi, self._Gam
        a1 = P[0][0] * a + P[0][1] * ad + g[0] * c
        ad1 = P[1][0] * a + P[1][1] * ad + g[1] * c
        if (abs(self._accel(c, a, ad)) > amax or abs(self._accel(c, a1, ad1)) > amax
                or abs(ad1) > rmax):
            acc = min(max(self._accel(c, a, ad), -amax), amax)
            ad1 = min(max(ad + acc * dt, -rmax), rmax)
            a1 = a + 0.5 * (ad + ad1) * dt
        add1 = min(max(self._accel(c, a1, ad1), -amax), amax)
        if abs(ad1) >= rmax and add1 * ad1 > 0:
            add1 = 0.0  # at the rate limit: no acceleration beyond it
        self.alpha, self.alpha_dot = a1, ad1
        return a1, ad1, add1


class PitchCommand(Protocol):
    """What the rig asks a command source: the commanded angle (rad) at source time ``t``, or
    None to follow the scenario."""

    def alpha_at(self, t: float) -> float | None: ...


class CommandSchedule:
    """Pitch commands on the source clock: :meth:`alpha_at` gives the command with the latest
    time at or before ``t`` (1 ns tolerance for rounded clocks), None before the first.

    >>> cs = CommandSchedule()
    >>> cs.push(0.5, 0.1); cs.push(1.0, 0.2)
    >>> cs.alpha_at(0.2), cs.alpha_at(0.5), cs.alpha_at(7.0)
    (None, 0.1, 0.2)
    """

    TOLERANCE_S = 1e-9

    def __init__(self) -> None:
        self._t: list[float] = []
        self._a: list[float] = []

    def __len__(self) -> int:
        return len(self._t)

    def push(self, t: float, alpha: float) -> None:
        """Command ``alpha`` (rad) from source time ``t`` on; a second command at the same time
        replaces the first."""
        t, alpha = float(t), float(alpha)
        if not (math.isfinite(t) and math.isfinite(alpha)):
            raise ValueError("a command needs a finite time and a finite angle")
        i = bisect.bisect_left(self._t, t)
        if i < len(self._t) and self._t[i] == t:
            self._a[i] = alpha
        else:
            self._t.insert(i, t)
            self._a.insert(i, alpha)

    def alpha_at(self, t: float) -> float | None:
        i = bisect.bisect_right(self._t, t + self.TOLERANCE_S) - 1
        return None if i < 0 else self._a[i]

    def forget_before(self, t: float) -> None:
        """Drop the commands that can no longer be in force at ``t`` or later (bounded memory)."""
        i = bisect.bisect_right(self._t, t + self.TOLERANCE_S) - 1
        if i > 0:
            del self._t[:i]
            del self._a[:i]


class _Follower:
    """Replaces the scenario's kinematics by the servo's response to a command source."""

    def __init__(self, command: PitchCommand, servo: PitchServo) -> None:
        self.command = command
        self.servo = servo
        self.engaged = False

    def follow(self, t_start: np.ndarray, a: np.ndarray, ad: np.ndarray, add: np.ndarray):
        a, ad, add = a.copy(), ad.copy(), add.copy()
        sv = self.servo
        for i in range(t_start.size):
            c = self.command.alpha_at(float(t_start[i]))  # held over the step from t_start[i]
            if c is None:
                if not self.engaged:
                    sv.reset(a[i], ad[i])  # following the scenario exactly
                    continue
                c = a[i]  # engaged: command the scenario's angle
            elif isinstance(c, bool) or not isinstance(c, (int, float)) or not math.isfinite(c):
                raise ValueError(f"command.alpha_at({float(t_start[i])!r}) returned {c!r}; "
                                 "it must return a finite angle in rad or None")
            self.engaged = True
            a[i], ad[i], add[i] = sv.step(float(c))
        return a, ad, add


class _Schedule:
    """Piecewise parameter history: smoothed ramps between the values set by events."""

    def __init__(self, initial: float, changes) -> None:
        self.initial = float(initial)
        self.segments = []  # (t_start, ramp_s, from, to)
        v = self.initial
        for t, ramp, to in sorted(changes, key=lambda c: c[0]):
            self.segments.append((t, ramp, v, float(to)))
            v = float(to)

    def __call__(self, t: np.ndarray) -> np.ndarray:
        out = np.full(t.shape, self.initial)
        for t0, ramp, a, b in self.segments:
            if ramp > 0.0:
                s, _, _ = smooth_step((t - t0) / ramp)
            else:
                s = (t >= t0).astype(float)
            out = np.where(t >= t0, a + (b - a) * s, out)
        return out


class VirtualRig:
    """A scripted run of the virtual rig.

    Parameters
    ----------
    scenario : Scenario or str or Path
        A loaded scenario, or a name / path for :func:`.scenario.load_scenario`.
    seed, rate_hz, duration_s : optional
        Overrides of the scenario's values.
    command : object with ``alpha_at(t) -> float | None``, optional
        A pitch command source (closed loop; see the module docstring). None: the scenario's
        prescribed motion only.
    servo : ServoSpec, optional
        The pitch actuator followed under ``command`` (default :class:`ServoSpec`).
    motion_seed : int, optional
        Seed of the prescribed motion alone (the random-pitching phases): runs with one
        ``motion_seed`` and different ``seed`` fly the same manoeuvre with different sensor
        noise (Monte Carlo over the noise only). None: both come from ``seed``.
    """

    def __init__(self, scenario: Scenario | str | Path, seed: int | None = None,
                 rate_hz: float | None = None, duration_s: float | None = None,
                 command: PitchCommand | None = None, servo: ServoSpec | None = None,
                 motion_seed: int | None = None) -> None:
        if command is not None and not callable(getattr(command, "alpha_at", None)):
            raise ConfigError("command must have a method alpha_at(t) returning an angle in rad or None")
        if servo is not None and not isinstance(servo, ServoSpec):
            raise ConfigError("servo must be a ServoSpec")
        self.command = command
        self.servo = servo or ServoSpec()
        sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
        if seed is not None:
            if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
                raise ConfigError(f"seed must be a non-negative integer, not {seed!r}")
            sc = replace(sc, seed=seed)
        if motion_seed is not None and (isinstance(motion_seed, bool) or not isinstance(motion_seed, int)
                                        or motion_seed < 0):
            raise ConfigError(f"motion_seed must be a non-negative integer, not {motion_seed!r}")
        self.motion_seed = motion_seed
        if rate_hz is not None:
            if not (isinstance(rate_hz, (int, float)) and math.isfinite(rate_hz) and 1.0 <= rate_hz <= 1e5):
                raise ConfigError(f"rate_hz must be a sample rate in [1, 100000] Hz, not {rate_hz!r}")
            sc = replace(sc, rate_hz=float(rate_hz))
        if duration_s is not None:
            if not (isinstance(duration_s, (int, float)) and math.isfinite(duration_s) and duration_s > 0):
                raise ConfigError(f"duration_s must be a positive number of seconds, not {duration_s!r}")
            sc = replace(sc, duration_s=float(duration_s),
                         events=tuple(e for e in sc.events if e.t_s <= duration_s))
        validate_physics(sc)
        self.scenario = sc
        self.seed = sc.seed
        self.rate_hz = sc.rate_hz
        self.frame_samples = sc.frame_samples
        self.duration_s = sc.duration_s
        self.channels = CHANNELS
        self.n_samples = int(round(sc.duration_s * sc.rate_hz))
        self.n_frames = -(-self.n_samples // self.frame_samples)

    @property
    def events(self) -> list[dict]:
        """The scripted events as dicts (``t_s``, ``kind`` and the kind's parameters)."""
        return [e.as_dict() for e in self.scenario.events]

    def _lost_seqs(self) -> set[int]:
        lost: set[int] = set()
        F, rate = self.frame_samples, self.rate_hz
        for e in self.scenario.events:
            if e.kind == "lost-frames":
                first = math.ceil(e.t_s * rate / F - 1e-9)
                lost.update(range(first, first + e.get("count")))
        return lost

    def make_simulator(self) -> PlateSimulator:
        sc = self.scenario
        return PlateSimulator(sc.article, sc.fluid, sc.numerics, sc.viscous,
                              flow_speed=sc.flow_speed_m_s, dt=1.0 / sc.rate_hz)

    def frames(self, include_lost: bool = False) -> Iterator[RigFrame]:
        """Generate the run's frames in order (a fresh, identical run on every call)."""
        sc = self.scenario
        ss = np.random.SeedSequence(sc.seed)
        motion_ss, sensor_ss = ss.spawn(2)
        if self.motion_seed is not None:
            motion_ss = np.random.SeedSequence(self.motion_seed).spawn(2)[0]
        creep = [Ramp(e.t_s, e.get("duration_s"), e.get("rate_deg_per_s") * e.get("duration_s"))
                 for e in sc.events if e.kind == "pitch-creep"]
        motion = Motion(sc.motion, np.random.default_rng(motion_ss), creep)
        sensors = SensorModel(sc.sensors, sc.events, np.random.default_rng(sensor_ss))
        speed = _Schedule(sc.flow_speed_m_s, [(e.t_s, e.get("ramp_s"), e.get("speed_m_s"))
                                              for e in sc.events if e.kind == "flow-speed"])
        stiff = _Schedule(1.0, [(e.t_s, e.get("ramp_s"), e.get("factor"))
                                for e in sc.events if e.kind == "stiffness"])
        added = [(e.t_s, e.get("mass_kg"), e.get("at_chord")) for e in sc.events if e.kind == "added-mass"]
        sim = self.make_simulator()
        sub = sc.numerics.substeps
        rate = self.rate_hz
        dt = 1.0 / rate
        k0 = motion.evaluate(np.array([0.0]))
        a0 = k0[0][0]
        sim.reset(float(a0))
        follower = None
        if self.command is not None:
            servo = PitchServo(self.servo, 1.0 / (self.rate_hz * sub))
            servo.reset(float(a0), float(k0[1][0]))
            follower = _Follower(self.command, servo)
        lost = self._lost_seqs()
        art, fl = sc.article, sc.fluid
        span, chord = art.span_m, art.chord_m
        half_t_ue = 0.5 * art.thickness_m * 1e6
        F = self.frame_samples
        # work in blocks of whole frames (about half a second) so the per-sample Python cost is the
        # physics step alone; the noise stream is drawn sample by sample in order, so blocking does
        # not change any value
        block = max(1, 500 // F) if follower is None else 1  # closed loop: frame by frame
        for first in range(0, self.n_frames, block):
            i0 = first * F
            n = min(block * F, self.n_samples - i0)
            t = (i0 + np.arange(n)) / rate
            # kinematics at every internal step; the state before sample 0 is the steady one at -dt
            ts = (i0 - 1 + (np.arange(n * sub) + 1.0) / sub) / rate
            a, ad, add = motion.evaluate(ts)
            if follower is not None:
                a, ad, add = follower.follow((i0 - 1 + np.arange(n * sub) / sub) / rate, a, ad, add)
            # ramps advance in a staircase of PARAM_HOLD_S holds (the step map is reassembled
            # once per hold, not once per sample; docs/rig.md bounds the difference)
            th = np.floor(t / PARAM_HOLD_S + 1e-9) * PARAM_HOLD_S
            U = speed(th)
            kf = stiff(th)
            ma = np.zeros(n)
            at = np.full(n, 0.9)
            for te, m, xa in added:
                on = t >= te
                ma = np.where(on, m, ma)
                at = np.where(on, xa, at)
            lift = np.empty(n)
            kap = np.empty((n, 2))
            # stretches of constant parameters go through the simulator's fast path
            change = np.flatnonzero((np.diff(U) != 0) | (np.diff(kf) != 0) | (np.diff(ma) != 0)
                                    | (np.diff(at) != 0)) + 1
            bounds = np.concatenate(([0], change, [n]))
            for j, k in zip(bounds[:-1], bounds[1:]):
                sim.set_parameters(flow_speed=float(U[j]), stiffness_factor=float(kf[j]),
                                   added_mass=float(ma[j]) / span, added_mass_at=float(at[j]))
                sl = slice(j * sub, k * sub)
                if sub == 1:
                    lj, kj = sim.run(a[sl], ad[sl], add[sl])
                else:
                    lj, kj = sim.run_substeps(a[sl], ad[sl], add[sl])
                lift[j:k] = lj
                kap[j:k] = kj
            alpha = a[sub - 1::sub]
            q = 0.5 * fl.density_kg_m3 * U * U
            lift_n = lift * span
            eps_root = kap[:, 0] * half_t_ue
            eps_mid = kap[:, 1] * half_t_ue
            samples = sensors.read(t, alpha, lift_n, q, eps_root, eps_mid)
            with np.errstate(divide="ignore", invalid="ignore"):
                cl = np.where(q > 0, lift / (q * chord), 0.0)
            cols = {
                "t": t, "alpha": alpha, "alpha_dot": ad[sub - 1::sub], "alpha_ddot": add[sub - 1::sub],
                "C_L": cl, "lift_n": lift_n, "kappa_root": kap[:, 0].copy(),
                "kappa_mid": kap[:, 1].copy(), "strain_root_ue": eps_root, "strain_mid_ue": eps_mid,
                "flow_speed": U, "q_pa": q, "stiffness_factor": kf, "added_mass_kg": ma,
                "reynolds": U * chord / fl.kinematic_viscosity_m2_s,
            }
            for j0 in range(0, n, F):
                seq = first + j0 // F
                is_lost = seq in lost
                if is_lost and not include_lost:
                    continue
                sl = slice(j0, min(j0 + F, n))
                t_start = float(t[j0])
                truth = {key: val[sl].copy() for key, val in cols.items()}
                truth["lost"] = is_lost
                truth["events"] = [e.as_dict() for e in sc.events
                                   if t_start <= e.t_s < t_start + F / rate]
                yield RigFrame(seq=seq, t0=t_start, samples=samples[sl].copy(), truth=truth)


def rig_messages(rig: VirtualRig, frames=None):
    """The rig's frames as daemon messages ``(topic, payload, t_recv)``, with the receive time on
    the source clock (frame end), so a log of them is bit-identical run to run."""
    from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame

    for f in (rig.frames() if frames is None else frames):
        if f.truth.get("lost"):
            continue
        sf = SensorFrame(stream="rig", seq=f.seq, t0=f.t0, rate=rig.rate_hz, channels=rig.channels,
                         samples=f.samples)
        topic, payload = encode_sensor_frame(sf)
        yield topic, payload, f.t0 + f.samples.shape[0] / rig.rate_hz


def write_rig_log(rig: VirtualRig, path, config=None):
    """Run the rig into a replay log as the daemon would record it (no sockets); returns the path."""
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.service import record_frames

    record_frames(rig_messages(rig), config or load_config(), path, start_unix=0.0, source="rig")
    return path
