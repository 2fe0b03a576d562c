"""Feeds for controllers and monitors: the latest validated model, the live warnings.

A controller holds a :class:`ModelFeed` and asks it, every control cycle, for the latest model
that passed wingwatch's validity gate::

    from wingwatch.clients.feed import ModelFeed
    feed = ModelFeed("tcp://127.0.0.1:5602", "tcp://127.0.0.1:5603")
    while running:
        feed.poll()                       # non-blocking: handles what has arrived
        if feed.lost or feed.model is None:
            ...                           # no current model: fall back to your own safe law
        else:
            A, B, C = feed.model.A, feed.model.B, feed.model.C

On start the feed asks the daemon's snapshot socket for the current model and active warnings
(a late joiner is up to date at once, without waiting for the next update), then follows the
publish socket. It declares the feed **lost** when no status heartbeat has arrived for
``lost_after`` heartbeat periods; it recovers by itself when heartbeats return (and fetches a
fresh snapshot). Use :meth:`poll` from your own loop, or :meth:`start` for a background thread
(then read the properties; they are guarded by a lock).
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import msgpack
import numpy as np
import scipy.linalg
import zmq

from wingwatch.daemon.codec import TOPICS, decode_message

__all__ = ["ModelUpdate", "ModelFeed", "WarningFeed", "count_missed"]


@dataclass(frozen=True, eq=False)
class ModelUpdate:
    """One model as published on ``ww.model`` (arrays as numpy)."""

    model_id: str
    seq: int
    t: float
    dt: float
    rank: int
    status: str
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    coefficients: dict[str, Any]
    intervals: dict[str, Any]
    modes: list[dict[str, Any]]
    fit: dict[str, Any]
    raw: dict[str, Any] = field(repr=False)
    received: float = 0.0  # time.monotonic() when it arrived

    @classmethod
    def from_message(cls, m: dict[str, Any], received: float) -> "ModelUpdate":
        def arr(key: str) -> np.ndarray:
            v = m.get(key)
            return np.asarray(v, dtype=float) if v is not None else np.zeros((0, 0))

        return cls(
            model_id=str(m.get("model_id", "")),
            seq=int(m.get("seq", -1)),
            t=float(m.get("t", float("nan"))),
            dt=float(m.get("dt", float("nan"))),
            rank=int(m.get("rank", 0)),
            status=str(m.get("status", "")),
            A=arr("A"),
            B=arr("B"),
            C=arr("C"),
            coefficients=dict(m.get("coefficients", {})),
            intervals=dict(m.get("intervals", {})),
            modes=list(m.get("modes", [])),
            fit=dict(m.get("fit", {})),
            raw=m,
            received=received,
        )

    def continuous(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Continuous-time (A_c, B_c, C) whose zero-order-hold discretisation at ``dt`` is
        (A, B): the matrix logarithm of the augmented matrix [[A, B], [0, I]] divided by dt
        (the inverse of the ZOH exponential; C. Van Loan, "Computing integrals involving the
        matrix exponential", IEEE Trans. Automatic Control 23(3), 1978)."""
        n, m = self.B.shape
        M = np.zeros((n + m, n + m))
        M[:n, :n] = self.A
        M[:n, n:] = self.B
        M[n:, n:] = np.eye(m)
        L = scipy.linalg.logm(M)
        L = np.real_if_close(L, tol=1e6) / self.dt
        return np.real(L[:n, :n]), np.real(L[:n, n:]), self.C


def count_missed(last_seen: dict[str, int], kind: str, m: dict[str, Any]) -> int:
    """Messages of ``kind`` that never arrived before ``m``, from the gap in ``pub_seq``.

    ``last_seen`` (kind -> last pub_seq) is updated. A number at or below the last one seen is a
    new publisher (the daemon restarted and numbers from 0 again): it becomes the baseline, so
    later drops are counted at once.

    >>> seen = {}
    >>> [count_missed(seen, "model", {"pub_seq": s}) for s in (0, 1, 4, 0, 2)]
    [0, 0, 2, 0, 1]
    """
    seq = m.get("pub_seq")
    if not isinstance(seq, int):
        return 0
    last = last_seen.get(kind)
    last_seen[kind] = seq
    return seq - last - 1 if last is not None and seq > last + 1 else 0


