"""``wingwatch demo``: the whole system on the virtual rig, on loopback, with one command.

1. Reference model: calibrated from the rig's ``calibration-5deg`` and ``test-manoeuvre``
   scenarios the first time (a few seconds), then kept in ``<record dir>/demo/``.
2. The daemon, with the shipped configuration and that reference, records to the usual place.
3. The virtual rig runs the ``campaign`` scenario and publishes it paced to real time. So that
   something happens soon, the demo joins the campaign ``lead_s`` (20) seconds before its first
   scripted event: the rig simulates the time before that (physics only, a few seconds of wall
   time) and starts publishing from there. ``--from 0`` plays the campaign from its start.
4. The terminal monitor, unless ``--headless``.

Ctrl-C (or ``--duration``) stops everything cleanly and prints where the log is and the exact
replay command. Everything wingwatch shows is advisory.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from wingwatch.daemon.config import Config, load_config
from wingwatch.daemon.errors import ConfigError

__all__ = ["DemoResult", "ensure_reference", "run_demo"]

CAL_SCENARIO = "calibration-5deg"
TEST_SCENARIO = "test-manoeuvre"


def _rig_log(scenario: str, path: Path, config: Config) -> Path:
    from wingwatch.daemon.rig.scenario import load_scenario
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log

    return write_rig_log(VirtualRig(load_scenario(scenario)), path, config)


def ensure_reference(directory: Path, config: Config, say=print) -> Path:
    """The demo's reference model file, calibrating it from the rig if it is not there yet."""
    from wingwatch.daemon.calibrate import calibrate, load_record
    from wingwatch.daemon.modelfile import load_model, save_model

    directory.mkdir(parents=True, exist_ok=True)
    model = directory / "reference.wwmodel.json"
    if model.exists():
        try:
            load_model(model)
            return model
        except Exception:  # a damaged cache is rebuilt, not trusted
            model.unlink()
    say("calibrating the reference model on the virtual rig (first run only) ...")
    cal = _rig_log(CAL_SCENARIO, directory / "calibration.wwlog", config)
    test = _rig_log(TEST_SCENARIO, directory / "test-manoeuvre.wwlog", config)
    result = calibrate(load_record(cal), load_record(test))
    save_model(result.model, model)
    e = result.errors_by_rank[result.model.rank]
    say(f"reference model: rank {result.model.rank}, test-manoeuvre error C_L "
        f"{100 * e['lift']:.1f} %, curvature {100 * e['curvature']:.1f} % -> {model}")
    return model


@dataclass
class DemoResult:
    log: str | None
    summary: dict[str, Any]


class _RigPublisher(threading.Thread):
    """The virtual rig, paced to real time, publishing into the daemon."""

    def __init__(self, config: Config, scenario: str, start_s: float | None, lead_s: float,
                 speed: float, stop: threading.Event, say) -> None:
        super().__init__(name="virtual-rig", daemon=True)
        from wingwatch.daemon.rig.scenario import load_scenario

        self.sc = load_scenario(scenario)
        events = sorted(e.t_s for e in self.sc.events)
        if start_s is None:
            start_s = max(0.0, events[0] - lead_s) if events else 0.0
        if not 0 <= start_s < self.sc.duration_s:
            raise ConfigError(f"--from {start_s} is outside the scenario's 0..{self.sc.duration_s} s.")
        self.start_s = start_s
        self.events = [(e.t_s, e.kind) for e in self.sc.events]
        self.config = config
        self.speed = speed
        self.stop_event = stop
        self.say = say
        self.sent = 0
        self.t_last = start_s
        self.error: BaseException | None = None
        self.publishing = threading.Event()  # set once the first frame goes out

    def run(self) -> None:
        try:
            self._run()
        except BaseException as exc:  # reported by the demo, never silent
            self.error = exc

    def _run(self) -> None:
        from wingwatch.clients.publisher import FramePublisher
        from wingwatch.daemon.rig.source import VirtualRig

        rig = VirtualRig(self.sc)
        pub = FramePublisher(self.config.endpoints.sensor, stream="rig", channels=rig.channels,
                             rate_hz=rig.rate_hz)
        try:
            if not pub.wait_ready(10.0):
                raise ConfigError("the daemon did not subscribe to the rig within 10 s.")
            frames = rig.frames()
            if self.start_s > 0:
                self.say(f"the virtual rig simulates the campaign's first {self.start_s:.0f} s "
                         "(physics only) ...")
            wall0 = None
            for f in frames:
                if self.stop_event.is_set():
                    return
                if f.t0 < self.start_s:
                    continue
                if wall0 is None:
                    wall0 = time.monotonic()
                    self.publishing.set()
                    self.say(f"publishing the campaign from t = {f.t0:.0f} s; first scripted "
                             f"events: " + ", ".join(f"{k} at {t:.0f} s" for t, k in self.events[:3]))
                due = wall0 + (f.t0 - self.start_s) / self.speed
                wait = due - time.monotonic()
                if wait > 0:
                    self.stop_event.wait(wait)
                pub.send(f.samples, t0=f.t0, seq=f.seq)
                self.sent += 1
                self.t_last = f.t0
        finally:
            pub.close()


