"""Soak: many hours of 1 kHz data through a Session with its recorder, in accelerated time.

No sockets: synthetic frames go straight into ``pipeline.Session.inbound`` as fast as the
machine allows, with a ``LogWriter`` recording into a temporary folder (64 MiB segments; closed
segments are deleted as the run goes, unless ``--keep-log``, so 24 h of data does not fill the
disk). Frames are the nominal 10 ms blocks of 5 channels; their samples come from a pool of 64
precomputed blocks (sinusoid plus seeded noise) so that generating them costs little, and the
sequence number and start time advance as a real source's would. Faults are mixed in: one
garbage message every 10,000 and a two-frame gap every 50,000 frames. A status heartbeat is
built every 100 frames (1 s of source time).

Reported: resident memory (/proc/self/status VmRSS) at checkpoints and its growth after the
warm-up (the first tenth of the run, at most one hour of data; target under 5 %), open file
descriptors (/proc/self/fd) and sockets among them before and after, and the record accounting
(written + dropped = appended). Stops by itself; ``--hours`` sets the amount of data.

    python benchmarks/soak.py [--hours 24] [--identify] [--keep-log]

``--identify`` also runs the daemon's identification stages (``service.make_pipeline``) when
this version has them.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import msgpack  # noqa: E402
import numpy as np  # noqa: E402

from wingwatch.daemon.config import load_config  # noqa: E402
from wingwatch.daemon.pipeline import Pipeline, Session  # noqa: E402
from wingwatch.daemon.service import make_recorder  # noqa: E402

CH = ["pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid"]
FRAME = 10  # samples per frame (10 ms at 1 kHz)
RATE = 1000.0


def rss_bytes() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


def fd_counts() -> tuple[int, int]:
    """(open file descriptors, of which sockets)."""
    fds = socks = 0
    for name in os.listdir("/proc/self/fd"):
        fds += 1
        try:
            if os.readlink(f"/proc/self/fd/{name}").startswith("socket:"):
                socks += 1
        except OSError:
            pass
    return fds, socks


def _pool(n: int = 64) -> list[bytes]:
    t = np.arange(FRAME) / RATE
    out = []
    for i in range(n):
        rng = np.random.default_rng(i)
        alpha = 3.0 + 2.0 * np.sin(2 * np.pi * 0.5 * (t + i * FRAME / RATE))
        blk = np.column_stack([alpha, 0.4 + 0.1 * alpha, 45.0 + 0.0 * t, 300.0 + 20 * alpha,
                               100.0 + 5 * alpha]) + rng.normal(scale=0.01, size=(FRAME, 5))
        out.append(np.ascontiguousarray(blk, "<f8").tobytes())
    return out


def soak(hours: float, folder: Path, *, identify: bool = False, keep_log: bool = False,
         checkpoints: int = 20) -> dict[str, Any]:
    cfg = load_config()
    pipeline = None
    if identify:
        from wingwatch.daemon import service

        if hasattr(service, "make_pipeline"):
            pipeline = service.make_pipeline(cfg)
    if pipeline is None:
        pipeline = Pipeline(cfg)
    fds0, socks0 = fd_counts()
    writer = make_recorder(cfg, directory=folder, source="replay")
    writer.rotate_bytes = 64 << 20
    session = Session(pipeline, recorder=writer)
    pool = _pool()
    n_frames = int(round(hours * 3600 * RATE / FRAME))
    every = max(1, n_frames // checkpoints)
    warm_frames = min(n_frames // 10, int(3600 * RATE / FRAME))
    topic = b"sensor.rig"
    base = {"v": 1, "stream": "rig", "seq": 0, "t0": 0.0, "rate": RATE, "channels": CH,
            "dtype": "<f8", "n": FRAME, "data": b""}
    seq = 0
    sent = garbage = 0
    points: list[dict[str, Any]] = []
    rss_warm = None
    t0_wall = time.monotonic()
    deleted = 0
    for k in range(n_frames):
        if k and k % 50_000 == 0:
            seq += 2  # a two-frame gap
        base["seq"] = seq
        base["t0"] = seq * FRAME / RATE
        base["data"] = pool[seq % len(pool)]
        now = base["t0"]
        session.inbound([topic, msgpack.packb(base, use_bin_type=True)], now)
        sent += 1
        seq += 1
        if k % 10_000 == 5_000:
            session.inbound([topic, b"\xc1garbage"], now)
            garbage += 1
        if k % 100 == 99:
            session.status(now)
        if not keep_log and len(writer.paths) > 1:
            for p in writer.paths[:-1]:
                if p.exists():
                    p.unlink()
                    deleted += 1
        if k == warm_frames:
            rss_warm = rss_bytes()
        if k % every == 0 or k == n_frames - 1:
            fds, socks = fd_counts()
            points.append({"hours_of_data": round((k + 1) * FRAME / RATE / 3600, 4),
                           "rss_mib": round(rss_bytes() / (1 << 20), 2), "fds": fds,
                           "sockets": socks, "wall_s": round(time.monotonic() - t0_wall, 1)})
    rss_end = rss_bytes()
    writer.close()
    fds1, socks1 = fd_counts()
    c = session.pipeline.ingest.counters
    st = writer.stats()
    appended = c["frames"] + session.outputs_sent
    return {
        "hours_of_data": hours,
        "frames": sent,
        "garbage_messages": garbage,
        "wall_s": round(time.monotonic() - t0_wall, 1),
        "speed_x_real_time": round(hours * 3600 / max(1e-9, time.monotonic() - t0_wall), 1),
        "pipeline_stages": [type(s).__name__ for s in session.pipeline.stages],
        "accepted": c["accepted"], "rejected": c["rejected"], "gaps": c["gaps"],
        "missing_frames": c["missing_frames"],
        "rss_warm_mib": round((rss_warm or rss_end) / (1 << 20), 2),
        "rss_end_mib": round(rss_end / (1 << 20), 2),
        "rss_growth_after_warmup": (rss_end - (rss_warm or rss_end)) / (rss_warm or rss_end),
        "fds_before": fds0, "fds_after": fds1, "sockets_before": socks0, "sockets_after": socks1,
        "records_written": st.records, "records_dropped": st.dropped_records,
        "records_appended": appended,
        "records_add_up": st.records + st.dropped_records + st.backlog_records == appended,
        "segments": st.segments, "segments_deleted": deleted,
        "checkpoints": points,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=24.0, help="hours of 1 kHz data (default 24)")
    ap.add_argument("--identify", action="store_true", help="also run the identification stages")
    ap.add_argument("--keep-log", action="store_true", help="keep every segment (needs disk)")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.ERROR)  # the injected garbage would log a line per burst
    with tempfile.TemporaryDirectory(prefix="ww-soak-") as tmp:
        r = soak(args.hours, Path(tmp), identify=args.identify, keep_log=args.keep_log)
    print(f"soak: {r['hours_of_data']:g} h of 1 kHz data in {r['wall_s']} s "
          f"({r['speed_x_real_time']}x real time), stages {r['pipeline_stages'] or 'none'}")
    print(f"  {'hours':>8} {'RSS MiB':>9} {'fds':>5} {'sockets':>8} {'wall s':>8}")
    for p in r["checkpoints"]:
        print(f"  {p['hours_of_data']:>8.3f} {p['rss_mib']:>9.2f} {p['fds']:>5} {p['sockets']:>8} "
              f"{p['wall_s']:>8.1f}")
    print(f"  frames {r['frames']} (accepted {r['accepted']}, rejected {r['rejected']}, "
          f"gaps {r['gaps']})")
    print(f"  RSS after warm-up {r['rss_warm_mib']} MiB, at the end {r['rss_end_mib']} MiB: growth "
          f"{100 * r['rss_growth_after_warmup']:.2f} % (target under 5 %)")
    print(f"  fds before/after {r['fds_before']}/{r['fds_after']}, sockets "
          f"{r['sockets_before']}/{r['sockets_after']}")
    print(f"  records written {r['records_written']} + dropped {r['records_dropped']} = appended "
          f"{r['records_appended']}: {r['records_add_up']}")
    res = Path(__file__).resolve().parent / "results"
    res.mkdir(exist_ok=True)
    (res / "soak.json").write_text(json.dumps(r, indent=2) + "\n")
    ok = r["records_add_up"] and r["rss_growth_after_warmup"] < 0.05 and r["fds_after"] <= r["fds_before"]
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
