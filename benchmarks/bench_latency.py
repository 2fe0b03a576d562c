"""Live latency over loopback, and the highest sample rate the live daemon sustains.

The daemon runs as its own process (``wingwatch run``, recording into a temporary folder, the
full pipeline with the calibrated reference model), so that the sender and the daemon do not
share an interpreter. This process sends the rig's frames in real time with
:class:`wingwatch.clients.publisher.FramePublisher` (10 ms frames; raw samples from a
random-pitch rig log, linearly interpolated to the rate under test) and subscribes to the
daemon's outputs. Nothing is added to the daemon:

- **Latency**: besides the rig stream the configuration declares a one-channel ``probe``
  stream. Every 100 ms one probe frame is sent whose sequence number skips one, a deliberate
  gap that the ingest stage answers with a ``ww.event`` (``gap``). The latency is the time from
  just before the send to the arrival of that event; the probe frames queue behind the rig
  frames and wait for whatever the pipeline is doing (a slow-layer update included), so the
  figure is what an operator would see. p50, p99 and max after a warm-up.
- **Sustained rate**: one fresh daemon per rate (1, 2, 5, 10, 20 kHz), frames of 10 ms, lag
  read from the ``ww.status`` heartbeat (``lag_s``: wall time elapsed minus source time
  covered). The rate is sustained when the lag over the second half of the step grows by less
  than 0.05 s per second and ends below 1 s. The lag is not bounded when it keeps growing.

Run:  python benchmarks/bench_latency.py [--quick]    (or python -m benchmarks --only latency)
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import json  # noqa: E402
import shutil  # noqa: E402
import signal  # noqa: E402
import socket  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402
import zmq  # noqa: E402

from benchmarks import (REPO, raw_frames, reference_at_rate, resample_raw, rig_log, table,  # noqa: E402
                        target)
from wingwatch.clients.publisher import FramePublisher  # noqa: E402
from wingwatch.daemon.codec import decode_message  # noqa: E402
from wingwatch.daemon.modelfile import save_model  # noqa: E402

__all__ = ["run", "main", "LiveDaemon"]

FRAME_S = 0.01  # 10 ms frames
PROBE_RATE = 20.0  # Hz, one sample per frame: a probe frame covers 50 ms of source time
PROBE_EVERY_S = 0.1


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LiveDaemon:
    """A ``wingwatch run`` subprocess on fresh loopback ports (stopped with SIGINT, by pid)."""

    def __init__(self, rate_hz: float, channels: tuple[str, ...], *, probe: bool,
                 max_wall_s: float) -> None:
        self.dir = Path(tempfile.mkdtemp(prefix="wingwatch-bench-live-"))
        model = save_model(reference_at_rate(rate_hz), self.dir / "reference.wwmodel.json")
        ports = [_free_port() for _ in range(3)]
        self.sensor, self.publish = (f"tcp://127.0.0.1:{ports[0]}", f"tcp://127.0.0.1:{ports[1]}")
        streams = f'[streams.rig]\nrate_hz = {rate_hz!r}\nchannels = {json.dumps(list(channels))}\n'
        if probe:
            streams += f'[streams.probe]\nrate_hz = {PROBE_RATE!r}\nchannels = ["probe_value"]\n'
        text = (
            f'[endpoints]\nsensor = "{self.sensor}"\npublish = "{self.publish}"\n'
            f'snapshot = "tcp://127.0.0.1:{ports[2]}"\n'
            f'[status]\nperiod_s = 0.2\n'
            f'[limits]\nmax_frame_samples = {max(10000, int(rate_hz * FRAME_S))}\n'
            f'{streams}'
            f'[recorder]\ndirectory = "{(self.dir / "logs").as_posix()}"\n'
            f'[identify]\nreference_model = "{Path(model).as_posix()}"\n'
            f'decimate = {int(round(20 * rate_hz / 1000.0))}\n'
        )
        self.config = self.dir / "bench.toml"
        self.config.write_text(text)
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
        self.proc = subprocess.Popen(
            [sys.executable, "-c", "import sys; from wingwatch.daemon.cli import main; "
             "sys.exit(main(sys.argv[1:]))", "run", "--config", str(self.config),
             "--duration", f"{max_wall_s:.0f}"],
            cwd=str(REPO), env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)

    def stop(self) -> str:
        err = ""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
        try:
            _, err_b = self.proc.communicate(timeout=15)
            err = (err_b or b"").decode(errors="replace")
        except (subprocess.TimeoutExpired, ValueError):
            self.proc.kill()
            self.proc.communicate(timeout=5)
        shutil.rmtree(self.dir, ignore_errors=True)
        return err[-2000:]


def _source_samples(rate_hz: float) -> tuple[tuple[str, ...], np.ndarray]:
    channels, rate, blocks = raw_frames(rig_log("random-pitch", 1000.0, 60.0))
    raw = np.concatenate(blocks)
    return channels, (raw if rate_hz == rate else resample_raw(raw, rate, rate_hz))


def _session(rate_hz: float, seconds: float, *, probe: bool, warmup_s: float) -> dict:
    """Run one live session; returns latencies (s, after warm-up) and status samples."""
    channels, raw = _source_samples(rate_hz)
    per = int(round(rate_hz * FRAME_S))
    n_blocks = raw.shape[0] // per
    d = LiveDaemon(rate_hz, channels, probe=probe, max_wall_s=seconds + warmup_s + 60)
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.RCVHWM, 100_000)
    for t in (b"ww.event", b"ww.status"):
        sub.setsockopt(zmq.SUBSCRIBE, t)
    sub.connect(d.publish)
    pub = FramePublisher(d.sensor, stream="rig", channels=channels, rate_hz=rate_hz, context=ctx)
    probe_pub = (FramePublisher(d.sensor, stream="probe", channels=["probe_value"],
                                rate_hz=PROBE_RATE, context=ctx) if probe else None)
    sent_at: dict[int, float] = {}
    latencies: list[float] = []
    status: list[tuple[float, float, int]] = []  # (wall since start, lag_s, samples)
    counters: dict = {}
    err = ""
    try:
        deadline = time.monotonic() + 60.0  # daemon start-up: imports, model file, sockets
        ready = pub.wait_ready(30.0) and (probe_pub is None or probe_pub.wait_ready(30.0))
        got_status = False
        while ready and not got_status and time.monotonic() < deadline:
            if sub.poll(200):
                got_status = sub.recv_multipart()[0] == b"ww.status"
        if not (ready and got_status):
            raise RuntimeError(f"the daemon did not come up (exit {d.proc.poll()}): {d.stop()}")
        total = warmup_s + seconds
        start = time.perf_counter()
        k = 0
        next_probe = 0.0
        probe_k = 0
        sent_samples = 0
        while True:
            now = time.perf_counter() - start
            if now >= total:
                break
            while k * FRAME_S <= now:  # catch up if the sender was delayed (never skip)
                i = k % n_blocks
                pub.send(raw[i * per:(i + 1) * per])
                sent_samples += per
                k += 1
            if probe_pub is not None and now >= next_probe:
                seq = 2 * probe_k  # every probe frame skips one: a gap event each time
                probe_pub.send(np.zeros((1, 1)), seq=seq, t0=seq / PROBE_RATE)
                sent_at[seq] = time.perf_counter()
                probe_k += 1
                next_probe += PROBE_EVERY_S
            wait_ms = max(0, int((min(k * FRAME_S, next_probe if probe else total) - now) * 1000))
            while sub.poll(wait_ms):
                topic, payload = sub.recv_multipart()[:2]
                t_arr = time.perf_counter()
                body = decode_message(payload)
                if topic == b"ww.event" and body.get("stream") == "probe":
                    t_send = sent_at.pop(int(body.get("seq", -1)), None)
                    if t_send is not None and t_send - start >= warmup_s:
                        latencies.append(t_arr - t_send)
                elif topic == b"ww.status":
                    status.append((t_arr - start, float(body.get("lag_s", 0.0)),
                                   int(body.get("counters", {}).get("samples", 0))))
                wait_ms = 0
        # drain: how long until the daemon has processed everything sent (bounded)
        drain_start = time.perf_counter()
        drained = None
        while time.perf_counter() - drain_start < 20.0:
            if sub.poll(300):
                topic, payload = sub.recv_multipart()[:2]
                if topic == b"ww.status":
                    body = decode_message(payload)
                    counters = body.get("counters", {})
                    if int(counters.get("samples", 0)) >= sent_samples:
                        drained = time.perf_counter() - drain_start
                        break
    finally:
        pub.close()
        if probe_pub is not None:
            probe_pub.close()
        sub.close(linger=0)
        ctx.term()
        err = d.stop()
    return {"latencies": latencies, "status": status, "sent_samples": sent_samples,
            "drain_s": drained, "lost_probes": len(sent_at), "stderr": err,
            "accepted": int(counters.get("accepted", 0)), "rejected": int(counters.get("rejected", 0))}


def _session_retry(*args, **kw) -> dict:
    """One retry with fresh ports when the daemon does not come up (a port taken meanwhile)."""
    try:
        return _session(*args, **kw)
    except RuntimeError as exc:
        if "did not come up" not in str(exc):
            raise
        return _session(*args, **kw)


def _lag_verdict(status: list[tuple[float, float, int]], total_s: float) -> tuple[float, float, bool]:
    """(lag growth over the second half in s/s, final lag s, bounded?)"""
    pts = [(t, lag) for t, lag, _ in status if t >= total_s / 2]
    if len(pts) < 3:
        return float("nan"), float("nan"), False
    t, lag = np.array(pts).T
    slope = float(np.polyfit(t, lag, 1)[0])
    final = float(lag[-1])
    return slope, final, bool(slope < 0.05 and final < 1.0)


def run(quick: bool = False) -> dict:
    lat_s = 4.0 if quick else 60.0
    warm = 2.0 if quick else 5.0
    r = _session_retry(1000.0, lat_s, probe=True, warmup_s=warm)
    lat = np.array(r["latencies"]) * 1e3
    if lat.size == 0:
        raise RuntimeError(f"no latency sample was measured; daemon said: {r['stderr']}")
    p50, p99, mx = (float(np.percentile(lat, 50)), float(np.percentile(lat, 99)), float(lat.max()))
    lat_rows = [["1 kHz, 10 ms frames, probe gap -> ww.event", lat.size, lat_s, p50, p99, mx,
                 float(lat.mean()), r["lost_probes"]]]
    rates = (1000.0, 10000.0) if quick else (1000.0, 2000.0, 5000.0, 10000.0, 20000.0)
    step_s = 3.0 if quick else 15.0
    rate_rows = []
    best = 0.0
    for rate in rates:
        s = _session_retry(rate, step_s, probe=False, warmup_s=3.0)
        slope, final, ok = _lag_verdict(s["status"], step_s + 3.0)
        max_lag = max((lag for _, lag, _ in s["status"]), default=float("nan"))
        rate_rows.append([f"{rate / 1000:g} kHz", int(rate * FRAME_S), step_s, final, max_lag, slope,
                          s["drain_s"] if s["drain_s"] is not None else float("nan"),
                          s["accepted"], s["rejected"], ok])
        ok = ok and s["accepted"] > 0 and s["rejected"] == 0
        rate_rows[-1][-1] = ok
        if ok:
            best = max(best, rate)
        else:
            break  # the lag grows without bound here: higher rates only grow faster
    summary = {"latency_p50_ms": p50, "latency_p99_ms": p99, "latency_max_ms": mx,
               "latency_samples": int(lat.size), "max_sustained_rate_hz": best}
    sustained_10k = any(row[0] == "10 kHz" and row[-1] for row in rate_rows)
    targets = [target("loopback p99 latency at 1 kHz, ms", p99, 10.0, higher_is_better=False),
               target("live 10 kHz with bounded lag (1 = yes)", float(sustained_10k), 1.0)]
    tables = [
        table("loopback latency: send of a gapped frame -> its ww.event (daemon in its own process)",
              ["case", "samples", "measured s", "p50 ms", "p99 ms", "max ms", "mean ms",
               "probes unanswered"], lat_rows),
        table("sustained rate: lag from the ww.status heartbeat (a fresh daemon per rate)",
              ["rate", "samples/frame", "step s", "final lag s", "max lag s", "lag growth s/s",
               "drain s", "frames accepted", "frames rejected", "bounded"], rate_rows),
    ]
    notes = ["Daemon: wingwatch run with recording on, full pipeline, reference model resampled "
             "to the rate; identify.decimate scaled to keep a 50 Hz decimated rate.",
             "The sender, the subscriber and the daemon share the machine's cores with whatever "
             "else runs; see the load average."]
    return {"name": "latency", "title": "live loopback latency and sustained sample rate",
            "tables": tables, "summary": summary, "targets": targets, "notes": notes}


def main(argv: list[str] | None = None) -> int:
    from benchmarks.run import main as run_main

    return run_main(["--only", "latency", *(argv if argv is not None else sys.argv[1:])])


if __name__ == "__main__":
    raise SystemExit(main())
