"""Replay log format: constants, record packing and a reader that survives damage.

A log segment is a file header followed by records (byte layout in ``docs/logformat.md``)::

    file header   magic "WWLOG\\0\\r\\n" (8) | version u16 | reserved u16 | header length u32
                  | header (msgpack map) | CRC32 of the header u32
    record        sync "\\xabWR\\x17" (4) | kind u8 | flags u8 | aux u16 | body length u32
                  | t_recv f64 | CRC32 u32 | body
    record body   topic length u16 | topic | payload

All integers little-endian. The record CRC32 (zlib) covers kind, flags, aux, length, t_recv and
the body, so a flipped bit anywhere in a record is found. The reader reports a record whose CRC
fails as corrupt with its byte offset, then scans forward for the next sync word whose record
checks out, and carries on; a record cut short by the end of the file is the truncated tail
(what a ``kill -9`` or power loss leaves). Nothing is silently dropped: every byte range that
did not read back is listed in :attr:`LogReader.damage`.

Examples
--------
>>> import io
>>> buf = io.BytesIO()
>>> _ = buf.write(pack_file_header({"software": "wingwatch"}))
>>> _ = buf.write(pack_record(KIND_INBOUND, b"sensor.rig", b"payload", 1.5))
>>> r = LogReader.from_bytes(buf.getvalue())
>>> [(rec.kind_name, rec.topic, rec.payload) for rec in r]
[('inbound', b'sensor.rig', b'payload')]
>>> r.truncated_tail, r.corrupt
(False, [])
"""

from __future__ import annotations

import mmap
import os
import struct
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import msgpack

from wingwatch.daemon.errors import LogFormatError

__all__ = [
    "MAGIC",
    "FORMAT_VERSION",
    "SYNC",
    "KINDS",
    "KIND_INBOUND",
    "KIND_REJECTED",
    "KIND_STATUS",
    "KIND_MODEL",
    "KIND_WARNING",
    "KIND_EVENT",
    "KIND_PLAN",
    "KIND_WATCH",
    "OUTPUT_KINDS",
    "MAX_RECORD_BODY",
    "Record",
    "Damage",
    "LogReader",
    "pack_file_header",
    "pack_record",
    "segment_paths",
]

MAGIC = b"WWLOG\x00\r\n"
FORMAT_VERSION = 1
SYNC = b"\xabWR\x17"

KIND_INBOUND = 1  # a sensor frame the ingest stage accepted (raw bytes as received)
KIND_REJECTED = 2  # a frame the codec or ingest refused (raw bytes; aux = reason code)
KIND_STATUS = 3  # daemon heartbeat as published
KIND_MODEL = 4  # a model update as published
KIND_WARNING = 5  # a warning event as published
KIND_EVENT = 6  # a daemon event: discontinuity, source restart, recorder notice
KIND_PLAN = 7  # an inbound controller plan (alpha trajectory)
KIND_WATCH = 8  # the watchers' periodic state as published
KINDS = {
    KIND_INBOUND: "inbound",
    KIND_REJECTED: "rejected",
    KIND_STATUS: "status",
    KIND_MODEL: "model",
    KIND_WARNING: "warning",
    KIND_EVENT: "event",
    KIND_PLAN: "plan",
    KIND_WATCH: "watch",
}
#: Record kinds that are the daemon's decisions and sample-time outputs (compared by replay).
OUTPUT_KINDS = (KIND_MODEL, KIND_WARNING, KIND_EVENT, KIND_WATCH)

_FILE_HEAD = struct.Struct("<8sHHI")
_REC_HEAD = struct.Struct("<4sBBHIdI")  # sync, kind, flags, aux, length, t_recv, crc
_CRC_PART = struct.Struct("<BBHId")
_TOPIC_LEN = struct.Struct("<H")
MAX_HEADER = 16 << 20
MAX_RECORD_BODY = 256 << 20


def pack_file_header(header: dict[str, Any]) -> bytes:
    """Bytes of a segment's file header holding the msgpack map ``header``."""
    body = msgpack.packb(header, use_bin_type=True)
    if len(body) > MAX_HEADER:
        raise ValueError("log header too large")
    return _FILE_HEAD.pack(MAGIC, FORMAT_VERSION, 0, len(body)) + body + struct.pack(
        "<I", zlib.crc32(body)
    )


def pack_record(kind: int, topic: bytes, payload: bytes, t_recv: float, *, flags: int = 0,
                aux: int = 0) -> bytes:
    """Bytes of one record (sync word to the end of the body)."""
    if len(topic) > 0xFFFF:
        raise ValueError("topic longer than 65535 bytes")
    body = _TOPIC_LEN.pack(len(topic)) + topic + payload
    if len(body) > MAX_RECORD_BODY:
        raise ValueError("record body above the format's limit")
    part = _CRC_PART.pack(kind, flags, aux, len(body), t_recv)
    crc = zlib.crc32(body, zlib.crc32(part))
    return SYNC + part + struct.pack("<I", crc) + body


@dataclass(frozen=True)
class Record:
    """One record read back, with where it stood in the file."""

    kind: int
    flags: int
    aux: int
    t_recv: float
    topic: bytes
    payload: bytes
    offset: int
    segment: int = 0

    @property
    def kind_name(self) -> str:
        return KINDS.get(self.kind, f"kind{self.kind}")


@dataclass(frozen=True)
class Damage:
    """A byte range that did not read back: ``kind`` is 'corrupt' or 'truncated_tail'."""

    kind: str
    offset: int
    length: int
    segment: str
    reason: str


