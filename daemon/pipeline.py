"""The pipeline: one code path for live, replay and offline recording.

::

    inbound bytes ──► Ingest ──► ChannelMap ──► [identify] ──► [watch] ──► outputs
         │                                                                   │
         └──────────────────────► recorder (every frame, accepted or not) ◄──┘

:class:`Pipeline` holds the stages and turns one inbound message into a verdict and a list of
:class:`Output` messages; it reads no clock. :class:`Session` wraps a pipeline with the
recorder and an output sink (the PUB socket live, a list in replay): it records every inbound
message (accepted or rejected, raw bytes as received) and every output, and publishes the
outputs. The live daemon, ``wingwatch replay`` and the virtual rig's ``--out`` all drive a
Session, so they cannot drift apart.

A stage is a small object with ``update(block) -> list[Output]``, ``reset()``,
``state_dict()`` and ``load_state_dict(state)``; to add one, append it to
:attr:`Pipeline.stages` (see DEVELOPERS.md).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable, Protocol

import numpy as np

from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import TOPICS, SensorFrame, encode_message
from wingwatch.daemon.condition import ChannelMap, ConditionedBlock
from wingwatch.daemon.config import Config
from wingwatch.daemon.ingest import Ingest, IngestVerdict
from wingwatch.daemon.recorder import LogWriter
from wingwatch.daemon.version import __version__

__all__ = ["Output", "Stage", "Pipeline", "Session", "LastValues", "ADVISORY", "OUTPUT_LOG_KIND"]

#: Topic prefix of inbound controller plans (docs/protocol.md).
PLAN_PREFIX = b"plan."

#: The caution every warning and the status heartbeat carry (BRIEF: Safety).
ADVISORY = (
    "Advisory only: wingwatch is not a safety system or an interlock; the facility's limit "
    "switches, test procedures and test director decide."
)

#: Which replay-log record kind each output message kind is recorded as.
OUTPUT_LOG_KIND = {
    "model": rl.KIND_MODEL,
    "warning": rl.KIND_WARNING,
    "event": rl.KIND_EVENT,
    "status": rl.KIND_STATUS,
    "watch": rl.KIND_WATCH,
}


@dataclass(frozen=True)
class Output:
    """A message the pipeline wants published (and recorded): kind and plain-data body."""

    kind: str
    body: dict[str, Any]

    def encode(self, pub_seq: int | None = None) -> tuple[bytes, bytes]:
        return encode_message(self.kind, self.body, pub_seq)


class Stage(Protocol):
    def update(self, block: ConditionedBlock) -> list[Output]: ...

    def reset(self) -> None: ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: dict[str, Any]) -> None: ...


class Pipeline:
    """Ingest, condition and the downstream stages, driven only by the message bytes."""

    def __init__(self, config: Config) -> None:
        self.config = config
        self.ingest = Ingest(config)
        self.channel_map = ChannelMap(config)
        self.stages: list[Stage] = []
        self.last_sample_t: float | None = None
        self.first_sample_t: float | None = None
        self.plans = 0  # controller plans accepted / refused
        self.plans_rejected = 0

    def reset(self) -> None:
        self.ingest.reset()
        self.channel_map.reset()
        for s in self.stages:
            s.reset()
        self.last_sample_t = None
        self.first_sample_t = None

    def process(self, topic: bytes, payload: bytes, *, parts_ok: bool = True
                ) -> tuple[IngestVerdict, list[Output]]:
        """Judge one inbound message and run the stages on its samples."""
        return self.process_many([(topic, payload, parts_ok)])[0]

    def process_many(self, messages: list[tuple[bytes, bytes, bool]], max_batch: int = 1 << 16
                     ) -> list[tuple[IngestVerdict, list[Output]]]:
        """Judge consecutive messages ``(topic, payload, parts_ok)`` one by one, and run the
        stages on the samples of consecutive accepted frames at once.

        Each message gets exactly the verdict and the outputs that :meth:`process` would have
        given it one at a time: the stages see the same pieces (they are cut at the stages'
        boundaries, not at the frames), and an output is handed to the message whose samples
        completed the piece it came from. A plan, a discontinuity or ``max_batch`` samples end
        a run of frames. Replay uses it: it saves the per-frame work of the channel map and the
        stages.
        """
        results: list[tuple[IngestVerdict, list[Output]]] = []
        run: list[tuple[int, SensorFrame]] = []  # (message index, frame), contiguous samples
        run_n = 0
        run_disc = False
        for topic, payload, parts_ok in messages:
            if parts_ok and topic.startswith(PLAN_PREFIX):
                self._run_stages(run, run_disc, results)  # the plan takes effect after them
                run, run_n = [], 0
                results.append((self._plan(topic, payload), []))
                continue
            verdict = self.ingest.update(topic, payload, parts_ok=parts_ok)
            outputs: list[Output] = []
            results.append((verdict, outputs))
            frame = verdict.frame
            if frame is None:
                continue
            if verdict.discontinuity:
                self._run_stages(run, run_disc, results)
                run, run_n = [], 0
                outputs.append(Output("event", {
                    "t": frame.t0,
                    "event": "restart" if verdict.restart else ("gap" if verdict.gap_frames else "time_gap"),
                    "stream": frame.stream,
                    "seq": frame.seq,
                    "missing_frames": verdict.gap_frames,
                    "missing_s": verdict.time_gap_s,
                }))
            if self.first_sample_t is None:
                self.first_sample_t = frame.t0
            self.last_sample_t = frame.t_end
            if self.channel_map.accepts(frame):
                if not run:
                    run_disc = verdict.discontinuity
                run.append((len(results) - 1, frame))
                run_n += frame.n_samples
                if run_n >= max_batch:
                    self._run_stages(run, run_disc, results)
                    run, run_n = [], 0
        self._run_stages(run, run_disc, results)
        return results

    def _run_stages(self, run: list[tuple[int, SensorFrame]], discontinuity: bool,
                    results: list[tuple[IngestVerdict, list[Output]]]) -> None:
        """Condition a run of frames and pass it through the stages, cut at their boundaries
        (``samples_to_boundary``); outputs go to the message holding a piece's last sample."""
        if not run:
            return
        block = self.channel_map.apply_many([f for _, f in run], discontinuity)
        cuts = [s.samples_to_boundary for s in self.stages if hasattr(s, "samples_to_boundary")]
        ends = np.cumsum([f.n_samples for _, f in run]) if len(run) > 1 else None
        done = 0
        while True:
            k = block.n
            for cut in cuts:
                k = min(k, cut(block.discontinuity))
            piece, rest = (block, None) if k >= block.n else block.split(k)
            done += piece.n
            at = 0 if ends is None else int(np.searchsorted(ends, done))
            outputs = results[run[at][0]][1]
            for stage in self.stages:
                outputs.extend(stage.update(piece))
            if rest is None:
                return
            block = rest

    def _plan(self, topic: bytes, payload: bytes) -> IngestVerdict:
        """A controller's announced alpha plan: validated, counted, handed to the stages that
        read plans (the curvature-margin watcher). Deterministic: its place in the recorded
        stream decides when it takes effect."""
        from wingwatch.daemon.errors import FrameRejected
        from wingwatch.daemon.plan import decode_plan

        try:
            plan = decode_plan(topic, payload, max_bytes=self.config.limits.max_payload_bytes)
        except FrameRejected as exc:
            self.plans_rejected += 1
            return IngestVerdict(False, reason=exc.reason, detail=exc.detail)
        self.plans += 1
        for stage in self.stages:
            if hasattr(stage, "set_plan"):
                stage.set_plan(plan)
        return IngestVerdict(True, plan=True)

    def state_dict(self) -> dict[str, Any]:
        return {
            "plans": [self.plans, self.plans_rejected],
            "ingest": self.ingest.state_dict(),
            "channel_map": self.channel_map.state_dict(),
            "stages": [s.state_dict() for s in self.stages],
            "first_sample_t": self.first_sample_t,
            "last_sample_t": self.last_sample_t,
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self.plans, self.plans_rejected = state.get("plans", [0, 0])
        self.ingest.load_state_dict(state["ingest"])
        self.channel_map.load_state_dict(state["channel_map"])
        for s, st in zip(self.stages, state["stages"], strict=True):
            s.load_state_dict(st)
        self.first_sample_t = state["first_sample_t"]
        self.last_sample_t = state["last_sample_t"]


Sink = Callable[[bytes, bytes], None]


@dataclass
class LastValues:
    """What a late joiner needs at once: the model in service, the active warnings, the last
    status (raw payloads as published, so the snapshot is exactly what subscribers saw)."""

    model: bytes | None = None
    warnings: dict[str, bytes] = field(default_factory=dict)
    status: bytes | None = None

    def observe(self, kind: str, body: dict[str, Any], payload: bytes) -> None:
        if kind == "model" and body.get("status") in ("accepted", "reference"):
            self.model = payload
        elif kind == "warning":
            wid = str(body.get("warning_id", ""))
            if body.get("event") == "cleared":
                self.warnings.pop(wid, None)
            else:
                self.warnings[wid] = payload
        elif kind == "status":
            self.status = payload


@dataclass
class Session:
    """A pipeline with its recorder and output sink: what the daemon loop and replay drive.

    Parameters
    ----------
    pipeline : Pipeline
    recorder : LogWriter or None
        Where every inbound message and every output is recorded (None: not recorded).
    sink : callable(topic, payload) or None
        Where outputs are published (the PUB socket, or a list in replay).
    """

    pipeline: Pipeline
    recorder: LogWriter | None = None
    sink: Sink | None = None
    outputs_sent: int = 0
    last: LastValues = field(default_factory=LastValues)
    pub_seq: dict[str, int] = field(default_factory=dict)
    started_wall: float = field(default_factory=time.time)
    first_wall: float | None = None
    _last_status_counters: dict[str, int] = field(default_factory=dict)
    _last_status_wall: float | None = None

    @staticmethod
    def _split(parts: list[bytes]) -> tuple[bytes, bytes, bool]:
        parts_ok = len(parts) == 2
        topic = parts[0] if parts else b""
        payload = parts[1] if parts_ok else b"".join(parts[1:])
        return topic, payload, parts_ok

    def inbound(self, parts: list[bytes], t_recv: float) -> IngestVerdict:
        """Handle one inbound multipart message received at wall time ``t_recv``."""
        topic, payload, parts_ok = self._split(parts)
        verdict, outputs = self.pipeline.process(topic, payload, parts_ok=parts_ok)
        self._handled(topic, payload, parts_ok, t_recv, verdict, outputs)
        return verdict

    def inbound_many(self, messages: list[list[bytes]], t_recv: list[float]) -> list[IngestVerdict]:
        """Handle consecutive inbound messages at once (:meth:`Pipeline.process_many`): the
        same verdicts, records and outputs, in the same order, as :meth:`inbound` one by one."""
        split = [self._split(parts) for parts in messages]
        results = self.pipeline.process_many(split)
        for (topic, payload, parts_ok), t, (verdict, outputs) in zip(split, t_recv, results,
                                                                     strict=True):
            self._handled(topic, payload, parts_ok, t, verdict, outputs)
        return [v for v, _ in results]

    def _handled(self, topic: bytes, payload: bytes, parts_ok: bool, t_recv: float,
                 verdict: IngestVerdict, outputs: list[Output]) -> None:
        """Record one judged message, then emit its outputs."""
        if self.recorder is not None:
            if verdict.accepted and verdict.plan:
                self.recorder.append(rl.KIND_PLAN, topic, payload, t_recv)
            elif verdict.accepted:
                self.recorder.append(rl.KIND_INBOUND, topic, payload, t_recv)
            else:
                # flags bit 0: the message did not have exactly two parts (replay re-rejects it)
                self.recorder.append(rl.KIND_REJECTED, topic, payload, t_recv,
                                     flags=0 if parts_ok else 1, aux=verdict.reason_code)
        if verdict.accepted and not verdict.plan and self.first_wall is None:
            self.first_wall = t_recv
        for out in outputs:
            self.emit(out, t_recv)

    @staticmethod
    def _record_parts(rec: rl.Record) -> list[bytes]:
        if rec.kind == rl.KIND_REJECTED and rec.flags & 1:
            return [rec.topic, rec.payload, b""]  # re-create the wrong part count
        return [rec.topic, rec.payload]

    def replay_record(self, rec: rl.Record) -> IngestVerdict:
        """Feed a recorded inbound record back through the same path (t_recv as recorded)."""
        return self.inbound(self._record_parts(rec), rec.t_recv)

    def replay_records(self, recs: list[rl.Record]) -> list[IngestVerdict]:
        """:meth:`replay_record` for consecutive records at once (:meth:`inbound_many`)."""
        return self.inbound_many([self._record_parts(r) for r in recs], [r.t_recv for r in recs])

    def emit(self, out: Output, t_wall: float) -> None:
        n = self.pub_seq.get(out.kind, 0)  # per kind: decision outputs stay deterministic
        self.pub_seq[out.kind] = n + 1
        topic, payload = out.encode(n)
        self.last.observe(out.kind, out.body, payload)
        if self.recorder is not None:
            self.recorder.append(OUTPUT_LOG_KIND[out.kind], topic, payload, t_wall)
        if self.sink is not None:
            self.sink(topic, payload)
        self.outputs_sent += 1

    def lag_s(self, now_wall: float) -> float:
        """How far processing trails the source: wall time elapsed since the first accepted
        frame minus source time covered since then (0 when keeping up)."""
        p = self.pipeline
        if self.first_wall is None or p.first_sample_t is None or p.last_sample_t is None:
            return 0.0
        return max(0.0, (now_wall - self.first_wall) - (p.last_sample_t - p.first_sample_t))

    def status(self, now_wall: float, extra: dict[str, Any] | None = None) -> Output:
        """Build, record and publish one status heartbeat (telemetry, not a decision)."""
        counters = self.pipeline.ingest.snapshot()
        rates = {}
        if self._last_status_wall is not None and now_wall > self._last_status_wall:
            dt = now_wall - self._last_status_wall
            for k in ("frames", "samples", "rejected"):
                rates[f"{k}_per_s"] = (counters[k] - self._last_status_counters.get(k, 0)) / dt
        self._last_status_counters = {k: v for k, v in counters.items() if isinstance(v, int)}
        self._last_status_wall = now_wall
        body: dict[str, Any] = {
            "t_wall": now_wall,
            "uptime_s": now_wall - self.started_wall,
            "t_sample": self.pipeline.last_sample_t,
            "lag_s": self.lag_s(now_wall),
            "period_s": self.pipeline.config.status_period_s,
            "counters": counters,
            "rates": rates,
            "flow_off_samples": self.pipeline.channel_map.flow_off_samples,
            "software_version": __version__,
            "advisory": ADVISORY,
        }
        if self.recorder is not None:
            st = self.recorder.stats()
            body["recorder"] = {
                "path": st.path,
                "records": st.records,
                "bytes": st.bytes,
                "segments": st.segments,
                "failing": st.failing,
                "backlog_records": st.backlog_records,
                "dropped_records": st.dropped_records,
                "last_error": st.last_error,
            }
        if extra:
            body.update(extra)
        out = Output("status", body)
        self.emit(out, now_wall)
        return out


assert set(OUTPUT_LOG_KIND) == set(TOPICS)
