"""Throughput of the virtual rig on one core: output samples per second of wall time.

The requirement (issue 4): at the default 1 kHz output rate the rig runs at least 5x faster than
real time on ONE core, i.e. >= 5000 samples per second. This script pins itself to one CPU
(``os.sched_setaffinity``) and to one BLAS thread, runs each case once after a short warm-up, and
prints a table plus one JSON object (also written to ``benchmarks/results/bench_rig.json``).

    python benchmarks/bench_rig.py            # the standard cases
    python benchmarks/bench_rig.py --full     # adds the whole 15-minute campaign
    python -m benchmarks --only rig [--quick] # through the suite (table + results/latest.json)

The real-time factor is simulated source time divided by wall time. A script, not a test: timing is
never asserted in the test suite.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402

from wingwatch.daemon.rig.plate import PlateSimulator  # noqa: E402
from wingwatch.daemon.rig.source import VirtualRig  # noqa: E402
from wingwatch.daemon.version import __version__  # noqa: E402

__all__ = ["main", "run"]


def _physics_only(seconds: float) -> dict:
    sim = PlateSimulator()
    n = int(seconds * 1000)
    t = np.arange(1, n + 1) * 1e-3
    w = 2 * np.pi * 0.7
    a = np.radians(5.0) + np.radians(0.5) * np.sin(w * t)
    ad = np.radians(0.5) * w * np.cos(w * t)
    add = -np.radians(0.5) * w * w * np.sin(w * t)
    sim.run(a[:500], ad[:500], add[:500])  # warm-up: fills the raw wake, builds the tables
    t0 = time.perf_counter()
    sim.run(a, ad, add)
    wall = time.perf_counter() - t0
    return {"case": "physics steps only (PlateSimulator.run)", "samples": n, "source_s": seconds,
            "wall_s": wall, "states": sim.n_states}


def _rig(name: str, seconds: float | None) -> dict:
    rig = VirtualRig(name, duration_s=seconds)
    t0 = time.perf_counter()
    n = 0
    for f in rig.frames():
        n += f.samples.shape[0]
    wall = time.perf_counter() - t0
    return {"case": f"VirtualRig '{name}' frames ({rig.duration_s:g} s)", "samples": n,
            "source_s": rig.duration_s, "wall_s": wall, "states": None}


def run(quick: bool = False) -> dict:
    """The suite's entry point (see :mod:`benchmarks`): the rig at 1 kHz, as ratios to real time."""
    from benchmarks import table, target

    if quick:
        cases = [_physics_only(2.0), _rig("stationary", 3.0)]
    else:
        cases = [_physics_only(20.0), _rig("stationary", 60.0), _rig("campaign", 200.0)]
    rows = []
    for c in cases:
        rows.append([c["case"], c["samples"], c["wall_s"], c["samples"] / c["wall_s"],
                     c["source_s"] / c["wall_s"]])
    phys, frames = rows[0][4], rows[1][4]
    summary = {"rig_rtf_1khz": frames, "physics_rtf_1khz": phys,
               "frames_over_physics": frames / phys}
    return {"name": "rig", "title": "virtual rig throughput at 1 kHz (one core, one BLAS thread)",
            "tables": [table("virtual rig at 1 kHz", ["case", "samples", "wall s", "samples/s",
                                                      "x real time"], rows)],
            "summary": summary,
            "targets": [target("rig real-time factor at 1 kHz (issue 4: >= 5)", frames, 5.0)],
            "notes": ["Not pinned to one CPU when run through the suite (the suite's other "
                      "benchmarks start subprocesses); the standalone script pins itself."]}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="also run the whole campaign (15 min of source time)")
    ap.add_argument("--json-out", default=str(Path(__file__).parent / "results" / "bench_rig.json"))
    args = ap.parse_args(argv)
    pinned = None
    if hasattr(os, "sched_setaffinity"):
        cpu = min(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {cpu})
        pinned = cpu
    cases = [_physics_only(20.0), _rig("stationary", 60.0), _rig("campaign", 200.0)]
    if args.full:
        cases.append(_rig("campaign", None))
    rows = []
    for c in cases:
        c["samples_per_s"] = c["samples"] / c["wall_s"]
        c["real_time_factor"] = c["source_s"] / c["wall_s"]
        rows.append(c)
    w = max(len(r["case"]) for r in rows)
    print(f"{'case':<{w}}  {'samples':>8}  {'wall s':>7}  {'samples/s':>9}  {'x real time':>11}")
    for r in rows:
        print(f"{r['case']:<{w}}  {r['samples']:>8d}  {r['wall_s']:>7.2f}  {r['samples_per_s']:>9.0f}  "
              f"{r['real_time_factor']:>11.1f}")
    out = {
        "benchmark": "rig",
        "version": __version__,
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "machine": platform.machine(),
        "pinned_cpu": pinned,
        "requirement_samples_per_s": 5000,
        "cases": rows,
    }
    p = Path(args.json_out)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(json.dumps(out, indent=2) + "\n")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
