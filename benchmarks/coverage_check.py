"""Coverage of the identifier's 95 % coefficient intervals over seeds of stationary rig data.

For each seed, the rig's ``stationary`` scenario (configs/scenarios/stationary.toml: 5 deg, light
random pitching, no event; 120 s by default) is run into a log and replayed through the daemon's
pipeline (``service.make_pipeline`` with the reference calibrated on the rig, as the demo does).
The last model published (accepted or in service) gives every interpretable coefficient
(quasi-steady, rate, added mass; lift and curvature) with its 95 % interval. The rig's long-run
value of a coefficient under this excitation is taken as its mean over the seeds (the rig holds
every parameter fixed, so the seeds differ only in noise and excitation); the check counts how
often the intervals contain it. The issue's target band for a 95 % interval is 85-100 %
(a binomial band on 120 cases is about +-4 %; the seed mean itself carries a scatter of
sd / sqrt(seeds), which this count ignores, so it slightly overstates coverage).

``--same-manoeuvre`` flies one manoeuvre (motion seed 14, the scenario's) in every run, so that
only the sensor noise differs between seeds; by default the random-pitching phases differ too.
``--config FILE`` runs it with other identification settings (rank, forgetting, intervals). A
script, not a test: about 6 s per seed.

    python benchmarks/coverage_check.py [--seeds 20] [--duration S] [--same-manoeuvre]
                                        [--config FILE] [--out DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402

from benchmarks import check_setup  # noqa: E402

COEFS = ("quasi_steady", "rate", "added_mass")
OUTS = ("lift", "curvature")


def last_model(outputs) -> dict | None:
    from wingwatch.daemon.codec import decode_message
    from wingwatch.daemon.replaylog import KIND_MODEL

    best = None
    for o in outputs:
        if o.kind == KIND_MODEL:
            m = decode_message(o.payload)
            if m.get("status") in ("accepted", "reference") and m.get("intervals"):
                best = m
    return best


def run_seed(seed: int, duration: float, ref, cfg, out: Path, motion_seed: int | None = None
             ) -> dict | None:
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.rig.scenario import load_scenario
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log
    from wingwatch.daemon.service import make_pipeline

    log = out / f"coverage-seed{seed}.wwlog"
    rig = VirtualRig(load_scenario("stationary"), seed=seed, duration_s=duration,
                     motion_seed=motion_seed)
    write_rig_log(rig, log, cfg)
    res = replay_log(log, config=cfg, pipeline_factory=lambda c: make_pipeline(c, ref))
    log.unlink(missing_ok=True)
    m = last_model(res.outputs)
    if m is None:
        return None
    return {"seed": seed, "model_id": m["model_id"], "rank": m.get("rank"),
            "value": {f"{k}.{o}": m["coefficients"][k][o] for k in COEFS for o in OUTS},
            "interval": {f"{k}.{o}": m["intervals"][k][o] for k in COEFS for o in OUTS}}


def coverage(rows: list[dict]) -> dict:
    keys = list(rows[0]["value"])
    per, hits, total = {}, 0, 0
    for k in keys:
        vals = np.array([r["value"][k] for r in rows])
        mean = float(vals.mean())
        inside = [r["interval"][k][0] <= mean <= r["interval"][k][1] for r in rows]
        half = np.array([(r["interval"][k][1] - r["interval"][k][0]) / 2 for r in rows])
        per[k] = {"long_run": mean, "sd_over_seeds": float(vals.std(ddof=1)),
                  "mean_half_width": float(half.mean()),
                  "sd_implied_by_intervals": float(half.mean() / 1.96),
                  "covered": int(sum(inside)), "cases": len(inside)}
        hits += sum(inside)
        total += len(inside)
    return {"coverage": hits / total if total else float("nan"), "cases": total, "per": per}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20, help="number of rig seeds (1..N)")
    ap.add_argument("--duration", type=float, default=120.0, help="seconds per seed")
    ap.add_argument("--same-manoeuvre", action="store_true",
                    help="one manoeuvre for every seed: only the sensor noise differs")
    ap.add_argument("--config", default=None, metavar="FILE", help="daemon configuration")
    ap.add_argument("--out", default=None, help="folder for the reference and results")
    a = ap.parse_args(argv)


    out, cfg, ref = check_setup(a.out, a.config, "ww-coverage-")
    rows = []
    for seed in range(1, a.seeds + 1):
        r = run_seed(seed, a.duration, ref, cfg, out, 14 if a.same_manoeuvre else None)
        if r is None:
            print(f"seed {seed}: no model with intervals was published", file=sys.stderr)
            continue
        rows.append(r)
        print(f"seed {seed}: model {r['model_id']} rank {r['rank']}", file=sys.stderr, flush=True)
    if len(rows) < 2:
        print("fewer than two seeds gave a model; nothing to score", file=sys.stderr)
        return 1
    cov = coverage(rows)
    summary = {"scenario": "stationary", "duration_s": a.duration, "seeds": len(rows),
               "same_manoeuvre": a.same_manoeuvre, "config": a.config, **cov, "runs": rows}
    (out / "coverage_check.json").write_text(json.dumps(summary, indent=1, default=float))
    print(f"{'coefficient':<24} {'long-run':>10} {'sd seeds':>10} {'sd claimed':>10} {'covered':>8}")
    for k, p in cov["per"].items():
        print(f"{k:<24} {p['long_run']:>10.4g} {p['sd_over_seeds']:>10.3g} "
              f"{p['sd_implied_by_intervals']:>10.3g} {p['covered']:>4}/{p['cases']:<3}")
    print(f"95 % intervals containing the long-run value: {100 * cov['coverage']:.0f} % of "
          f"{cov['cases']} (target 85-100 %); results in {out / 'coverage_check.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
