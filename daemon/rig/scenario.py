"""Scripted rig scenarios: TOML files of motion, flow, events and sensor settings, fully validated.

A scenario names everything a run of the virtual rig needs: duration, sample rate, frame length,
seed, the test article and flow (defaults: our Quillfin strip in the Fernholt channel), the pitch
motion (a mean angle plus smoothed ramps, tapered harmonics and band-limited random multisines),
timed events that change the simulator or the sensor layer, and the sensor noise. Smoothed ramps use
the quintic "minimum-jerk" polynomial 10 s^3 - 15 s^4 + 6 s^5 (T. Flash and N. Hogan, "The
coordination of arm movements", J. Neuroscience 5(7), 1985), so alpha, alpha_dot and alpha_ddot
are continuous; random pitching is a multisine with seeded phases (R. Pintelon and J. Schoukens,
"System Identification: A Frequency Domain Approach", 2001, ch. 2), so the kinematics and their
derivatives are exact at every sample.

Every refusal raises :class:`wingwatch.daemon.errors.ConfigError` with one sentence naming the key
and the file, before anything runs.

Examples
--------
>>> sc = load_scenario("calibration")
>>> sc.name, sc.rate_hz, sc.frame_samples
('calibration', 1000.0, 10)
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np

from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.rig.plate import Article, Fluid, Numerics, ViscousModel

__all__ = [
    "Ramp",
    "Harmonic",
    "RandomPitch",
    "MotionSpec",
    "Event",
    "SensorSpec",
    "Scenario",
    "Motion",
    "load_scenario",
    "list_scenarios",
    "scenario_dir",
    "EVENT_KINDS",
    "CHANNELS",
    "smooth_step",
]

#: raw channels of the rig, in frame column order
CHANNELS = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")

#: event kind -> {parameter: (type, required, default)}
EVENT_KINDS: dict[str, dict[str, tuple]] = {
    "flow-speed": {"speed_m_s": (float, True, None), "ramp_s": (float, False, 2.0)},
    "stiffness": {"factor": (float, True, None), "ramp_s": (float, False, 0.0)},
    "added-mass": {"mass_kg": (float, True, None), "at_chord": (float, False, 0.9)},
    "pitch-creep": {"rate_deg_per_s": (float, True, None), "duration_s": (float, True, None)},
    "gauge-drift": {"channel": (str, True, None), "rate_ue_per_s": (float, True, None)},
    "dropout": {"channel": (str, True, None), "duration_s": (float, True, None)},
    "stuck": {"channel": (str, True, None), "duration_s": (float, True, None)},
    "lost-frames": {"count": (int, True, None)},
}
_PHYSICS_EVENTS = {"flow-speed", "stiffness", "added-mass", "pitch-creep"}


def scenario_dir() -> Path:
    """The folder of shipped scenarios (``configs/scenarios`` of the source tree)."""
    return Path(__file__).resolve().parents[2] / "configs" / "scenarios"


# ===================================================================== specification
@dataclass(frozen=True)
class Ramp:
    """A smoothed change of the mean angle by ``delta_deg`` over ``duration_s`` from ``start_s``."""

    start_s: float
    duration_s: float
    delta_deg: float


@dataclass(frozen=True)
class Harmonic:
    """``amplitude sin(2 pi f (t - start) + phase)``, tapered on and off over ``taper_s``."""

    amplitude_deg: float
    frequency_hz: float
    phase_deg: float = 0.0
    start_s: float = 0.0
    end_s: float = math.inf
    taper_s: float = 1.0


@dataclass(frozen=True)
class RandomPitch:
    """Band-limited random pitching: a seeded multisine of ``components`` lines in ``band_hz``."""

    rms_deg: float
    band_hz: tuple[float, float]
    components: int = 48
    start_s: float = 0.0
    end_s: float = math.inf
    taper_s: float = 2.0


@dataclass(frozen=True)
class MotionSpec:
    mean_deg: float = 0.0
    ramps: tuple[Ramp, ...] = ()
    harmonics: tuple[Harmonic, ...] = ()
    random: tuple[RandomPitch, ...] = ()


@dataclass(frozen=True)
class Event:
    """A scripted change at ``t_s``: see :data:`EVENT_KINDS` for the kinds and their parameters."""

    t_s: float
    kind: str
    params: tuple[tuple[str, object], ...]

    def get(self, key: str):
        return dict(self.params)[key]

    def as_dict(self) -> dict:
        return {"t_s": self.t_s, "kind": self.kind, **dict(self.params)}


@dataclass(frozen=True)
class SensorSpec:
    """Sensor-layer settings (noise standard deviations, offsets, encoder resolution)."""

    encoder_bits: int = 14
    balance_noise_n: float = 0.004
    balance_offset_n: float = 0.015
    q_noise_pa: float = 0.15
    strain_noise_ue: float = 0.6
    strain_zero_drift_ue_per_s: float = 0.0


@dataclass(frozen=True)
class Scenario:
    """Everything a run of the virtual rig needs; build with :func:`load_scenario`."""

    name: str
    description: str
    duration_s: float
    rate_hz: float = 1000.0
    frame_samples: int = 10
    seed: int = 0
    flow_speed_m_s: float = 0.4
    article: Article = Article()
    fluid: Fluid = Fluid()
    numerics: Numerics = Numerics()
    viscous: ViscousModel = ViscousModel()
    motion: MotionSpec = MotionSpec()
    events: tuple[Event, ...] = ()
    sensors: SensorSpec = SensorSpec()
    source: str = "<built-in>"


# ===================================================================== motion
def smooth_step(tau):
    """Quintic minimum-jerk step S(tau) and its first two derivatives, tau clipped to [0, 1]."""
    t = np.clip(tau, 0.0, 1.0)
    s = t * t * t * (10.0 - 15.0 * t + 6.0 * t * t)
    ds = 30.0 * t * t * (1.0 - t) ** 2
    d2s = 60.0 * t * (1.0 - t) * (1.0 - 2.0 * t)
    return s, ds, d2s


def _window(t, start, end, taper):
    """Smooth on/off window (value, first, second derivative)."""
    if taper <= 0.0:
        w = ((t >= start) & (t < end)).astype(float)
        return w, np.zeros_like(t), np.zeros_like(t)
    a, da, d2a = smooth_step((t - start) / taper)
    da, d2a = da / taper, d2a / taper**2
    if math.isinf(end):
        return a, da, d2a
    b, db, d2b = smooth_step((end - t) / taper)
    db, d2b = -db / taper, d2b / taper**2
    return a * b, da * b + a * db, d2a * b + 2.0 * da * db + a * d2b


class Motion:
    """Prescribed pitch kinematics of a scenario, exact at any time (radians).

    The random multisine's frequencies and phases are drawn once from ``rng``.
    """

    def __init__(self, spec: MotionSpec, rng: np.random.Generator, extra_ramps=()) -> None:
        self.spec = spec
        self.ramps = tuple(spec.ramps) + tuple(extra_ramps)
        self._lines = []
        for rp in spec.random:
            lo, hi = rp.band_hz
            f = np.sort(rng.uniform(lo, hi, rp.components))
            ph = rng.uniform(0.0, 2.0 * np.pi, rp.components)
            amp = np.radians(rp.rms_deg) * np.sqrt(2.0 / rp.components)
            self._lines.append((rp, 2.0 * np.pi * f, ph, amp))

    def evaluate(self, t):
        """Return alpha, alpha_dot, alpha_ddot at times ``t`` (s)."""
        t = np.asarray(t, dtype=float)
        a = np.full(t.shape, np.radians(self.spec.mean_deg))
        ad = np.zeros(t.shape)
        add = np.zeros(t.shape)
        for r in self.ramps:
            s, ds, d2s = smooth_step((t - r.start_s) / r.duration_s)
            d = np.radians(r.delta_deg)
            a += d * s
            ad += d * ds / r.duration_s
            add += d * d2s / r.duration_s**2
        for h in self.spec.harmonics:
            w = 2.0 * np.pi * h.frequency_hz
            arg = w * (t - h.start_s) + np.radians(h.phase_deg)
            amp = np.radians(h.amplitude_deg)
            x, dx, d2x = amp * np.sin(arg), amp * w * np.cos(arg), -amp * w * w * np.sin(arg)
            win, dwin, d2win = _window(t, h.start_s, h.end_s, h.taper_s)
            a += win * x
            ad += dwin * x + win * dx
            add += d2win * x + 2.0 * dwin * dx + win * d2x
        for rp, w, ph, amp in self._lines:
            arg = np.multiply.outer(t, w) + ph
            sn, cs = np.sin(arg), np.cos(arg)
            x = amp * sn.sum(axis=-1)
            dx = amp * (cs @ w)
            d2x = -amp * (sn @ (w * w))
            win, dwin, d2win = _window(t, rp.start_s, rp.end_s, rp.taper_s)
            a += win * x
            ad += dwin * x + win * dx
            add += d2win * x + 2.0 * dwin * dx + win * d2x
        return a, ad, add


# ===================================================================== loading
class _Reader:
    """Typed, range-checked access to one TOML table; remembers which keys were used."""

    def __init__(self, table: dict, where: str, source: str) -> None:
        if not isinstance(table, dict):
            raise ConfigError(f"{source}: [{where}] must be a table")
        self.t = table
        self.where = where
        self.source = source
        self.used: set[str] = set()

    def _name(self, key: str) -> str:
        return f"{self.where}.{key}" if self.where else key

    def fail(self, key: str, why: str):
        raise ConfigError(f"{self.source}: '{self._name(key)}' {why}")

    def get(self, key: str, typ, default=None, *, required=False, lo=None, hi=None,
            lo_open=False, choices=None):
        self.used.add(key)
        if key not in self.t:
            if required:
                self.fail(key, "is required")
            return default
        v = self.t[key]
        if typ is float:
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                self.fail(key, f"must be a number, not {v!r}")
            v = float(v)
            if not math.isfinite(v):
                self.fail(key, "must be finite")
        elif typ is int:
            if isinstance(v, bool) or not isinstance(v, int):
                self.fail(key, f"must be an integer, not {v!r}")
        elif typ is bool:
            if not isinstance(v, bool):
                self.fail(key, f"must be true or false, not {v!r}")
        elif typ is str:
            if not isinstance(v, str):
                self.fail(key, f"must be a string, not {v!r}")
        if lo is not None and (v <= lo if lo_open else v < lo):
            self.fail(key, f"must be {'>' if lo_open else '>='} {lo}, not {v}")
        if hi is not None and v > hi:
            self.fail(key, f"must be <= {hi}, not {v}")
        if choices is not None and v not in choices:
            self.fail(key, f"must be one of {', '.join(sorted(choices))}, not {v!r}")
        return v

    def done(self) -> None:
        extra = sorted(set(self.t) - self.used)
        if extra:
            self.fail(extra[0], "is not a known key")


def _dataclass_from(cls, reader: _Reader, rules: dict):
    kw = {}
    for f in fields(cls):
        if f.name not in rules:
            continue
        typ, kwargs = rules[f.name]
        v = reader.get(f.name, typ, **kwargs)
        if v is not None:
            kw[f.name] = v
    reader.done()
    return cls(**kw)


_ARTICLE_RULES = {
    "name": (str, {}),
    "chord_m": (float, {"lo": 0.0, "lo_open": True, "hi": 10.0}),
    "span_m": (float, {"lo": 0.0, "lo_open": True, "hi": 100.0}),
    "thickness_m": (float, {"lo": 0.0, "lo_open": True}),
    "youngs_modulus_pa": (float, {"lo": 0.0, "lo_open": True}),
    "density_kg_m3": (float, {"lo": 0.0, "lo_open": True}),
    "poisson_ratio": (float, {"lo": 0.0, "hi": 0.499}),
    "pivot": (float, {"lo": 0.0, "hi": 1.0}),
    "n_modes": (int, {"lo": 0, "hi": 6}),
    "damping_ratio": (float, {"lo": 0.0, "hi": 1.0}),
    "root_gauge": (float, {"lo": 0.0, "hi": 1.0}),
    "mid_gauge": (float, {"lo": 0.0, "hi": 1.0}),
}
_FLUID_RULES = {
    "density_kg_m3": (float, {"lo": 0.0}),
    "kinematic_viscosity_m2_s": (float, {"lo": 0.0, "lo_open": True}),
}
_NUMERICS_RULES = {
    "n_panels": (int, {"lo": 2, "hi": 200}),
    "shed_fraction": (float, {"lo": 0.0, "hi": 1.0}),
    "substeps": (int, {"lo": 1, "hi": 50}),
    "wake_raw": (int, {"lo": 8, "hi": 5000}),
    "wake_merge": (int, {"lo": 2, "hi": 16}),
    "wake_level_capacity": (int, {"lo": 4, "hi": 5000}),
    "wake_levels": (int, {"lo": 0, "hi": 12}),
}
_VISCOUS_RULES = {
    "low_re": (bool, {}),
    "re_coefficient": (float, {"lo": 0.0, "hi": 100.0}),
    "stall": (bool, {}),
    "stall_angle_deg": (float, {"lo": 0.0, "lo_open": True, "hi": 45.0}),
    "stall_width_deg": (float, {"lo": 0.0, "lo_open": True, "hi": 20.0}),
}
_SENSOR_RULES = {
    "encoder_bits": (int, {"lo": 6, "hi": 32}),
    "balance_noise_n": (float, {"lo": 0.0}),
    "balance_offset_n": (float, {}),
    "q_noise_pa": (float, {"lo": 0.0}),
    "strain_noise_ue": (float, {"lo": 0.0}),
    "strain_zero_drift_ue_per_s": (float, {}),
}


def _read_motion(tab: dict, src: str) -> MotionSpec:
    r = _Reader(tab, "motion", src)
    mean = r.get("mean_deg", float, 0.0, lo=-30.0, hi=30.0)
    ramps, harms, rand = [], [], []
    r.used.update({"ramps", "harmonics", "random"})
    for i, t in enumerate(_list(tab.get("ramps", []), "motion.ramps", src)):
        rr = _Reader(t, f"motion.ramps[{i}]", src)
        ramps.append(Ramp(rr.get("start_s", float, required=True, lo=0.0),
                          rr.get("duration_s", float, required=True, lo=0.0, lo_open=True),
                          rr.get("delta_deg", float, required=True, lo=-30.0, hi=30.0)))
        rr.done()
    for i, t in enumerate(_list(tab.get("harmonics", []), "motion.harmonics", src)):
        rr = _Reader(t, f"motion.harmonics[{i}]", src)
        harms.append(Harmonic(rr.get("amplitude_deg", float, required=True, lo=0.0, hi=30.0),
                              rr.get("frequency_hz", float, required=True, lo=0.0, lo_open=True),
                              rr.get("phase_deg", float, 0.0),
                              rr.get("start_s", float, 0.0, lo=0.0),
                              rr.get("end_s", float, math.inf, lo=0.0),
                              rr.get("taper_s", float, 1.0, lo=0.0)))
        rr.done()
    for i, t in enumerate(_list(tab.get("random", []), "motion.random", src)):
        rr = _Reader(t, f"motion.random[{i}]", src)
        band = rr.get("band_hz", list, required=True)
        if (len(band) != 2 or not all(isinstance(b, (int, float)) and not isinstance(b, bool) for b in band)
                or not 0.0 < band[0] < band[1]):
            rr.fail("band_hz", "must be two increasing positive frequencies [low, high]")
        rand.append(RandomPitch(rr.get("rms_deg", float, required=True, lo=0.0, hi=20.0),
                                (float(band[0]), float(band[1])),
                                rr.get("components", int, 48, lo=1, hi=2000),
                                rr.get("start_s", float, 0.0, lo=0.0),
                                rr.get("end_s", float, math.inf, lo=0.0),
                                rr.get("taper_s", float, 2.0, lo=0.0)))
        rr.done()
    r.done()
    return MotionSpec(mean, tuple(ramps), tuple(harms), tuple(rand))


def _list(v, where: str, src: str) -> list:
    if not isinstance(v, list):
        raise ConfigError(f"{src}: '{where}' must be an array of tables")
    return v


def _read_events(items, src: str) -> tuple[Event, ...]:
    out = []
    for i, t in enumerate(_list(items, "events", src)):
        r = _Reader(t, f"events[{i}]", src)
        kind = r.get("kind", str, required=True, choices=set(EVENT_KINDS))
        t_s = r.get("t_s", float, required=True, lo=0.0)
        params = []
        for key, (typ, req, default) in EVENT_KINDS[kind].items():
            v = r.get(key, typ, default, required=req)
            params.append((key, v))
        r.done()
        p = dict(params)
        if kind == "flow-speed":
            if not 0.0 < p["speed_m_s"] <= 20.0:
                r.fail("speed_m_s", "must be a flow speed in (0, 20] m/s")
            if p["ramp_s"] < 0.0:
                r.fail("ramp_s", "must be non-negative")
        elif kind == "stiffness":
            if not 0.0 < p["factor"] <= 10.0:
                r.fail("factor", "must be a positive stiffness factor (at most 10)")
            if p["ramp_s"] < 0.0:
                r.fail("ramp_s", "must be non-negative")
        elif kind == "added-mass":
            if p["mass_kg"] < 0.0:
                r.fail("mass_kg", "must be non-negative")
            if not 0.0 <= p["at_chord"] <= 1.0:
                r.fail("at_chord", "must be a chord fraction in [0, 1]")
        elif kind == "pitch-creep":
            if p["duration_s"] <= 0.0:
                r.fail("duration_s", "must be positive")
        elif kind in ("gauge-drift", "dropout", "stuck"):
            allowed = CHANNELS if kind != "gauge-drift" else ("strain_root", "strain_mid")
            if p["channel"] not in allowed:
                r.fail("channel", f"must be one of {', '.join(allowed)}, not {p['channel']!r}")
            if kind != "gauge-drift" and p["duration_s"] <= 0.0:
                r.fail("duration_s", "must be positive")
        elif kind == "lost-frames" and p["count"] < 1:
            r.fail("count", "must be at least 1")
        out.append(Event(t_s, kind, tuple(params)))
    out.sort(key=lambda e: e.t_s)
    return tuple(out)


def scenario_from_dict(doc: dict, source: str = "<dict>") -> Scenario:
    """Build and validate a :class:`Scenario` from a parsed TOML document."""
    top = _Reader(doc, "", source)
    top.used.update({"scenario", "article", "fluid", "numerics", "viscous", "motion", "events", "sensors"})
    top.done()
    r = _Reader(doc.get("scenario", {}), "scenario", source)
    name = r.get("name", str, required=True)
    desc = r.get("description", str, required=True)
    if "\n" in desc.strip():
        r.fail("description", "must be one line")
    duration = r.get("duration_s", float, required=True, lo=0.0, lo_open=True, hi=86400.0)
    rate = r.get("rate_hz", float, 1000.0, lo=1.0, hi=100000.0)
    frame = r.get("frame_samples", int, 10, lo=1, hi=10000)
    seed = r.get("seed", int, 0, lo=0)
    r.done()
    fl = _Reader(doc.get("fluid", {}), "fluid", source)
    speed = fl.get("speed_m_s", float, 0.4, lo=0.0, lo_open=True, hi=20.0)
    fluid = _dataclass_from(Fluid, fl, _FLUID_RULES)
    art = _dataclass_from(Article, _Reader(doc.get("article", {}), "article", source), _ARTICLE_RULES)
    num = _dataclass_from(Numerics, _Reader(doc.get("numerics", {}), "numerics", source), _NUMERICS_RULES)
    vis = _dataclass_from(ViscousModel, _Reader(doc.get("viscous", {}), "viscous", source), _VISCOUS_RULES)
    sen = _dataclass_from(SensorSpec, _Reader(doc.get("sensors", {}), "sensors", source), _SENSOR_RULES)
    motion = _read_motion(doc.get("motion", {}), source)
    events = _read_events(doc.get("events", []), source)
    sc = Scenario(name=name, description=desc.strip(), duration_s=duration, rate_hz=rate,
                  frame_samples=frame, seed=seed, flow_speed_m_s=speed, article=art, fluid=fluid,
                  numerics=num, viscous=vis, motion=motion, events=events, sensors=sen, source=source)
    validate_physics(sc)
    return sc


def max_flow_speed(sc: Scenario) -> float:
    """Largest free-stream speed the scenario reaches (initial speed and flow-speed events)."""
    speeds = [sc.flow_speed_m_s] + [e.get("speed_m_s") for e in sc.events if e.kind == "flow-speed"]
    return max(speeds)


def validate_physics(sc: Scenario, rate_hz: float | None = None) -> None:
    """Refuse non-physical articles and time steps too large for the scheme (ConfigError)."""
    src = sc.source
    a = sc.article
    if a.n_modes > 0 and not (a.chord_m * max(a.pivot, 1.0 - a.pivot) > 0.0):
        raise ConfigError(f"{src}: 'article.pivot' leaves no flexible part of the plate")
    rate = sc.rate_hz if rate_hz is None else rate_hz
    dt = 1.0 / (rate * sc.numerics.substeps)
    h = a.chord_m / sc.numerics.n_panels
    courant = max_flow_speed(sc) * dt / h
    if courant > 1.0:
        raise ConfigError(
            f"{src}: 'scenario.rate_hz' = {rate:g} gives a time step too large for the wake scheme "
            f"(convective Courant number U dt / h = {courant:.2f} > 1; raise the rate or "
            f"numerics.substeps)")
    if a.n_modes > 0:
        from wingwatch.daemon.rig.beam import cantilever_eigenvalues
        from wingwatch.daemon.rig.theory import cantilever_frequency
        length = a.chord_m * max(a.pivot, 1.0 - a.pivot)
        stiffest = max([1.0] + [e.get("factor") for e in sc.events if e.kind == "stiffness"])
        f1 = float(cantilever_frequency(cantilever_eigenvalues(1), length, a.rigidity * stiffest,
                                        a.areal_mass)[0])
        if f1 * dt > 0.1:
            raise ConfigError(
                f"{src}: 'scenario.rate_hz' = {rate:g} gives a time step too large to resolve the "
                f"first bending mode ({f1:.1f} Hz in vacuo needs at least 10 steps per period)")
    for e in sc.events:
        if e.t_s > sc.duration_s:
            raise ConfigError(f"{src}: an event '{e.kind}' at t_s = {e.t_s:g} lies after the end "
                              f"of the run (duration_s = {sc.duration_s:g})")


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Load a shipped scenario by name, or a scenario file by path; validate it fully."""
    p = Path(name_or_path)
    if p.suffix != ".toml" and not p.exists():
        p = scenario_dir() / f"{name_or_path}.toml"
        if not p.exists():
            known = ", ".join(n for n, _ in list_scenarios())
            raise ConfigError(f"unknown scenario {str(name_or_path)!r} (known: {known})")
    if not p.is_file():
        raise ConfigError(f"scenario file {str(p)!r} does not exist")
    try:
        with open(p, "rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p}: not valid TOML ({exc})") from None
    return scenario_from_dict(doc, str(p))


def list_scenarios() -> list[tuple[str, str]]:
    """Shipped scenarios as (name, one-line description), sorted by name."""
    out = []
    for p in sorted(scenario_dir().glob("*.toml")):
        try:
            with open(p, "rb") as fh:
                doc = tomllib.load(fh)
            desc = str(doc.get("scenario", {}).get("description", "")).strip().splitlines()[0]
        except (OSError, tomllib.TOMLDecodeError, IndexError):
            desc = "(unreadable)"
        out.append((p.stem, desc))
    return out
