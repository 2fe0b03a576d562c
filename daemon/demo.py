"""``wingwatch demo``: the whole system on the virtual rig, on loopback, with one command.

1. Reference model: calibrated from the rig's ``calibration-5deg`` and ``test-manoeuvre``
   scenarios the first time (a few seconds), then kept in ``<record dir>/demo/``.
2. The daemon, with the shipped configuration and that reference, records to the usual place.
3. The virtual rig runs the ``campaign`` scenario and publishes it paced to real time. So that
   something happens soon, the demo joins the campaign ``lead_s`` (20) seconds before its first
   scripted event: the rig simulates the time before that (physics only, a few seconds of wall
   time) and starts publishing from there. ``--from 0`` plays the campaign from its start.
4. The example controller (:mod:`wingwatch.clients.examples.mpc`), unless ``--no-controller``:
   it closes the loop through the rig's pitch-command path (``cmd.alpha`` on an ``inproc://``
   socket; the rig's :class:`~wingwatch.daemon.rig.cli.CommandListener`), predicts with the
   newest validated model from the daemon's model feed (the reference model until one arrives)
   and announces its plan to the daemon (``plan.mpc-demo``, used by the margin forecast). Its
   lift reference is the lift the *reference* model gives along the campaign's scripted pitch
   programme (:class:`~wingwatch.clients.examples.mpc.ModelLiftReference`), so the rig flies
   the scripted motion while the models agree, and the scripted events (flow-speed change,
   stiffness, added mass, pitch creep) still happen and are still for the daemon to find; when
   a newer model differs, the controller flies whatever angle gives the reference lift under
   it. The curvature limit it keeps is ``outputs.curvature.limit_per_m`` (5 % backed off).
5. The terminal monitor, unless ``--headless``.

Ctrl-C (or ``--duration``) stops everything cleanly and prints where the log is and the exact
replay command. Everything wingwatch shows is advisory, and the example controller is example
code: neither is a safety system.
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


def _rig_log(scenario: str, path: Path, config: Config, article: Any = None) -> Path:
    from dataclasses import replace

    from wingwatch.daemon.rig.scenario import load_scenario
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log

    sc = load_scenario(scenario)
    if article is not None:
        sc = replace(sc, article=article)
    return write_rig_log(VirtualRig(sc), path, config)


def ensure_reference(directory: Path, config: Config, say=print, article: Any = None) -> Path:
    """The demo's reference model file, calibrating it from the rig if it is not there yet.

    ``article`` flies the two manoeuvres with another test article (the ``stiff-strip``
    check's 1.5 mm strip); the model is cached in ``directory`` either way, so give each
    article its own.
    """
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
    cal = _rig_log(CAL_SCENARIO, directory / "calibration.wwlog", config, article)
    test = _rig_log(TEST_SCENARIO, directory / "test-manoeuvre.wwlog", config, article)
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


def scripted_motion(scenario: Any) -> Any:
    """The scenario's scripted pitch programme, exactly as :class:`VirtualRig` prescribes it.

    A :class:`wingwatch.daemon.rig.scenario.Motion` built from the same seed stream and the same
    creep ramps as ``VirtualRig.frames()`` (``tests/test_demo.py`` holds the two equal), so that
    ``evaluate(t)`` is the angle the rig would fly at ``t`` without commands.
    """
    import numpy as np

    from wingwatch.daemon.rig.scenario import Motion, Ramp

    motion_ss, _ = np.random.SeedSequence(scenario.seed).spawn(2)
    creep = [Ramp(e.t_s, e.get("duration_s"), e.get("rate_deg_per_s") * e.get("duration_s"))
             for e in scenario.events if e.kind == "pitch-creep"]
    return Motion(scenario.motion, np.random.default_rng(motion_ss), creep)


class _FollowCheck:
    """Does the rig's pitch axis follow the controller? Bounded, thread-safe bookkeeping.

    The controller posts the angle its servo model predicts at each control instant
    (:meth:`expect`); the rig thread, for every frame it computes, compares the rig's true angle
    at those instants with the prediction and with the scripted programme (:meth:`observe`).
    Following the commands, the first difference is the servo model's error (none inside the
    servo's limits) plus late commands; not following them, it is as large as the second.
    """

    def __init__(self, motion: Any) -> None:
        from collections import deque

        self._lock = threading.Lock()
        self._pending: Any = deque(maxlen=1000)
        self.motion = motion
        self.checks = 0
        self._ss_follow = 0.0
        self._ss_script = 0.0
        self.max_follow = 0.0

    def expect(self, t: float, alpha: float) -> None:
        with self._lock:
            self._pending.append((t, alpha))

    def observe(self, t: Any, alpha: Any, rate_hz: float) -> None:
        if not self._pending:
            return
        t_lo, t_hi = float(t[0]), float(t[-1])
        with self._lock:
            due = []
            while self._pending and self._pending[0][0] <= t_hi + 1e-9:
                due.append(self._pending.popleft())
        for tp, ap in due:
            i = int(round((tp - t_lo) * rate_hz))
            if 0 <= i < len(t) and abs(float(t[i]) - tp) < 1e-6:
                d = float(alpha[i]) - ap
                s = float(alpha[i]) - float(self.motion.evaluate(tp)[0])
                self.checks += 1
                self._ss_follow += d * d
                self._ss_script += s * s
                self.max_follow = max(self.max_follow, abs(d))

    def summary(self) -> dict[str, Any]:
        import math

        n = max(self.checks, 1)
        return {"checks": self.checks,
                "rms_vs_controller_deg": math.degrees(math.sqrt(self._ss_follow / n)),
                "max_vs_controller_deg": math.degrees(self.max_follow),
                "rms_vs_script_deg": math.degrees(math.sqrt(self._ss_script / n))}


class _CountedCommands:
    """The rig's command source in the demo: the CommandListener's schedule, counting the
    internal steps that a command drove (the pitch axis follows the scenario while none has).

    Before ``quiet_until`` (the time the rig starts publishing) no command can exist yet, so the
    socket is not read; after it, it is read once per ``drain_every_s`` of source time instead of
    at every internal step (commands arrive a control period or more ahead of their time).
    """

    def __init__(self, listener: Any, quiet_until: float, drain_every_s: float = 0.005) -> None:
        self.listener = listener
        self.quiet_until = float(quiet_until)
        self.drain_every_s = float(drain_every_s)
        self._drain_at = float(quiet_until)
        self.followed_steps = 0

    def alpha_at(self, t: float) -> float | None:
        if t < self.quiet_until:
            return None
        if t >= self._drain_at:
            self.listener.drain()
            self._drain_at = t + self.drain_every_s
        sched = self.listener.schedule
        sched.forget_before(t)  # asked in time order: older ones are spent
        c = sched.alpha_at(t)
        if c is not None:
            self.followed_steps += 1
        return c


class _RigPublisher(threading.Thread):
    """The virtual rig, paced to real time, publishing into the daemon; with
    ``command_endpoint`` its pitch axis follows ``cmd.alpha`` commands (closed loop)."""

    def __init__(self, config: Config, scenario: str, start_s: float | None, lead_s: float,
                 speed: float, stop: threading.Event, say, *, command_endpoint: str | None = None,
                 context: Any = None) -> None:
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
        self.command_endpoint = command_endpoint
        self.context = context
        self.listening = threading.Event()  # set once the command socket is bound
        self.commands: _CountedCommands | None = None
        self.follow = _FollowCheck(scripted_motion(self.sc)) if command_endpoint else None
        self.rate_hz = float(self.sc.rate_hz)
        self._wall0: float | None = None

    def source_time(self) -> float:
        """The rig's source clock now, by its pacing (the source time being published)."""
        w = self._wall0
        return self.start_s if w is None else self.start_s + (time.monotonic() - w) * self.speed

    def run(self) -> None:
        try:
            self._run()
        except BaseException as exc:  # reported by the demo, never silent
            self.error = exc

    def _run(self) -> None:
        from wingwatch.clients.publisher import FramePublisher
        from wingwatch.daemon.rig.cli import CommandListener
        from wingwatch.daemon.rig.source import VirtualRig

        listener = None
        if self.command_endpoint:
            listener = CommandListener(self.command_endpoint, context=self.context)
            self.commands = _CountedCommands(listener, quiet_until=self.start_s)
            self.listening.set()
        try:
            rig = VirtualRig(self.sc, command=self.commands)
            self.rate_hz = rig.rate_hz
            pub = FramePublisher(self.config.endpoints.sensor, stream="rig", channels=rig.channels,
                                 rate_hz=rig.rate_hz)
            try:
                self._publish(rig, pub)
            finally:
                pub.close()
        finally:
            if listener is not None:
                listener.close()

    def _publish(self, rig: Any, pub: Any) -> None:
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
            if self.follow is not None:
                self.follow.observe(f.truth["t"], f.truth["alpha"], rig.rate_hz)
            if wall0 is None:
                wall0 = time.monotonic()
                self._wall0 = wall0
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

    def command_summary(self) -> dict[str, Any] | None:
        if self.commands is None:
            return None
        lst = self.commands.listener
        return {"endpoint": self.command_endpoint, "commands_received": lst.received,
                "commands_rejected": dict(lst.rejected),
                "followed_s": self.commands.followed_steps
                / (self.rate_hz * self.sc.numerics.substeps),
                **(self.follow.summary() if self.follow is not None else {})}


class _DemoController(threading.Thread):
    """The example MPC lift tracker in the loop: model feed in, ``cmd.alpha`` and plans out.

    A thread, not a subprocess. One control step costs well under a millisecond of CPU
    (median 0.6 ms, 95 % 1.3 ms on the 2-core test machine; every run measures it again,
    ``controller.step_ms`` in the summary), once every 50 ms of source time: about 2 % of one
    core, so it takes little from the daemon and the monitor under the GIL. Sharing the
    process gives it the rig's own source clock, an ``inproc://`` command socket (no port to
    collide, nothing off the machine) and its counters for the summary without plumbing; a
    second interpreter would cost more (numpy and scipy imported again, a port, output to
    carry back) than it would save on 2 cores.

    Every control period it takes the newest validated model the feed holds (ids recorded),
    plans from the next control instant ``lead_s`` of wall time ahead of the rig's clock (so
    ``lead_s * speed`` of source time: a GIL stall of a few tens of ms does not make a command
    late at any ``--speed``), sends the first
    move as a command for that instant and the plan to the daemon, and posts its predicted angle
    to the rig's :class:`_FollowCheck`. If the feed goes quiet it keeps the model it has (a
    model that passed the gate stays valid; the controller is never told otherwise).
    """

    NAME = "mpc-demo"
    #: hard bounds on the commanded and predicted angle (the creep ends near 9 deg)
    ALPHA_BOUNDS_DEG = (-2.0, 12.0)

    def __init__(self, config: Config, reference: Path, rig: _RigPublisher, endpoint: str,
                 context: Any, stop: threading.Event, say, *, period_s: float = 0.05,
                 lead_s: float = 0.1) -> None:
        super().__init__(name="controller", daemon=True)
        from collections import Counter, deque

        from wingwatch.clients.examples.mpc import ControlModel
        from wingwatch.daemon.modelfile import load_model

        self.config = config
        self.reference = ControlModel.from_reference(load_model(reference), "reference file")
        self.rig = rig
        self.endpoint = endpoint
        self.context = context
        self.stop_event = stop
        self.say = say
        self.period_s = float(period_s)
        self.lead_s = float(lead_s)
        self.limit = float(config.outputs.curvature.limit_per_m)
        self.state = "starting"
        self.error: BaseException | None = None
        self.models_received: Any = deque(maxlen=200)  # ids, in arrival order (the newest 200)
        self.n_models = 0
        self.models_refused: dict[str, str] = {}  # id -> why the controller could not use it
        self.n_refused = 0
        self.model_in_use = self.reference.model_id
        self.commands_sent = 0
        self.plans_sent = 0
        self.late = 0  # commands sent less than one rig frame before their time
        self.resyncs = 0
        self.feed_lost = 0
        self.moves: Counter[str] = Counter()
        self._cost: Any = deque(maxlen=5000)  # wall seconds per control step (the newest 5000)
        self._cpu: Any = deque(maxlen=5000)  # this thread's CPU seconds per control step
        self.cost_max = 0.0
        self.cpu_s = 0.0  # the thread's CPU time over its run (polling and sending included)
        self._new: Any = deque(maxlen=1)  # the newest model from the feed's callback

    def run(self) -> None:
        try:
            self._run()
        except BaseException as exc:  # reported by the demo, never silent
            self.error = exc
            self.state = f"failed: {exc}"
            self.say(f"the example controller stopped: {exc}")
            self.stop_event.set()

    def _on_model(self, m: Any) -> None:
        self.n_models += 1
        self.models_received.append(m.model_id)
        self._new.append(m)

    def _on_lost(self, lost: bool) -> None:
        self.feed_lost += bool(lost)

    def _run(self) -> None:
        import zmq

        from wingwatch.clients.feed import ModelFeed
        from wingwatch.clients.plan import PlanPublisher
        from wingwatch.clients.publisher import XpubLink

        cpu0 = time.thread_time()
        cfg = self.config
        feed = ModelFeed(cfg.endpoints.publish, cfg.endpoints.snapshot, context=self.context,
                         heartbeat_period_s=cfg.status_period_s)
        feed.on_change(self._on_model)
        feed.on_lost(self._on_lost)
        plans = PlanPublisher(cfg.endpoints.sensor, self.NAME, context=self.context)
        cmd = XpubLink(self.endpoint, context=self.context)
        try:
            self._loop(feed, plans, cmd)
        finally:
            for sock in (plans.sock, cmd.sock):
                sock.setsockopt(zmq.LINGER, 0)  # nothing is worth waiting for at the end
            cmd.close()
            plans.close()
            feed.close()
            self.cpu_s = time.thread_time() - cpu0

    def _wait(self, what: str, ready, feed: Any, limit_s: float) -> bool:
        """Poll the feed until ``ready()``; False on stop, on the rig's end or after ``limit_s``."""
        self.state = what
        deadline = time.monotonic() + limit_s
        while not ready():
            if self.stop_event.is_set() or not self.rig.is_alive() or time.monotonic() > deadline:
                return False
            feed.poll(0.05)
        return True

    def _loop(self, feed: Any, plans: Any, cmd: Any) -> None:
        import math

        import numpy as np

        from wingwatch.clients.examples.mpc import LiftTracker, ModelLiftReference
        from wingwatch.daemon.plan import encode_command

        rig = self.rig
        if not self._wait("waiting for the rig", rig.publishing.is_set, feed, 600.0):
            return
        if not self._wait("waiting for the rig's command socket", lambda: cmd.wait_ready(0.01),
                          feed, 10.0):
            if not self.stop_event.is_set() and rig.is_alive():
                raise ConfigError(f"the rig did not subscribe to the demo's commands on "
                                  f"{self.endpoint} within 10 s.")
            return
        self._wait("waiting for the daemon to take plans", lambda: plans.wait_ready(0.01), feed,
                   5.0)
        motion = scripted_motion(rig.sc)
        period, lead = self.period_s, self.lead_s * max(1.0, rig.speed)  # source time
        t0 = period * math.ceil((rig.source_time() + lead) / period)  # the first control instant
        reference = ModelLiftReference(self.reference, motion.evaluate, t_start=t0)
        lo, hi = (math.radians(b) for b in self.ALPHA_BOUNDS_DEG)
        tracker = LiftTracker(self.reference, reference, curvature_limit=self.limit,
                              alpha_bounds=(lo, hi), control_period_s=period)
        a0, ad0, _ = motion.evaluate(np.array([t0]))
        tracker.reset(t0, float(a0[0]), float(ad0[0]))  # the rig follows the script until t0
        frame_s = rig.sc.frame_samples / rig.sc.rate_hz
        self.state = "tracking"
        while not self.stop_event.is_set() and rig.is_alive():
            ahead = tracker.t - lead - rig.source_time()
            if ahead > 0:
                feed.poll(min(max(ahead / rig.speed, 0.001), 0.05))
                continue
            feed.poll(0.0)
            if self._new:
                self._use(tracker, self._new.pop())
            behind = rig.source_time() - tracker.t
            if behind > 1.0:  # stalled (a suspended process): rejoin at the next instant
                self.resyncs += 1
                t_next = period * math.ceil((rig.source_time() + lead) / period)
                tracker.reset(t_next, tracker.state["command"])
                continue
            c0, p0 = time.perf_counter(), time.thread_time()
            mv = tracker.step()
            cost = time.perf_counter() - c0
            self._cpu.append(time.thread_time() - p0)
            self._cost.append(cost)
            self.cost_max = max(self.cost_max, cost)
            self.moves[mv.status] += 1
            if mv.t - rig.source_time() < frame_s:
                self.late += 1
            cmd.sock.send_multipart(list(encode_command(mv.t, mv.command)))
            self.commands_sent += 1
            plans.send(mv.plan_t0, mv.plan_dt, mv.plan_alpha)
            self.plans_sent += 1
            if rig.follow is not None:
                rig.follow.expect(tracker.t, tracker.alpha)  # its servo model's angle then

    def _use(self, tracker: Any, m: Any) -> None:
        from wingwatch.daemon.errors import WingwatchError

        if m.model_id == self.model_in_use:
            return
        try:
            tracker.set_model(m)
        except (ValueError, TypeError, ArithmeticError, WingwatchError) as exc:
            if len(self.models_refused) < 50:  # bounded: the first 50 say enough
                self.models_refused[m.model_id] = str(exc)
            self.n_refused += 1
            return
        self.model_in_use = m.model_id

    def summary(self) -> dict[str, Any]:
        import numpy as np

        c = np.array(self._cost) * 1e3
        p = np.array(self._cpu) * 1e3
        step = ({"median": float(np.median(c)), "p95": float(np.percentile(c, 95)),
                 "max": 1e3 * self.cost_max, "mean": float(np.mean(c)),
                 "cpu_median": float(np.median(p)), "cpu_p95": float(np.percentile(p, 95)),
                 "cpu_mean": float(np.mean(p)), "steps": int(c.size)} if c.size else None)
        return {"enabled": True, "name": self.NAME, "state": self.state,
                "stopped_cleanly": not self.is_alive(), "cpu_s": self.cpu_s,
                "models_received": list(self.models_received),
                "models_received_count": self.n_models,
                "models_refused": dict(self.models_refused),
                "models_refused_count": self.n_refused, "model_in_use": self.model_in_use,
                "commands_sent": self.commands_sent, "late_commands": self.late,
                "plans_sent": self.plans_sent, "moves": dict(self.moves),
                "resyncs": self.resyncs, "feed_lost_events": self.feed_lost,
                "curvature_limit_per_m": self.limit, "period_s": self.period_s,
                "lead_wall_s": self.lead_s, "step_ms": step,
                "error": None if self.error is None else str(self.error)}


def run_demo(*, duration_s: float | None = None, headless: bool = False,
             scenario: str = "campaign", start_s: float | None = None, lead_s: float = 20.0,
             speed: float = 1.0, config_path: str | None = None, controller: bool = True,
             say=print) -> DemoResult:
    """Run the demo; returns where the log is and a summary (see the module docstring)."""
    import zmq

    from wingwatch.daemon.service import Daemon

    if speed <= 0:
        raise ConfigError("--speed must be greater than zero.")
    cfg = load_config(config_path)
    demo_dir = Path(cfg.recorder.directory) / "demo"
    model = ensure_reference(demo_dir, cfg, say)
    stop = threading.Event()
    endpoint = f"inproc://wingwatch-demo-commands-{id(stop):x}" if controller else None
    rig = _RigPublisher(cfg, scenario, start_s, lead_s, speed, stop, say,
                        command_endpoint=endpoint)
    ctx = zmq.Context() if controller else None  # shared by the rig's listener and the controller
    rig.context = ctx
    ctl = _DemoController(cfg, model, rig, endpoint, ctx, stop, say) if controller else None
    daemon = Daemon(cfg, reference=model)
    dthread = threading.Thread(target=daemon.run, name="daemon", daemon=True)
    dthread.start()
    rig.start()
    if ctl is not None:
        deadline = time.monotonic() + 10.0  # inproc: the rig binds before the controller connects
        while not rig.listening.wait(0.1) and rig.is_alive() and time.monotonic() < deadline:
            pass
        ctl.start()
    chain = "virtual rig -> daemon -> monitor" + (", controller -> rig" if ctl else "")
    say(f"wingwatch demo running on loopback: {chain}. Advisory only: not a safety system; the "
        "facility's procedures decide. Ctrl-C stops it.")
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
        alive = []
        if ctl is not None:
            ctl.join(5.0)  # first: no command after this
            alive += ["controller"] if ctl.is_alive() else []
        rig.join(5.0)
        alive += ["virtual-rig"] if rig.is_alive() else []
        daemon.stop()
        dthread.join(10.0)
        alive += ["daemon"] if dthread.is_alive() else []
        daemon.close()
        if ctx is not None and not {"controller", "virtual-rig"} & set(alive):
            ctx.term()  # every socket on it is closed (a live thread would make this wait)
    if rig.error is not None:
        raise rig.error
    if ctl is not None and ctl.error is not None:
        raise ctl.error
    summary = _summarise(daemon, rig)
    summary["controller"] = ({**ctl.summary(), "rig": rig.command_summary()} if ctl is not None
                             else {"enabled": False})
    summary["threads_left_running"] = alive
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
    lines += _controller_lines(s.get("controller") or {"enabled": False})
    if res.log:
        lines.append(f"log: {res.log}")
        lines.append(f"replay it: wingwatch replay {res.log} --compare")
    return "\n".join(lines)


def _controller_lines(c: dict[str, Any]) -> list[str]:
    if not c.get("enabled"):
        return ["example controller: not run (--no-controller); the rig flew the scenario's motion"]
    ids = c["models_received"]
    shown = ", ".join(ids[-6:]) + (f" (and {c['models_received_count'] - 6} before)"
                                   if c["models_received_count"] > 6 else "")
    how = "stopped cleanly" if c["stopped_cleanly"] else "still running at exit"
    lines = [f"example controller (was {c['state']}; {how}): {c['commands_sent']} commands "
             f"({c['late_commands']} late), {c['plans_sent']} plans; models received "
             f"{c['models_received_count']}: {shown or 'none'}; in use at the end: "
             f"{c['model_in_use']}"]
    if c["models_refused"]:
        lines.append("  models it could not use: " + "; ".join(
            f"{k}: {v}" for k, v in c["models_refused"].items()))
    st = c.get("step_ms")
    if st:
        lines.append(f"  control step: CPU median {st['cpu_median']:.2f} ms, 95 % "
                     f"{st['cpu_p95']:.2f} ms; wall median {st['median']:.2f} ms, max "
                     f"{st['max']:.1f} ms over {st['steps']} steps (every "
                     f"{1e3 * c['period_s']:.0f} ms of source time); moves " + ", ".join(
                         f"{k} {v}" for k, v in sorted(c["moves"].items())))
    r = c.get("rig")
    if r:
        lines.append(f"  the rig took {r['commands_received']} commands and followed them for "
                     f"{r['followed_s']:.1f} s: its angle is {r['rms_vs_controller_deg']:.2g} deg "
                     f"RMS from the controller's prediction, {r['rms_vs_script_deg']:.2g} deg from "
                     f"the scripted programme ({r['checks']} instants)")
    return lines


def summary_json(res: DemoResult) -> str:
    return json.dumps({"log": res.log, **res.summary}, indent=2, default=float)
