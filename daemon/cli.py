"""The ``wingwatch`` command line: one entry point, one subcommand per job.

Every subcommand that summarises something takes ``--json`` and then prints exactly one JSON
object on stdout; human text otherwise. Errors are one sentence on stderr and a non-zero exit
(2 for bad input, 1 for a failed job); tracebacks only with ``--debug``. Progress of long work
goes to stderr.
"""

from __future__ import annotations

import os

# The daemon works on small matrices at a high rate: BLAS threads only add hand-off latency
# (and stall on a busy 2-core machine). Set before numpy is first imported; the user may override.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import json  # noqa: E402
import logging  # noqa: E402
import signal  # noqa: E402
import sys  # noqa: E402
from typing import Any, Callable  # noqa: E402

from rich.console import Console  # noqa: E402

from wingwatch.daemon.errors import WingwatchError  # noqa: E402
from wingwatch.daemon.version import __version__  # noqa: E402

__all__ = ["main", "build_parser"]

ADVISORY_LINE = (
    "wingwatch warnings are advisory only; the facility's safety procedures and test director decide."
)

err_console = Console(stderr=True, highlight=False, soft_wrap=True)


def _print_json(obj: Any) -> None:
    sys.stdout.write(json.dumps(obj, indent=2, sort_keys=False, default=str) + "\n")


# --------------------------------------------------------------------------------------------
# run


def _cmd_run(args: argparse.Namespace) -> int:
    from wingwatch.daemon.config import load_config, to_toml
    from wingwatch.daemon.service import Daemon

    cfg = load_config(args.config)
    reference = args.model
    if args.resume:
        from wingwatch.daemon.checkpoint import read_checkpoint
        from wingwatch.daemon.config import config_from_recorded
        from wingwatch.daemon.modelfile import model_from_dict

        ck = read_checkpoint(args.resume)
        cfg = config_from_recorded(ck["config"], source=f"{args.resume} (checkpoint)")
        if ck.get("reference_model"):
            reference = model_from_dict(ck["reference_model"], "the checkpoint's reference model")
    if args.print_config:
        sys.stdout.write(to_toml(cfg))
        return 0
    daemon = Daemon(cfg, record=not args.no_record, record_dir=args.record_dir,
                    insecure=args.insecure, reference=reference, resume=args.resume)
    try:
        def _stop(signum: int, frame: Any) -> None:
            daemon.stop()

        signal.signal(signal.SIGINT, _stop)
        signal.signal(signal.SIGTERM, _stop)
        if not args.json:
            err_console.print(
                f"wingwatch {__version__}: listening for sensor frames on {cfg.endpoints.sensor}, "
                f"publishing on {cfg.endpoints.publish}"
            )
            if daemon.log_path:
                err_console.print(f"recording to {daemon.log_path}")
            err_console.print(ADVISORY_LINE)
            err_console.print("Ctrl-C stops the daemon.")
        summary = daemon.run(duration_s=args.duration)
    finally:
        daemon.close()
    if args.json:
        _print_json(summary)
    else:
        err_console.print(
            f"stopped: {summary['accepted']} frames accepted ({summary['samples']} samples), "
            f"{summary['rejected']} rejected, {summary['gaps']} gaps, "
            f"{summary['duplicates']} duplicates"
        )
        if summary["log"]:
            err_console.print(f"log: {summary['log']}   (summarise it: wingwatch inspect {summary['log']})")
    return 0


# --------------------------------------------------------------------------------------------
# inspect


