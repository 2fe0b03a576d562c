"""Resident memory over a long run of the full pipeline (bounded memory, DEVELOPERS.md).

A 60 s random-pitch rig log at 1 kHz is looped with advancing sequence numbers and start times,
so that the pipeline (``make_pipeline`` with the calibrated reference: ingest, channel map,
identifier and whatever watch stages this version has) sees one continuous run. Frames are
re-encoded as they go and fed to a :class:`~wingwatch.daemon.pipeline.Session` without a
recorder (``benchmarks/soak.py`` covers the recorder). The resident set (``VmRSS`` of
/proc/self/status) is read every minute of source time.

Reported: RSS after the warm-up (the first 10 minutes of data; 30 s in --quick), at the end,
the peak, and the growth after warm-up in %. The full run asks for 2 hours of data but stops at
a wall-time budget (the pipeline's speed decides how much data that is; the table says).

Run:  python benchmarks/bench_memory.py [--quick]     (or python -m benchmarks --only memory)
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import gc  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import raw_frames, reference_at_rate, rig_log, rss_kib, table, target  # noqa: E402
from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame  # noqa: E402
from wingwatch.daemon.pipeline import Session  # noqa: E402
from wingwatch.daemon.replay import config_of_log  # noqa: E402
from wingwatch.daemon.service import make_pipeline  # noqa: E402

__all__ = ["run", "main", "looped_frames"]


def looped_frames(blocks, channels, rate, total_s: float):
    """(topic, payload, t) of the log's blocks looped into one continuous run of ``total_s``."""
    t0, seq = 0.0, 0
    while t0 < total_s:
        for b in blocks:
            if t0 >= total_s:
                return
            f = SensorFrame(stream="rig", seq=seq, t0=t0, rate=rate, channels=channels, samples=b)
            topic, payload = encode_sensor_frame(f)
            yield topic, payload, t0
            seq += 1
            t0 = seq * b.shape[0] / rate  # no drift: the time follows the sequence number


def run(quick: bool = False) -> dict:
    import scipy.stats  # noqa: F401  -- lazily imported by the first model message; not growth

    hours = 2.0 / 60.0 if quick else 2.0
    wall_budget = 15.0 if quick else 480.0
    warm_s = 30.0 if quick else 600.0
    step_s = 10.0 if quick else 60.0
    path = rig_log("random-pitch", 1000.0, 60.0)
    channels, rate, blocks = raw_frames(path)
    cfg = config_of_log(path)
    session = Session(make_pipeline(cfg, reference_at_rate(rate)), recorder=None, sink=None)
    gc.collect()
    rss_start = rss_kib()
    points = [(0.0, rss_start)]
    rss_warm = None
    start = time.perf_counter()
    next_mark = step_s
    covered = 0.0
    stopped_by_budget = False
    for topic, payload, t in looped_frames(blocks, channels, rate, hours * 3600.0):
        session.inbound([topic, payload], t)
        covered = t
        if t >= next_mark:
            next_mark += step_s
            rss = rss_kib()
            points.append((t, rss))
            if rss_warm is None and t >= warm_s:
                rss_warm = rss
            if time.perf_counter() - start > wall_budget:
                stopped_by_budget = True
                break
    wall = time.perf_counter() - start
    gc.collect()
    rss_end = rss_kib()
    points.append((covered, rss_end))
    if rss_warm is None:  # shorter than the warm-up: compare with the first reading after start
        rss_warm = points[1][1] if len(points) > 2 else rss_start
    peak = max(r for _, r in points)
    growth = 100.0 * (rss_end - rss_warm) / rss_warm
    counters = session.pipeline.ingest.snapshot()
    rows = [["full pipeline, looped 1 kHz rig log", covered / 3600.0, hours, wall, counters["samples"],
             rss_start / 1024, rss_warm / 1024, rss_end / 1024, peak / 1024, growth]]
    every = max(1, len(points) // 12)
    series = [[t / 60.0, r / 1024] for t, r in points[::every]] + [[covered / 60.0, rss_end / 1024]]
    summary = {"rss_warm_mib": rss_warm / 1024, "rss_end_mib": rss_end / 1024,
               "rss_peak_mib": peak / 1024, "rss_growth_pct": growth,
               "hours_covered": covered / 3600.0, "stopped_by_wall_budget": stopped_by_budget,
               "gaps": counters["gaps"], "accepted": counters["accepted"]}
    tables = [
        table("resident memory (VmRSS) over one continuous run",
              ["case", "hours of data", "hours asked", "wall s", "samples", "RSS start MiB",
               "RSS after warm-up MiB", "RSS end MiB", "RSS peak MiB", "growth after warm-up %"],
              rows),
        table("RSS against source time", ["source min", "RSS MiB"], series),
    ]
    notes = [f"warm-up: the first {warm_s / 60:g} min of data; wall budget {wall_budget:g} s "
             + ("(reached: fewer hours than asked)" if stopped_by_budget else "(not reached)"),
             f"{counters['gaps']} gaps and {counters['rejected']} rejections seen: the loop is one "
             "continuous stream."]
    return {"name": "memory", "title": "resident memory over a long run", "tables": tables,
            "summary": summary, "notes": notes,
            "targets": [target("RSS growth after warm-up, % (soak.py target)", growth, 5.0, higher_is_better=False)]}


def main(argv: list[str] | None = None) -> int:
    from benchmarks.run import main as run_main

    return run_main(["--only", "memory", *(argv if argv is not None else sys.argv[1:])])


if __name__ == "__main__":
    raise SystemExit(main())
