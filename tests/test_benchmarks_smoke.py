"""Smoke test of the benchmark scripts: they import and the suite writes its results.

Only the smallest benchmark runs (``--quick --only rig``, a few seconds); no time is asserted,
only that the JSON and markdown are written with the expected keys and positive figures.
"""

from __future__ import annotations

import importlib
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))  # the benchmarks folder is not installed

from benchmarks.run import BENCHMARKS  # noqa: E402


@pytest.mark.parametrize("name", sorted(BENCHMARKS))
def test_benchmark_module_imports(name):
    mod = importlib.import_module(BENCHMARKS[name])
    assert callable(mod.run) and callable(mod.main)


def test_quick_rig_run_writes_results(tmp_path):
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    proc = subprocess.run(
        [sys.executable, "-m", "benchmarks", "--quick", "--only", "rig", "--results-dir", str(tmp_path)],
        cwd=str(REPO), env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    doc = json.loads((tmp_path / "latest.json").read_text())
    assert set(doc) >= {"suite", "quick", "machine", "results", "wall_s"}
    assert doc["quick"] is True
    assert set(doc["machine"]) >= {"cpu_model", "cores", "python", "numpy", "date", "load_average"}
    assert list(doc["results"]) == ["rig"]
    res = doc["results"]["rig"]
    assert "error" not in res, res.get("traceback")
    assert set(res) >= {"name", "tables", "summary", "targets"}
    for key in ("rig_rtf_1khz", "physics_rtf_1khz", "frames_over_physics"):
        assert math.isfinite(res["summary"][key]) and res["summary"][key] > 0, key
    assert res["tables"] and all(t["rows"] for t in res["tables"])
    for tg in res["targets"]:
        assert set(tg) >= {"target", "value", "threshold", "met"} and tg["value"] > 0
    stamped = [p for p in tmp_path.glob("results-*.json")]
    assert len(stamped) == 1
    md = (tmp_path / "latest.md").read_text()
    assert "| rig |" in md and "Python" in md and "cores" in md


def test_flow_change_score_counts_containment_and_ratios():
    """The flow-change check's scoring on two hand-made runs: the long-run value is the mean
    over runs, the gap is against the steady value, and an interval counts when it holds it."""
    from benchmarks.flow_change_check import score

    def run(b, a, lo, hi):
        out = {}
        for phase, v, iv in (("before", b, (b - 0.1, b + 0.1)), ("after", a, (lo, hi))):
            out[phase] = {"value": {"lift": v, "curvature": 2 * v},
                          "interval": {"lift": list(iv), "curvature": [2 * iv[0], 2 * iv[1]]}}
        return out

    rows = [run(3.5, 3.3, 3.2, 3.6), run(3.5, 3.2, 3.1, 3.3)]
    steady = {"before": {"lift": 3.7, "curvature": 7.4}, "after": {"lift": 3.5, "curvature": 7.0}}
    p = score(rows, steady)["lift"]
    assert p["long_run"] == {"before": 3.5, "after": 3.25}
    assert math.isclose(p["gap_to_steady_pct"]["after"], 100 * (3.25 / 3.5 - 1))
    assert p["after_interval_contains"] == {"steady": 1, "long_run": 2, "cases": 2}
    assert math.isclose(p["ratio_after_before"]["identified"], (3.3 / 3.5 + 3.2 / 3.5) / 2)
    assert math.isclose(p["ratio_after_before"]["steady"], 3.5 / 3.7)
