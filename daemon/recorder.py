"""Recorder: the append-only, checksummed, crash-safe replay log writer.

The recorder observes the pipeline and writes what it sees; no stage keeps its own history.
Each record is handed to the operating system with one ``write`` as soon as it is appended
(write-through), so a ``kill -9`` of the daemon loses nothing that was appended: only a record
the kernel had not finished taking can be cut short, and the reader reports that as the
truncated tail. ``fsync`` runs at the configured interval against power loss.

Naming scheme (directory mode, the daemon's): one folder per run inside the recorder directory,
``<directory>/<run_id>/segment-0000.wwlog``, ``segment-0001.wwlog``, ... with ``run_id`` =
``ww-YYYYMMDDTHHMMSSZ`` (UTC start) and a new segment once a segment passes ``rotate_mb``. Every
segment starts with its own header (run id, segment index, configuration, software version), so
each reads on its own. File mode (``path=``, used for the rig's ``--out`` and incident slices)
writes exactly one file and does not rotate.

Write failures (disk full, unwritable) follow one documented policy: the recorder keeps the
records it could not write in a bounded memory queue (``backlog_bytes``), retries on every
later append, raises :attr:`LogWriter.failing` so the status heartbeat and a warning say so,
and counts every record it had to drop once the queue is full (oldest first are kept: the
queue refuses new ones). It never raises into the daemon loop. The first failure and the
recovery are logged as warnings (logger ``wingwatch.recorder``). A segment whose header could
not be written is removed again, so a run directory never holds an empty or headless segment
that would make the whole run unreadable.

Two inputs the log format cannot hold are handled without raising: a topic longer than 65535
bytes is cut to 65535 bytes and the record gets flags bit 1 (``FLAG_TOPIC_CUT``; the ingest stage
refuses any topic that long as ``bad_topic``, so a replay reaches the same verdict), and a
record above the format's body limit is counted in ``dropped_records`` with ``last_error`` saying
why.
"""

from __future__ import annotations

import collections
import datetime as _dt
import logging
import os
import platform
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from wingwatch.daemon.replaylog import FORMAT_VERSION, MAX_RECORD_BODY, pack_file_header, pack_record
from wingwatch.daemon.version import __version__

__all__ = ["LogWriter", "RecorderStats", "make_run_id", "FLAG_TOPIC_CUT", "MAX_TOPIC"]

log = logging.getLogger("wingwatch.recorder")

#: Record flags bit set when the topic had to be cut to :data:`MAX_TOPIC` bytes.
FLAG_TOPIC_CUT = 1 << 1
#: The most topic bytes a record holds (the topic length is a u16 in the format).
MAX_TOPIC = 0xFFFF


def make_run_id(unix_time: float) -> str:
    """``ww-YYYYMMDDTHHMMSSZ`` for a UNIX time.

    >>> make_run_id(0.0)
    'ww-19700101T000000Z'
    """
    t = _dt.datetime.fromtimestamp(unix_time, tz=_dt.timezone.utc)
    return "ww-" + t.strftime("%Y%m%dT%H%M%SZ")


@dataclass(frozen=True)
class RecorderStats:
    records: int
    bytes: int
    segments: int
    path: str
    failing: bool
    backlog_records: int
    dropped_records: int
    last_error: str


