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

from typing import Any

import zmq

from wingwatch.clients.publisher import XpubLink
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
        self.endpoint = endpoint
        self.controller = controller
        self.sent = 0
        self.link = XpubLink(endpoint, context=context, sndhwm=sndhwm, curve=curve)
        self.sock = self.link.sock
        self.ctx = self.link.ctx

    def wait_ready(self, timeout_s: float = 5.0) -> bool:
        """Wait until the daemon has subscribed (True), or ``timeout_s`` passes (False)."""
        return self.link.wait_ready(timeout_s)

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
        self.link.close()

    def __enter__(self) -> "PlanPublisher":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

