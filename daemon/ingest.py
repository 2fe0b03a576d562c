"""Ingest stage: decode, validate and sequence-check inbound sensor frames.

The first stage of the pipeline. For every inbound message it returns an
:class:`IngestVerdict`: accepted (with the decoded :class:`~wingwatch.daemon.codec.SensorFrame`
and any discontinuity before it) or rejected (with a reason code and one sentence). It decides
from the message bytes alone, never from arrival time, so a replay of the recorded bytes reaches
the same verdicts. Every outcome is counted; nothing is silently absorbed.

Sequence rules, per stream (documented in ``docs/protocol.md``):

- ``seq`` one above the last accepted: in order. If ``t0`` starts later than the end of the
  previous frame by more than half a sample, a *time gap* (accepted, counted as a gap).
- ``seq`` more than one above: a *gap* of ``seq - last - 1`` frames (accepted, counted).
- ``seq`` equal to a recently accepted one: *duplicate* (rejected).
- ``seq`` below the last accepted and not recent: *out of order*, arrived late (rejected).
- ``seq == 0`` after a later frame, or a frame 0 whose bytes differ from the frame 0 already
  accepted (a source that restarted with its clock reset to the same ``t0``): the source
  *restarted* (accepted as a discontinuity). Only a byte-identical copy of frame 0 is a duplicate.
- a newer ``seq`` whose ``t0`` lies before the end of the previous frame: *clock backwards*
  (rejected).

Examples
--------
>>> import numpy as np
>>> from wingwatch.daemon.config import load_config
>>> from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame
>>> cfg = load_config()
>>> ing = Ingest(cfg)
>>> chans = cfg.streams["rig"].channels
>>> def frame(seq):
...     return encode_sensor_frame(SensorFrame("rig", seq, seq * 0.01, 1000.0, chans,
...                                            np.zeros((10, 5))))
>>> [ing.update(*frame(s)).outcome for s in (0, 1, 1, 3)]
['accepted', 'accepted', 'duplicate', 'accepted']
>>> ing.counters["gaps"], ing.counters["missing_frames"]
(1, 1)
"""

from __future__ import annotations

import collections
import copy
import logging
import zlib
from dataclasses import dataclass
from typing import Any

from wingwatch.daemon.codec import REJECT_REASONS, SensorFrame, decode_sensor_frame
from wingwatch.daemon.config import Config
from wingwatch.daemon.errors import FrameRejected

__all__ = ["IngestVerdict", "Ingest", "BurstLog"]

log = logging.getLogger("wingwatch.ingest")

_RECENT = 256  # how many accepted (seq, t0) per stream are remembered to spot duplicates
#: Longest topic the ingest stage reads (a sensor topic is at most 7 + 64 bytes). Longer ones
#: are refused as ``bad_topic`` before decoding, so a replay of a log whose recorder had to cut
#: an absurd topic (the log format holds 65535 topic bytes) reaches the same verdict.
MAX_TOPIC_BYTES = 1024


@dataclass(frozen=True)
class IngestVerdict:
    """What the ingest stage made of one inbound message."""

    accepted: bool
    frame: SensorFrame | None = None
    reason: str = ""
    detail: str = ""
    gap_frames: int = 0  # frames missing just before this one (sequence gap)
    time_gap_s: float = 0.0  # source time missing just before this one
    restart: bool = False  # the source restarted its sequence before this frame
    plan: bool = False  # an accepted controller plan, not a sensor frame

    @property
    def outcome(self) -> str:
        return "accepted" if self.accepted else self.reason

    @property
    def discontinuity(self) -> bool:
        return self.gap_frames > 0 or self.time_gap_s > 0 or self.restart

    @property
    def reason_code(self) -> int:
        return REJECT_REASONS.get(self.reason, 0)


class BurstLog:
    """Log a rejection once per burst: the first ``first`` of a kind, then one summary line.

    A burst of one reason ends when a frame is accepted; the summary then says how many more
    were suppressed.
    """

    def __init__(self, first: int = 5, logger: logging.Logger = log) -> None:
        self.first = int(first)
        self.logger = logger
        self._counts: dict[str, int] = {}

    def rejected(self, reason: str, message: str) -> None:
        n = self._counts.get(reason, 0) + 1
        self._counts[reason] = n
        if n <= self.first:
            self.logger.warning("frame rejected (%s): %s", reason, message)
        elif n == self.first + 1:
            self.logger.warning("more frames rejected for %s; summarising the rest of this burst", reason)

    def accepted(self) -> None:
        for reason, n in self._counts.items():
            if n > self.first:
                self.logger.warning("%d more frames rejected for %s in that burst", n - self.first, reason)
        self._counts.clear()


