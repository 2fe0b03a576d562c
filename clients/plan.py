"""Plan publisher: announce a controller's planned alpha trajectory to a wingwatch daemon.

The daemon's curvature-margin watcher forecasts better with the controller's intent than by
holding the present angle. A controller sends its plan, every time it replans, on the daemon's
sensor socket (topic ``plan.<controller>``, schema in ``docs/protocol.md``)::

    from wingwatch.clients.plan import PlanPublisher
    plans = PlanPublisher("tcp://127.0.0.1:5601", controller="mpc")
    plans.wait_ready()                   # until the daemon's subscription has arrived
    plans.send(t0, dt, alpha)            # alpha[i] (rad) planned for source time t0 + i dt

Like :class:`wingwatch.clients.publisher.FramePublisher` it connects an XPUB socket (the daemon
binds) so that :meth:`wait_ready` can see the daemon subscribe; a plan sent before that would be
dropped by ZeroMQ. Encoding and validation are :func:`wingwatch.daemon.plan.encode_plan`'s.
"""

from __future__ import annotations

import time
from typing import Any

import zmq

from wingwatch.daemon.plan import encode_plan

__all__ = ["PlanPublisher"]


class PlanPublisher:
    """Publish the plans of one controller.

    Parameters
    ----------
    endpoint : str
        The daemon's sensor endpoint (``endpoints.sensor`` in its configuration).
    controller : str
        The controller's name: 1-64 characters of ``A-Z a-z 0-9 _ . -`` (the topic suffix).
    context : zmq.Context, optional
    curve : dict, optional
        CurveZMQ client options from :func:`wingwatch.daemon.security.client_curve_options`.
    sndhwm : int
        Send high-water mark (plans beyond it are dropped by ZeroMQ, never block the caller).
    """

    def __init__(self, endpoint: str = "tcp://127.0.0.1:5601", controller: str = "mpc", *,
                 context: zmq.Context | None = None, curve: dict | None = None,
                 sndhwm: int = 1000) -> None:
        encode_plan(controller, 0.0, 1.0, [0.0])  # refuses a bad name here, not at the first send
        if sndhwm < 1:
            raise ValueError("sndhwm must be at least 1")
        self.endpoint = endpoint
        self.controller = controller
        self.sent = 0
        self._subscribed = False
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sock = self.ctx.socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, 1000)
        self.sock.setsockopt(zmq.SNDHWM, int(sndhwm))
        for opt, value in (curve or {}).items():  # CurveZMQ client keys (daemon/security.py)
            self.sock.setsockopt(opt, value)
        self.sock.connect(endpoint)

    def wait_ready(self, timeout_s: float = 5.0) -> bool:
        """Wait until a subscriber has subscribed (True), or ``timeout_s`` passes (False)."""
        deadline = time.monotonic() + timeout_s
        while not self._subscribed:
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            if self.sock.poll(int(left * 1000) + 1, zmq.POLLIN):
                if self.sock.recv()[:1] == b"\x01":
                    self._subscribed = True
        return True

    def encode(self, t0: float, dt: float, alpha: Any) -> tuple[bytes, bytes]:
        """The ``(topic, payload)`` of a plan, without sending it (ValueError when invalid)."""
        return encode_plan(self.controller, t0, dt, alpha)

    def send(self, t0: float, dt: float, alpha: Any) -> tuple[bytes, bytes]:
        """Encode and send one plan; returns what was sent.

        ``alpha[i]`` (rad) is the angle planned for source time ``t0 + i * dt``.
        """
        topic, payload = self.encode(t0, dt, alpha)
        self.sock.send_multipart([topic, payload])
        self.sent += 1
        return topic, payload

    def close(self) -> None:
        self.sock.close()
        if self._own_ctx:
            self.ctx.term()

    def __enter__(self) -> "PlanPublisher":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

