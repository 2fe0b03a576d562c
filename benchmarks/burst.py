"""Burst load: frames at 10x the nominal rate into a loopback daemon, then catch-up.

Nominal: a 1 kHz stream in 10 ms frames (100 frames/s). The burst sends 1000 frames/s (each
still carrying 10 ms of samples, so source time runs 10x faster than the wall clock) for
``--seconds`` (10 by default) into a live daemon on loopback that records to a temporary
folder. Reported: resident memory before, at the end of the burst and after catch-up; the
backlog (frames sent but not yet counted by the daemon, read from the status heartbeats); the
heartbeats' ``lag_s``; the wall time from the last frame sent to the daemon having counted all;
and whether every sequence number sent is in the log. Prints a table and writes
``benchmarks/results/burst.json``.

The daemon runs in this process (a thread), so the memory figures are the daemon's plus the
sender's. ``tests/test_hardening_load.py`` runs a 2 s version of the same function.

    python benchmarks/burst.py [--seconds 10] [--rate 1000]
"""

from __future__ import annotations

import argparse
import bisect
import json
import os
import resource
import socket
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import msgpack  # noqa: E402
import numpy as np  # noqa: E402
import zmq  # noqa: E402

from wingwatch.clients.publisher import FramePublisher  # noqa: E402
from wingwatch.daemon import replaylog as rl  # noqa: E402
from wingwatch.daemon.codec import decode_message  # noqa: E402
from wingwatch.daemon.config import load_config  # noqa: E402
from wingwatch.daemon.service import Daemon  # noqa: E402

CH = ("pitch_enc", "balance_lift", "q_pitot", "strain_root", "strain_mid")


def rss_bytes() -> int:
    """Resident set size now (Linux /proc; falls back to the peak from getrusage)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def write_burst_config(folder: Path) -> Path:
    p = folder / "burst.toml"
    ports = [_port() for _ in range(3)]
    p.write_text(f"""
[endpoints]
sensor = "tcp://127.0.0.1:{ports[0]}"
publish = "tcp://127.0.0.1:{ports[1]}"
snapshot = "tcp://127.0.0.1:{ports[2]}"

[status]
period_s = 0.2