class Ingest:
    """Decode, validate and sequence-check inbound frames (one small stage, explicit state)."""

    def __init__(self, config: Config, *, burst_log: BurstLog | None = None) -> None:
        self.config = config
        self.streams = dict(config.streams)
        self.limits = config.limits
        self.burst_log = burst_log if burst_log is not None else BurstLog(config.limits.max_burst_log)
        self.reset()

    def reset(self) -> None:
        """Forget every stream's sequence state and zero the counters."""
        self._seq: dict[str, dict[str, Any]] = {}
        self.counters: dict[str, int] = {
            "frames": 0,
            "accepted": 0,
            "samples": 0,
            "rejected": 0,
            "gaps": 0,
            "missing_frames": 0,
            "time_gaps": 0,
            "duplicates": 0,
            "out_of_order": 0,
            "restarts": 0,
            "flagged": 0,
        }
        self.rejected_by_reason: dict[str, int] = {}

    # ----------------------------------------------------------------------------------------
    def _reject(self, reason: str, detail: str, where: str = "") -> IngestVerdict:
        self.counters["rejected"] += 1
        self.rejected_by_reason[reason] = self.rejected_by_reason.get(reason, 0) + 1
        if reason == "duplicate":
            self.counters["duplicates"] += 1
        elif reason == "out_of_order":
            self.counters["out_of_order"] += 1
        self.burst_log.rejected(reason, f"{where}{detail}")
        return IngestVerdict(False, reason=reason, detail=detail)

    def update(self, topic: bytes, payload: bytes, *, parts_ok: bool = True) -> IngestVerdict:
        """Judge one inbound message ``[topic, payload]``; never raises on bad input."""
        self.counters["frames"] += 1
        if not parts_ok:
            return self._reject("malformed", "a sensor message must have exactly two parts, topic and payload")
        if len(topic) > MAX_TOPIC_BYTES:
            return self._reject("bad_topic", f"topic is {len(topic)} bytes, longer than any sensor "
                                             f"topic (limit {MAX_TOPIC_BYTES})")
        try:
            frame = decode_sensor_frame(
                topic,
                payload,
                max_bytes=self.limits.max_payload_bytes,
                max_channels=self.limits.max_channels,
                max_samples=self.limits.max_frame_samples,
            )
        except FrameRejected as exc:
            return self._reject(exc.reason, exc.detail)

        where = f"stream '{frame.stream}' frame {frame.seq}: "
        spec = self.streams.get(frame.stream)
        if spec is None:
            known = ", ".join(sorted(self.streams))
            return self._reject("unknown_stream", f"stream '{frame.stream}' is not configured (known: {known})")
        if frame.channels != spec.channels:
            return self._reject(
                "channel_mismatch",
                f"channels {list(frame.channels)} differ from the configured {list(spec.channels)}",
                where,
            )
        if abs(frame.rate - spec.rate_hz) > 1e-9 * spec.rate_hz:
            return self._reject(
                "rate_mismatch", f"rate {frame.rate} Hz differs from the configured {spec.rate_hz} Hz", where
            )

        st = self._seq.get(frame.stream)
        gap_frames = 0
        time_gap = 0.0
        restart = False
        if st is not None:
            half = 0.5 / spec.rate_hz
            last = st["last"]
            seen_t0 = st["recent"].get(frame.seq)
            if frame.seq == 0 and (last > 0 or seen_t0 is not None) and (
                    seen_t0 is None or abs(frame.t0 - seen_t0) > half
                    or st.get("first_crc") != zlib.crc32(payload)):
                # A frame 0 that is not a byte-identical copy of the accepted frame 0: the
                # source restarted (possibly with its clock reset to the same t0).
                restart = True
            elif seen_t0 is not None:
                return self._reject("duplicate", "sequence number already received", where)
            elif frame.seq < last:
                return self._reject("out_of_order", f"arrived after frame {last}", where)
            else:
                if frame.t0 < st["t_end"] - half:
                    return self._reject(
                        "clock_backwards",
                        f"starts at t={frame.t0:.6f} s, before the previous frame's end "
                        f"t={st['t_end']:.6f} s",
                        where,
                    )
                gap_frames = frame.seq - last - 1
                if frame.t0 > st["t_end"] + half:
                    time_gap = frame.t0 - st["t_end"]
        if st is None or restart:
            st = {"last": -1, "t_end": frame.t0, "recent": collections.OrderedDict(),
                  "first_crc": None}
            self._seq[frame.stream] = st
            if restart:
                self.counters["restarts"] += 1
        if frame.seq == 0:
            st["first_crc"] = zlib.crc32(payload)  # tells a re-sent frame 0 from a restart
        st["last"] = frame.seq
        st["t_end"] = frame.t_end
        recent = st["recent"]
        recent[frame.seq] = frame.t0
        if len(recent) > _RECENT:
            recent.popitem(last=False)

        c = self.counters
        c["accepted"] += 1
        c["samples"] += frame.n_samples
        if frame.flags:
            c["flagged"] += 1
        if gap_frames > 0 or time_gap > 0:
            c["gaps"] += 1
            c["missing_frames"] += max(gap_frames, 0)
            if time_gap > 0:
                c["time_gaps"] += 1
        self.burst_log.accepted()
        return IngestVerdict(True, frame=frame, gap_frames=max(gap_frames, 0), time_gap_s=time_gap,
                             restart=restart)

    # ----------------------------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """Everything learned, as plain data (for checkpoints and comparisons)."""
        return {
            "seq": {
                s: {"last": v["last"], "t_end": v["t_end"],
                    "recent": [[k, t] for k, t in v["recent"].items()],
                    "first_crc": v.get("first_crc")}
                for s, v in self._seq.items()
            },
            "counters": dict(self.counters),
            "rejected_by_reason": dict(self.rejected_by_reason),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self.reset()
        self._seq = {
            s: {"last": int(v["last"]), "t_end": float(v["t_end"]),
                "recent": collections.OrderedDict((int(k), float(t)) for k, t in v["recent"]),
                "first_crc": None if v.get("first_crc") is None else int(v["first_crc"])}
            for s, v in state["seq"].items()
        }
        self.counters.update({k: int(v) for k, v in state["counters"].items()})
        self.rejected_by_reason = {k: int(v) for k, v in state["rejected_by_reason"].items()}

    def snapshot(self) -> dict[str, Any]:
        """Counters for the status heartbeat."""
        out = copy.deepcopy(self.counters)
        out["rejected_by_reason"] = dict(self.rejected_by_reason)
        return out
