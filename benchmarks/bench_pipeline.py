"""Ingest-to-publish throughput of the full pipeline, in process, from a replay log.

The log comes from ``wingwatch rig --scenario random-pitch --out LOG`` at 1 kHz and, with
``--rate 10000``, at 10 kHz (both cached outside the repository). Each is replayed as fast as
possible twice with :func:`wingwatch.daemon.replay.replay_log`:

- baseline: the ingest-only :class:`wingwatch.daemon.pipeline.Pipeline` (decode, sequence
  checks, channel map; nothing downstream);
- full, one record at a time: the same pipeline as below, records handed over singly (what
  replay did before it batched, and what the live daemon does);
- full: ``make_pipeline(config, reference)`` (the daemon's pipeline with the online identifier),
  the reference calibrated from the two shipped logs (carried to 10 kHz by exact zero-order-hold
  resampling of (A, B)). At 10 kHz ``identify.decimate`` is raised from 20 to 200 so that the
  slow layer sees the same 50 Hz decimated rate as at 1 kHz (with 20 its Markov fit would have
  ten times the lags; that setting is a configuration choice, not measured here).

Reported: samples/s, the real-time factor (source time / wall time) and the full pipeline's speed
as a fraction of the ingest-only one. A cProfile run of the full 1 kHz replay splits the time
into log reading, ingest, channel map, conditioning (Savitzky-Golay filters), fast layer
(transient states and RLS), slow layer (Markov fit, ERA, basis transfer, model message) and
output encoding, and lists the functions with the most own time.

Run:  python benchmarks/bench_pipeline.py [--quick]   (or python -m benchmarks --only pipeline)
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import cProfile  # noqa: E402
import pstats  # noqa: E402
import sys  # noqa: E402
from dataclasses import replace  # noqa: E402
from pathlib import Path  # noqa: E402

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import reference_at_rate, rig_log, table, target  # noqa: E402
from wingwatch.daemon.replay import REPLAY_BATCH, config_of_log, replay_log  # noqa: E402
from wingwatch.daemon.service import make_pipeline  # noqa: E402

__all__ = ["run", "main", "config_for_rate", "profile_breakdown"]


def config_for_rate(path, rate_hz: float):
    """The log's configuration, with the slow layer's decimation scaled to keep 50 Hz."""
    cfg = config_of_log(path)
    if rate_hz != 1000.0:
        ident = dict(cfg.identify)
        ident["decimate"] = int(round(20 * rate_hz / 1000.0))
        cfg = replace(cfg, identify=ident)
    return cfg


def _replay(path, cfg, full: bool, ref, batch: int | None = None):
    """One replay; ``batch`` overrides the records handed over at once (1: one at a time)."""
    factory = (lambda c: make_pipeline(c, ref)) if full else None
    return replay_log(path, config=cfg, pipeline_factory=factory, batch=batch)


def _cum(stats: pstats.Stats, suffix: str, func: str, caller: tuple[str, str] | None = None) -> float:
    """Cumulative time of ``func`` in files ending ``suffix`` (only calls from ``caller``)."""
    total = 0.0
    for (fn, _line, name), (_cc, _nc, _tt, ct, callers) in stats.stats.items():
        if not (fn.replace("\\", "/").endswith(suffix) and name == func):
            continue
        if caller is None:
            total += ct
            continue
        for (cfn, _cl, cname), val in callers.items():
            if cfn.replace("\\", "/").endswith(caller[0]) and cname == caller[1]:
                total += val[3]
    return total


#: Pipeline methods that call the stages (ingest, channel map, identifier, watcher) directly.
_STAGE_CALLERS = ("process", "process_many", "_run_stages")


def _stage_times(stats: pstats.Stats) -> list[tuple[str, float]]:
    """Time of everything the pipeline calls directly (the stages), largest first."""
    out = []
    for (fn, line, name), (_cc, _nc, _tt, _ct, callers) in stats.stats.items():
        path = fn.replace("\\", "/")
        if path.endswith("daemon/pipeline.py") or "/daemon/" not in path:
            continue  # the pipeline's own methods calling each other; numpy helpers
        for (cfn, _cl, cname), val in callers.items():
            if (cfn.replace("\\", "/").endswith("daemon/pipeline.py")
                    and cname in _STAGE_CALLERS):
                short = "/".join(Path(fn).parts[-2:]) if fn.startswith("/") else fn
                out.append((f"{short} {name}", val[3]))
    return sorted(out, key=lambda kv: kv[1], reverse=True)


_PROCESS = ("daemon/identifier.py", "_process")


def profile_breakdown(path, cfg, ref, top: int = 12) -> tuple[list[list], list[list], dict]:
    """Profile one full replay; (breakdown rows, top own-time rows, summary)."""
    prof = cProfile.Profile()
    prof.enable()
    res = _replay(path, cfg, True, ref)
    prof.disable()
    stats = pstats.Stats(prof)
    total = stats.total_tt
    inbound = (_cum(stats, "daemon/pipeline.py", "inbound_many")
               + _cum(stats, "daemon/pipeline.py", "inbound", ("daemon/pipeline.py",
                                                                  "replay_record")))
    parts: list[tuple[str, float]] = [
        ("log reading and replay loop (outside Session.inbound_many)", total - inbound),
        ("output encoding and sink (Session.emit)", _cum(stats, "daemon/pipeline.py", "emit")),
    ]
    for label, v in _stage_times(stats):
        if v >= 0.002 * total:
            parts.append((f"stage: {label}", v))
    ident = [
        ("  identifier: conditioning (Savitzky-Golay, delay line)",
         _cum(stats, "identify/differentiate.py", "update", _PROCESS)),
        ("  identifier: fast layer, transient states (simulate_states)",
         _cum(stats, "identify/interpretable.py", "simulate_states", _PROCESS)),
        ("  identifier: fast layer, RLS update",
         _cum(stats, "identify/rls.py", "update", _PROCESS)),
        ("  identifier: slow layer (_slow_update snapshot + _finish_job: Markov, ERA, basis "
         "transfer, catch-up, model)",
         _cum(stats, "daemon/identifier.py", "_slow_update", _PROCESS)
         + _cum(stats, "daemon/identifier.py", "_finish_job", _PROCESS)),
    ]
    parts += ident
    rows = [[label, v * 1e3, 100 * v / total] for label, v in parts]
    rows.append(["total (profiled)", total * 1e3, 100.0])
    own = sorted(stats.stats.items(), key=lambda kv: kv[1][2], reverse=True)[:top]
    top_rows = []
    for (fn, line, name), (_cc, nc, tt, ct, _c) in own:
        short = "/".join(Path(fn).parts[-2:]) if fn.startswith("/") else fn
        top_rows.append([f"{short}:{line} {name}", nc, tt * 1e3, 100 * tt / total, ct * 1e3])
    stage_rows = [r for r in rows if r[0].startswith("stage:")]
    dominant = max(stage_rows or rows[:-1], key=lambda r: r[1])
    summary = {"profile_total_ms": total * 1e3, "profile_samples": res.samples,
               "dominant_part": dominant[0], "dominant_share_pct": dominant[2],
               "top_own_time_function": top_rows[0][0] if top_rows else None}
    return rows, top_rows, summary


def run(quick: bool = False) -> dict:
    import scipy.stats  # noqa: F401  -- imported lazily by the first model message (about 2 s
    # once per process, cold); imported here so that the replays measure the steady state
    cases = [(1000.0, 12.0 if quick else 60.0), (10000.0, 2.0 if quick else 20.0)]
    rows, summary, targets = [], {}, []
    first = None
    for rate, seconds in cases:
        path = rig_log("random-pitch", rate, seconds)
        cfg = config_for_rate(path, rate)
        ref = reference_at_rate(rate)
        base = _replay(path, cfg, False, ref)
        single = _replay(path, cfg, True, ref, batch=1)
        full = _replay(path, cfg, True, ref)
        if [o.payload for o in single.outputs] != [o.payload for o in full.outputs]:
            raise RuntimeError("the batched replay's outputs differ from one record at a time")
        n_models = sum(1 for o in full.outputs if o.topic.startswith(b"ww.model"))
        for label, r in (("ingest only (Pipeline)", base),
                         ("full, one record at a time", single),
                         (f"full (make_pipeline), records in batches of {REPLAY_BATCH}",
                          full)):
            rows.append([f"{rate / 1000:g} kHz", label, r.samples, r.source_s, r.wall_s,
                         r.samples / r.wall_s, r.realtime_factor,
                         (r.samples / r.wall_s) / (base.samples / base.wall_s)])
        key = f"{rate / 1000:g}khz"
        summary[f"full_rtf_{key}"] = full.realtime_factor
        summary[f"full_single_rtf_{key}"] = single.realtime_factor
        summary[f"batching_speedup_{key}"] = single.wall_s / full.wall_s
        summary[f"ingest_rtf_{key}"] = base.realtime_factor
        summary[f"full_samples_per_s_{key}"] = full.samples / full.wall_s
        summary[f"full_over_ingest_{key}"] = base.wall_s / full.wall_s
        summary[f"model_messages_{key}"] = n_models
        if first is None:
            first = (path, cfg, ref)
            summary["stages"] = [type(st).__name__ for st in full.session.pipeline.stages]
    targets.append(target("full pipeline real-time factor at 1 kHz (one core)",
                          summary["full_rtf_1khz"], 300.0))
    prof_rows, top_rows, prof_sum = profile_breakdown(*first)
    summary.update(prof_sum)
    tables = [
        table("replay throughput, random-pitch rig log (replay_log, as fast as possible)",
              ["rate", "pipeline", "samples", "source s", "wall s", "samples/s", "x real time",
               "speed / ingest-only"], rows),
        table("where the full 1 kHz replay spends its time (cProfile, cumulative per part)",
              ["part", "ms", "% of total"], prof_rows),
        table("functions with the most own time (cProfile tottime)",
              ["function", "calls", "own ms", "% of total", "cumulative ms"], top_rows),
    ]
    notes = ["Replay as fast as possible hands records to the pipeline in batches "
             "(Session.replay_records): the same verdicts and outputs as one at a time (checked "
             "here on every run: the outputs of both replays are compared byte for byte), "
             "without the per-frame work of the channel map and the stages.",
             "cProfile adds overhead per Python call, so the profiled total exceeds the plain "
             "replay's wall time; the shares are what matters.",
             "Stages in the full pipeline: " + ", ".join(summary["stages"]) + ".",
             "The first model message imports scipy.stats (rls.intervals), about 2 s once per "
             "process; it is imported before the replays and is not in these figures.",
             "At 10 kHz identify.decimate = 200 (same 50 Hz decimated rate as 20 at 1 kHz)."]
    return {"name": "pipeline", "title": "ingest-to-publish throughput from a replay log",
            "tables": tables, "summary": summary, "targets": targets, "notes": notes}


def main(argv: list[str] | None = None) -> int:
    from benchmarks.run import main as run_main

    return run_main(["--only", "pipeline", *(argv if argv is not None else sys.argv[1:])])


if __name__ == "__main__":
    raise SystemExit(main())
