"""Summarise a replay log (``wingwatch inspect``).

The inbound records are run through a fresh :class:`~wingwatch.daemon.ingest.Ingest` built from
the configuration in the log's own header, so the counts are exactly what the live daemon
counted (same code, same bytes). Damage (corrupt records, a truncated tail) is reported with
byte offsets; the summary never stops at the first bad byte.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any, Callable

from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.config import config_from_recorded, load_config
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.ingest import BurstLog, Ingest

__all__ = ["summarise_log"]


def summarise_log(path: str | Path, progress: Callable[[int, int], None] | None = None
                  ) -> dict[str, Any]:
    """A JSON-ready summary of the log at ``path`` (a segment file or a run directory).

    ``progress(done_bytes, total_bytes)`` is called now and then for long logs.
    """
    reader = rl.LogReader.open(path)
    header = reader.header
    config_note = ""
    try:
        config = config_from_recorded(header["config"], source=f"{path} (header)")
    except (KeyError, TypeError, ConfigError) as exc:
        config = load_config()
        config_note = f"header configuration unusable ({exc}); counted with the built-in default"
    quiet = logging.getLogger("wingwatch.inspect.quiet")
    quiet.disabled = True
    ingest = Ingest(config, burst_log=BurstLog(1, quiet))

    total = sum(p.stat().st_size for p in reader.paths)
    by_kind: dict[str, int] = {}
    streams: dict[str, dict[str, Any]] = {}
    t_first = t_last = None
    stored_rejected = 0
    mismatched = 0
    for i, rec in enumerate(reader):
        by_kind[rec.kind_name] = by_kind.get(rec.kind_name, 0) + 1
        if progress is not None and i % 5000 == 0:
            progress(rec.offset, total)
        if rec.kind not in (rl.KIND_INBOUND, rl.KIND_REJECTED):
            continue
        parts_ok = not (rec.kind == rl.KIND_REJECTED and rec.flags & 1)
        verdict = ingest.update(rec.topic, rec.payload, parts_ok=parts_ok)
        if rec.kind == rl.KIND_REJECTED:
            stored_rejected += 1
        if verdict.accepted != (rec.kind == rl.KIND_INBOUND):
            mismatched += 1
        f = verdict.frame
        if f is None:
            continue
        s = streams.setdefault(f.stream, {"frames": 0, "samples": 0, "rate_hz": f.rate,
                                          "channels": list(f.channels)})
        s["frames"] += 1
        s["samples"] += f.n_samples
        t_first = f.t0 if t_first is None else min(t_first, f.t0)
        t_last = f.t_end if t_last is None else max(t_last, f.t_end)
    if progress is not None:
        progress(total, total)

    c = ingest.counters
    channels: list[str] = []
    for s in streams.values():
        channels.extend(ch for ch in s["channels"] if ch not in channels)
    return {
        "path": str(path),
        "segments": [str(p) for p in reader.paths],
        "run_id": header.get("run_id"),
        "software_version": header.get("software_version"),
        "source": header.get("source"),
        "created_utc": header.get("created_utc"),
        "duration_s": (t_last - t_first) if t_first is not None else 0.0,
        "t_start": t_first,
        "t_end": t_last,
        "frames": c["frames"],
        "accepted": c["accepted"],
        "samples": c["samples"],
        "streams": sorted(streams),
        "stream_details": streams,
        "channels": channels,
        "gaps": c["gaps"],
        "missing_frames": c["missing_frames"],
        "duplicates": c["duplicates"],
        "out_of_order": c["out_of_order"],
        "restarts": c["restarts"],
        "rejected": c["rejected"],
        "rejected_by_reason": dict(ingest.rejected_by_reason),
        "verdicts_differ_from_recorded": mismatched,
        "records_by_kind": by_kind,
        "truncated_tail": reader.truncated_tail,
        "corrupt_frames": len(reader.corrupt),
        "damage": [
            {"kind": d.kind, "segment": d.segment, "offset": d.offset, "length": d.length,
             "reason": d.reason}
            for d in reader.damage
        ],
        "note": config_note,
    }
