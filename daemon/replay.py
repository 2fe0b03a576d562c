"""Replay: drive the same pipeline from a recorded log, and compare with what happened live.

Every inbound record (accepted and rejected alike, raw bytes as received) is fed back through a
:class:`~wingwatch.daemon.pipeline.Session` built from the configuration in the log header (or
another one, to ask "what would these thresholds have done?"). Because the pipeline decides from
sample data and timestamps only, a replay with the recorded configuration reproduces every
recorded decision record (model, warning, event) byte for byte; :func:`compare_outputs` finds the
first divergence otherwise.

The output digest is SHA-256 over, for each decision output in order, its log kind (one byte),
topic length (u16 LE), topic and payload: it is equal for equal decision streams, whatever the
machine or the run.
"""

from __future__ import annotations

import hashlib
import struct
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import TOPICS, decode_message, peek_sensor_header
from wingwatch.daemon.config import Config, config_from_recorded
from wingwatch.daemon.errors import ConfigError, LogFormatError
from wingwatch.daemon.pipeline import OUTPUT_LOG_KIND, Pipeline, Session
from wingwatch.daemon.recorder import LogWriter

__all__ = [
    "OutputRecord",
    "ReplayResult",
    "Divergence",
    "digest_outputs",
    "recorded_outputs",
    "compare_outputs",
    "replay_log",
    "config_of_log",
    "final_summary",
]

#: topic bytes -> the log record kind it is recorded as
_TOPIC_KIND = {topic: OUTPUT_LOG_KIND[name] for name, (topic, _) in TOPICS.items()}


@dataclass(frozen=True)
class OutputRecord:
    kind: int
    topic: bytes
    payload: bytes


@dataclass(frozen=True)
class Divergence:
    index: int
    t: float | None
    topic: str
    field: str
    recorded: Any
    replayed: Any

    def describe(self) -> str:
        return (f"output {self.index} (t={self.t}, topic {self.topic}) differs at field "
                f"'{self.field}': recorded {self.recorded!r}, replayed {self.replayed!r}")


@dataclass
class ReplayResult:
    samples: int = 0
    frames: int = 0
    source_s: float = 0.0
    wall_s: float = 0.0
    outputs: list[OutputRecord] = field(default_factory=list)
    counters: dict[str, Any] = field(default_factory=dict)
    damage: list[dict[str, Any]] = field(default_factory=list)
    session: Session | None = None
    final: dict[str, Any] = field(default_factory=dict)

    @property
    def realtime_factor(self) -> float:
        return self.source_s / self.wall_s if self.wall_s > 0 else float("inf")

    @property
    def output_digest(self) -> str:
        return digest_outputs(self.outputs)


def digest_outputs(outputs: list[OutputRecord]) -> str:
    h = hashlib.sha256()
    for o in outputs:
        h.update(bytes([o.kind]) + struct.pack("<H", len(o.topic)) + o.topic + o.payload)
    return h.hexdigest()


def config_of_log(path: str | Path) -> Config:
    """The configuration recorded in a log's header."""
    reader = rl.LogReader.open(path)
    try:
        return config_from_recorded(reader.header["config"], source=f"{path} (recorded configuration)")
    except KeyError:
        raise LogFormatError(f"{path}: the log header holds no configuration; pass --config.") from None


def recorded_outputs(path: str | Path) -> list[OutputRecord]:
    """The decision outputs (model, warning, event) recorded in a log, in order."""
    return [OutputRecord(r.kind, r.topic, r.payload) for r in rl.LogReader.open(path)
            if r.kind in rl.OUTPUT_KINDS]


