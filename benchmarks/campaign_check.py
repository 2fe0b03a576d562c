"""Score the watchers on the virtual rig's whole campaign against the rig's truth.

Runs the campaign scenario through the rig (log and truth), calibrates the reference model on
the rig's calibration-5deg and test-manoeuvre scenarios (as the demo does), replays the log
through the daemon's pipeline, and reports for every scripted event the first structural or
sensor warning after it (kind, delay), the warnings raised before the first event (false
alarms), and, for the creep, how long before the rig's true curvature reached the limit the
first curvature-margin warning came. A script, not a test: it takes several minutes.

    python benchmarks/campaign_check.py [--duration S] [--seed N] [--config FILE] [--out DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import check_setup  # noqa: E402

import numpy as np  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--duration", type=float, default=None, help="seconds of the campaign")
    ap.add_argument("--seed", type=int, default=None)
    ap.add_argument("--config", default=None, metavar="FILE",
                    help="daemon configuration to run with (default: the shipped one), e.g. other "
                         "[watch] thresholds")
    ap.add_argument("--out", default=None, help="folder for the log, truth and results")
    a = ap.parse_args(argv)

    from wingwatch.daemon.codec import SensorFrame, decode_message, encode_sensor_frame
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.replaylog import KIND_WARNING
    from wingwatch.daemon.rig.scenario import load_scenario
    from wingwatch.daemon.rig.source import VirtualRig
    from wingwatch.daemon.service import make_pipeline, record_frames

    t0 = time.perf_counter()
    out, cfg, ref = check_setup(a.out, a.config, "ww-campaign-")
    rig = VirtualRig(load_scenario("campaign"), seed=a.seed, duration_s=a.duration)
    kappa_true, t_true = [], []

    def msgs():
        for f in rig.frames():
            kappa_true.append(np.asarray(f.truth["kappa_root"]))
            t_true.append(np.asarray(f.truth["t"]))
            fr = SensorFrame("rig", f.seq, f.t0, rig.rate_hz, rig.channels, f.samples)
            yield (*encode_sensor_frame(fr), f.t0)

    log = out / "campaign.wwlog"
    record_frames(msgs(), cfg, log)
    t_rig = time.perf_counter() - t0
    res = replay_log(log, pipeline_factory=lambda c: make_pipeline(c, ref))
    warns = [decode_message(o.payload) for o in res.outputs if o.kind == KIND_WARNING]
    raised = [w for w in warns if w["event"] == "raised"]
    ev = sorted((float(e["t_s"]), str(e["kind"])) for e in rig.events)
    first_t = ev[0][0] if ev else float("inf")
    structural = ("coefficient_drift", "mode_drift", "stale_model", "sensor_health",
                  "damping_trend")
    rows = []
    for i, (t, kind) in enumerate(ev):
        t_next = ev[i + 1][0] if i + 1 < len(ev) else float("inf")
        hits = [w for w in raised if t <= w["t"] < t_next and w["warning_kind"] in structural]
        rows.append({"event": kind, "t": t,
                     "first_warning": (hits[0]["warning_kind"] + ":" + hits[0]["quantity"]) if hits else None,
                     "delay_s": (hits[0]["t"] - t) if hits else None,
                     "kinds": sorted({h["warning_kind"] for h in hits})})
    false_alarms = [w for w in raised if w["t"] < first_t and w["warning_kind"] in structural]
    kap = np.abs(np.concatenate(kappa_true)) if kappa_true else np.zeros(0)
    tt = np.concatenate(t_true) if t_true else np.zeros(0)
    limit = cfg.outputs.curvature.limit_per_m
    over = np.flatnonzero(kap >= limit)
    t_limit = float(tt[over[0]]) if over.size else None
    margin = [w for w in raised if w["warning_kind"] == "curvature_margin"]
    lead = None
    if t_limit is not None:
        before = [w for w in margin if w["t"] <= t_limit and w["t"] > t_limit - 60]
        lead = (t_limit - before[0]["t"]) if before else None
    summary = {"duration_s": res.source_s, "replay_realtime_factor": res.realtime_factor,
               "rig_and_calibration_s": t_rig, "events": rows,
               "false_alarms_before_first_event": [(w["t"], w["warning_kind"], w["quantity"])
                                                   for w in false_alarms],
               "true_limit_crossing_t": t_limit, "margin_warning_lead_s": lead,
               "margin_warnings": len(margin)}
    (out / "campaign_check.json").write_text(json.dumps(summary, indent=1, default=float))
    print(json.dumps(summary, indent=1, default=float))
    return 0


if __name__ == "__main__":
    sys.exit(main())