def _cmd_inspect(args: argparse.Namespace) -> int:
    from wingwatch.daemon.logsummary import summarise_log

    progress_cb = None
    prog = None
    if sys.stderr.isatty() and not args.json:
        from rich.progress import Progress

        prog = Progress(console=err_console, transient=True)
        task = prog.add_task("reading log", total=1)
        prog.start()

        def progress_cb(done: int, total: int) -> None:
            prog.update(task, completed=done, total=max(total, 1))

    try:
        s = summarise_log(args.log, progress=progress_cb)
    finally:
        if prog is not None:
            prog.stop()
    if args.json:
        _print_json(s)
        return 0
    from rich.table import Table

    out = Console(highlight=False)
    t = Table(title=f"replay log {s['path']}", show_header=False, box=None)
    rows = [
        ("run", f"{s['run_id']} (wingwatch {s['software_version']}, source {s['source']})"),
        ("segments", str(len(s["segments"]))),
        ("duration", f"{s['duration_s']:.3f} s of source time"),
        ("frames", f"{s['frames']} received, {s['accepted']} accepted, {s['rejected']} rejected"),
        ("samples", str(s["samples"])),
        ("streams", ", ".join(s["streams"]) or "-"),
        ("channels", ", ".join(s["channels"]) or "-"),
        ("gaps", f"{s['gaps']} ({s['missing_frames']} frames missing)"),
        ("duplicates", str(s["duplicates"])),
        ("out of order", str(s["out_of_order"])),
        ("restarts", str(s["restarts"])),
        ("rejections", ", ".join(f"{k} {v}" for k, v in s["rejected_by_reason"].items()) or "none"),
        ("records", ", ".join(f"{k} {v}" for k, v in s["records_by_kind"].items())),
        ("damage", "none" if not s["damage"] else
         "; ".join(f"{d['kind']} at byte {d['offset']} of {d['segment']} ({d['reason']})"
                   for d in s["damage"])),
    ]
    for k, v in rows:
        t.add_row(k, v)
    out.print(t)
    if s["note"]:
        err_console.print(s["note"])
    return 0


# --------------------------------------------------------------------------------------------
# replay


def replay_summary(result: Any, compare: Any = None) -> dict[str, Any]:
    """The JSON summary of a replay (shared by ``replay --json`` and the demo)."""
    from wingwatch.daemon.codec import decode_message
    from wingwatch.daemon.replaylog import KIND_MODEL, KIND_WARNING

    models = [decode_message(o.payload) for o in result.outputs if o.kind == KIND_MODEL]
    warnings = [decode_message(o.payload) for o in result.outputs if o.kind == KIND_WARNING]
    out: dict[str, Any] = {
        "realtime_factor": result.realtime_factor,
        "samples": result.samples,
        "frames": result.frames,
        "source_s": result.source_s,
        "wall_s": result.wall_s,
        "models_published": sum(1 for m in models if m.get("status") != "rejected"),
        "models_rejected": sum(1 for m in models if m.get("status") == "rejected"),
        "warnings": [{"t": w.get("t"), "level": w.get("level"), "kind": w.get("warning_kind"),
                      "event": w.get("event")} for w in warnings],
        "events": sum(1 for o in result.outputs if o.kind not in (KIND_MODEL, KIND_WARNING)),
        "final": result.final,
        "output_digest": result.output_digest,
        "counters": result.counters,
        "damage": result.damage,
    }
    if compare is not None:
        out["compare"] = compare
    return out