def _first_field_difference(a: Any, b: Any, prefix: str = "") -> tuple[str, Any, Any] | None:
    if isinstance(a, dict) and isinstance(b, dict):
        for k in list(a) + [k for k in b if k not in a]:
            if k not in a or k not in b:
                return (prefix + str(k), a.get(k), b.get(k))
            d = _first_field_difference(a[k], b[k], f"{prefix}{k}.")
            if d:
                return d
        return None
    try:
        import numpy as np

        if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
            if np.shape(a) == np.shape(b) and np.array_equal(a, b):
                return None
            return (prefix.rstrip("."), a, b)
    except ImportError:  # pragma: no cover
        pass
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        for i, (x, y) in enumerate(zip(a, b)):
            d = _first_field_difference(x, y, f"{prefix}{i}.")
            if d:
                return d
        return None
    return None if a == b else (prefix.rstrip("."), a, b)


def compare_outputs(recorded: list[OutputRecord], replayed: list[OutputRecord]) -> Divergence | None:
    """The first difference between two decision-output streams, or None when identical."""
    for i in range(max(len(recorded), len(replayed))):
        if i >= len(recorded) or i >= len(replayed):
            have = replayed[i] if i >= len(recorded) else recorded[i]
            m = decode_message(have.payload)
            return Divergence(i, m.get("t"), have.topic.decode(), "<presence>",
                              "absent" if i >= len(recorded) else "present",
                              "absent" if i >= len(replayed) else "present")
        a, b = recorded[i], replayed[i]
        if a.kind == b.kind and a.topic == b.topic and a.payload == b.payload:
            continue
        ma, mb = decode_message(a.payload), decode_message(b.payload)
        if a.topic != b.topic:
            return Divergence(i, ma.get("t"), a.topic.decode(), "<topic>", a.topic.decode(),
                              b.topic.decode())
        d = _first_field_difference(ma, mb) or ("<bytes>", "...", "...")
        return Divergence(i, ma.get("t"), a.topic.decode(), d[0], d[1], d[2])
    return None


#: Records handed to the pipeline at once by an as-fast-as-possible replay.
REPLAY_BATCH = 100


def _default_factory(header: dict[str, Any]) -> Callable[[Config], Pipeline]:
    """The live daemon's pipeline for a daemon-recorded log (with the embedded reference model);
    the bare ingest pipeline for logs that recorded only frames (the rig's --out)."""
    source = header.get("source")
    if source not in ("daemon", "replay"):
        return Pipeline
    from wingwatch.daemon.modelfile import model_from_dict
    from wingwatch.daemon.service import make_pipeline

    ref = header.get("reference_model")
    reference = model_from_dict(ref, "the log header's reference model") if ref else None
    return lambda cfg: make_pipeline(cfg, reference)


def final_summary(pipeline: Pipeline) -> dict[str, Any]:
    """The model in service at the end, in the replay summary's ``final`` layout."""
    for st in pipeline.stages:
        m = getattr(st, "in_service", None)
        if m:
            c = m.get("coefficients", {})
            return {
                "model_id": m.get("model_id"), "t": m.get("t"), "rank": m.get("rank"),
                "quasi_steady": c.get("quasi_steady"), "rate": c.get("rate"),
                "added_mass": c.get("added_mass"),
                "modes": [{"freq_hz": x["freq_hz"], "damping": x["damping"]}
                          for x in m.get("modes", [])],
            }
    return {}


def _records_in_window(reader: rl.LogReader, t_from: float | None, t_to: float | None
                       ) -> Iterator[rl.Record]:
    for rec in reader:
        if rec.kind not in (rl.KIND_INBOUND, rl.KIND_REJECTED, rl.KIND_PLAN):
            continue
        if t_from is not None or t_to is not None:
            head = peek_sensor_header(rec.payload)
            t0 = head.get("t0") if head else None
            if isinstance(t0, (int, float)):
                if t_from is not None and t0 < t_from:
                    continue
                if t_to is not None and t0 >= t_to:
                    break
        yield rec


