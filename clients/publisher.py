"""Frame publisher: send correct sensor frames to a wingwatch daemon from any Python program.

Three lines for a DAQ bridge, a test or the virtual rig::

    from wingwatch.clients.publisher import FramePublisher
    pub = FramePublisher("tcp://127.0.0.1:5601", stream="rig", channels=names, rate_hz=1000.0)
    pub.send(block)          # block: array (samples, channels) in raw engineering units

The publisher connects to the daemon's SUB socket (the daemon binds). It numbers frames from
``start_seq`` and advances the first-sample time by ``n / rate_hz`` per frame, unless the caller
gives ``seq`` or ``t0``. It uses an XPUB socket so that :meth:`wait_ready` can see the daemon's
subscription arrive: frames sent before that would be dropped by ZeroMQ (a PUB socket sends
nothing to a subscriber it has not heard from yet).
"""

from __future__ import annotations

import time
from typing import Any, Sequence

import numpy as np
import zmq

from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame

__all__ = ["FramePublisher", "XpubLink"]


class XpubLink:
    """An XPUB socket to the daemon's sensor endpoint, shared by every publisher helper.

    XPUB rather than PUB so that :meth:`wait_ready` can see the daemon's subscription arrive;
    messages sent before it would be dropped by ZeroMQ.
    """

    def __init__(self, endpoint: str, *, context: zmq.Context | None = None, sndhwm: int = 1000,
                 curve: dict | None = None, bind: bool = False) -> None:
        if sndhwm < 1:
            raise ValueError("sndhwm must be at least 1")
        self.endpoint = endpoint
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sock = self.ctx.socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, 1000)
        self.sock.setsockopt(zmq.SNDHWM, int(sndhwm))
        for opt, value in (curve or {}).items():  # CurveZMQ client keys (see daemon/security.py)
            self.sock.setsockopt(opt, value)
        self._subscribed = False
        if bind:
            self.sock.bind(endpoint)
        else:
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

    def close(self) -> None:
        self.sock.close()
        if self._own_ctx:
            self.ctx.term()


class FramePublisher:
    """Publish sensor frames for one stream.

    Parameters
    ----------
    endpoint : str
        The daemon's sensor endpoint (``endpoints.sensor`` in its configuration).
    stream : str
        Stream name, as declared in the daemon's ``[streams]``.
    channels : sequence of str
        Channel names in column order.
    rate_hz : float
        Sample rate.
    dtype : {"<f8", "<f4"}
        Sample encoding on the wire.
    start_seq, t0 : int, float
        First sequence number and first-sample time (source clock, s).
    bind : bool
        Bind instead of connecting (when the daemon side connects).
    context : zmq.Context, optional
    curve : dict, optional
        CurveZMQ client options from
        :func:`wingwatch.daemon.security.client_curve_options` (daemon with ``security.curve``).
    """

    def __init__(
        self,
        endpoint: str = "tcp://127.0.0.1:5601",
        *,
        stream: str = "rig",
        channels: Sequence[str],
        rate_hz: float,
        dtype: str = "<f8",
        start_seq: int = 0,
        t0: float = 0.0,
        flags: int = 0,
        bind: bool = False,
        context: zmq.Context | None = None,
        sndhwm: int = 100_000,
        curve: dict | None = None,
    ) -> None:
        if rate_hz <= 0:
            raise ValueError("rate_hz must be positive")
        if dtype not in ("<f8", "<f4"):
            raise ValueError("dtype must be '<f8' or '<f4'")
        self.endpoint = endpoint
        self.stream = stream
        self.channels = tuple(channels)
        self.rate_hz = float(rate_hz)
        self.dtype = dtype
        self.flags = int(flags)
        self.seq = int(start_seq)
        self.t0 = float(t0)
        self.sent = 0
        self.link = XpubLink(endpoint, context=context, sndhwm=sndhwm, curve=curve, bind=bind)
        self.sock = self.link.sock
        self.ctx = self.link.ctx

    def wait_ready(self, timeout_s: float = 5.0) -> bool:
        """Wait until the daemon has subscribed (True), or ``timeout_s`` passes (False)."""
        return self.link.wait_ready(timeout_s)

    def frame(self, samples: Any, *, t0: float | None = None, seq: int | None = None,
              flags: int | None = None) -> SensorFrame:
        """Build (without sending) the next frame, advancing the sequence and clock."""
        block = np.asarray(samples, dtype=np.float64)
        if block.ndim != 2 or block.shape[1] != len(self.channels):
            raise ValueError(f"samples must have shape (n, {len(self.channels)}), got {block.shape}")
        f = SensorFrame(
            stream=self.stream,
            seq=self.seq if seq is None else int(seq),
            t0=self.t0 if t0 is None else float(t0),
            rate=self.rate_hz,
            channels=self.channels,
            samples=block,
            flags=self.flags if flags is None else int(flags),
            dtype=self.dtype,
        )
        self.seq = f.seq + 1
        self.t0 = f.t0 + block.shape[0] / self.rate_hz
        return f

    def send(self, samples: Any, *, t0: float | None = None, seq: int | None = None,
             flags: int | None = None) -> SensorFrame:
        """Encode and send one block; returns the frame sent."""
        f = self.frame(samples, t0=t0, seq=seq, flags=flags)
        self.send_raw(*encode_sensor_frame(f))
        return f

    def send_raw(self, topic: bytes, payload: bytes) -> None:
        """Send an already encoded message (tests use it to send bad frames)."""
        self.sock.send_multipart([topic, payload])
        self.sent += 1

    def close(self) -> None:
        self.link.close()

    def __enter__(self) -> "FramePublisher":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()
