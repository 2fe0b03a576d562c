"""Configuration: load, validate and resolve the daemon's TOML configuration.

The shipped default (``configs/wingwatch.toml``, installed as package data of
``wingwatch.configs``) is the base; a user's file is laid over it key by key, except that the
tables ``[streams]`` and ``[channels]`` are replaced whole when the user's file gives them.
Everything is validated on load: unknown keys, wrong types, missing channels and non-physical
values stop with a :class:`~wingwatch.daemon.errors.ConfigError` whose message names the file
and the dotted key.

The resolved configuration is a frozen :class:`Config`; :func:`to_toml` prints it and
:meth:`Config.as_dict` is what the replay log header records.

Examples
--------
>>> cfg = load_config()
>>> cfg.streams["rig"].rate_hz
1000.0
>>> cfg.outputs.curvature.strain
'strain_root'
"""

from __future__ import annotations

import copy
import importlib.resources
import ipaddress
import math
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from wingwatch.daemon.errors import ConfigError

__all__ = [
    "Config",
    "Endpoints",
    "StreamSpec",
    "ChannelSpec",
    "LiftSpec",
    "CurvatureSpec",
    "Outputs",
    "RecorderSpec",
    "Security",
    "Limits",
    "load_config",
    "default_config_text",
    "config_from_dict",
    "config_from_recorded",
    "to_toml",
    "endpoint_is_loopback",
    "QUANTITIES",
]

#: Physical quantities a raw channel may measure, with their SI unit after the channel map.
QUANTITIES = {
    "angle": "rad",
    "force": "N",
    "pressure": "Pa",
    "strain": "1",
    "velocity": "m/s",
    "temperature": "K",
    "acceleration": "m/s^2",
    "voltage": "V",
}


@dataclass(frozen=True)
class Endpoints:
    sensor: str
    publish: str
    snapshot: str


@dataclass(frozen=True)
class StreamSpec:
    name: str
    rate_hz: float
    channels: tuple[str, ...]


@dataclass(frozen=True)
class ChannelSpec:
    name: str
    quantity: str
    units: str
    gain: float
    offset: float


@dataclass(frozen=True)
class LiftSpec:
    force: str
    dynamic_pressure: str
    reference_area_m2: float
    min_dynamic_pressure_pa: float


@dataclass(frozen=True)
class CurvatureSpec:
    strain: str
    thickness_m: float
    limit_per_m: float


@dataclass(frozen=True)
class Outputs:
    alpha: str
    lift: LiftSpec
    curvature: CurvatureSpec


@dataclass(frozen=True)
class RecorderSpec:
    enabled: bool
    directory: str
    rotate_mb: float
    fsync_interval_s: float
    checkpoint_s: float = 5.0


@dataclass(frozen=True)
class Limits:
    max_payload_bytes: int
    max_channels: int
    max_frame_samples: int
    max_burst_log: int


@dataclass(frozen=True)
class Security:
    curve: bool
    server_key: str
    allowed_clients: str


