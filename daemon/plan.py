"""Controller messages: the announced alpha plan (``plan.<controller>``) and the rig's pitch command.

A controller announces its planned angle-of-attack trajectory on the daemon's sensor socket, so
that the curvature-margin watcher can forecast with the controller's intent instead of holding
the present angle. The schema is in ``docs/protocol.md`` (inbound ``plan.<controller>``, kind
``plan``, version 1): ``v``, ``kind``, ``controller`` (the topic suffix), ``t0`` (source time of
the first planned sample, s), ``dt`` (plan step, s) and ``alpha`` (rad, an array map
``{"dtype": "<f8", "shape": [n], "data": bytes}`` as :func:`wingwatch.daemon.codec.encode_array`
writes it).

:func:`decode_plan` validates every field and either returns a :class:`Plan` or raises
:class:`~wingwatch.daemon.errors.FrameRejected` with a reason code of
:data:`wingwatch.daemon.codec.REJECT_REASONS`; it never raises anything else, whatever the bytes
(the fuzz tests in ``tests/test_plan.py`` hold it to that).

| reason | when |
|---|---|
| ``too_large`` | payload longer than ``max_bytes`` (checked before unpacking) |
| ``malformed`` | not bytes; not msgpack; not a map; bytes after the map |
| ``schema_version`` | ``v`` missing, not an integer, or not 1 |
| ``bad_field`` | a field missing, unknown, of the wrong type or out of range (names the field) |
| ``bad_topic`` | topic is not ``plan.`` + the payload's ``controller`` |
| ``bad_shape`` | ``alpha`` not one-dimensional, of 1 to :data:`MAX_PLAN_SAMPLES` samples, or its bytes do not match its shape |
| ``non_finite`` | ``t0``, ``dt`` or a sample of ``alpha`` is NaN or infinite |

The rig's pitch command (topic ``cmd.alpha``, documented in ``docs/rig.md``) is a map
``{"v": 1, "kind": "command", "t": source time s, "alpha": rad}``; :func:`decode_command` holds
it to the same policy.

Examples
--------
>>> import numpy as np
>>> topic, payload = encode_plan("mpc", 2.0, 0.025, np.radians([5.0, 5.5, 6.0]))
>>> topic
b'plan.mpc'
>>> p = decode_plan(topic, payload)
>>> (p.controller, p.t0, p.dt, p.n_samples, round(float(np.degrees(p.alpha[-1])), 6))
('mpc', 2.0, 0.025, 3, 6.0)
>>> decode_command(*encode_command(1.5, 0.1))
Command(t=1.5, alpha=0.1)
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

from wingwatch.daemon.codec import decode_array, encode_array
from wingwatch.daemon.errors import FrameRejected

__all__ = [
    "PLAN_SCHEMA",
    "PLAN_TOPIC_PREFIX",
    "MAX_PLAN_SAMPLES",
    "COMMAND_SCHEMA",
    "COMMAND_TOPIC",
    "Plan",
    "Command",
    "plan_topic",
    "encode_plan",
    "decode_plan",
    "encode_command",
    "decode_command",
]

#: Schema version of ``plan.<controller>`` messages.
PLAN_SCHEMA = 1
PLAN_TOPIC_PREFIX = b"plan."
#: Most samples one plan may carry.
MAX_PLAN_SAMPLES = 100_000
#: Schema version of the rig's ``cmd.alpha`` messages.
COMMAND_SCHEMA = 1
COMMAND_TOPIC = b"cmd.alpha"

_NAME_RE = re.compile(r"[A-Za-z0-9_.-]{1,64}")  # like a stream name (docs/protocol.md); fullmatch
_PLAN_KEYS = ("v", "kind", "controller", "t0", "dt", "alpha")
_COMMAND_KEYS = ("v", "kind", "t", "alpha")
_ARRAY_KEYS = {"dtype", "shape", "data"}
_T_MAX = 1e12  # |source time| bound, s, as for sensor frames
_DT_MAX = 3600.0  # a plan step longer than an hour is a mistake, not a plan
_ALPHA_MAX = 0.5 * math.pi  # |alpha| bound of a command, rad
_COMMAND_MAX_BYTES = 1024


@dataclass(frozen=True, eq=False)
class Plan:
    """One decoded plan: ``alpha[i]`` (rad) is planned for source time ``t0 + i * dt``.

    ``alpha`` is a read-only float64 array.
    """

    controller: str
    t0: float
    dt: float
    alpha: np.ndarray

    @property
    def n_samples(self) -> int:
        return int(self.alpha.shape[0])

    @property
    def t_end(self) -> float:
        """Source time of the last planned sample."""
        return self.t0 + (self.n_samples - 1) * self.dt

    def times(self) -> np.ndarray:
        return self.t0 + self.dt * np.arange(self.n_samples)


@dataclass(frozen=True)
class Command:
    """A pitch command for the rig: follow ``alpha`` (rad) from source time ``t`` (s) on."""

    t: float
    alpha: float


def plan_topic(controller: str) -> bytes:
    return PLAN_TOPIC_PREFIX + controller.encode("ascii")


def _finite_number(x: Any) -> bool:
    return not isinstance(x, bool) and isinstance(x, (int, float)) and math.isfinite(x)


def encode_plan(controller: str, t0: float, dt: float, alpha: Any) -> tuple[bytes, bytes]:
    """Encode a plan as ``(topic, payload)``; the inverse of :func:`decode_plan`.

    Raises
    ------
    ValueError
        Naming the parameter, when the plan would be refused by :func:`decode_plan`.
    """
    if not isinstance(controller, str) or not _NAME_RE.fullmatch(controller):
        raise ValueError("controller must be 1-64 characters of A-Z a-z 0-9 _ . -")
    if not _finite_number(t0) or abs(t0) > _T_MAX:
        raise ValueError(f"t0 must be a finite source time within 1e12 s, not {t0!r}")
    if not _finite_number(dt) or not 0.0 < dt <= _DT_MAX:
        raise ValueError(f"dt must be a positive step of at most {_DT_MAX:g} s, not {dt!r}")
    a = np.asarray(alpha, dtype=np.float64)
    if a.ndim != 1 or not 1 <= a.size <= MAX_PLAN_SAMPLES:
        raise ValueError(f"alpha must be a 1-D array of 1 to {MAX_PLAN_SAMPLES} samples, "
                         f"got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("alpha holds NaN or infinite values")
    msg = {"v": PLAN_SCHEMA, "kind": "plan", "controller": controller, "t0": float(t0),
           "dt": float(dt), "alpha": encode_array(a)}
    return plan_topic(controller), msgpack.packb(msg, use_bin_type=True, use_single_float=False)


def _unpack(payload: bytes, max_bytes: int) -> dict[str, Any]:
    if len(payload) > max_bytes:
        raise FrameRejected("too_large", f"payload is {len(payload)} bytes, the limit is {max_bytes}")
    try:
        msg = msgpack.unpackb(payload, raw=False, strict_map_key=True, max_str_len=4096,
                              max_bin_len=max_bytes, max_array_len=64, max_map_len=16,
                              max_ext_len=0)
    except msgpack.ExtraData:
        raise FrameRejected("malformed", "payload has bytes after the msgpack map") from None
    except (ValueError, msgpack.UnpackException, TypeError, OverflowError, RecursionError) as exc:
        raise FrameRejected("malformed", f"payload is not valid msgpack ({type(exc).__name__})") from None
    if not isinstance(msg, dict):
        raise FrameRejected("malformed", f"payload is a msgpack {type(msg).__name__}, not a map")
    return msg


def _version(msg: dict[str, Any], expected: int) -> None:
    v = msg.get("v")
    if isinstance(v, bool) or not isinstance(v, int):
        raise FrameRejected("schema_version", "field 'v' (schema version) is missing or not an integer")
    if v != expected:
        raise FrameRejected("schema_version", f"schema version {v} is not supported (this reader "
                                              f"reads {expected})")


def _fields(msg: dict[str, Any], keys: tuple[str, ...], what: str) -> None:
    for key in keys:
        if key not in msg:
            raise FrameRejected("bad_field", f"field '{key}' is missing")
    for key in msg:
        if key not in keys:
            shown = str(key)[:64]
            raise FrameRejected("bad_field", f"field '{shown}' is not part of {what}")


def _number(msg: dict[str, Any], key: str) -> float:
    x = msg[key]
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        raise FrameRejected("bad_field", f"field '{key}' must be a number")
    if isinstance(x, float) and not math.isfinite(x):
        raise FrameRejected("non_finite", f"field '{key}' is NaN or infinite")
    return float(x)


def decode_plan(topic: bytes, payload: bytes, max_bytes: int = 4 << 20) -> Plan:
    """Decode and validate one ``plan.<controller>`` message.

    Raises
    ------
    FrameRejected
        With ``reason`` in :data:`wingwatch.daemon.codec.REJECT_REASONS` and a sentence naming
        the field. No other exception escapes, whatever the input bytes.
    """
    if not isinstance(topic, bytes) or not isinstance(payload, bytes):
        raise FrameRejected("malformed", "topic and payload must be bytes")
    msg = _unpack(payload, max_bytes)
    _version(msg, PLAN_SCHEMA)
    _fields(msg, _PLAN_KEYS, f"plan schema {PLAN_SCHEMA}")
    if msg["kind"] != "plan":
        raise FrameRejected("bad_field", "field 'kind' must be 'plan'")
    controller = msg["controller"]
    if not isinstance(controller, str) or not _NAME_RE.fullmatch(controller):
        raise FrameRejected("bad_field", "field 'controller' must be 1-64 characters of A-Z a-z 0-9 _ . -")
    if topic != plan_topic(controller):
        shown = topic[:80].decode("ascii", "replace")
        raise FrameRejected("bad_topic", f"topic '{shown}' does not match controller '{controller}'")
    t0 = _number(msg, "t0")
    if abs(t0) > _T_MAX:
        raise FrameRejected("bad_field", "field 't0' is beyond 1e12 seconds")
    dt = _number(msg, "dt")
    if not 0.0 < dt <= _DT_MAX:
        raise FrameRejected("bad_field", f"field 'dt' must be in (0, {_DT_MAX:g}] s, got {dt}")

    arr = msg["alpha"]
    if not isinstance(arr, dict) or set(arr) != _ARRAY_KEYS:
        raise FrameRejected("bad_field", "field 'alpha' must be an array map of 'dtype', 'shape' and 'data'")
    if arr["dtype"] != "<f8":
        raise FrameRejected("bad_field", "field 'alpha' must have dtype '<f8'")
    shape = arr["shape"]
    if (not isinstance(shape, list) or len(shape) != 1 or isinstance(shape[0], bool)
            or not isinstance(shape[0], int)):
        raise FrameRejected("bad_shape", "field 'alpha' must be one-dimensional (shape [n])")
    n = shape[0]
    if not 1 <= n <= MAX_PLAN_SAMPLES:
        raise FrameRejected("bad_shape", f"field 'alpha' must hold 1 to {MAX_PLAN_SAMPLES} samples, got {n}")
    data = arr["data"]
    if not isinstance(data, bytes):
        raise FrameRejected("bad_field", "field 'alpha.data' must be msgpack bin (raw bytes)")
    if len(data) != 8 * n:
        raise FrameRejected("bad_shape", f"field 'alpha' holds {len(data)} bytes, but {n} samples "
                                         f"of 8 bytes are {8 * n}")
    try:
        alpha = decode_array(arr)
    except ValueError as exc:  # checked above; kept so that nothing else can ever escape
        raise FrameRejected("bad_shape", f"field 'alpha': {exc}") from None
    if not np.all(np.isfinite(alpha)):
        bad = int(np.flatnonzero(~np.isfinite(alpha))[0])
        raise FrameRejected("non_finite", f"field 'alpha' holds NaN or infinite values (first at {bad})")
    if not math.isfinite(t0 + (n - 1) * dt):
        raise FrameRejected("bad_field", "fields 't0', 'dt' and 'alpha' put the plan's end beyond "
                                         "a finite time")
    alpha.flags.writeable = False
    return Plan(controller=controller, t0=t0, dt=dt, alpha=alpha)


def encode_command(t: float, alpha: float) -> tuple[bytes, bytes]:
    """Encode a pitch command for the rig as ``(topic, payload)`` (see ``docs/rig.md``).

    Raises ValueError naming the parameter when :func:`decode_command` would refuse it.
    """
    if not _finite_number(t) or abs(t) > _T_MAX:
        raise ValueError(f"t must be a finite source time within 1e12 s, not {t!r}")
    if not _finite_number(alpha) or abs(alpha) > _ALPHA_MAX:
        raise ValueError(f"alpha must be a finite angle within pi/2 rad, not {alpha!r}")
    msg = {"v": COMMAND_SCHEMA, "kind": "command", "t": float(t), "alpha": float(alpha)}
    return COMMAND_TOPIC, msgpack.packb(msg, use_bin_type=True, use_single_float=False)


def decode_command(topic: bytes, payload: bytes) -> Command:
    """Decode and validate one ``cmd.alpha`` message; raises only FrameRejected."""
    if not isinstance(topic, bytes) or not isinstance(payload, bytes):
        raise FrameRejected("malformed", "topic and payload must be bytes")
    if topic != COMMAND_TOPIC:
        shown = topic[:80].decode("ascii", "replace")
        raise FrameRejected("bad_topic", f"topic '{shown}' is not '{COMMAND_TOPIC.decode()}'")
    msg = _unpack(payload, _COMMAND_MAX_BYTES)
    _version(msg, COMMAND_SCHEMA)
    _fields(msg, _COMMAND_KEYS, f"command schema {COMMAND_SCHEMA}")
    if msg["kind"] != "command":
        raise FrameRejected("bad_field", "field 'kind' must be 'command'")
    t = _number(msg, "t")
    if abs(t) > _T_MAX:
        raise FrameRejected("bad_field", "field 't' is beyond 1e12 seconds")
    alpha = _number(msg, "alpha")
    if abs(alpha) > _ALPHA_MAX:
        raise FrameRejected("bad_field", "field 'alpha' must be within pi/2 rad")
    return Command(t=t, alpha=alpha)