class _Feed:
    """Shared machinery: SUB to the publish socket, REQ to the snapshot socket, heartbeats."""

    def __init__(
        self,
        publish_endpoint: str,
        snapshot_endpoint: str | None = None,
        *,
        topics: tuple[bytes, ...],
        heartbeat_period_s: float = 1.0,
        lost_after: int = 3,
        snapshot_timeout_s: float = 1.0,
        context: zmq.Context | None = None,
        rcvhwm: int = 1000,
        curve: dict | None = None,
    ) -> None:
        if heartbeat_period_s <= 0:
            raise ValueError("heartbeat_period_s must be positive")
        if lost_after < 1:
            raise ValueError("lost_after must be at least 1")
        self.publish_endpoint = publish_endpoint
        self.snapshot_endpoint = snapshot_endpoint
        self.heartbeat_period_s = float(heartbeat_period_s)
        self.lost_after = int(lost_after)
        self.snapshot_timeout_s = float(snapshot_timeout_s)
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.RCVHWM, int(rcvhwm))  # before connect: options bind at connect
        self._curve = dict(curve or {})
        for opt, value in self._curve.items():  # CurveZMQ client keys (daemon/security.py)
            self.sub.setsockopt(opt, value)
        for t in (TOPICS["status"][0], *topics):
            self.sub.setsockopt(zmq.SUBSCRIBE, t)
        self.sub.connect(publish_endpoint)
        self.req: zmq.Socket | None = None
        self._req_sent = 0.0
        self._lock = threading.RLock()
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self.started = time.monotonic()
        self.last_heartbeat: float | None = None
        self.last_status: dict[str, Any] | None = None
        self.snapshots = 0
        self.decode_errors = 0
        self.missed = 0  # messages the daemon published that never reached this feed
        self._last_pub_seq: dict[str, int] = {}
        self._was_lost = False
        self._lost_callbacks: list[Callable[[bool], None]] = []
        self._request_snapshot()

    # -- snapshot -----------------------------------------------------------------------------
    def _request_snapshot(self) -> None:
        if self.snapshot_endpoint is None:
            return
        if self.req is not None:
            self.req.close(linger=0)
        self.req = self.ctx.socket(zmq.REQ)
        self.req.setsockopt(zmq.LINGER, 0)
        for opt, value in self._curve.items():
            self.req.setsockopt(opt, value)
        self.req.connect(self.snapshot_endpoint)
        self.req.send(msgpack.packb({"v": 1, "want": "snapshot"}))
        self._req_sent = time.monotonic()

    def _check_snapshot(self) -> None:
        if self.req is None:
            return
        if self.req.poll(0, zmq.POLLIN):
            reply = self.req.recv()
            self.req.close(linger=0)
            self.req = None
            try:
                m = msgpack.unpackb(reply, raw=False)
                if m.get("kind") == "snapshot":
                    self.snapshots += 1
                    self._apply_snapshot(m)
            except Exception:  # a bad reply never breaks the controller's loop
                self.decode_errors += 1
        elif time.monotonic() - self._req_sent > self.snapshot_timeout_s:
            self._request_snapshot()  # REQ cannot resend: a fresh socket retries

    def _apply_snapshot(self, m: dict[str, Any]) -> None:
        now = time.monotonic()
        if m.get("status") is not None:
            self._on_message("status", decode_message(msgpack.packb(m["status"])), now)
        self._apply_snapshot_body(m, now)

    def _apply_snapshot_body(self, m: dict[str, Any], now: float) -> None:  # pragma: no cover
        pass

    # -- messages -----------------------------------------------------------------------------
    def poll(self, timeout_s: float = 0.0) -> int:
        """Handle every message that has arrived (wait up to ``timeout_s`` for the first)."""
        with self._lock:
            n = 0
            self._check_snapshot()
            wait = int(timeout_s * 1000)
            while self.sub.poll(wait, zmq.POLLIN):
                wait = 0
                topic, payload = self.sub.recv_multipart()[:2]
                now = time.monotonic()
                try:
                    m = decode_message(payload)
                except Exception:
                    self.decode_errors += 1
                    continue
                self._on_message(str(m.get("kind")), m, now)
                n += 1
            lost = self.lost
            if lost != self._was_lost:
                self._was_lost = lost
                if not lost:
                    self._request_snapshot()  # back: catch up at once
                for cb in self._lost_callbacks:
                    cb(lost)
            return n

    def _count_missed(self, kind: str, m: dict[str, Any]) -> None:
        self.missed += count_missed(self._last_pub_seq, kind, m)

    def _on_message(self, kind: str, m: dict[str, Any], now: float) -> None:
        self._count_missed(kind, m)
        if kind == "status":
            self.last_heartbeat = now
            self.last_status = m
            p = m.get("period_s")
            if isinstance(p, (int, float)) and p > 0:
                self.heartbeat_period_s = float(p)

    @property
    def lost(self) -> bool:
        """No heartbeat for ``lost_after`` periods (or none yet after as long since start)."""
        ref = self.last_heartbeat if self.last_heartbeat is not None else self.started
        return time.monotonic() - ref > self.lost_after * self.heartbeat_period_s

    def on_lost(self, callback: Callable[[bool], None]) -> None:
        """Call ``callback(lost)`` whenever the feed is lost or comes back."""
        self._lost_callbacks.append(callback)

    # -- thread -------------------------------------------------------------------------------
    def start(self) -> "_Feed":
        """Follow the feed from a background thread (daemon thread)."""
        if self._thread is None:
            self._stop.clear()
            self._thread = threading.Thread(target=self._loop, name=type(self).__name__, daemon=True)
            self._thread.start()
        return self

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.poll(0.05)

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(2.0)
            self._thread = None
        with self._lock:
            if self.req is not None:
                self.req.close(linger=0)
            self.sub.close(linger=0)
        if self._own_ctx:
            self.ctx.term()

    def __enter__(self):
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