@dataclass(frozen=True)
class Config:
    """The resolved, validated configuration (immutable)."""

    endpoints: Endpoints
    status_period_s: float
    limits: Limits
    streams: dict[str, StreamSpec]
    channels: dict[str, ChannelSpec]
    outputs: Outputs
    recorder: RecorderSpec
    security: Security = Security(False, "keys/daemon.key_secret", "keys/allowed")
    identify: dict[str, Any] = field(default_factory=dict)
    watch: dict[str, Any] = field(default_factory=dict)
    publish: dict[str, Any] = field(default_factory=dict)
    source: str = "<built-in default>"

    @property
    def conditioning_stream(self) -> StreamSpec:
        """The stream that carries the channels the outputs are computed from."""
        for spec in self.streams.values():
            if self.outputs.alpha in spec.channels:
                return spec
        raise ConfigError("no stream carries the alpha channel")  # prevented by validation

    def as_dict(self) -> dict[str, Any]:
        """Plain nested dict in the same shape as the TOML file (without ``source``)."""
        streams = {
            n: {"rate_hz": s.rate_hz, "channels": list(s.channels)} for n, s in self.streams.items()
        }
        channels = {
            n: {"quantity": c.quantity, "units": c.units, "gain": c.gain, "offset": c.offset}
            for n, c in self.channels.items()
        }
        return {
            "endpoints": asdict(self.endpoints),
            "status": {"period_s": self.status_period_s},
            "limits": asdict(self.limits),
            "streams": streams,
            "channels": channels,
            "outputs": {
                "alpha": self.outputs.alpha,
                "lift": asdict(self.outputs.lift),
                "curvature": asdict(self.outputs.curvature),
            },
            "recorder": asdict(self.recorder),
            "security": asdict(self.security),
            "identify": copy.deepcopy(self.identify),
            "watch": copy.deepcopy(self.watch),
            "publish": copy.deepcopy(self.publish),
        }


# --------------------------------------------------------------------------------------------
# Loading


def default_config_text() -> str:
    """The shipped default configuration file's text."""
    return (
        importlib.resources.files("wingwatch.configs").joinpath("wingwatch.toml").read_text("utf-8")
    )


def _parse_toml(text: str, where: str) -> dict[str, Any]:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where}: not valid TOML ({exc}).") from None


def _merge(base: dict[str, Any], over: dict[str, Any], path: str = "") -> dict[str, Any]:
    out = copy.deepcopy(base)
    for key, value in over.items():
        dotted = f"{path}{key}"
        if dotted in ("streams", "channels"):
            out[key] = copy.deepcopy(value)
        elif isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value, dotted + ".")
        else:
            out[key] = copy.deepcopy(value)
    return out


def load_config(path: str | Path | None = None) -> Config:
    """Load the shipped default, lay the file at ``path`` over it, validate and resolve.

    Raises
    ------
    ConfigError
        One sentence naming the file and the key at fault.
    """
    base = _parse_toml(default_config_text(), "the built-in default configuration")
    if path is None:
        return config_from_dict(base, source="<built-in default>")
    p = Path(path)
    try:
        text = p.read_text("utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: configuration file not found.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read the configuration file ({exc}).") from None
    user = _parse_toml(text, str(p))
    return config_from_dict(_merge(base, user), source=str(p))


# --------------------------------------------------------------------------------------------
# Validation helpers: each names the file and the dotted key.


class _Checker:
    def __init__(self, where: str) -> None:
        self.where = where

    def fail(self, key: str, msg: str) -> ConfigError:
        return ConfigError(f"{self.where}: key '{key}' {msg}.")

    def table(self, d: dict[str, Any], key: str) -> dict[str, Any]:
        v = d.get(key.rsplit(".", 1)[-1], None)
        if v is None:
            raise self.fail(key, "is missing")
        if not isinstance(v, dict):
            raise self.fail(key, f"must be a table, got {type(v).__name__}")
        return v

    def no_unknown(self, d: dict[str, Any], prefix: str, allowed: set[str]) -> None:
        for k in d:
            if k not in allowed:
                names = ", ".join(sorted(allowed)) or "none"
                raise self.fail(f"{prefix}{k}", f"is not a known key (allowed here: {names})")

    def get(self, d: dict[str, Any], prefix: str, key: str) -> Any:
        if key not in d:
            raise self.fail(prefix + key, "is missing")
        return d[key]

    def number(
        self,
        d: dict[str, Any],
        prefix: str,
        key: str,
        *,
        positive: bool = False,
        nonneg: bool = False,
    ) -> float:
        v = self.get(d, prefix, key)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.fail(prefix + key, f"must be a number, got {type(v).__name__} {v!r}")
        v = float(v)
        if not math.isfinite(v):
            raise self.fail(prefix + key, f"must be finite, got {v!r}")
        if positive and v <= 0:
            raise self.fail(prefix + key, f"must be greater than zero, got {v!r}")
        if nonneg and v < 0:
            raise self.fail(prefix + key, f"must not be negative, got {v!r}")
        return v

    def integer(self, d: dict[str, Any], prefix: str, key: str, *, minimum: int = 0) -> int:
        v = self.get(d, prefix, key)
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(prefix + key, f"must be a whole number, got {type(v).__name__} {v!r}")
        if v < minimum:
            raise self.fail(prefix + key, f"must be at least {minimum}, got {v}")
        return v

    def string(self, d: dict[str, Any], prefix: str, key: str) -> str:
        v = self.get(d, prefix, key)
        if not isinstance(v, str) or not v:
            raise self.fail(prefix + key, f"must be a non-empty string, got {v!r}")
        return v

    def boolean(self, d: dict[str, Any], prefix: str, key: str) -> bool:
        v = self.get(d, prefix, key)
        if not isinstance(v, bool):
            raise self.fail(prefix + key, f"must be true or false, got {v!r}")
        return v