def _cmd_replay(args: argparse.Namespace) -> int:
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.replay import compare_outputs, recorded_outputs, replay_log

    if not args.debug:  # the replay summary counts rejections; do not log each again
        logging.getLogger("wingwatch.ingest").setLevel(logging.ERROR)
    if args.incident is not None:
        from wingwatch.daemon.incident import write_incident

        if not args.out:
            from wingwatch.daemon.errors import ConfigError

            raise ConfigError("--incident needs --out DIR for the bundle.")
        s = write_incident(args.log, args.incident, args.window, args.out)
        if args.json:
            _print_json(s)
        else:
            err_console.print(f"incident bundle written to {s['out']}: slice of {s['frames']} "
                              f"frames, model in service {s['model_in_service']}, "
                              f"{len(s['warnings'])} warning events"
                              + (f", plot {s['plot']}" if s["plot"] else
                                 " (no plot: install the plotting extra)"))
        return 0
    cfg = load_config(args.config) if args.config else None
    speed = None if args.fast or args.speed is None else args.speed
    sink = None
    ctx = pub = None
    if args.publish:
        import zmq

        from wingwatch.daemon.config import load_config as _lc
        from wingwatch.daemon.service import check_binds

        pcfg = cfg or _lc()
        check_binds(pcfg, insecure=False)
        ctx = zmq.Context()
        pub = ctx.socket(zmq.PUB)
        pub.setsockopt(zmq.LINGER, 0)
        pub.bind(pcfg.endpoints.publish)

        def sink(topic: bytes, payload: bytes) -> None:
            try:
                pub.send_multipart([topic, payload], flags=zmq.NOBLOCK)
            except zmq.Again:
                pass

    prog = None
    cb = None
    if sys.stderr.isatty():
        from rich.progress import Progress

        prog = Progress(console=err_console, transient=True)
        task = prog.add_task("replaying", total=1)
        prog.start()

        def cb(done: int, total: int) -> None:
            prog.update(task, completed=done, total=max(total, 1))

    try:
        result = replay_log(args.log, config=cfg, t_from=args.t_from, t_to=args.t_to, speed=speed,
                            sink=sink, progress=cb)
    finally:
        if prog is not None:
            prog.stop()
        if pub is not None:
            pub.close()
            ctx.term()
    compare = None
    if args.compare:
        div = compare_outputs(recorded_outputs(args.log), result.outputs)
        compare = {"identical": div is None,
                   "first_divergence": None if div is None else {
                       "index": div.index, "t": div.t, "topic": div.topic, "field": div.field,
                       "recorded": repr(div.recorded), "replayed": repr(div.replayed),
                       "message": div.describe()}}
    summary = replay_summary(result, compare)
    if args.json:
        _print_json(summary)
    else:
        err_console.print(
            f"replayed {summary['samples']} samples ({summary['source_s']:.1f} s of source time) in "
            f"{summary['wall_s']:.2f} s: {summary['realtime_factor']:.0f}x real time; "
            f"{summary['models_published']} models published, {summary['models_rejected']} rejected, "
            f"{len(summary['warnings'])} warning events"
        )
        err_console.print(f"output digest {summary['output_digest']}")
        if compare is not None:
            err_console.print("compare: identical to the recorded outputs" if compare["identical"]
                              else f"compare: {compare['first_divergence']['message']}")
    if compare is not None and not compare["identical"]:
        return 1
    return 0


# --------------------------------------------------------------------------------------------
# calibrate


def _cmd_calibrate(args: argparse.Namespace) -> int:
    from wingwatch.daemon.calibrate import calibrate, load_record
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.modelfile import save_model

    cfg = load_config(args.config) if args.config else None
    cal = load_record(args.log, config=cfg)
    test = load_record(args.test, config=cfg) if args.test else None
    result = calibrate(cal, test, rank=args.rank, max_rank=args.max_rank)
    out = save_model(result.model, args.out)
    s = result.summary()
    s["model_file"] = str(out)
    if args.plot:
        s["plot"] = _calibration_plot(result, test or cal, args.plot)
    if args.json:
        _print_json(s)
        return 0
    from rich.table import Table

    con = Console(highlight=False)
    t = Table(title=f"reference model from {args.log}", show_lines=False)
    t.add_column("coefficient")
    t.add_column("output")
    t.add_column("whole manoeuvre", justify="right")
    t.add_column("± 1 sd", justify="right")
    t.add_column("point read", justify="right")
    names = {"quasi_steady": "quasi-steady /rad", "rate": "pitch rate /(rad/s)",
             "added_mass": "added mass /(rad/s^2)"}
    for key, label in names.items():
        for out_name in ("lift", "curvature"):
            t.add_row(label, "C_L" if out_name == "lift" else "kappa",
                      f"{s[key][out_name]:.5g}", f"{s['uncertainty'][key][out_name]:.2g}",
                      f"{s['point_read'][key][out_name]:.5g}")
    con.print(t)
    e = Table(title=f"normalised RMS error on the {s['errors_evaluated_on']}")
    e.add_column("rank", justify="right")
    e.add_column("C_L", justify="right")
    e.add_column("kappa", justify="right")
    e.add_column("Hankel sv", justify="right")
    for r, err in s["errors_by_rank"].items():
        hsv = s["hankel_sv"][int(r) - 1] if int(r) - 1 < len(s["hankel_sv"]) else float("nan")
        mark = "  <" if int(r) == s["rank"] else ""
        e.add_row(f"{r}{mark}", f"{100 * err['lift']:.2f} %", f"{100 * err['curvature']:.2f} %",
                  f"{hsv:.3g}")
    con.print(e)
    con.print(f"rank {s['rank']}: {s['rank_reason']}")
    c = Table(title="contributions (share of signal energy)")
    c.add_column("term")
    c.add_column("C_L", justify="right")
    c.add_column("kappa", justify="right")
    for k, v in s["contributions"].items():
        c.add_row(k.replace("_", "-"), f"{100 * v['lift']:.1f} %", f"{100 * v['curvature']:.1f} %")
    con.print(c)
    for w in s["spread_warnings"]:
        err_console.print(f"warning: {w}")
    for n in s["notes"]:
        err_console.print(f"note: {n}")
    if s.get("plot"):
        err_console.print(f"plot: {s['plot']}")
    err_console.print(f"model file: {out}")
    return 0