def replay_log(
    path: str | Path,
    *,
    config: Config | None = None,
    t_from: float | None = None,
    t_to: float | None = None,
    speed: float | None = None,
    sink: Callable[[bytes, bytes], None] | None = None,
    record_to: str | Path | None = None,
    progress: Callable[[int, int], None] | None = None,
    pipeline_factory: Callable[[Config], Pipeline] | None = None,
    batch: int | None = None,
) -> ReplayResult:
    """Replay the log at ``path`` through a fresh pipeline.

    Parameters
    ----------
    config : Config, optional
        Defaults to the configuration recorded in the log.
    t_from, t_to : float, optional
        Source-time window; the pipeline starts fresh at ``t_from``.
    speed : float, optional
        Pace inbound frames at ``speed`` times real time (wall clock used for sleeping only);
        None replays as fast as possible.
    sink : callable(topic, payload), optional
        Also publish every output (e.g. on a PUB socket for a monitor).
    record_to : path, optional
        Record the replay as a new log file.
    batch : int, optional
        Records handed to the pipeline at once when replaying as fast as possible
        (:data:`REPLAY_BATCH` by default; 1 for one at a time). The outputs do not depend on it.
    """
    if speed is not None and speed <= 0:
        raise ConfigError("--speed must be greater than zero.")
    cfg = config or config_of_log(path)
    reader = rl.LogReader.open(path)
    total = sum(p.stat().st_size for p in reader.paths)
    if pipeline_factory is None:
        pipeline_factory = _default_factory(reader.header)
    pipeline = pipeline_factory(cfg)
    result = ReplayResult()
    writer = None
    if record_to is not None:
        writer = LogWriter(path=record_to, header={"source": "replay", "config": cfg.as_dict(),
                                                   "config_source": cfg.source,
                                                   "replay_of": str(path)})

    def collect(topic: bytes, payload: bytes) -> None:
        kind = _TOPIC_KIND[topic]
        if kind in rl.OUTPUT_KINDS:
            result.outputs.append(OutputRecord(kind, topic, payload))
        if sink is not None:
            sink(topic, payload)

    session = Session(pipeline, recorder=writer, sink=collect)
    result.session = session
    start_wall = time.perf_counter()
    first_t = None
    try:
        if speed is None:
            # As fast as possible: records in batches (Session.replay_records), which give
            # exactly the verdicts and outputs of one record at a time.
            size = max(1, int(batch or REPLAY_BATCH))
            recs: list[rl.Record] = []
            done = 0
            for rec in _records_in_window(reader, t_from, t_to):
                recs.append(rec)
                if len(recs) >= size:
                    session.replay_records(recs)
                    done += len(recs)
                    if progress is not None and done % (20 * size) == 0:
                        progress(rec.offset, total)
                    recs = []
            if recs:
                session.replay_records(recs)
        else:
            for i, rec in enumerate(_records_in_window(reader, t_from, t_to)):
                if rec.kind == rl.KIND_INBOUND:
                    head = peek_sensor_header(rec.payload)
                    t0 = head.get("t0") if head else None
                    if isinstance(t0, (int, float)):
                        if first_t is None:
                            first_t = t0
                        wait = (t0 - first_t) / speed - (time.perf_counter() - start_wall)
                        if wait > 0:
                            time.sleep(wait)
                session.replay_record(rec)
                if progress is not None and i % 2000 == 0:
                    progress(rec.offset, total)
    finally:
        if writer is not None:
            writer.close()
    result.wall_s = time.perf_counter() - start_wall
    if progress is not None:
        progress(total, total)
    p = session.pipeline
    result.counters = p.ingest.snapshot()
    result.samples = result.counters["samples"]
    result.frames = result.counters["frames"]
    if p.first_sample_t is not None and p.last_sample_t is not None:
        result.source_s = p.last_sample_t - p.first_sample_t
    result.damage = [{"kind": d.kind, "segment": d.segment, "offset": d.offset, "reason": d.reason}
                     for d in reader.damage]
    result.final = final_summary(p)
    return result
