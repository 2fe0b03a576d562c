"""The identified first bending frequency across a -15 % stiffness step, against the rig's own.

Runs the rig's ``stiff-strip`` scenario (a 1.5 mm strip whose first bending mode rings in the
stream at about 6.4 Hz, damping ratio about 0.26; broadband pitching 0.1-10 Hz at 5 deg;
bending stiffness times 0.85 in one step at 60 s) for several seeds and replays each through the
daemon's pipeline with the shipped configuration (its strain-to-curvature thickness set to the
strip's), starting from a reference model calibrated on the same strip with the demo's two
manoeuvres (``calibration-5deg``, ``test-manoeuvre``, article replaced).

The identifier's first bending mode in each accepted model is the oscillatory mode (damping ratio
below 0.5) with the largest participation in the curvature output: the structural mode that
dominates the bending signal, picked without looking at the truth. The rig's value before and
after the step comes from a simulated free decay at the operating point
(:func:`wingwatch.daemon.rig.ringdown.first_bending_in_flow`: the plate plucked in the stream and
a damped oscillation fitted with scipy's ``curve_fit``), natural frequency in both.

Reported per seed: the error of the last accepted model before the step against the old value,
the time after the step from which every accepted model's first bending frequency stays within
2 % of the new value (the convergence time; the target is under 20 s), and the error at the end.
A script, not a test (about 8 s per seed); tests/test_stiffness_step.py runs one shortened seed.

    python benchmarks/stiffness_step_check.py [--seeds 5] [--config FILE] [--out DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from dataclasses import replace
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402

SCENARIO = "stiff-strip"
TOLERANCE = 0.02     # issue 6: within 2 % of the rig's new value
WITHIN_S = 20.0      # issue 6: in under 20 s of data
MAX_DAMPING = 0.5    # an oscillatory mode (the rig's own mode has about 0.26-0.28)


def strip_config(cfg, article):
    """``cfg`` reading the strain of ``article``: the curvature's thickness set to the strip's."""
    curv = replace(cfg.outputs.curvature, thickness_m=float(article.thickness_m))
    return replace(cfg, outputs=replace(cfg.outputs, curvature=curv))


def strip_reference(folder: Path, cfg, article, say=lambda m: None):
    """A reference model calibrated on ``article`` with the demo's two manoeuvres (cached in
    ``folder``, as the demo caches its own)."""
    from wingwatch.daemon.demo import ensure_reference
    from wingwatch.daemon.modelfile import load_model

    return load_model(ensure_reference(folder, cfg, say=say, article=article))


def first_bending(model: dict) -> dict | None:
    """The model's oscillatory mode with the largest curvature participation (None if none)."""
    best = None
    for m in model.get("modes") or []:
        if not (0.0 < m["damping"] < MAX_DAMPING and np.isfinite(m["freq_hz"])):
            continue
        if best is None or m["participation"][1] > best["participation"][1]:
            best = m
    return best


def bending_track(outputs) -> list[dict]:
    """(t, model id, first bending frequency and damping) of every accepted or reference model."""
    from wingwatch.daemon.codec import decode_message
    from wingwatch.daemon.replaylog import KIND_MODEL

    track = []
    for o in outputs:
        if o.kind != KIND_MODEL:
            continue
        m = decode_message(o.payload)
        if m.get("status") not in ("accepted", "reference"):
            continue
        b = first_bending(m)
        track.append({"t": float(m["t"]), "model_id": m["model_id"],
                      "freq_hz": float(b["freq_hz"]) if b else float("nan"),
                      "damping": float(b["damping"]) if b else float("nan")})
    return track


def score(track: list[dict], t_step: float, before_hz: float, after_hz: float,
          tol: float = TOLERANCE) -> dict:
    """Error before the step, convergence time after it, error at the end (fractions)."""
    pre = [r for r in track if r["t"] <= t_step]
    post = [r for r in track if r["t"] > t_step]
    err_before = (pre[-1]["freq_hz"] / before_hz - 1.0) if pre else float("nan")
    converged_at = None
    for i, r in enumerate(post):  # the first accepted model from which all stay within tol
        if all(abs(q["freq_hz"] / after_hz - 1.0) <= tol for q in post[i:]):
            converged_at = r["t"] - t_step
            break
    return {"error_before": err_before,
            "error_end": (post[-1]["freq_hz"] / after_hz - 1.0) if post else float("nan"),
            "converged_after_s": converged_at,
            "models_after": len(post)}


