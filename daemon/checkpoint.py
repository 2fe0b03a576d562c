"""Checkpoints: the pipeline's whole explicit state, written periodically, for a restart.

A checkpoint is one msgpack map (arrays as the codec's dtype/shape/data maps), written
atomically (a temporary file renamed over the old one, then fsync) beside the log segments of a
run: ``<run dir>/checkpoint.wwstate``. It holds ``{"v": 1, "kind": "checkpoint",
"software_version", "t_sample", "config", "reference_model", "state"}``. ``wingwatch run
--resume RUN_DIR`` loads it, continues the run's log in a new segment, and restores the
pipeline (ingest sequence state, identifier, watchers) so identification carries on from where
it was instead of starting from scratch; only the data after the checkpoint are missing from
its memory, and the first frame after the restart is a gap or a source restart as usual.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import msgpack

from wingwatch.daemon.codec import _from_wire, _to_wire
from wingwatch.daemon.errors import WingwatchError
from wingwatch.daemon.version import __version__

__all__ = ["CHECKPOINT_NAME", "write_checkpoint", "read_checkpoint"]

CHECKPOINT_NAME = "checkpoint.wwstate"


def write_checkpoint(path: str | Path, state: dict[str, Any], *, t_sample: float | None,
                     config: dict[str, Any], reference: dict[str, Any] | None) -> Path:
    """Write the checkpoint atomically; returns its path."""
    p = Path(path)
    body = {"v": 1, "kind": "checkpoint", "software_version": __version__, "t_sample": t_sample,
            "config": config, "reference_model": reference, "state": _to_wire(state)}
    data = msgpack.packb(body, use_bin_type=True)
    tmp = p.with_name(p.name + ".tmp")
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, p)
    return p


def read_checkpoint(path: str | Path) -> dict[str, Any]:
    """Read a checkpoint written by :func:`write_checkpoint` (arrays back as numpy)."""
    p = Path(path)
    if p.is_dir():
        p = p / CHECKPOINT_NAME
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise WingwatchError(f"{p}: no checkpoint to resume from (the daemon writes one every "
                             "recorder.checkpoint_s of data).") from None
    try:
        m = msgpack.unpackb(raw, raw=False, strict_map_key=False)
    except Exception as exc:  # msgpack raises several types on damaged input
        raise WingwatchError(f"{p}: the checkpoint is damaged ({type(exc).__name__}).") from None
    if not isinstance(m, dict) or m.get("kind") != "checkpoint" or m.get("v") != 1:
        raise WingwatchError(f"{p}: not a wingwatch checkpoint (version 1).")
    m["state"] = _from_wire(m["state"])
    return m