def _calibration_plot(result: Any, rec: Any, path: str) -> str | None:
    """Contribution plot (PNG) when the plotting extra is installed; None otherwise."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        err_console.print("note: no plot: install the plotting extra (pip install 'wingwatch[plot]')")
        return None

    from wingwatch.daemon.calibrate import contributions, find_lead_in
    from wingwatch.daemon.identify.interpretable import simulate_states

    seg = find_lead_in(rec)
    m = result.model
    X, _ = simulate_states(m.A, m.B[:, 0], rec.alpha_dot)
    parts = contributions(m, rec.alpha - seg.alpha0, rec.alpha_dot, rec.alpha_ddot, X)
    fig, axes = plt.subplots(2, 1, figsize=(9, 6), sharex=True)
    for j, (ax, name) in enumerate(zip(axes, ("C_L", "curvature (1/m)"))):
        ax.plot(rec.t, rec.y[:, j] - seg.bias[j], "k", lw=1.2, label="measured")
        ax.plot(rec.t, sum(p[:, j] for p in parts.values()), "--", color="tab:red", lw=1.0,
                label="model")
        for k, p in parts.items():
            if k != "bias":
                ax.plot(rec.t, p[:, j], lw=0.8, label=k.replace("_", "-"))
        ax.set_ylabel(name)
        ax.grid(alpha=0.3)
    axes[0].legend(ncol=3, fontsize=8)
    axes[-1].set_xlabel("t (s)")
    fig.suptitle(f"rank {m.rank} reference model: contributions")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return str(path)


# --------------------------------------------------------------------------------------------
# demo


def _cmd_demo(args: argparse.Namespace) -> int:
    from wingwatch.daemon.demo import format_summary, run_demo, summary_json

    def say(msg: str) -> None:
        err_console.print(msg, markup=False)

    res = run_demo(duration_s=args.duration, headless=args.headless, start_s=args.start_s,
                   speed=args.speed, config_path=args.config,
                   controller=not args.no_controller, say=say)
    if args.json:
        sys.stdout.write(summary_json(res) + "\n")
    else:
        sys.stdout.write(format_summary(res) + "\n")
    return 0


# --------------------------------------------------------------------------------------------
# keys


def _cmd_keys(args: argparse.Namespace) -> int:
    from wingwatch.daemon.security import make_keys

    made = make_keys(args.dir, args.client or ["source", "controller", "monitor"], args.name)
    if args.json:
        _print_json(made)
        return 0
    err_console.print(f"made CurveZMQ key pairs in {made['directory']}:")
    for name, k in made["keys"].items():
        err_console.print(f"  {name}: public {k['public']}, secret {k['secret']}")
    err_console.print(f"allowed clients (the daemon's allow-list): {made['allowed']}")
    err_console.print("turn it on in the daemon's configuration:\n"
                      f"  [security]\n  curve = true\n"
                      f"  server_key = \"{made['keys'][args.name]['secret']}\"\n"
                      f"  allowed_clients = \"{made['allowed']}\"")
    err_console.print("Give each client its own .key_secret and the daemon's public .key; keep "
                      "secret files private.")
    return 0


# --------------------------------------------------------------------------------------------


def _not_yet(name: str, issue: str) -> Callable[[argparse.Namespace], int]:
    def run(args: argparse.Namespace) -> int:
        err_console.print(f"wingwatch {name}: not yet available in this version ({issue}).")
        return 2

    run.placeholder = True  # type: ignore[attr-defined]
    return run


def _add_rig(sub: argparse._SubParsersAction) -> None:
    try:
        from wingwatch.daemon.rig import cli as rig_cli  # the virtual rig
    except ImportError:
        p = sub.add_parser("rig", help="virtual rig (not yet available)")
        p.set_defaults(func=_not_yet("rig", "the virtual rig is being built"))
        return
    p = sub.add_parser("rig", help="run the virtual rig: a simulated flexible plate that streams "
                                   "like a tunnel DAQ",
                       description="Run the virtual rig (a physics-based flexible-plate simulator).")
    rig_cli.configure_parser(p)
    p.set_defaults(func=rig_cli.run)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="wingwatch",
        description=(
            "Data acquisition and online identification for flexible-wing tunnel tests. "
            + ADVISORY_LINE
        ),
    )
    parser.add_argument("--version", action="version", version=f"wingwatch {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("run", help="run the daemon: ingest, record, identify, watch, publish",
                       description="Run the wingwatch daemon until Ctrl-C (or --duration).")
    p.add_argument("--config", metavar="FILE", help="configuration file (TOML) laid over the "
                   "shipped default")
    p.add_argument("--print-config", action="store_true", help="print the resolved configuration "
                   "as TOML and exit")
    p.add_argument("--duration", type=float, metavar="S", help="stop after S seconds of wall time")
    p.add_argument("--model", metavar="FILE", help="reference model file from 'wingwatch calibrate' "
                   "(default: identify.reference_model; none: run cold)")
    p.add_argument("--record-dir", metavar="DIR", help="record into DIR instead of recorder.directory")
    p.add_argument("--resume", metavar="RUN_DIR", help="restart a killed daemon: continue its run's "
                   "log in a new segment and its identification from the last checkpoint")
    p.add_argument("--no-record", action="store_true", help="do not write a replay log")
    p.add_argument("--insecure", action="store_true", help="allow binding beyond loopback "
                   "without authentication (logged loudly)")
    p.add_argument("--json", action="store_true", help="print the final summary as one JSON object")
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("inspect", help="summarise a replay log",
                       description="Summarise a replay log: counts, gaps, rejections, damage.")
    p.add_argument("log", metavar="LOG", help="a log segment (.wwlog) or a run directory")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_cmd_inspect)

    p = sub.add_parser("replay", help="replay a recorded run through the same pipeline",
                       description="Replay a recorded run through the same pipeline as the live "
                                   "daemon; deterministic: same log and configuration, same outputs.")
    p.add_argument("log", metavar="LOG", help="a log segment (.wwlog) or a run directory")
    p.add_argument("--from", dest="t_from", type=float, metavar="T", help="start at source time T (s)")
    p.add_argument("--to", dest="t_to", type=float, metavar="T", help="stop at source time T (s)")
    pace = p.add_mutually_exclusive_group()
    pace.add_argument("--fast", action="store_true", help="as fast as possible (the default)")
    pace.add_argument("--speed", type=float, metavar="X", help="pace at X times real time")
    p.add_argument("--config", metavar="FILE", help="replay with this configuration instead of the "
                   "recorded one")
    p.add_argument("--publish", action="store_true", help="also publish the outputs on the publish "
                   "endpoint (for a monitor or a controller)")
    p.add_argument("--compare", action="store_true", help="compare the outputs with the recorded "
                   "ones; exit 1 on a divergence")
    p.add_argument("--incident", type=float, metavar="T", help="write an incident bundle around "
                   "source time T (needs --out)")
    p.add_argument("--window", type=float, default=10.0, metavar="S", help="half-width of the "
                   "incident window, s (default 10)")
    p.add_argument("--out", metavar="DIR", help="folder for the incident bundle")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_cmd_replay)

    p = sub.add_parser("calibrate", help="identify the reference model from a pitch-up manoeuvre",
                       description="Identify the interpretable reference model (quasi-steady, "
                                   "pitch-rate and added-mass columns plus an ERA transient) from a "
                                   "replay log of a pitch-up manoeuvre.")
    p.add_argument("log", metavar="LOG", help="log of the pitch-up manoeuvre (quiet, ramp, hold)")
    p.add_argument("--test", metavar="LOG", help="a separate test manoeuvre to score ranks on")
    p.add_argument("--out", metavar="MODEL", default="reference.wwmodel.json",
                   help="model file to write (default: reference.wwmodel.json)")
    p.add_argument("--rank", type=int, help="use this rank instead of choosing one")
    p.add_argument("--max-rank", type=int, default=12, help="largest rank tried (default 12)")
    p.add_argument("--config", metavar="FILE", help="channel map to use instead of the log's")
    p.add_argument("--plot", metavar="PNG", help="also write a contribution plot (plotting extra)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_cmd_calibrate)

    p = sub.add_parser("demo", help="the whole system on the virtual rig (rig, daemon, controller, "
                                    "monitor)",
                       description="Run the virtual rig's campaign into the daemon with the example "
                                   "controller flying the rig in closed loop and the terminal "
                                   "monitor, all on loopback. " + ADVISORY_LINE)
    p.add_argument("--duration", type=float, metavar="S", help="stop after S seconds and print a "
                   "summary")
    p.add_argument("--headless", action="store_true", help="no monitor (for scripts and CI)")
    p.add_argument("--no-controller", action="store_true", help="leave the example controller out: "
                   "the rig flies the scenario's motion open loop")
    p.add_argument("--from", dest="start_s", type=float, metavar="S", help="join the campaign at "
                   "source time S (default: 20 s before its first scripted event)")
    p.add_argument("--speed", type=float, default=1.0, metavar="X", help="pace the rig at X times "
                   "real time (default 1)")
    p.add_argument("--config", metavar="FILE", help="configuration laid over the shipped default")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    p.set_defaults(func=_cmd_demo)

    p = sub.add_parser("keys", help="create CurveZMQ key pairs for the daemon and its clients",
                       description="Create CurveZMQ key pairs: one for the daemon, one per client, "
                                   "and the allow-list folder of client public keys.")
    p.add_argument("--dir", default="keys", help="where to write them (default: keys)")
    p.add_argument("--name", default="daemon", help="the daemon's key name (default: daemon)")
    p.add_argument("--client", action="append", metavar="NAME",
                   help="a client key to make (repeatable; default: source, controller, monitor)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_cmd_keys)

    _add_rig(sub)
    from wingwatch.clients import monitor as monitor_cli  # the terminal monitor
    p = sub.add_parser("monitor", help="terminal monitor: link, coefficients, modes, curvature "
                       "margin and live warnings at a glance",
                       description="Follow a running daemon (or a published replay) on one "
                                   "terminal screen. " + ADVISORY_LINE)
    monitor_cli.configure_parser(p)
    p.set_defaults(func=monitor_cli.run)
    for name, text, issue in (
    ):
        p = sub.add_parser(name, help=f"{text} (not yet available)")
        p.set_defaults(func=_not_yet(name, issue))
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.debug else logging.WARNING,
        format="wingwatch: %(levelname)s %(name)s: %(message)s",
    )
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args.func(args) or 0)
    except WingwatchError as exc:
        if args.debug:
            raise
        err_console.print(f"wingwatch {args.command}: error: {exc}", markup=False)
        return 2
    except OSError as exc:
        if args.debug:
            raise
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        err_console.print(f"wingwatch {args.command}: error: {exc.strerror or exc}{where}", markup=False)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