def run_demo(*, duration_s: float | None = None, headless: bool = False,
             scenario: str = "campaign", start_s: float | None = None, lead_s: float = 20.0,
             speed: float = 1.0, config_path: str | None = None, say=print) -> DemoResult:
    """Run the demo; returns where the log is and a summary (see the module docstring)."""
    from wingwatch.daemon.service import Daemon

    if speed <= 0:
        raise ConfigError("--speed must be greater than zero.")
    cfg = load_config(config_path)
    demo_dir = Path(cfg.recorder.directory) / "demo"
    model = ensure_reference(demo_dir, cfg, say)
    stop = threading.Event()
    daemon = Daemon(cfg, reference=model)
    dthread = threading.Thread(target=daemon.run, name="daemon", daemon=True)
    rig = _RigPublisher(cfg, scenario, start_s, lead_s, speed, stop, say)
    dthread.start()
    rig.start()
    say("wingwatch demo running on loopback: virtual rig -> daemon -> monitor. Advisory only: "
        "not a safety system; the facility's procedures decide. Ctrl-C stops it.")
    try:
        # --duration counts from the first published frame (the rig's lead-in is physics only)
        while not rig.publishing.is_set() and rig.is_alive():
            rig.publishing.wait(0.2)
        t0 = time.monotonic()
        if headless:
            while rig.is_alive() and (duration_s is None or time.monotonic() - t0 < duration_s):
                time.sleep(0.2)
        else:
            import argparse

            from wingwatch.clients import monitor

            margs = argparse.Namespace(config=config_path, publish=None, snapshot=None,
                                       refresh=5.0, once=False, duration=duration_s,
                                       client_key=None, daemon_key=None)
            monitor.run(margs)
    except KeyboardInterrupt:
        pass
    finally:
        stop.set()
        rig.join(5.0)
        daemon.stop()
        dthread.join(10.0)
        daemon.close()
    if rig.error is not None:
        raise rig.error
    summary = _summarise(daemon, rig)
    return DemoResult(log=str(daemon.log_path) if daemon.log_path else None, summary=summary)


def _summarise(daemon: Any, rig: _RigPublisher) -> dict[str, Any]:
    from wingwatch.daemon.codec import decode_message
    from wingwatch.daemon.replaylog import KIND_MODEL, KIND_WARNING, LogReader

    out: dict[str, Any] = dict(daemon.summary())
    models = warnings = 0
    events: list[dict[str, Any]] = []
    if daemon.log_path:
        for rec in LogReader.open(daemon.log_path):
            if rec.kind == KIND_MODEL:
                m = decode_message(rec.payload)
                models += m.get("status") == "accepted"
            elif rec.kind == KIND_WARNING:
                w = decode_message(rec.payload)
                warnings += 1
                if w.get("event") == "raised":
                    events.append({"t": w["t"], "level": w["level"], "kind": w["warning_kind"],
                                   "quantity": w["quantity"]})
    out["models_published"] = models
    out["warning_events"] = warnings
    out["warnings_raised"] = events
    out["rig_from_s"] = rig.start_s
    out["rig_to_s"] = rig.t_last
    played = [(t, k) for t, k in rig.events if rig.start_s <= t <= rig.t_last]
    detected = []
    for t, kind in played:
        # a structural or stale-model advisory raised within 10 s after the event
        hits = [e for e in events if t <= e["t"] <= t + 10.0 and e["kind"] in
                ("coefficient_drift", "stale_model", "mode_drift", "sensor_health")]
        detected.append({"event": kind, "t": t, "detected": bool(hits),
                         "first_warning_t": hits[0]["t"] if hits else None,
                         "delay_s": (hits[0]["t"] - t) if hits else None})
    out["scripted_events"] = detected
    return out


def format_summary(res: DemoResult) -> str:
    s = res.summary
    lines = [
        f"demo stopped: {s['accepted']} frames ({s['samples']} samples) of the campaign from "
        f"t = {s['rig_from_s']:.0f} s to {s['rig_to_s']:.0f} s; {s['rejected']} rejected, "
        f"{s['gaps']} gaps",
        f"models published: {s['models_published']}; warning events: {s['warning_events']}",
    ]
    for e in s["scripted_events"]:
        lines.append(f"scripted event '{e['event']}' at {e['t']:.0f} s: " + (
            f"detected {e['delay_s']:.1f} s later (advisory)" if e["detected"] else "not detected"))
    if res.log:
        lines.append(f"log: {res.log}")
        lines.append(f"replay it: wingwatch replay {res.log} --compare")
    return "\n".join(lines)


def summary_json(res: DemoResult) -> str:
    return json.dumps({"log": res.log, **res.summary}, indent=2, default=float)
