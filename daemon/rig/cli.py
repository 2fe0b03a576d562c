"""``wingwatch rig``: run the virtual rig live over ZeroMQ, into a replay log, or for its truth.

Modes (one run, one pass over the frames):

* default, live: publish frames to the daemon's sensor endpoint with
  :class:`wingwatch.clients.publisher.FramePublisher`, paced so that frame k leaves when the source
  clock reaches its end (``time.monotonic`` sets the pace only; no value depends on it);
* ``--out LOG``: no sockets, as fast as possible, through the daemon's own ingest and recorder
  (:func:`wingwatch.daemon.service.record_frames`), so the file is what the daemon would record;
* ``--truth OUT``: the noise-free truth of every sample (lost frames included) as ``OUT.npz`` plus
  the run's events and settings as ``OUT.events.json`` (format in docs/rig.md); with ``--out`` or
  ``--live`` alongside that mode, alone it runs the rig with neither sockets nor log.

Closed loop (live mode only): ``--command-endpoint EP`` binds a SUB socket on EP (loopback only)
for ``cmd.alpha`` pitch commands (schema in docs/rig.md, decoded by
:func:`wingwatch.daemon.plan.decode_command`); the pitch axis then follows the newest command
through the rig's servo (:class:`wingwatch.daemon.rig.source.PitchServo`), holding the last one,
and follows the scenario until the first arrives. Refused command messages are counted.

The simulator is the one of :mod:`wingwatch.daemon.rig.plate` (Katz & Plotkin, "Low-Speed
Aerodynamics", 2001, lumped-vortex method, strongly coupled to Euler-Bernoulli modes).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import asdict, replace
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.rig.scenario import list_scenarios
from wingwatch.daemon.rig.source import TRUTH_KEYS, CommandSchedule, RigFrame, VirtualRig

__all__ = ["configure_parser", "run", "truth_paths", "TruthWriter", "CommandListener"]


def configure_parser(parser: argparse.ArgumentParser) -> None:
    """Add the ``rig`` subcommand's options to ``parser``."""
    parser.add_argument("--list", action="store_true", help="list the shipped scenarios and exit")
    parser.add_argument("--scenario", default="campaign", metavar="NAME",
                        help="scenario name or path to a scenario .toml (default: campaign)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="run length in seconds (default: the scenario's)")
    parser.add_argument("--seed", type=int, default=None, metavar="N",
                        help="random seed (default: the scenario's)")
    parser.add_argument("--rate", type=float, default=None, metavar="HZ",
                        help="sample rate in Hz (default: the scenario's, 1000)")
    parser.add_argument("--truth", default=None, metavar="OUT",
                        help="write the noise-free truth to OUT.npz and OUT.events.json")
    parser.add_argument("--out", default=None, metavar="LOG",
                        help="write a replay log as fast as possible instead of publishing")
    parser.add_argument("--live", action="store_true",
                        help="with --truth: publish live as well (without it --truth runs offline)")
    parser.add_argument("--config", default=None, metavar="FILE",
                        help="daemon configuration (endpoint, channel map; default: shipped)")
    parser.add_argument("--endpoint", default=None, metavar="EP",
                        help="sensor endpoint to publish to (default: the configuration's)")
    parser.add_argument("--client-key", default=None, metavar="FILE",
                        help="CurveZMQ client secret key file (daemon with security.curve)")
    parser.add_argument("--server-key", default=None, metavar="FILE",
                        help="the daemon's CurveZMQ public key file")
    parser.add_argument("--command-endpoint", default=None, metavar="EP",
                        help="live mode: bind EP (loopback) for cmd.alpha pitch commands and follow "
                             "them through the pitch servo (default: off, the scenario's motion)")
    parser.add_argument("--json", action="store_true", help="print one JSON summary on stdout")


def truth_paths(out: str | Path) -> tuple[Path, Path]:
    """``OUT`` -> (``OUT.npz``, ``OUT.events.json``); a trailing ``.npz`` is not doubled."""
    p = Path(out)
    stem = p.with_suffix("") if p.suffix == ".npz" else p
    return stem.with_name(stem.name + ".npz"), stem.with_name(stem.name + ".events.json")


class TruthWriter:
    """Collects the truth of every frame of a run and writes it at the end."""

    def __init__(self, rig: VirtualRig) -> None:
        self.rig = rig
        self.cols: dict[str, list[np.ndarray]] = {k: [] for k in TRUTH_KEYS}
        self.seq: list[np.ndarray] = []
        self.emitted: list[np.ndarray] = []
        self.lost: list[int] = []

    def add(self, frame: RigFrame) -> None:
        n = frame.samples.shape[0]
        for k in TRUTH_KEYS:
            self.cols[k].append(frame.truth[k])
        self.seq.append(np.full(n, frame.seq, dtype=np.int64))
        self.emitted.append(np.full(n, not frame.truth["lost"]))
        if frame.truth["lost"]:
            self.lost.append(frame.seq)

    def write(self, out: str | Path) -> tuple[Path, Path]:
        npz, js = truth_paths(out)
        npz.parent.mkdir(parents=True, exist_ok=True)
        arrays = {k: np.concatenate(v) if v else np.zeros(0) for k, v in self.cols.items()}
        arrays["seq"] = np.concatenate(self.seq) if self.seq else np.zeros(0, dtype=np.int64)
        arrays["emitted"] = np.concatenate(self.emitted) if self.emitted else np.zeros(0, dtype=bool)
        with open(npz, "wb") as fh:
            np.savez(fh, **arrays)
        sc = self.rig.scenario
        meta = {
            "format": "wingwatch-rig-truth/1",
            "scenario": sc.name,
            "source": sc.source,
            "seed": self.rig.seed,
            "rate_hz": self.rig.rate_hz,
            "frame_samples": self.rig.frame_samples,
            "duration_s": self.rig.duration_s,
            "channels": list(self.rig.channels),
            "article": asdict(sc.article),
            "fluid": asdict(sc.fluid) | {"speed_m_s": sc.flow_speed_m_s},
            "events": self.rig.events,
            "lost_seqs": self.lost,
            "arrays": sorted(arrays),
        }
        js.write_text(json.dumps(meta, indent=2, default=float) + "\n")
        return npz, js


class CommandListener:
    """A pitch command source for :class:`VirtualRig` fed by ``cmd.alpha`` messages.

    Binds a SUB socket on ``endpoint`` (loopback addresses only) and, every time the rig asks
    :meth:`alpha_at`, takes in what has arrived (without blocking). Commands are kept on the
    source clock (:class:`CommandSchedule`): the one in force is the newest whose time has come,
    held until a newer one; before the first the rig follows its scenario. Refused messages are
    counted by reason (``rejected``), never raised.
    """

    def __init__(self, endpoint: str, *, context=None, max_pending: int = 10_000) -> None:
        import zmq

        from wingwatch.daemon.config import endpoint_is_loopback

        if not endpoint_is_loopback(endpoint):
            raise ConfigError(f"--command-endpoint {endpoint!r} is not a loopback address; the rig "
                              "takes commands on loopback only")
        self.endpoint = endpoint
        self.schedule = CommandSchedule()
        self.max_pending = int(max_pending)
        self.received = 0
        self.rejected: dict[str, int] = {}
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sock = self.ctx.socket(zmq.SUB)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.RCVHWM, 10_000)
        self.sock.setsockopt(zmq.MAXMSGSIZE, 4096)
        self.sock.setsockopt(zmq.SUBSCRIBE, b"")  # see wrong topics too, and count them
        try:
            self.sock.bind(endpoint)
        except zmq.ZMQError as exc:
            self.sock.close(linger=0)
            raise ConfigError(f"--command-endpoint {endpoint!r}: cannot bind ({exc})") from None

    def drain(self) -> int:
        """Take in every message that has arrived; returns how many commands were accepted."""
        import zmq

        from wingwatch.daemon.errors import FrameRejected
        from wingwatch.daemon.plan import decode_command

        n = 0
        while True:
            try:
                parts = self.sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return n
            try:
                if len(parts) != 2:
                    raise FrameRejected("malformed", "a command is exactly two message frames")
                cmd = decode_command(parts[0], parts[1])
            except FrameRejected as exc:
                self.rejected[exc.reason] = self.rejected.get(exc.reason, 0) + 1
                continue
            if len(self.schedule) >= self.max_pending:
                self.rejected["too_many_pending"] = self.rejected.get("too_many_pending", 0) + 1
                continue
            self.schedule.push(cmd.t, cmd.alpha)
            self.received += 1
            n += 1

    def alpha_at(self, t: float) -> float | None:
        self.drain()
        self.schedule.forget_before(t)  # the rig asks in time order: older ones are spent
        return self.schedule.alpha_at(t)

    def close(self) -> None:
        self.sock.close(linger=0)
        if self._own_ctx:
            self.ctx.term()


def _load_config(path: str | None, rate_hz: float):
    from wingwatch.daemon.config import load_config

    cfg = load_config(path)
    spec = cfg.streams.get("rig")
    if spec is None:
        raise ConfigError(f"{cfg.source}: the configuration has no [streams.rig] for the virtual rig")
    return cfg, spec


def _thickness_note(cfg, rig: VirtualRig) -> None:
    """Say so when the daemon's configuration reads the gauges of a different strip."""
    t_cfg = cfg.outputs.curvature.thickness_m
    t_rig = rig.scenario.article.thickness_m
    if abs(t_cfg - t_rig) > 1e-9 * t_rig:
        sys.stderr.write(
            f"note: scenario '{rig.scenario.name}' flies a {1e3 * t_rig:g} mm strip but "
            f"{cfg.source} reads strain with outputs.curvature.thickness_m = {t_cfg:g}; a daemon "
            f"using it computes curvature {t_rig / t_cfg:.3g} times the strip's (set "
            f"thickness_m = {t_rig:g} in the daemon's configuration)\n")


def _messages(frames: Iterator[RigFrame], rig: VirtualRig) -> Iterator[tuple[bytes, bytes, float]]:
    from wingwatch.daemon.rig.source import rig_messages

    return rig_messages(rig, frames)


def _tee(rig: VirtualRig, truth: TruthWriter | None) -> Iterator[RigFrame]:
    for f in rig.frames(include_lost=True):
        if truth is not None:
            truth.add(f)
        yield f


def run(args: argparse.Namespace) -> int:
    """Run the ``rig`` subcommand; returns the process exit code."""
    if args.list:
        rows = list_scenarios()
        if getattr(args, "json", False):
            sys.stdout.write(json.dumps([{"name": n, "description": d} for n, d in rows]) + "\n")
        else:
            width = max(len(n) for n, _ in rows)
            for name, desc in rows:
                sys.stdout.write(f"{name:<{width}}  {desc}\n")
        return 0
    if getattr(args, "command_endpoint", None) and (args.out or (args.truth and not args.live)):
        raise ConfigError("--command-endpoint needs live mode (it cannot go with --out, or with "
                          "--truth without --live)")
    rig = VirtualRig(args.scenario, seed=args.seed, rate_hz=args.rate, duration_s=args.duration)
    truth = TruthWriter(rig) if args.truth else None
    summary: dict[str, Any] = {"scenario": rig.scenario.name, "seed": rig.seed,
                               "rate_hz": rig.rate_hz, "duration_s": rig.duration_s,
                               "frames": rig.n_frames, "samples": rig.n_samples}
    t_start = time.perf_counter()
    if args.out:
        from wingwatch.daemon.service import record_frames

        cfg, spec = _load_config(args.config, rig.rate_hz)
        _thickness_note(cfg, rig)
        if spec.rate_hz != rig.rate_hz or tuple(spec.channels) != rig.channels:
            # the log's header carries the rig stream as this run produced it
            spec = replace(spec, rate_hz=rig.rate_hz, channels=rig.channels)
            cfg = replace(cfg, streams={**cfg.streams, "rig": spec})
        out = Path(args.out)
        out.parent.mkdir(parents=True, exist_ok=True)
        counts = record_frames(_messages(_tee(rig, truth), rig), cfg, out, start_unix=0.0, source="rig")
        summary["log"] = str(out)
        summary["ingest"] = counts
    elif args.truth and not args.live:
        for _ in _tee(rig, truth):
            pass
    else:
        summary.update(_live(args, rig, truth))
    if truth is not None:
        npz, js = truth.write(args.truth)
        summary["truth"] = [str(npz), str(js)]
    elapsed = time.perf_counter() - t_start
    summary["wall_s"] = round(elapsed, 3)
    if args.json:
        sys.stdout.write(json.dumps(summary, default=str) + "\n")
    else:
        where = summary.get("log") or summary.get("endpoint") or "nowhere"
        sys.stderr.write(f"virtual rig: {rig.scenario.name}, {rig.n_samples} samples in "
                         f"{rig.n_frames} frames to {where} in {elapsed:.1f} s\n")
        if truth is not None:
            sys.stderr.write(f"truth: {summary['truth'][0]} and {summary['truth'][1]}\n")
    return 0


def _live(args: argparse.Namespace, rig: VirtualRig, truth: TruthWriter | None) -> dict[str, Any]:
    from wingwatch.clients.publisher import FramePublisher

    cfg, spec = _load_config(args.config, rig.rate_hz)
    _thickness_note(cfg, rig)
    endpoint = args.endpoint or cfg.endpoints.sensor
    if spec.rate_hz != rig.rate_hz:
        sys.stderr.write(f"note: the daemon's configuration expects the rig at {spec.rate_hz:g} Hz, "
                         f"this run is at {rig.rate_hz:g} Hz; its frames will be rejected\n")
    curve = None
    if args.client_key or args.server_key:
        if not (args.client_key and args.server_key):
            raise ConfigError("--client-key and --server-key go together (CurveZMQ needs both)")
        from wingwatch.daemon.security import client_curve_options

        curve = client_curve_options(args.client_key, args.server_key)
    listener = None
    if getattr(args, "command_endpoint", None):
        listener = CommandListener(args.command_endpoint)
        rig.command = listener  # read when frames() starts
    pub = FramePublisher(endpoint, stream="rig", channels=rig.channels, rate_hz=rig.rate_hz, curve=curve)
    sent = 0
    interrupted = False
    try:
        if not pub.wait_ready(5.0):
            sys.stderr.write(f"note: no daemon subscribed on {endpoint} within 5 s; publishing anyway\n")
        if not args.json:
            sys.stderr.write(f"virtual rig: publishing {rig.scenario.name} to {endpoint} in real "
                             f"time (Ctrl-C stops)\n")
        start = time.monotonic()
        for f in _tee(rig, truth):
            if f.truth["lost"]:
                continue
            due = start + f.t0 + f.samples.shape[0] / rig.rate_hz  # pace only, never a value
            wait = due - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            pub.send(f.samples, t0=f.t0, seq=f.seq)
            sent += 1
    except KeyboardInterrupt:
        interrupted = True
    finally:
        pub.close()
        if listener is not None:
            listener.close()
    out: dict[str, Any] = {"endpoint": endpoint, "sent": sent, "interrupted": interrupted}
    if listener is not None:
        out["commands"] = {"endpoint": listener.endpoint, "received": listener.received,
                           "rejected": dict(listener.rejected)}
    return out