def _endpoint(ck: _Checker, d: dict[str, Any], key: str) -> str:
    v = ck.string(d, "endpoints.", key)
    parts = urlsplit(v)
    if parts.scheme not in ("tcp", "ipc", "inproc"):
        raise ck.fail(f"endpoints.{key}", f"must be a tcp://, ipc:// or inproc:// address, got {v!r}")
    if parts.scheme == "tcp":
        try:
            port = parts.port
        except ValueError:
            port = None
        if not parts.hostname or port is None:
            raise ck.fail(f"endpoints.{key}", f"must give a host and a port, got {v!r}")
    return v


def endpoint_is_loopback(endpoint: str) -> bool:
    """True for inproc/ipc addresses and tcp addresses on the loopback range.

    >>> endpoint_is_loopback("tcp://127.0.0.1:5601"), endpoint_is_loopback("tcp://0.0.0.0:5601")
    (True, False)
    """
    parts = urlsplit(endpoint)
    if parts.scheme in ("inproc", "ipc"):
        return True
    host = parts.hostname or ""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


_TOP_KEYS = {
    "endpoints",
    "status",
    "limits",
    "streams",
    "channels",
    "outputs",
    "recorder",
    "security",
    "identify",
    "watch",
    "publish",
}


def config_from_recorded(raw: dict[str, Any], source: str) -> Config:
    """A configuration recorded by this or an earlier version (a log header, a checkpoint):
    keys that version did not have yet take the shipped defaults."""
    base = _parse_toml(default_config_text(), "the built-in default configuration")
    return config_from_dict(_merge(base, raw), source=source)


