"""The daemon loop: sockets around a :class:`~wingwatch.daemon.pipeline.Session`.

The loop binds a SUB socket for sensor frames and a PUB socket for outputs (loopback by
default; any other address needs ``insecure=True``, logged loudly), receives with a bounded
poll, hands every message to the session (which records it and runs the pipeline), and sends a
status heartbeat every ``status.period_s`` of wall time. Wall time is used only for the
heartbeat and receive stamps, never in a decision.

The SUB socket subscribes to everything so that a message on a wrong topic is still received,
rejected with a reason and recorded, instead of being filtered away unseen. The transport's own
size cap (``ZMQ_MAXMSGSIZE``) is set well above ``limits.max_payload_bytes`` so that oversized
frames still arrive and are rejected and recorded by the ingest stage; only a message above the
transport cap (16x the limit) is dropped by ZeroMQ before the daemon sees it.
"""

from __future__ import annotations

import logging
import threading
import time
from pathlib import Path
from typing import Any, Iterable

import zmq

from wingwatch.daemon.codec import decode_snapshot_request, encode_error_reply, encode_snapshot
from wingwatch.daemon.config import Config, endpoint_is_loopback
from wingwatch.daemon.errors import ConfigError, FrameRejected
from wingwatch.daemon.pipeline import Pipeline, Session
from wingwatch.daemon.recorder import LogWriter
from wingwatch.daemon.security import SecuritySpec, ServerCurve

__all__ = ["Daemon", "record_frames", "make_recorder", "make_pipeline", "check_binds"]

log = logging.getLogger("wingwatch.daemon")

_POLL_MS = 50
_DRAIN_MAX = 1000  # messages handled per poll wake-up before the loop looks at its clock
_BATCH_MAX = 32  # queued messages judged and processed together (Session.inbound_many)


def make_pipeline(config: Config, reference: Any = None, *, identify: bool = True,
                  background: bool = False) -> Pipeline:
    """The daemon's pipeline: ingest and channel map, then identification (and the watchers).

    ``reference`` is a ReferenceModel or a path to a model file; None uses
    ``identify.reference_model`` from the configuration (empty: run cold). ``background`` runs
    the identifier's slow layer on a worker thread (the live daemon); outputs are identical.
    """
    p = Pipeline(config)
    if identify:
        from wingwatch.daemon.identifier import OnlineIdentifier
        from wingwatch.daemon.modelfile import load_model

        from wingwatch.daemon.watch.stage import Watcher

        ref = load_model(reference) if isinstance(reference, (str, Path)) else reference
        ident = OnlineIdentifier(config, ref, background=background)
        p.stages.append(ident)
        p.stages.append(Watcher(config, ident))
    return p


def check_binds(config: Config, insecure: bool) -> None:
    """Refuse non-loopback binds without CurveZMQ unless ``insecure`` (then log it loudly)."""
    for key in ("sensor", "publish", "snapshot"):
        ep = getattr(config.endpoints, key)
        if not endpoint_is_loopback(ep) and not config.security.curve:
            if not insecure:
                raise ConfigError(
                    f"{config.source}: key 'endpoints.{key}' binds {ep}, which is not loopback; "
                    "pass --insecure to allow it (anyone who can reach it can feed or read the daemon)."
                )
            log.warning("INSECURE: endpoints.%s binds %s beyond loopback without authentication", key, ep)


def make_recorder(config: Config, *, directory: str | Path | None = None, path: str | Path | None = None,
                  source: str = "daemon", start_unix: float | None = None,
                  reference: Any = None) -> LogWriter:
    """A LogWriter set up from the configuration's [recorder] table.

    The reference model in use (if any) is embedded in the header, so a replay starts from
    exactly the same model even when the model file has moved or changed.
    """
    header = {"source": source, "config": config.as_dict(), "config_source": config.source}
    if reference is not None:
        header["reference_model"] = reference.as_dict()
    rec = config.recorder
    if path is not None:
        return LogWriter(path=path, header=header, fsync_interval_s=rec.fsync_interval_s,
                         start_unix=start_unix)
    return LogWriter(
        directory=directory if directory is not None else rec.directory,
        header=header,
        rotate_bytes=int(rec.rotate_mb * (1 << 20)),
        fsync_interval_s=rec.fsync_interval_s,
        start_unix=start_unix,
    )


def record_frames(
    frames: Iterable[tuple[bytes, bytes, float]],
    config: Config,
    out_path: str | Path,
    *,
    start_unix: float = 0.0,
    source: str = "rig",
) -> dict[str, Any]:
    """Run messages ``(topic, payload, t_recv)`` through a Session into one log file, no sockets.

    Used by ``wingwatch rig --out``: the same ingest and recorder as the live daemon, so the
    file is exactly what the daemon would have recorded. With a fixed ``start_unix`` and
    deterministic ``t_recv`` the file is bit-identical across runs. Returns the ingest counters.
    """
    writer = make_recorder(config, path=out_path, source=source, start_unix=start_unix)
    session = Session(Pipeline(config), recorder=writer)
    try:
        for topic, payload, t_recv in frames:
            session.inbound([topic, payload], t_recv)
    finally:
        writer.close()
    out = session.pipeline.ingest.snapshot()
    out["path"] = str(out_path)
    return out