class ModelFeed(_Feed):
    """The latest validated model from a wingwatch daemon (see the module docstring)."""

    def __init__(self, publish_endpoint: str, snapshot_endpoint: str | None = None, **kw: Any) -> None:
        self._model: ModelUpdate | None = None
        self.rejected: dict[str, Any] | None = None
        self._callbacks: list[Callable[[ModelUpdate], None]] = []
        super().__init__(publish_endpoint, snapshot_endpoint, topics=(TOPICS["model"][0],), **kw)

    def _apply_snapshot_body(self, m: dict[str, Any], now: float) -> None:
        if m.get("model") is not None:
            self._on_message("model", decode_message(msgpack.packb(m["model"])), now)

    def _on_message(self, kind: str, m: dict[str, Any], now: float) -> None:
        super()._on_message(kind, m, now)
        if kind != "model":
            return
        if m.get("status") not in ("accepted", "reference"):
            self.rejected = m  # a candidate that failed the gate: the previous model stays
            return
        if self._model is not None and m.get("model_id") == self._model.model_id:
            return  # the snapshot and the live feed both delivered it
        self._model = ModelUpdate.from_message(m, now)
        for cb in self._callbacks:
            cb(self._model)

    @property
    def model(self) -> ModelUpdate | None:
        """The latest model that passed validation (None before the first)."""
        with self._lock:
            return self._model

    @property
    def age_s(self) -> float | None:
        """Seconds since the current model arrived (wall clock), None without a model."""
        with self._lock:
            return None if self._model is None else time.monotonic() - self._model.received

    @property
    def sample_age_s(self) -> float | None:
        """Source time from the model's sample time to the daemon's newest sample."""
        with self._lock:
            if self._model is None or not self.last_status:
                return None
            ts = self.last_status.get("t_sample")
            return None if ts is None else float(ts) - self._model.t

    def on_change(self, callback: Callable[[ModelUpdate], None]) -> None:
        """Call ``callback(model)`` whenever a new validated model arrives."""
        self._callbacks.append(callback)


class WarningFeed(_Feed):
    """The live (raised, not yet cleared) advisory warnings, and every warning event."""

    def __init__(self, publish_endpoint: str, snapshot_endpoint: str | None = None, **kw: Any) -> None:
        self._active: dict[str, dict[str, Any]] = {}
        self._callbacks: list[Callable[[dict[str, Any]], None]] = []
        super().__init__(publish_endpoint, snapshot_endpoint, topics=(TOPICS["warning"][0],), **kw)

    def _apply_snapshot_body(self, m: dict[str, Any], now: float) -> None:
        for w in m.get("warnings") or []:
            self._on_message("warning", decode_message(msgpack.packb(w)), now)

    def _on_message(self, kind: str, m: dict[str, Any], now: float) -> None:
        super()._on_message(kind, m, now)
        if kind != "warning":
            return
        wid = str(m.get("warning_id", ""))
        if m.get("event") == "cleared":
            self._active.pop(wid, None)
        else:
            self._active[wid] = m
        for cb in self._callbacks:
            cb(m)

    @property
    def active(self) -> dict[str, dict[str, Any]]:
        with self._lock:
            return dict(self._active)

    def on_event(self, callback: Callable[[dict[str, Any]], None]) -> None:
        self._callbacks.append(callback)