class LogWriter:
    """Append records to a replay log (directory mode with rotation, or a single file).

    Parameters
    ----------
    directory : str or Path, optional
        Recorder directory; the run gets its own folder inside it.
    path : str or Path, optional
        Write exactly this one file instead (no rotation). Give ``directory`` or ``path``.
    header : dict
        Extra header fields (the resolved configuration under ``"config"``, ``"source"``...).
    rotate_bytes : int
        Segment size after which a new segment starts (directory mode).
    fsync_interval_s : float
        Longest time between fsyncs (0: fsync after every record).
    start_unix : float, optional
        The run's start time for the header and run id; the current time by default. A fixed
        value makes the file bit-identical across runs (the virtual rig's ``--out``).
    backlog_bytes : int
        Memory the recorder may use to hold records it could not write.
    """

    def __init__(
        self,
        *,
        directory: str | Path | None = None,
        path: str | Path | None = None,
        header: dict[str, Any] | None = None,
        rotate_bytes: int = 256 << 20,
        fsync_interval_s: float = 1.0,
        start_unix: float | None = None,
        backlog_bytes: int = 64 << 20,
        clock=time.monotonic,
        continue_run: str | Path | None = None,
    ) -> None:
        if sum(x is not None for x in (directory, path, continue_run)) != 1:
            raise ValueError("give exactly one of directory=, path= or continue_run=")
        if rotate_bytes <= 0:
            raise ValueError("rotate_bytes must be positive")
        if fsync_interval_s < 0:
            raise ValueError("fsync_interval_s must not be negative")
        self.rotate_bytes = int(rotate_bytes)
        self.fsync_interval_s = float(fsync_interval_s)
        self.backlog_bytes = int(backlog_bytes)
        self._clock = clock
        self._fixed_start = start_unix is not None
        self.start_unix = time.time() if start_unix is None else float(start_unix)
        self.run_id = make_run_id(self.start_unix)
        self._extra = dict(header or {})
        if continue_run is not None:
            # A restarted daemon continues its run: the same folder, the next segment number.
            self.run_dir = Path(continue_run)
            if not self.run_dir.is_dir():
                raise ValueError(f"{self.run_dir}: no such run folder to continue")
            self.run_id = self.run_dir.name
            self._single = None
            existing = sorted(self.run_dir.glob("segment-*.wwlog"))
            self._first_index = (int(existing[-1].stem.split("-")[1]) + 1) if existing else 0
        elif directory is not None:
            self.run_dir: Path | None = Path(directory) / self.run_id
            suffix = 0
            while self.run_dir.exists():  # two runs started in the same second
                suffix += 1
                self.run_dir = Path(directory) / f"{self.run_id}.{suffix}"
            self.run_dir.mkdir(parents=True)
            self._single: Path | None = None
        else:
            self.run_dir = None
            self._single = Path(path)
            self._single.parent.mkdir(parents=True, exist_ok=True)
        self._first_index = getattr(self, "_first_index", 0)
        self.segment = -1
        self.fd: int | None = None
        self.seg_bytes = 0
        self.records = 0
        self.bytes = 0
        self.paths: list[Path] = []
        self._last_sync = self._clock()
        self._backlog: collections.deque[bytes] = collections.deque()
        self._backlog_size = 0
        self.dropped = 0
        self.last_error = ""
        self._open_segment()

    # ----------------------------------------------------------------------------------------
    @property
    def path(self) -> Path:
        """The segment being written now."""
        return self.paths[-1]

    @property
    def failing(self) -> bool:
        return bool(self.last_error) and (self.fd is None or bool(self._backlog))

    def header_for(self, segment: int) -> dict[str, Any]:
        h = {
            "software": "wingwatch",
            "software_version": __version__,
            "format_version": FORMAT_VERSION,
            "run_id": self.run_id,
            "segment": segment,
            "created_unix": self.start_unix,
            "created_utc": _dt.datetime.fromtimestamp(self.start_unix, tz=_dt.timezone.utc)
            .isoformat(timespec="seconds"),
            # A fixed start time asks for a reproducible file: leave the host name out then.
            "host": "" if self._fixed_start else platform.node(),
        }
        h.update(self._extra)
        return h

    def _open_segment(self) -> None:
        # a failed open does not use up a segment number; a continued run counts on from its last
        index = len(self.paths) + getattr(self, "_first_index", 0)
        if self._single is not None:
            p = self._single
            flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC
        else:
            p = self.run_dir / f"segment-{index:04d}.wwlog"
            flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL
        try:
            self.fd = os.open(p, flags | getattr(os, "O_BINARY", 0), 0o644)
        except OSError as exc:
            self._fail(exc, p)
            return
        head = pack_file_header(self.header_for(index))
        try:
            self._write_all(head)
        except OSError as exc:
            # A segment without a whole header would make every reader refuse the run: remove
            # it, and use the same segment number on the next attempt.
            self._fail(exc, p)
            try:
                os.unlink(p)
            except OSError:
                pass
            return
        self.paths.append(p)
        self.segment = index
        self.seg_bytes = len(head)
        self.bytes += len(head)

    def _write_all(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            n = os.write(self.fd, view)
            view = view[n:]

    def _fail(self, exc: OSError, where: Path | None = None) -> None:
        if where is None:
            where = getattr(exc, "filename", None) or (self.paths[-1] if self.paths else "")
        first = not self.last_error
        self.last_error = f"{exc.strerror or exc} ({where})"
        if first:
            log.warning("recorder: cannot write the replay log: %s; holding records in memory "
                        "(up to %d bytes) and retrying", self.last_error, self.backlog_bytes)
        if self.fd is not None:
            try:
                os.close(self.fd)
            except OSError:
                pass
        self.fd = None

    # ----------------------------------------------------------------------------------------
    def append(self, kind: int, topic: bytes, payload: bytes, t_recv: float, *, flags: int = 0,
               aux: int = 0) -> bool:
        """Append one record; True if it reached the file now, False if queued or dropped."""
        if len(topic) > MAX_TOPIC:
            topic, flags = topic[:MAX_TOPIC], flags | FLAG_TOPIC_CUT
        if 2 + len(topic) + len(payload) > MAX_RECORD_BODY:
            self.dropped += 1
            self.last_error = (f"a record of {len(payload)} bytes is above the log format's limit "
                               f"of {MAX_RECORD_BODY} bytes; dropped")
            log.warning("recorder: %s", self.last_error)
            return False
        rec = pack_record(kind, topic, payload, t_recv, flags=flags, aux=aux)
        if self._backlog or self.fd is None:
            self._retry()
        if self._backlog or self.fd is None:
            self._queue(rec)
            return False
        return self._put(rec)

    def _put(self, rec: bytes) -> bool:
        if self._single is None and self.seg_bytes + len(rec) > self.rotate_bytes and self.records:
            self._close_fd()
            self._open_segment()
            if self.fd is None:
                self._queue(rec)
                return False
        try:
            self._write_all(rec)
        except OSError as exc:
            # A partial write leaves a torn record the reader skips as corrupt; start a fresh
            # segment on recovery so the torn bytes never sit in front of good ones.
            self._fail(exc)
            self._queue(rec)
            return False
        self.seg_bytes += len(rec)
        self.bytes += len(rec)
        self.records += 1
        now = self._clock()
        if now - self._last_sync >= self.fsync_interval_s:
            self._sync(now)
        return True

    def _queue(self, rec: bytes) -> None:
        if self._backlog_size + len(rec) > self.backlog_bytes:
            self.dropped += 1
            return
        self._backlog.append(rec)
        self._backlog_size += len(rec)

    def _retry(self) -> None:
        if self.fd is None:
            if self._single is not None and self.paths:
                # File mode cannot start a new segment: reopen for appending.
                try:
                    self.fd = os.open(self._single, os.O_WRONLY | os.O_APPEND)
                except OSError:
                    return
            else:
                self._open_segment()
                if self.fd is None:
                    return
        while self._backlog:
            rec = self._backlog[0]
            try:
                self._write_all(rec)
            except OSError as exc:
                self._fail(exc)
                return
            self._backlog.popleft()
            self._backlog_size -= len(rec)
            self.seg_bytes += len(rec)
            self.bytes += len(rec)
            self.records += 1
        if self.last_error:
            log.warning("recorder: writing the replay log again (%s); %d record(s) were dropped "
                        "in all while it failed", self.paths[-1] if self.paths else "", self.dropped)
        self.last_error = ""

    def _sync(self, now: float) -> None:
        self._last_sync = now
        if self.fd is not None:
            try:
                os.fsync(self.fd)
            except OSError as exc:
                self._fail(exc)

    def flush(self) -> None:
        """Retry any backlog and fsync now."""
        if self._backlog or self.fd is None:
            self._retry()
        self._sync(self._clock())

    def _close_fd(self) -> None:
        if self.fd is not None:
            try:
                os.fsync(self.fd)
                os.close(self.fd)
            except OSError as exc:
                self.last_error = str(exc)
            self.fd = None

    def close(self) -> None:
        self.flush()
        self._close_fd()

    def stats(self) -> RecorderStats:
        return RecorderStats(
            records=self.records,
            bytes=self.bytes,
            segments=len(self.paths),
            path=str(self.paths[-1]) if self.paths else "",
            failing=self.failing,
            backlog_records=len(self._backlog),
            dropped_records=self.dropped,
            last_error=self.last_error,
        )

    def __enter__(self) -> "LogWriter":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()