class Daemon:
    """The live daemon: SUB in, PUB out, a Session in between.

    Parameters
    ----------
    config : Config
    record : bool
        Record to ``recorder.directory`` (or ``record_dir``); ``config.recorder.enabled`` also
        gates it.
    context : zmq.Context, optional
        Share a context (tests use inproc endpoints that need one).
    insecure : bool
        Allow binding beyond loopback.
    """

    def __init__(self, config: Config, *, record: bool = True, record_dir: str | Path | None = None,
                 context: zmq.Context | None = None, insecure: bool = False,
                 reference: Any = None, identify: bool = True,
                 resume: str | Path | None = None) -> None:
        check_binds(config, insecure)
        self.config = config
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.stop_event = threading.Event()
        if isinstance(reference, (str, Path)):
            from wingwatch.daemon.modelfile import load_model

            reference = load_model(reference)
        if reference is None and identify and config.identify.get("reference_model"):
            from wingwatch.daemon.modelfile import load_model

            reference = load_model(config.identify["reference_model"])
        self.reference = reference
        state = None
        if resume is not None:
            from wingwatch.daemon.checkpoint import read_checkpoint

            state = read_checkpoint(resume)["state"]
            header = {"source": "daemon", "config": config.as_dict(),
                      "config_source": config.source, "resumed_from_checkpoint": True}
            if reference is not None:
                header["reference_model"] = reference.as_dict()
            rec = config.recorder
            self.recorder = LogWriter(continue_run=resume, header=header,
                                      rotate_bytes=int(rec.rotate_mb * (1 << 20)),
                                      fsync_interval_s=rec.fsync_interval_s)
        else:
            self.recorder = (
                make_recorder(config, directory=record_dir, reference=reference)
                if record and config.recorder.enabled else None
            )
        self.sub = self.ctx.socket(zmq.SUB)
        self.pub = self.ctx.socket(zmq.PUB)
        self.rep = self.ctx.socket(zmq.REP)
        self.curve: ServerCurve | None = None
        try:
            if config.security.curve:
                sec = config.security
                self.curve = ServerCurve(self.ctx, SecuritySpec(True, sec.server_key,
                                                                sec.allowed_clients))
                for s in (self.sub, self.pub, self.rep):
                    self.curve.secure(s)
            self.rep.setsockopt(zmq.LINGER, 0)
            self.rep.setsockopt(zmq.MAXMSGSIZE, 65536)
            self.rep.bind(config.endpoints.snapshot)
            self.sub.setsockopt(zmq.LINGER, 0)
            self.sub.setsockopt(zmq.RCVHWM, 100_000)
            self.sub.setsockopt(zmq.MAXMSGSIZE, 16 * config.limits.max_payload_bytes)
            self.sub.setsockopt(zmq.SUBSCRIBE, b"")
            self.pub.setsockopt(zmq.LINGER, 0)
            self.pub.setsockopt(zmq.SNDHWM, int(config.publish.get("sndhwm", 1000)))
            self.sub.bind(config.endpoints.sensor)
            self.pub.bind(config.endpoints.publish)
        except (zmq.ZMQError, ConfigError) as exc:
            self.close()
            if isinstance(exc, ConfigError):
                raise
            raise ConfigError(
                f"{config.source}: cannot bind the daemon's sockets ({exc}); is another daemon "
                "running on these endpoints?"
            ) from None
        pipeline = make_pipeline(config, reference, identify=identify, background=True)
        if state is not None:
            pipeline.load_state_dict(state)  # identification carries on, not from scratch
        self.session = Session(pipeline, recorder=self.recorder, sink=self._send)
        self.checkpoints = 0
        self.publish_drops = 0
        self.messages = 0
        self.snapshot_requests = 0
        self.snapshot_rejected = 0

    def _send(self, topic: bytes, payload: bytes) -> None:
        # PUB never blocks: a subscriber whose queue (SNDHWM/RCVHWM) is full loses the message
        # silently, and counts it itself from the gap in pub_seq. Ingest is never held up.
        try:
            self.pub.send_multipart([topic, payload], flags=zmq.NOBLOCK)
        except zmq.Again:  # not expected for PUB; counted all the same
            self.publish_drops += 1

    def _serve_snapshot(self) -> None:
        """Answer one snapshot request (REP: every request gets exactly one reply)."""
        try:
            parts = self.rep.recv_multipart(flags=zmq.NOBLOCK)
        except zmq.Again:
            return
        try:
            if len(parts) != 1:
                raise FrameRejected("malformed", "a snapshot request is one message part")
            decode_snapshot_request(parts[0])
        except FrameRejected as exc:
            self.snapshot_rejected += 1
            reply = encode_error_reply(exc.reason, exc.detail)
        else:
            self.snapshot_requests += 1
            last = self.session.last
            reply = encode_snapshot(last.model, list(last.warnings.values()), last.status)
        self.rep.send(reply)

    def write_checkpoint(self) -> Path | None:
        """Write the pipeline's state beside the log (atomically); None when not recording."""
        if self.recorder is None or self.recorder.run_dir is None:
            return None
        from wingwatch.daemon.checkpoint import CHECKPOINT_NAME, write_checkpoint

        p = self.session.pipeline
        try:
            out = write_checkpoint(self.recorder.run_dir / CHECKPOINT_NAME, p.state_dict(),
                                   t_sample=p.last_sample_t, config=self.config.as_dict(),
                                   reference=self.reference.as_dict() if self.reference else None)
        except OSError as exc:
            log.warning("could not write the checkpoint: %s", exc)
            return None
        self.checkpoints += 1
        return out

    def _extra_status(self) -> dict[str, Any]:
        out = {"publish_drops": self.publish_drops, "snapshot_requests": self.snapshot_requests,
               "snapshot_rejected": self.snapshot_rejected, "checkpoints": self.checkpoints}
        if self.curve is not None:
            self.curve.poll_refusals()
            out["auth_refused"] = self.curve.refused
        return out

    @property
    def log_path(self) -> Path | None:
        if self.recorder is None:
            return None
        return self.recorder.run_dir or self.recorder.path

    def stop(self) -> None:
        self.stop_event.set()

    def run(self, duration_s: float | None = None, max_messages: int | None = None) -> dict[str, Any]:
        """Run until :meth:`stop`, ``duration_s`` of wall time or ``max_messages``; return a summary."""
        poller = zmq.Poller()
        poller.register(self.sub, zmq.POLLIN)
        poller.register(self.rep, zmq.POLLIN)
        period = self.config.status_period_s
        start = time.monotonic()
        next_status = start
        ck_period = self.config.recorder.checkpoint_s
        next_ck = start + ck_period if ck_period > 0 else float("inf")
        try:
            while not self.stop_event.is_set():
                now = time.monotonic()
                if duration_s is not None and now - start >= duration_s:
                    break
                if now >= next_status:
                    self.session.status(time.time(), self._extra_status())
                    next_status = now + period
                if now >= next_ck:
                    self.write_checkpoint()
                    next_ck = now + ck_period
                timeout = max(0, min(_POLL_MS, int((next_status - now) * 1000)))
                ready = dict(poller.poll(timeout))
                if not ready:
                    continue
                if self.rep in ready:
                    self._serve_snapshot()
                # What is queued is taken in small batches (Session.inbound_many: the same
                # verdicts, records and outputs as one by one); when the daemon keeps up a batch
                # is one message, when it falls behind the per-frame work shrinks.
                received = 0
                while received < _DRAIN_MAX:
                    batch: list[list[bytes]] = []
                    stamps: list[float] = []
                    while len(batch) < _BATCH_MAX and received < _DRAIN_MAX:
                        if max_messages is not None and self.messages + len(batch) >= max_messages:
                            break
                        try:
                            batch.append(self.sub.recv_multipart(flags=zmq.NOBLOCK))
                        except zmq.Again:
                            break
                        stamps.append(time.time())
                        received += 1
                    if not batch:
                        break
                    self.session.inbound_many(batch, stamps)
                    self.messages += len(batch)
                    if max_messages is not None and self.messages >= max_messages:
                        self.stop_event.set()
                        break
                    if len(batch) < _BATCH_MAX:
                        break  # the queue is empty
        finally:
            self.session.status(time.time(), {**self._extra_status(), "final": True})
        return self.summary()

    def summary(self) -> dict[str, Any]:
        out: dict[str, Any] = dict(self.session.pipeline.ingest.snapshot())
        out["outputs_sent"] = self.session.outputs_sent
        out["publish_drops"] = self.publish_drops
        out["log"] = str(self.log_path) if self.log_path else None
        return out

    def close(self) -> None:
        socks = [s for s in (getattr(self, "sub", None), getattr(self, "pub", None),
                             getattr(self, "rep", None)) if s is not None]
        if getattr(self, "curve", None) is not None:
            self.curve.close(socks)
            self.curve = None
        for s in (getattr(self, "sub", None), getattr(self, "pub", None), getattr(self, "rep", None)):
            if s is not None:
                s.close(linger=0)
        if getattr(self, "recorder", None) is not None:
            self.recorder.close()
        if self._own_ctx:
            self.ctx.term()

    def __enter__(self) -> "Daemon":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()