def run_seed(scenario, seed: int, ref, cfg, folder: Path) -> list[dict]:
    """Fly ``scenario`` with ``seed`` into a log, replay it from ``ref``; the bending track."""
    from wingwatch.daemon.replay import replay_log
    from wingwatch.daemon.rig.source import VirtualRig, write_rig_log
    from wingwatch.daemon.service import make_pipeline

    log = folder / f"stiffness-step-seed{seed}.wwlog"
    write_rig_log(VirtualRig(scenario, seed=seed), log, cfg)
    res = replay_log(log, config=cfg, pipeline_factory=lambda c: make_pipeline(c, ref))
    log.unlink(missing_ok=True)
    return bending_track(res.outputs)


def truth(scenario) -> tuple[float, dict]:
    """The step's time and the rig's first bending mode before and after it (free decays)."""
    from wingwatch.daemon.rig.ringdown import first_bending_in_flow

    ev = next(e for e in scenario.events if e.kind == "stiffness")
    modes = {k: first_bending_in_flow(scenario, f)
             for k, f in (("before", 1.0), ("after", float(ev.get("factor"))))}
    return float(ev.t_s), modes


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=5, help="number of rig seeds (1..N)")
    ap.add_argument("--config", default=None, metavar="FILE", help="daemon configuration")
    ap.add_argument("--out", default=None, help="folder for the reference and results")
    a = ap.parse_args(argv)

    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.rig.scenario import load_scenario

    out = Path(a.out or tempfile.mkdtemp(prefix="ww-stiffness-step-"))
    out.mkdir(parents=True, exist_ok=True)
    sc = load_scenario(SCENARIO)
    cfg = strip_config(load_config(a.config) if a.config else load_config(), sc.article)
    ref = strip_reference(out / "ref", cfg, sc.article,
                          say=lambda m: print(f"{m} (the 1.5 mm strip)", file=sys.stderr))
    t_step, modes = truth(sc)
    before, after = modes["before"].freq_hz, modes["after"].freq_hz
    rows = []
    for seed in range(1, a.seeds + 1):
        track = run_seed(sc, seed, ref, cfg, out)
        s = score(track, t_step, before, after)
        rows.append({"seed": seed, **s, "track": track})
        conv = s["converged_after_s"]
        print(f"seed {seed}: before {100 * s['error_before']:+.1f} %, within 2 % after "
              f"{'never' if conv is None else f'{conv:.1f} s'}, end {100 * s['error_end']:+.1f} %",
              file=sys.stderr, flush=True)
    met = [r["converged_after_s"] is not None and r["converged_after_s"] < WITHIN_S for r in rows]
    summary = {"scenario": SCENARIO, "step_t_s": t_step,
               "truth": {k: vars(m) for k, m in modes.items()},
               "tolerance": TOLERANCE, "within_s": WITHIN_S,
               "seeds_met": int(sum(met)), "seeds": len(rows), "runs": rows}
    (out / "stiffness_step_check.json").write_text(json.dumps(summary, indent=1, default=float))
    print(f"rig (free decay at {modes['before'].alpha_deg:g} deg, {modes['before'].flow_speed_m_s:g}"
          f" m/s): first bending {before:.3f} Hz (damping {modes['before'].damping:.3f}) -> "
          f"{after:.3f} Hz ({modes['after'].damping:.3f}) at {t_step:g} s")
    print(f"{'seed':>4} {'before':>8} {'within 2 % after':>17} {'end':>8} {'models after':>13}")
    for r in rows:
        conv = r["converged_after_s"]
        print(f"{r['seed']:>4} {100 * r['error_before']:>+7.2f}% "
              f"{'never' if conv is None else f'{conv:.1f} s':>17} {100 * r['error_end']:>+7.2f}% "
              f"{r['models_after']:>13}")
    print(f"converged within 2 % in under {WITHIN_S:g} s: {sum(met)} of {len(rows)} seeds; "
          f"results in {out / 'stiffness_step_check.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
