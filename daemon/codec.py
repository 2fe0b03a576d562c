"""Wire codec: every msgpack encoding and decoding in wingwatch happens here.

Inbound sensor frames are multipart ZeroMQ messages ``[topic, payload]`` with topic
``sensor.<stream>`` and a msgpack map payload (schema :data:`SENSOR_SCHEMA`, documented field by
field in ``docs/protocol.md``). :func:`decode_sensor_frame` either returns a
:class:`SensorFrame` or raises :class:`~wingwatch.daemon.errors.FrameRejected` with a reason code
from :data:`REJECT_REASONS`; it never raises anything else, whatever the bytes.

Outbound messages (model, warning, status, ...) are msgpack maps with ``"v"`` (schema version)
and ``"kind"``; numpy arrays travel as maps ``{"dtype": "<f8", "shape": [r, c], "data": bytes}``
(little-endian, C order) that any msgpack reader can decode. No pickle anywhere.

Examples
--------
>>> import numpy as np
>>> f = SensorFrame("rig", 7, 0.07, 1000.0, ("a", "b"), np.arange(6.0).reshape(3, 2))
>>> g = decode_sensor_frame(*encode_sensor_frame(f))
>>> (g.stream, g.seq, g.n_samples, float(g.samples[2, 1]))
('rig', 7, 3, 5.0)
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np

from wingwatch.daemon.errors import FrameRejected

__all__ = [
    "SENSOR_SCHEMA",
    "OUT_SCHEMA",
    "SENSOR_TOPIC_PREFIX",
    "TOPICS",
    "REJECT_REASONS",
    "FLAG_BITS",
    "SensorFrame",
    "encode_sensor_frame",
    "decode_sensor_frame",
    "peek_sensor_header",
    "encode_array",
    "decode_array",
    "encode_message",
    "decode_message",
    "decode_snapshot_request",
    "encode_snapshot",
    "encode_error_reply",
    "sensor_topic",
    "REASON_BY_CODE",
]

#: Schema version of inbound sensor frames.
SENSOR_SCHEMA = 1
#: Schema version of every outbound message type.
OUT_SCHEMA = 1
SENSOR_TOPIC_PREFIX = b"sensor."

#: Outbound topics and their schema versions (payloads in docs/protocol.md).
TOPICS = {
    "status": (b"ww.status", OUT_SCHEMA),
    "model": (b"ww.model", OUT_SCHEMA),
    "warning": (b"ww.warning", OUT_SCHEMA),
    "event": (b"ww.event", OUT_SCHEMA),
    "watch": (b"ww.watch", OUT_SCHEMA),
}

#: Reason codes a frame can be refused with (codec and ingest together), with their wire number
#: (stored in the replay log's ``aux`` field of a rejected record).
REJECT_REASONS = {
    "malformed": 1,  # not msgpack, not a map, trailing bytes, wrong number of message parts
    "too_large": 2,  # payload above limits.max_payload_bytes
    "schema_version": 3,  # "v" missing or not a version this daemon reads
    "bad_field": 4,  # a field missing, of the wrong type or out of its limits
    "bad_topic": 5,  # topic is not sensor.<stream> of the payload's stream
    "unknown_stream": 6,  # stream not declared in the configuration
    "channel_mismatch": 7,  # channel list differs from the configured stream's
    "rate_mismatch": 8,  # sample rate differs from the configured stream's
    "bad_shape": 9,  # data length is not n * channels * itemsize, or n out of limits
    "non_finite": 10,  # a NaN or infinite sample
    "duplicate": 11,  # a sequence number already received
    "out_of_order": 12,  # older than the newest frame received (arrived late)
    "clock_backwards": 13,  # newer sequence number but earlier time than already covered
}
REASON_BY_CODE = {v: k for k, v in REJECT_REASONS.items()}

#: Optional per-frame flag bits a source may set (informational, recorded, counted).
FLAG_BITS = {
    "source_overrun": 1 << 0,  # the DAQ dropped samples inside this block
    "clock_unlocked": 1 << 1,  # the source clock is free-running (not disciplined)
    "simulated": 1 << 2,  # the frame comes from a simulator (virtual rig)
}
_FLAG_MASK = (1 << 32) - 1

# \A ... \Z, not ^ ... $: "$" also matches before a trailing newline, which let "rig\n" through.
_STREAM_RE = re.compile(r"\A[A-Za-z0-9_.-]{1,64}\Z")
_CHANNEL_RE = re.compile(r"\A[A-Za-z0-9_.:-]{1,64}\Z")
_DTYPES = {"<f4": np.dtype("<f4"), "<f8": np.dtype("<f8")}
_REQUIRED = ("v", "stream", "seq", "t0", "rate", "channels", "dtype", "n", "data")
_OPTIONAL = ("flags",)


@dataclass(frozen=True, eq=False)
class SensorFrame:
    """One decoded block of samples from one stream.

    ``samples`` has shape ``(n_samples, n_channels)`` in raw engineering units, float64, and is
    read-only. Sample ``i`` was taken at source time ``t0 + i / rate``.
    """

    stream: str
    seq: int
    t0: float
    rate: float
    channels: tuple[str, ...]
    samples: np.ndarray
    flags: int = 0
    dtype: str = "<f8"
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.samples.shape[0])

    @property
    def t_end(self) -> float:
        """Source time just after the last sample (t0 + n / rate)."""
        return self.t0 + self.n_samples / self.rate

    def times(self) -> np.ndarray:
        return self.t0 + np.arange(self.n_samples) / self.rate


def sensor_topic(stream: str) -> bytes:
    return SENSOR_TOPIC_PREFIX + stream.encode("ascii")


def encode_sensor_frame(frame: SensorFrame) -> tuple[bytes, bytes]:
    """Encode a frame as ``(topic, payload)``; the inverse of :func:`decode_sensor_frame`."""
    dt = _DTYPES[frame.dtype]
    data = np.ascontiguousarray(frame.samples, dtype=dt).tobytes()
    msg = {
        "v": SENSOR_SCHEMA,
        "stream": frame.stream,
        "seq": int(frame.seq),
        "t0": float(frame.t0),
        "rate": float(frame.rate),
        "channels": list(frame.channels),
        "dtype": frame.dtype,
        "n": int(frame.samples.shape[0]),
        "data": data,
    }
    if frame.flags:
        msg["flags"] = int(frame.flags)
    return sensor_topic(frame.stream), msgpack.packb(msg, use_bin_type=True)


def _unpack(payload: bytes, max_bytes: int) -> Any:
    if len(payload) > max_bytes:
        raise FrameRejected("too_large", f"payload is {len(payload)} bytes, the limit is {max_bytes}")
    try:
        return msgpack.unpackb(
            payload,
            raw=False,
            strict_map_key=True,
            max_str_len=4096,
            max_bin_len=max_bytes,
            max_array_len=4096,
            max_map_len=64,
            max_ext_len=0,
        )
    except msgpack.ExtraData:
        raise FrameRejected("malformed", "payload has bytes after the msgpack map") from None
    except (ValueError, msgpack.UnpackException, TypeError, OverflowError, RecursionError) as exc:
        raise FrameRejected("malformed", f"payload is not valid msgpack ({type(exc).__name__})") from None


def peek_sensor_header(payload: bytes, max_bytes: int = 1 << 26) -> dict[str, Any] | None:
    """Best-effort header fields (stream, seq, t0) of a payload, or None; never raises.

    Used to describe rejected frames in logs and summaries.
    """
    try:
        msg = _unpack(payload, max_bytes)
    except FrameRejected:
        return None
    if not isinstance(msg, dict):
        return None
    return {k: msg.get(k) for k in ("stream", "seq", "t0") if not isinstance(msg.get(k), bytes)}


def decode_sensor_frame(
    topic: bytes,
    payload: bytes,
    *,
    max_bytes: int = 4 << 20,
    max_channels: int = 64,
    max_samples: int = 10000,
) -> SensorFrame:
    """Decode and validate one inbound sensor frame.

    Raises
    ------
    FrameRejected
        With ``reason`` in :data:`REJECT_REASONS` and a sentence naming the field. No other
        exception escapes, whatever the input bytes.
    """
    if not isinstance(topic, bytes) or not isinstance(payload, bytes):
        raise FrameRejected("malformed", "topic and payload must be bytes")
    msg = _unpack(payload, max_bytes)
    if not isinstance(msg, dict):
        raise FrameRejected("malformed", f"payload is a msgpack {type(msg).__name__}, not a map")
    v = msg.get("v")
    if isinstance(v, bool) or not isinstance(v, int):
        raise FrameRejected("schema_version", "field 'v' (schema version) is missing or not an integer")
    if v != SENSOR_SCHEMA:
        raise FrameRejected("schema_version", f"schema version {v} is not supported (this daemon reads {SENSOR_SCHEMA})")
    for key in _REQUIRED:
        if key not in msg:
            raise FrameRejected("bad_field", f"field '{key}' is missing")
    for key in msg:
        if key not in _REQUIRED and key not in _OPTIONAL:
            raise FrameRejected("bad_field", f"field '{key}' is not part of sensor schema {SENSOR_SCHEMA}")

    stream = msg["stream"]
    if not isinstance(stream, str) or not _STREAM_RE.match(stream):
        raise FrameRejected("bad_field", "field 'stream' must be 1-64 characters of A-Z a-z 0-9 _ . -")
    if topic != SENSOR_TOPIC_PREFIX + stream.encode("ascii"):
        # escaped: received bytes never reach a log line raw (a newline could forge a line)
        shown = repr(topic[:80])[2:-1]
        raise FrameRejected("bad_topic", f"topic '{shown}' does not match stream '{stream}'")

    seq = msg["seq"]
    if isinstance(seq, bool) or not isinstance(seq, int) or not 0 <= seq < 2**63:
        raise FrameRejected("bad_field", "field 'seq' must be an integer from 0 to 2^63-1")
    t0 = msg["t0"]
    if isinstance(t0, bool) or not isinstance(t0, (int, float)) or not math.isfinite(t0):
        raise FrameRejected("bad_field", "field 't0' must be a finite number of seconds")
    if abs(t0) > 1e12:
        raise FrameRejected("bad_field", "field 't0' is beyond 1e12 seconds")
    rate = msg["rate"]
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not math.isfinite(rate):
        raise FrameRejected("bad_field", "field 'rate' must be a finite number of Hz")
    if not 0.0 < rate <= 1e7:
        raise FrameRejected("bad_field", f"field 'rate' must be in (0, 1e7] Hz, got {rate}")

    chans = msg["channels"]
    if not isinstance(chans, list) or not chans:
        raise FrameRejected("bad_field", "field 'channels' must be a non-empty list of names")
    if len(chans) > max_channels:
        raise FrameRejected("bad_field", f"field 'channels' lists {len(chans)} channels, the limit is {max_channels}")
    for c in chans:
        if not isinstance(c, str) or not _CHANNEL_RE.match(c):
            raise FrameRejected("bad_field", "field 'channels' holds a name that is not 1-64 characters of A-Z a-z 0-9 _ . : -")
    if len(set(chans)) != len(chans):
        raise FrameRejected("bad_field", "field 'channels' names a channel twice")

    dtype = msg["dtype"]
    if not isinstance(dtype, str) or dtype not in _DTYPES:
        raise FrameRejected("bad_field", "field 'dtype' must be '<f4' or '<f8'")
    n = msg["n"]
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= max_samples:
        raise FrameRejected("bad_shape", f"field 'n' must be an integer from 1 to {max_samples}")
    data = msg["data"]
    if not isinstance(data, bytes):
        raise FrameRejected("bad_field", "field 'data' must be msgpack bin (raw bytes)")
    dt = _DTYPES[dtype]
    expected = n * len(chans) * dt.itemsize
    if len(data) != expected:
        raise FrameRejected(
            "bad_shape",
            f"field 'data' holds {len(data)} bytes, but n={n} samples x {len(chans)} channels x "
            f"{dt.itemsize} bytes = {expected}",
        )
    flags = msg.get("flags", 0)
    if isinstance(flags, bool) or not isinstance(flags, int) or not 0 <= flags <= _FLAG_MASK:
        raise FrameRejected("bad_field", "field 'flags' must be an unsigned 32-bit integer")

    samples = np.frombuffer(data, dtype=dt).reshape(n, len(chans)).astype(np.float64)
    finite = np.isfinite(samples)
    if not finite.all():
        bad = [chans[j] for j in np.flatnonzero(~finite.all(axis=0))]
        raise FrameRejected("non_finite", f"NaN or infinite samples in channel(s) {', '.join(bad)}")
    samples.flags.writeable = False
    return SensorFrame(
        stream=stream,
        seq=seq,
        t0=float(t0),
        rate=float(rate),
        channels=tuple(chans),
        samples=samples,
        flags=flags,
        dtype=dtype,
    )


# --------------------------------------------------------------------------------------------
# Outbound messages


def encode_array(a: np.ndarray) -> dict[str, Any]:
    """A numpy array as a plain msgpack map (little-endian, C order).

    >>> encode_array(np.eye(2))["shape"]
    [2, 2]
    """
    a = np.asarray(a)
    if a.dtype.kind == "c":
        dt = np.dtype("<c16")
    elif a.dtype.kind in "iub":
        dt = np.dtype("<i8")
    else:
        dt = np.dtype("<f8")
    return {"dtype": dt.str, "shape": list(a.shape), "data": np.ascontiguousarray(a, dtype=dt).tobytes()}


_ARRAY_KEYS = {"dtype", "shape", "data"}
_OUT_DTYPES = {"<f8", "<i8", "<c16", "<f4"}


def decode_array(m: dict[str, Any]) -> np.ndarray:
    """Inverse of :func:`encode_array`; raises ValueError on an inconsistent map."""
    dt = m.get("dtype")
    if not isinstance(dt, str) or dt not in _OUT_DTYPES:
        raise ValueError(f"array dtype {dt!r} is not one of {sorted(_OUT_DTYPES)}")
    shape = m.get("shape")
    if not isinstance(shape, list) or not all(isinstance(s, int) and s >= 0 for s in shape):
        raise ValueError("array 'shape' must be a list of non-negative integers")
    data = m.get("data")
    dtype = np.dtype(dt)
    if not isinstance(data, bytes) or len(data) != int(np.prod(shape, dtype=np.int64)) * dtype.itemsize:
        raise ValueError("array 'data' length does not match its shape and dtype")
    return np.frombuffer(data, dtype=dtype).reshape(shape).copy()


def _to_wire(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return encode_array(obj)
    if isinstance(obj, dict):
        return {str(k): _to_wire(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_to_wire(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def _from_wire(obj: Any) -> Any:
    if isinstance(obj, dict):
        if set(obj) == _ARRAY_KEYS and isinstance(obj.get("data"), bytes):
            return decode_array(obj)
        return {k: _from_wire(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_from_wire(v) for v in obj]
    return obj


def encode_message(kind: str, body: dict[str, Any], pub_seq: int | None = None) -> tuple[bytes, bytes]:
    """Encode an outbound message of ``kind`` (a key of :data:`TOPICS`) as ``(topic, payload)``.

    ``pub_seq`` numbers the messages of one kind (0, 1, 2, ...) so that a subscriber can count
    what it missed (ZeroMQ's PUB drops silently for a subscriber whose queue is full). Floats are
    written as float64 and map keys in the order given, so equal messages give equal bytes
    (replay compares output frames byte for byte).
    """
    topic, version = TOPICS[kind]
    msg: dict[str, Any] = {"v": version, "kind": kind}
    if pub_seq is not None:
        msg["pub_seq"] = int(pub_seq)
    msg.update(_to_wire(body))
    return topic, msgpack.packb(msg, use_bin_type=True, use_single_float=False)


SNAPSHOT_REQUEST_LIMIT = 4096


def decode_snapshot_request(payload: bytes) -> str:
    """Validate a snapshot request ``{"v": 1, "want": "snapshot"}``; returns what is wanted.

    Raises FrameRejected (reason ``malformed``, ``schema_version`` or ``bad_field``).
    """
    msg = _unpack(payload, SNAPSHOT_REQUEST_LIMIT)
    if not isinstance(msg, dict):
        raise FrameRejected("malformed", "a snapshot request must be a msgpack map")
    v = msg.get("v")
    # an integer, as for sensor frames: True == 1 and 1.0 == 1 in Python, but neither is version 1
    if isinstance(v, bool) or not isinstance(v, int) or v != OUT_SCHEMA:
        raise FrameRejected("schema_version", f"snapshot request version must be the integer {OUT_SCHEMA}")
    want = msg.get("want")
    if want not in ("snapshot",):
        raise FrameRejected("bad_field", "field 'want' must be 'snapshot'")
    extra = set(msg) - {"v", "want"}
    if extra:
        raise FrameRejected("bad_field", f"field '{sorted(extra)[0]}' is not part of a snapshot request")
    return want


def encode_snapshot(model: bytes | None, warnings: list[bytes], status: bytes | None) -> bytes:
    """The snapshot reply: the last published model, active warnings and status, each the map
    that was published (re-embedded, so one msgpack read gives everything)."""
    def inner(p: bytes | None) -> Any:
        return None if p is None else msgpack.unpackb(p, raw=False)

    msg = {"v": OUT_SCHEMA, "kind": "snapshot", "model": inner(model),
           "warnings": [inner(w) for w in warnings], "status": inner(status)}
    return msgpack.packb(msg, use_bin_type=True)


def encode_error_reply(reason: str, detail: str) -> bytes:
    return msgpack.packb({"v": OUT_SCHEMA, "kind": "error", "reason": reason, "detail": detail},
                         use_bin_type=True)


def decode_message(payload: bytes, max_bytes: int = 64 << 20) -> dict[str, Any]:
    """Decode an outbound message, turning array maps back into numpy arrays."""
    if len(payload) > max_bytes:
        raise ValueError(f"message is {len(payload)} bytes, the limit is {max_bytes}")
    msg = msgpack.unpackb(payload, raw=False, strict_map_key=True, max_ext_len=0)
    if not isinstance(msg, dict) or "kind" not in msg or "v" not in msg:
        raise ValueError("message is not a wingwatch map with 'v' and 'kind'")
    return _from_wire(msg)
