"""Access control: CurveZMQ authentication and encryption for every daemon socket.

CurveZMQ (P. Hintjens, ZeroMQ RFC 26/CURVEZMQ, after D. J. Bernstein's CurveCP) gives each
peer a long-term key pair. The daemon is the CURVE server on all its sockets (it binds);
a client (source, controller, monitor) must know the daemon's public key and hold a key pair
whose public half is in the daemon's allow-list folder. The ZAP handler is pyzmq's
``zmq.auth.thread.ThreadAuthenticator``; a client that is not listed completes no handshake,
so it can neither feed frames nor read anything, and the daemon counts each refused handshake
(socket monitor event ``ZMQ_EVENT_HANDSHAKE_FAILED_AUTH``).

Key files are ZeroMQ's certificate format written by ``zmq.auth.create_certificates``:
``NAME.key`` (public) and ``NAME.key_secret`` (public and secret). ``wingwatch keys`` makes
them.
"""

from __future__ import annotations

import logging
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import parse_monitor_message

from wingwatch.daemon.errors import ConfigError

__all__ = ["SecuritySpec", "ServerCurve", "client_curve_options", "make_keys", "apply_client_keys"]

log = logging.getLogger("wingwatch.security")


@dataclass(frozen=True)
class SecuritySpec:
    curve: bool
    server_key: str
    allowed_clients: str


def _load(path: str | Path, *, secret: bool, what: str) -> tuple[bytes, bytes | None]:
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: {what} not found (make keys with 'wingwatch keys').")
    try:
        public, sec = zmq.auth.load_certificate(p)
    except (ValueError, OSError) as exc:
        raise ConfigError(f"{p}: not a ZeroMQ certificate ({exc}).") from None
    if secret and sec is None:
        raise ConfigError(f"{p}: holds no secret key; give the .key_secret file for {what}.")
    return public, sec


class ServerCurve:
    """The daemon side: authenticator thread, server keys, refused-handshake counter."""

    def __init__(self, ctx: zmq.Context, spec: SecuritySpec) -> None:
        self.public, self.secret = _load(spec.server_key, secret=True, what="the daemon's secret key")
        allowed = Path(spec.allowed_clients)
        if not allowed.is_dir() or not list(allowed.glob("*.key")):
            raise ConfigError(f"{allowed}: the allow-list folder of client public keys (*.key) is "
                              "missing or empty.")
        self.auth = ThreadAuthenticator(ctx)
        self.auth.start()
        self.auth.configure_curve(domain="*", location=str(allowed))
        self.refused = 0
        self._monitors: list[zmq.Socket] = []

    def secure(self, sock: zmq.Socket) -> None:
        """Make ``sock`` a CURVE server (call before bind) and watch it for refusals."""
        sock.setsockopt(zmq.CURVE_SERVER, 1)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        self._monitors.append(sock.get_monitor_socket(zmq.EVENT_HANDSHAKE_FAILED_AUTH
                                                      | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL))

    def poll_refusals(self) -> int:
        """Count refused handshakes reported since the last call (non-blocking)."""
        new = 0
        for m in self._monitors:
            while m.poll(0):
                evt = parse_monitor_message(m.recv_multipart())
                if evt["event"] in (zmq.EVENT_HANDSHAKE_FAILED_AUTH,
                                    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL):
                    new += 1
        if new:
            log.warning("refused %d connection attempt(s) without an allowed key", new)
        self.refused += new
        return new

    def close(self, socks: list[zmq.Socket]) -> None:
        for s in socks:
            try:
                s.disable_monitor()
            except zmq.ZMQError:
                pass
        for m in self._monitors:
            m.close(linger=0)
        self.auth.stop()


def client_curve_options(client_secret: str | Path, server_public: str | Path) -> dict[int, Any]:
    """Socket options that make a client socket a CURVE client of the daemon."""
    pub, sec = _load(client_secret, secret=True, what="the client's secret key")
    server, _ = _load(server_public, secret=False, what="the daemon's public key")
    return {zmq.CURVE_PUBLICKEY: pub, zmq.CURVE_SECRETKEY: sec, zmq.CURVE_SERVERKEY: server}


def apply_client_keys(sock: zmq.Socket, curve: dict[int, Any] | None) -> None:
    """Set client CURVE options on ``sock`` (before connect); None leaves it plain."""
    for opt, value in (curve or {}).items():
        sock.setsockopt(opt, value)


def make_keys(directory: str | Path, clients: list[str], server: str = "daemon") -> dict[str, Any]:
    """Create the daemon's key pair and one per client; list the clients' public keys.

    Layout: ``DIR/NAME.key`` and ``DIR/NAME.key_secret`` for each, and ``DIR/allowed/`` holding a
    copy of every client's public key (the daemon's allow-list). Existing files are never
    overwritten.
    """
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    allowed = d / "allowed"
    allowed.mkdir(exist_ok=True)
    made: dict[str, Any] = {"directory": str(d), "allowed": str(allowed), "keys": {}}
    for name in [server, *clients]:
        if not name or "/" in name or name.startswith("."):
            raise ConfigError(f"key name {name!r} is not a plain file name.")
        if (d / f"{name}.key").exists() or (d / f"{name}.key_secret").exists():
            raise ConfigError(f"{d / (name + '.key')}: a key of that name exists already; "
                              "remove it or choose another name.")
        public, secret = zmq.auth.create_certificates(d, name)
        made["keys"][name] = {"public": public, "secret": secret}
        if name != server:
            shutil.copy(public, allowed / f"{name}.key")
    return made
