"""Count drift alarms on long stationary runs of the virtual rig (accelerated replay).

For each seed, the rig's ``stationary`` scenario (configs/scenarios/stationary.toml: a steady
5 deg operating point with light random pitching and no event) is run for ``--duration``
seconds (30 min by default) into a log, and the log is replayed through the daemon's pipeline
(``service.make_pipeline`` with the reference model calibrated on the rig, as
``benchmarks/campaign_check.py`` and the demo obtain it). Nothing changes in these runs, so
every drift alarm is a false alarm: the design target (docs/watch.md) is at most one for the
whole set of drift statistics in ``watch.false_alarm_per_hours`` (8 h) of stationary running,
so 5 x 30 min at the default thresholds should give none. Counted per seed: raised
coefficient-drift, mode-drift and stale-model warnings (the drift alarms), and, for
information, every other warning kind raised. A script, not a test: it takes several minutes
per seed.

    python benchmarks/stationary_check.py [--seeds 1,2,3,4,5] [--duration S] [--config FILE]
                                          [--out DIR] [--keep-logs]

Prints a table and writes ``stationary_check.json`` in ``--out``.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from collections import Counter
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import check_setup  # noqa: E402

DRIFT_KINDS = ("coefficient_drift", "mode_drift", "stale_model")


def run_seed(seed: int, duration: float, ref, cfg, out: Path, keep: bool) -> dict:
    """One stationary run: rig log, replay, warning counts."""
    from wingwatch.daemon.codec import decode_message
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.replaylog import KIND_WARNING
    from wingwatch.daemon.rig.scenario import load_scenario
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log
    from wingwatch.daemon.service import make_pipeline

    log = out / f"stationary-seed{seed}.wwlog"
    t0 = time.perf_counter()
    write_rig_log(VirtualRig(load_scenario("stationary"), seed=seed, duration_s=duration), log, cfg)
    t_rig = time.perf_counter() - t0
    res = replay_log(log, pipeline_factory=lambda c: make_pipeline(c, ref))
    warns = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WARNING]
    raised = [w for w in warns if w["event"] == "raised"]
    by_kind = Counter(w["warning_kind"] for w in raised)
    drift = [w for w in raised if w["warning_kind"] in DRIFT_KINDS]
    if not keep:
        log.unlink(missing_ok=True)
    return {
        "seed": seed, "duration_s": res.source_s, "rig_s": t_rig, "replay_s": res.wall_s,
        "replay_realtime_factor": res.realtime_factor,
        "drift_alarms": len(drift),
        "by_kind": {k: by_kind.get(k, 0) for k in DRIFT_KINDS},
        "other_warnings": {k: v for k, v in sorted(by_kind.items()) if k not in DRIFT_KINDS},
        "drift_alarm_list": [(round(w["t"], 3), w["warning_kind"], w["quantity"], w["message"])
                             for w in drift],
        "models_accepted": int(getattr(res.session.pipeline.stages[0], "accepted", 0)),
        "models_rejected": int(getattr(res.session.pipeline.stages[0], "rejections", 0)),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="1,2,3,4,5", help="comma-separated rig seeds")
    ap.add_argument("--duration", type=float, default=1800.0, help="seconds per seed")
    ap.add_argument("--config", default=None, metavar="FILE",
                    help="daemon configuration to run with (default: the shipped one), e.g. other "
                         "[watch] thresholds")
    ap.add_argument("--out", default=None, help="folder for the reference, logs and results")
    ap.add_argument("--keep-logs", action="store_true", help="keep the rig logs (about 70 MB each)")
    a = ap.parse_args(argv)

    from wingwatch.daemon.watch.stage import WatchSettings

    seeds = [int(s) for s in a.seeds.split(",") if s.strip()]
    out, cfg, ref = check_setup(a.out, a.config, "ww-stationary-")
    rows = []
    for seed in seeds:
        r = run_seed(seed, a.duration, ref, cfg, out, a.keep_logs)
        rows.append(r)
        print(f"seed {seed}: {r['drift_alarms']} drift alarms {r['by_kind']} "
              f"(replay {r['replay_realtime_factor']:.1f}x real time)", file=sys.stderr, flush=True)
    s = WatchSettings.from_config(cfg)
    summary = {
        "scenario": "stationary", "duration_s_per_seed": a.duration, "seeds": seeds,
        "false_alarm_per_hours": s.false_alarm_per_hours, "cusum_k": s.cusum_k,
        "total_drift_alarms": sum(r["drift_alarms"] for r in rows),
        "hours_replayed": sum(r["duration_s"] for r in rows) / 3600.0,
        "runs": rows,
    }
    (out / "stationary_check.json").write_text(json.dumps(summary, indent=1, default=float))
    head = f"{'seed':>5} {'minutes':>8} {'coef':>5} {'mode':>5} {'stale':>6} {'total':>6}  other warnings"
    print(head)
    print("-" * len(head))
    for r in rows:
        k = r["by_kind"]
        other = ", ".join(f"{n} {c}" for n, c in r["other_warnings"].items()) or "-"
        print(f"{r['seed']:>5} {r['duration_s'] / 60:>8.1f} {k['coefficient_drift']:>5} "
              f"{k['mode_drift']:>5} {k['stale_model']:>6} {r['drift_alarms']:>6}  {other}")
        for t, kind, q, _msg in r["drift_alarm_list"]:
            print(f"{'':>5} t = {t:.1f} s {kind} {q}")
    print(f"total drift alarms: {summary['total_drift_alarms']} in "
          f"{summary['hours_replayed']:.2f} h (design: at most one per "
          f"{s.false_alarm_per_hours:g} h over all drift statistics); results in "
          f"{out / 'stationary_check.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
