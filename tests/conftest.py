"""Shared fixtures: hermetic configurations on random loopback ports, receive helpers."""

from __future__ import annotations

import socket
import time
from pathlib import Path

import pytest
import zmq

from wingwatch.daemon.config import load_config


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def write_config(tmp_path: Path, extra: str = "") -> Path:
    """A user configuration on fresh loopback ports, recording under tmp_path."""
    ports = [free_port() for _ in range(3)]
    text = f"""
[endpoints]
sensor = "tcp://127.0.0.1:{ports[0]}"
publish = "tcp://127.0.0.1:{ports[1]}"
snapshot = "tcp://127.0.0.1:{ports[2]}"

[status]
period_s = 0.2

[recorder]
directory = "{(tmp_path / 'logs').as_posix()}"
fsync_interval_s = 0.0
{extra}
"""
    p = tmp_path / "test.toml"
    p.write_text(text)
    return p


@pytest.fixture
def cfg_path(tmp_path: Path) -> Path:
    return write_config(tmp_path)


@pytest.fixture
def cfg(cfg_path: Path):
    return load_config(cfg_path)


@pytest.fixture
def zctx():
    ctx = zmq.Context()
    yield ctx
    ctx.destroy(linger=0)


def recv_until(sock: zmq.Socket, pred, timeout_s: float = 5.0):
    """Receive multipart messages until ``pred(parts)`` is true; fail (not hang) on timeout."""
    deadline = time.monotonic() + timeout_s
    while True:
        left = deadline - time.monotonic()
        if left <= 0:
            raise AssertionError("timed out waiting for a message")
        if sock.poll(int(left * 1000) + 1):
            parts = sock.recv_multipart()
            if pred(parts):
                return parts