def config_from_dict(raw: dict[str, Any], source: str = "<dict>") -> Config:
    """Validate a nested dict (as parsed from TOML) and build the :class:`Config`."""
    ck = _Checker(source)
    ck.no_unknown(raw, "", _TOP_KEYS)

    e = ck.table(raw, "endpoints")
    ck.no_unknown(e, "endpoints.", {"sensor", "publish", "snapshot"})
    endpoints = Endpoints(*(_endpoint(ck, e, k) for k in ("sensor", "publish", "snapshot")))
    if len({endpoints.sensor, endpoints.publish, endpoints.snapshot}) != 3:
        raise ck.fail("endpoints", "must give three different addresses")

    st = ck.table(raw, "status")
    ck.no_unknown(st, "status.", {"period_s"})
    status_period = ck.number(st, "status.", "period_s", positive=True)

    lim = ck.table(raw, "limits")
    ck.no_unknown(lim, "limits.", {"max_payload_bytes", "max_channels", "max_frame_samples",
                                   "max_burst_log"})
    max_payload = ck.integer(lim, "limits.", "max_payload_bytes", minimum=64)
    if max_payload > 16 << 20:
        # the transport cap is 16x this, and a record must fit the log format's 256 MiB body
        raise ck.fail("limits.max_payload_bytes", f"must be at most {16 << 20} (16 MiB), got "
                                                  f"{max_payload}")
    limits = Limits(
        max_payload_bytes=max_payload,
        max_channels=ck.integer(lim, "limits.", "max_channels", minimum=1),
        max_frame_samples=ck.integer(lim, "limits.", "max_frame_samples", minimum=1),
        max_burst_log=ck.integer(lim, "limits.", "max_burst_log", minimum=1),
    )

    streams_raw = ck.table(raw, "streams")
    if not streams_raw:
        raise ck.fail("streams", "must declare at least one stream")
    streams: dict[str, StreamSpec] = {}
    for name, s in streams_raw.items():
        pre = f"streams.{name}."
        if not isinstance(s, dict):
            raise ck.fail(f"streams.{name}", "must be a table")
        ck.no_unknown(s, pre, {"rate_hz", "channels"})
        rate = ck.number(s, pre, "rate_hz", positive=True)
        chans = ck.get(s, pre, "channels")
        if (
            not isinstance(chans, list)
            or not chans
            or not all(isinstance(c, str) and c for c in chans)
        ):
            raise ck.fail(pre + "channels", "must be a non-empty list of channel names")
        if len(set(chans)) != len(chans):
            raise ck.fail(pre + "channels", "must not name a channel twice")
        if len(chans) > limits.max_channels:
            raise ck.fail(pre + "channels", f"has more than limits.max_channels={limits.max_channels}")
        streams[name] = StreamSpec(name=name, rate_hz=rate, channels=tuple(chans))

    chan_raw = ck.table(raw, "channels")
    channels: dict[str, ChannelSpec] = {}
    for name, c in chan_raw.items():
        pre = f"channels.{name}."
        if not isinstance(c, dict):
            raise ck.fail(f"channels.{name}", "must be a table")
        ck.no_unknown(c, pre, {"quantity", "units", "gain", "offset"})
        quantity = ck.string(c, pre, "quantity")
        if quantity not in QUANTITIES:
            raise ck.fail(pre + "quantity", f"must be one of {', '.join(QUANTITIES)}, got {quantity!r}")
        gain = ck.number(c, pre, "gain")
        if gain == 0.0:
            raise ck.fail(pre + "gain", "must not be zero")
        channels[name] = ChannelSpec(
            name=name,
            quantity=quantity,
            units=ck.string(c, pre, "units"),
            gain=gain,
            offset=ck.number(c, pre, "offset"),
        )
    all_stream_channels = {c for s in streams.values() for c in s.channels}
    for name in channels:
        if name not in all_stream_channels:
            raise ck.fail(f"channels.{name}", "is mapped but no stream carries it")

    o = ck.table(raw, "outputs")
    ck.no_unknown(o, "outputs.", {"alpha", "lift", "curvature"})
    alpha = ck.string(o, "outputs.", "alpha")
    lf = ck.table(o, "outputs.lift")
    ck.no_unknown(lf, "outputs.lift.", {"force", "dynamic_pressure", "reference_area_m2",
                                        "min_dynamic_pressure_pa"})
    lift = LiftSpec(
        force=ck.string(lf, "outputs.lift.", "force"),
        dynamic_pressure=ck.string(lf, "outputs.lift.", "dynamic_pressure"),
        reference_area_m2=ck.number(lf, "outputs.lift.", "reference_area_m2", positive=True),
        min_dynamic_pressure_pa=ck.number(lf, "outputs.lift.", "min_dynamic_pressure_pa",
                                          positive=True),
    )
    cv = ck.table(o, "outputs.curvature")
    ck.no_unknown(cv, "outputs.curvature.", {"strain", "thickness_m", "limit_per_m"})
    curvature = CurvatureSpec(
        strain=ck.string(cv, "outputs.curvature.", "strain"),
        thickness_m=ck.number(cv, "outputs.curvature.", "thickness_m", positive=True),
        limit_per_m=ck.number(cv, "outputs.curvature.", "limit_per_m", positive=True),
    )
    wanted = {
        "outputs.alpha": (alpha, "angle"),
        "outputs.lift.force": (lift.force, "force"),
        "outputs.lift.dynamic_pressure": (lift.dynamic_pressure, "pressure"),
        "outputs.curvature.strain": (curvature.strain, "strain"),
    }
    for key, (chan, quantity) in wanted.items():
        if chan not in channels:
            raise ck.fail(key, f"names channel {chan!r}, which [channels] does not map")
        if channels[chan].quantity != quantity:
            raise ck.fail(key, f"needs a {quantity} channel, but {chan!r} measures "
                               f"{channels[chan].quantity}")
    homes = {
        n for n, s in streams.items() if all(w[0] in s.channels for w in wanted.values())
    }
    if not homes:
        raise ck.fail("outputs", "must take all its channels from one stream")

    r = ck.table(raw, "recorder")
    ck.no_unknown(r, "recorder.", {"enabled", "directory", "rotate_mb", "fsync_interval_s",
                                   "checkpoint_s"})
    recorder = RecorderSpec(
        enabled=ck.boolean(r, "recorder.", "enabled"),
        directory=ck.string(r, "recorder.", "directory"),
        rotate_mb=ck.number(r, "recorder.", "rotate_mb", positive=True),
        fsync_interval_s=ck.number(r, "recorder.", "fsync_interval_s", nonneg=True),
        checkpoint_s=ck.number(r, "recorder.", "checkpoint_s", nonneg=True),
    )

    sec = ck.table(raw, "security")
    ck.no_unknown(sec, "security.", {"curve", "server_key", "allowed_clients"})
    security = Security(
        curve=ck.boolean(sec, "security.", "curve"),
        server_key=ck.string(sec, "security.", "server_key"),
        allowed_clients=ck.string(sec, "security.", "allowed_clients"),
    )

    pb = raw.get("publish", {})
    if not isinstance(pb, dict):
        raise ck.fail("publish", "must be a table")
    ck.no_unknown(pb, "publish.", {"sndhwm"})
    if "sndhwm" in pb:
        ck.integer(pb, "publish.", "sndhwm", minimum=1)

    later = {}
    for key in ("identify", "watch", "publish"):
        later[key] = raw.get(key, {})
        if not isinstance(later[key], dict):
            raise ck.fail(key, "must be a table")

    return Config(
        endpoints=endpoints,
        status_period_s=status_period,
        limits=limits,
        streams=streams,
        channels=channels,
        outputs=Outputs(alpha=alpha, lift=lift, curvature=curvature),
        recorder=recorder,
        security=security,
        identify=later["identify"],
        watch=later["watch"],
        publish=later["publish"],
        source=source,
    )


# --------------------------------------------------------------------------------------------
# Printing


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ("nan" if math.isnan(v) else
                                                 ("inf" if v > 0 else "-inf"))
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def _emit(d: dict[str, Any], prefix: str, lines: list[str]) -> None:
    scalars = {k: v for k, v in d.items() if not isinstance(v, dict)}
    tables = {k: v for k, v in d.items() if isinstance(v, dict)}
    if prefix and (scalars or not tables):
        lines.append(f"[{prefix}]")
    for k, v in scalars.items():
        lines.append(f"{k} = {_toml_value(v)}")
    if prefix and (scalars or not tables):
        lines.append("")
    for k, v in tables.items():
        _emit(v, f"{prefix}.{k}" if prefix else k, lines)


def to_toml(cfg: Config) -> str:
    """The resolved configuration as TOML text; loading it back gives an equal :class:`Config`.

    >>> cfg = load_config()
    >>> config_from_dict(tomllib.loads(to_toml(cfg))).as_dict() == cfg.as_dict()
    True
    """
    lines = [f"# wingwatch resolved configuration (from {cfg.source})", ""]
    _emit(cfg.as_dict(), "", lines)
    return "\n".join(lines).rstrip() + "\n"