@dataclass
class LogReader:
    """Read one or more log segments in order, reporting damage and carrying on.

    Iterate it for :class:`Record` objects. After (or during) iteration, :attr:`damage`,
    :attr:`corrupt` and :attr:`truncated_tail` describe what did not read back.
    """

    paths: list[Path]
    _data: list[bytes] | None = None
    headers: list[dict[str, Any]] = field(default_factory=list)
    damage: list[Damage] = field(default_factory=list)

    @classmethod
    def open(cls, path: str | Path) -> "LogReader":
        """A reader for a file, or for every segment (``*.wwlog``) in a directory."""
        return cls(paths=segment_paths(path))

    @classmethod
    def from_bytes(cls, data: bytes) -> "LogReader":
        return cls(paths=[Path("<memory>")], _data=[data])

    @property
    def header(self) -> dict[str, Any]:
        """The first segment's header (reads it if iteration has not started)."""
        if not self.headers:
            data = self._load(0)
            self.headers.append(self._read_header(data, str(self.paths[0]))[0])
        return self.headers[0]

    @property
    def corrupt(self) -> list[Damage]:
        return [d for d in self.damage if d.kind == "corrupt"]

    @property
    def truncated_tail(self) -> bool:
        return any(d.kind == "truncated_tail" for d in self.damage)

    def _load(self, i: int) -> Any:
        if self._data is not None:
            return self._data[i]
        p = self.paths[i]
        try:
            with open(p, "rb") as fh:
                size = os.fstat(fh.fileno()).st_size
                if size == 0:
                    return b""
                # Memory-mapped: long logs stream from disk in constant resident memory.
                return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
        except FileNotFoundError:
            raise LogFormatError(f"{p}: log file not found.") from None
        except OSError as exc:
            raise LogFormatError(f"{p}: cannot read the log ({exc.strerror}).") from None

    @staticmethod
    def _read_header(data: bytes, name: str) -> tuple[dict[str, Any], int]:
        if len(data) < _FILE_HEAD.size or data[:8] != MAGIC:
            raise LogFormatError(f"{name}: not a wingwatch replay log (bad magic).")
        _, version, _, hlen = _FILE_HEAD.unpack_from(data, 0)
        if version != FORMAT_VERSION:
            raise LogFormatError(
                f"{name}: log format version {version} is not supported (this reads {FORMAT_VERSION})."
            )
        end = _FILE_HEAD.size + hlen
        if hlen > MAX_HEADER or end + 4 > len(data):
            raise LogFormatError(f"{name}: the log header is cut short; the file is damaged at its start.")
        body = bytes(data[_FILE_HEAD.size:end])
        (crc,) = struct.unpack_from("<I", data, end)
        if zlib.crc32(body) != crc:
            raise LogFormatError(f"{name}: the log header fails its checksum.")
        try:
            header = msgpack.unpackb(body, raw=False, strict_map_key=False)
        except Exception as exc:  # msgpack raises several types on bad input
            raise LogFormatError(f"{name}: the log header is not readable ({type(exc).__name__}).") from None
        if not isinstance(header, dict):
            raise LogFormatError(f"{name}: the log header is not a map.")
        return header, end + 4

    def __iter__(self) -> Iterator[Record]:
        self.headers = []
        self.damage = []
        for i, path in enumerate(self.paths):
            data = self._load(i)
            header, pos = self._read_header(data, str(path))
            self.headers.append(header)
            yield from self._records(data, pos, i, str(path))

    def _check_at(self, data: bytes, pos: int) -> tuple[Record | None, str]:
        """Try to read a record at ``pos``: (record, '') or (None, why)."""
        n = len(data)
        if pos + _REC_HEAD.size > n:
            return None, "short"
        sync, kind, flags, aux, length, t_recv, crc = _REC_HEAD.unpack_from(data, pos)
        if sync != SYNC:
            return None, "no sync word"
        if length < 2 or length > MAX_RECORD_BODY:
            return None, f"impossible body length {length}"
        start = pos + _REC_HEAD.size
        if start + length > n:
            return None, "short"
        body = data[start:start + length]
        if zlib.crc32(body, zlib.crc32(data[pos + 4:pos + 4 + _CRC_PART.size])) != crc:
            return None, "checksum mismatch"
        (tlen,) = _TOPIC_LEN.unpack_from(body, 0)
        if 2 + tlen > length:
            return None, "topic length beyond the body"
        return Record(kind, flags, aux, t_recv, bytes(body[2:2 + tlen]), bytes(body[2 + tlen:]),
                      pos), ""

    def _records(self, data: bytes, pos: int, seg: int, name: str) -> Iterator[Record]:
        n = len(data)
        while pos < n:
            rec, why = self._check_at(data, pos)
            if rec is not None:
                yield Record(rec.kind, rec.flags, rec.aux, rec.t_recv, rec.topic, rec.payload,
                             rec.offset, seg)
                pos += _REC_HEAD.size + 2 + len(rec.topic) + len(rec.payload)
                continue
            # Damage: look for the next sync word whose record checks out.
            nxt = data.find(SYNC, pos + 1)
            while nxt != -1:
                cand, _ = self._check_at(data, nxt)
                if cand is not None:
                    break
                nxt = data.find(SYNC, nxt + 1)
            if nxt == -1:
                kind = "truncated_tail" if why == "short" else "corrupt"
                self.damage.append(Damage(kind, pos, n - pos, name, why))
                return
            self.damage.append(Damage("corrupt", pos, nxt - pos, name, why))
            pos = nxt


def segment_paths(path: str | Path) -> list[Path]:
    """The segment files a path names: the file itself, or a directory's ``*.wwlog`` in order."""
    p = Path(path)
    if p.is_dir():
        segs = sorted(p.glob("*.wwlog"))
        if not segs:
            raise LogFormatError(f"{p}: the directory holds no *.wwlog segments.")
        return segs
    if not p.exists():
        raise LogFormatError(f"{p}: log file not found.")
    return [p]