[recorder]
directory = "{(folder / 'logs').as_posix()}"
fsync_interval_s = 1.0
""")
    return p


def burst(folder: Path, seconds: float = 10.0, frames_per_s: float = 1000.0,
          frame_samples: int = 10, catch_up_timeout_s: float = 120.0) -> dict[str, Any]:
    """Run one burst; return the measurements (see the module docstring)."""
    cfg = load_config(write_burst_config(folder))
    ctx = zmq.Context()
    d = Daemon(cfg, context=ctx)
    th = threading.Thread(target=d.run, kwargs={"duration_s": seconds + catch_up_timeout_s + 30},
                          daemon=True)
    th.start()
    watch = ctx.socket(zmq.SUB)
    watch.setsockopt(zmq.LINGER, 0)
    watch.setsockopt(zmq.SUBSCRIBE, b"ww.status")
    watch.connect(cfg.endpoints.publish)
    statuses: list[dict[str, Any]] = []
    stop_watch = threading.Event()

    def follow() -> None:
        while not stop_watch.is_set():
            if watch.poll(50):
                statuses.append(decode_message(watch.recv_multipart()[1]))

    wt = threading.Thread(target=follow, daemon=True)
    pub = FramePublisher(cfg.endpoints.sensor, channels=CH, rate_hz=1000.0, context=ctx,
                         sndhwm=10_000_000)
    blocks = [np.random.default_rng(i).normal(size=(frame_samples, 5)) + [2.0, 1.0, 45.0, 300.0, 100.0]
              for i in range(32)]
    out: dict[str, Any] = {"seconds": seconds, "frames_per_s": frames_per_s,
                           "frame_samples": frame_samples}
    try:
        if not pub.wait_ready(10):
            raise RuntimeError("the daemon did not subscribe")
        wt.start()
        # warm-up at the nominal rate (100 frames/s for 2 s): lazy imports and first-use
        # allocations of the stages happen here, not inside the burst figures
        warm = 200
        for i in range(warm):
            pub.send(blocks[i % len(blocks)])
            time.sleep(0.01)
        warm_deadline = time.monotonic() + 30
        while d.session.pipeline.ingest.counters["frames"] < warm and time.monotonic() < warm_deadline:
            time.sleep(0.01)
        time.sleep(0.5)  # a heartbeat or two before the burst
        out["rss_before"] = rss_bytes()
        out["warmup_frames"] = warm
        n_total = int(round(seconds * frames_per_s))
        seq0 = pub.seq
        tick = 0.01
        per_tick = frames_per_s * tick
        timeline: list[tuple[float, int]] = []
        t_start = time.monotonic()
        wall0 = time.time()
        sent = 0
        while sent < n_total:
            due = min(n_total, int((time.monotonic() - t_start) / tick * per_tick) + int(per_tick))
            while sent < due:
                pub.send(blocks[sent % len(blocks)])
                sent += 1
            timeline.append((wall0 + (time.monotonic() - t_start), sent))
            next_t = t_start + (len(timeline)) * tick
            delay = next_t - time.monotonic()
            if delay > 0:
                time.sleep(delay)
        t_sent = time.monotonic()
        out["send_wall_s"] = t_sent - t_start
        out["rss_end_of_burst"] = rss_bytes()
        deadline = t_sent + catch_up_timeout_s
        while time.monotonic() < deadline:
            if d.session.pipeline.ingest.counters["frames"] >= warm + n_total:
                break
            time.sleep(0.01)
        out["catch_up_s"] = time.monotonic() - t_sent
        time.sleep(0.5)  # heartbeats after the catch-up
        out["rss_after"] = rss_bytes()
        out["sent"] = n_total
    finally:
        d.stop()
        th.join(30)
        stop_watch.set()
        if wt.is_alive():
            wt.join(5)
        pub.close()
        watch.close(linger=0)
        d.close()
        ctx.term()
    c = d.session.pipeline.ingest.counters
    out["accepted"] = c["accepted"] - warm
    out["rejected"] = c["rejected"]
    out["rss_peak"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    times = [t for t, _ in timeline]
    backlog = []
    lags = []
    for m in statuses:
        i = bisect.bisect_right(times, m["t_wall"]) - 1
        sent_then = timeline[i][1] if i >= 0 else 0
        backlog.append(max(0, sent_then - (m["counters"]["frames"] - warm)) if i >= 0 else 0)
        lags.append(m["lag_s"])
    out["heartbeats"] = len(statuses)
    out["max_backlog_frames"] = max(backlog) if backlog else None
    out["max_lag_s"] = max(lags) if lags else None
    out["lag_s_all_finite_nonnegative"] = all(np.isfinite(x) and x >= 0 for x in lags)
    recorded = [msgpack.unpackb(r.payload, raw=False)["seq"]
                for r in rl.LogReader.open(d.log_path) if r.kind == rl.KIND_INBOUND]
    out["recorded_inbound"] = len(recorded)
    out["log_has_every_seq"] = recorded == list(range(seq0 + out["sent"]))
    out["log"] = str(d.log_path)
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--rate", type=float, default=1000.0, help="frames per second (nominal 100)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="ww-burst-") as tmp:
        r = burst(Path(tmp), args.seconds, args.rate)
    mib = 1 << 20
    rows = [
        ("burst frames sent / accepted", f"{r['sent']} / {r['accepted']}"),
        ("frames in the log (with the warm-up)", str(r["recorded_inbound"])),
        ("every sequence number in the log", str(r["log_has_every_seq"])),
        ("sending took (s)", f"{r['send_wall_s']:.2f}"),
        ("catch-up after the last frame (s)", f"{r['catch_up_s']:.2f}"),
        ("largest backlog seen in a heartbeat (frames)", str(r["max_backlog_frames"])),
        ("largest lag_s in a heartbeat", f"{r['max_lag_s']:.3f}" if r["max_lag_s"] is not None else "-"),
        ("RSS before / end of burst / after (MiB)",
         f"{r['rss_before'] / mib:.1f} / {r['rss_end_of_burst'] / mib:.1f} / {r['rss_after'] / mib:.1f}"),
        ("RSS growth after / before", f"{r['rss_after'] / r['rss_before']:.3f}"),
        ("peak RSS (MiB)", f"{r['rss_peak'] / mib:.1f}"),
    ]
    w = max(len(a) for a, _ in rows)
    print(f"burst: {args.rate:g} frames/s of {r['frame_samples']} samples for {args.seconds:g} s")
    for a, b in rows:
        print(f"  {a:<{w}}  {b}")
    res = Path(__file__).resolve().parent / "results"
    res.mkdir(exist_ok=True)
    (res / "burst.json").write_text(json.dumps(r, indent=2, default=str) + "\n")
    return 0 if r["log_has_every_seq"] and r["accepted"] == r["sent"] else 1


if __name__ == "__main__":
    sys.exit(main())
