"""wingwatch benchmark suite: measurement scripts, never tests (``python -m benchmarks``).

Every benchmark module exposes ``run(quick: bool) -> dict`` with the shape::

    {"name": str, "title": str,
     "tables": [{"title": str, "columns": [str, ...], "rows": [[...], ...]}],
     "summary": {key: number},            # the headline figures (ratios first)
     "targets": [{"target": str, "value": float, "threshold": float, "met": bool}],
     "notes": [str, ...]}

and ``main()`` for running it alone. :mod:`benchmarks.run` collects them, prints rich tables and
writes ``benchmarks/results/``. Absolute times differ between machines, so each figure is
reported beside a baseline measured in the same process.

This module sets ``OPENBLAS_NUM_THREADS=1`` before numpy is imported (as the daemon's CLI
does): threaded BLAS on these small matrices only waits for busy cores.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import functools  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any, Callable  # noqa: E402

__all__ = [
    "REPO",
    "RESULTS_DIR",
    "cache_dir",
    "machine_info",
    "best_of",
    "rss_kib",
    "reference_model",
    "reference_at_rate",
    "rig_log",
    "raw_frames",
    "resample_raw",
    "target",
    "table",
    "check_setup",
]

REPO = Path(__file__).resolve().parent.parent
RESULTS_DIR = REPO / "benchmarks" / "results"


def cache_dir() -> Path:
    """Where generated rig logs and model files are kept between runs (outside the repository)."""
    d = Path(os.environ.get("WINGWATCH_BENCH_CACHE", Path(tempfile.gettempdir()) / "wingwatch-bench"))
    d.mkdir(parents=True, exist_ok=True)
    return d


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def machine_info() -> dict[str, Any]:
    """The machine and software the figures were measured on."""
    import numpy as np

    from wingwatch.daemon.version import __version__

    try:
        load = list(os.getloadavg())
    except OSError:
        load = None
    try:
        commit = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"],
                                capture_output=True, text=True, timeout=10).stdout.strip() or None
        dirty = sorted({line[3:].split("/")[0] for line in subprocess.run(
            ["git", "-C", str(REPO), "status", "--porcelain", "--untracked-files=no", "daemon", "clients"],
            capture_output=True, text=True, timeout=10).stdout.splitlines() if len(line) > 3})
    except (OSError, subprocess.SubprocessError):
        commit, dirty = None, []
    return {
        "date": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "cpu_model": _cpu_model(),
        "cores": os.cpu_count(),
        "cores_usable": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "load_average": load,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "machine": platform.machine(),
        "system": f"{platform.system()} {platform.release()}",
        "wingwatch": __version__,
        "commit": commit,
        "uncommitted_changes_in": dirty,  # figures then reflect the working tree, not the commit
        "openblas_num_threads": os.environ.get("OPENBLAS_NUM_THREADS"),
    }


def best_of(fn: Callable[[], Any], repeats: int = 5) -> float:
    """Smallest wall time of ``repeats`` calls (seconds): the least disturbed run."""
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def rss_kib() -> int:
    """Resident set size of this process in KiB (``VmRSS`` of /proc/self/status)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError("VmRSS not found in /proc/self/status")


def target(name: str, value: float, threshold: float, higher_is_better: bool = True) -> dict:
    met = value >= threshold if higher_is_better else value <= threshold
    return {"target": name, "value": float(value), "threshold": float(threshold),
            "direction": ">=" if higher_is_better else "<=", "met": bool(met)}


def table(title: str, columns: list[str], rows: list[list[Any]]) -> dict:
    return {"title": title, "columns": list(columns), "rows": [list(r) for r in rows]}


@functools.lru_cache(maxsize=1)
def reference_model():
    """The reference model calibrated from the two shipped logs (once per process)."""
    from wingwatch.daemon.calibrate import calibrate, load_record

    logs = REPO / "replay_logs"
    cal = calibrate(load_record(logs / "rig-calibration.wwlog"),
                    load_record(logs / "rig-test-manoeuvre.wwlog"))
    return cal.model


def reference_at_rate(rate_hz: float):
    """The 1 kHz reference carried to another sample rate: (A, B) resampled exactly through
    continuous time (zero-order hold, as :func:`~wingwatch.daemon.identify.transient.
    resample_realisation` does); the coefficient columns are continuous-time and stay."""
    from dataclasses import replace

    from wingwatch.daemon.identify.transient import resample_realisation

    ref = reference_model()
    dt = 1.0 / rate_hz
    if abs(dt - ref.dt) <= 1e-12:
        return ref
    A, B = resample_realisation(ref.A, ref.B, ref.dt, dt)
    return replace(ref, dt=dt, A=A, B=B.reshape(ref.B.shape))


def rig_log(scenario: str = "random-pitch", rate_hz: float = 1000.0, duration_s: float = 60.0) -> Path:
    """A log from ``wingwatch rig --scenario S --rate R --duration D --out LOG`` (cached)."""
    path = cache_dir() / f"{scenario}-{rate_hz:g}Hz-{duration_s:g}s.wwlog"
    if path.exists():
        return path
    tmp = path.with_suffix(".partial.wwlog")
    cmd = [sys.executable, "-c", "import sys; from wingwatch.daemon.cli import main; "
           "sys.exit(main(sys.argv[1:]))", "rig", "--scenario", scenario, "--rate", f"{rate_hz:g}",
           "--duration", f"{duration_s:g}", "--out", str(tmp)]
    subprocess.run(cmd, check=True, capture_output=True, timeout=3600, cwd=str(REPO))
    tmp.replace(path)
    return path


def raw_frames(path: str | Path) -> tuple[tuple[str, ...], float, list]:
    """The accepted sensor frames of a log as (channels, rate, [samples arrays])."""
    from wingwatch.daemon import replaylog as rl
    from wingwatch.daemon.codec import decode_sensor_frame

    blocks = []
    channels: tuple[str, ...] = ()
    rate = 0.0
    for rec in rl.LogReader.open(path):
        if rec.kind != rl.KIND_INBOUND:
            continue
        f = decode_sensor_frame(rec.topic, rec.payload)
        channels, rate = f.channels, f.rate
        blocks.append(f.samples)
    return channels, rate, blocks


def resample_raw(samples, rate_from: float, rate_to: float):
    """Raw channel samples linearly interpolated to another rate (a load generator for rates
    the rig cannot produce in real time; the signals stay smooth and physical)."""
    import numpy as np

    n = samples.shape[0]
    t_from = np.arange(n) / rate_from
    m = int(math.floor((n - 1) / rate_from * rate_to)) + 1
    t_to = np.arange(m) / rate_to
    return np.column_stack([np.interp(t_to, t_from, samples[:, j]) for j in range(samples.shape[1])])


def check_setup(out: str | None, config: str | None, prefix: str):
    """What every check against the rig's truth starts with: its output folder (``out``, or a
    fresh temporary one named ``prefix``...), the daemon configuration (``config``, or the
    shipped one) and the reference model calibrated on the rig as the demo does (once per
    folder). Returns ``(out, config, reference)``."""
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.demo import ensure_reference
    from wingwatch.daemon.modelfile import load_model

    folder = Path(out or tempfile.mkdtemp(prefix=prefix))
    folder.mkdir(parents=True, exist_ok=True)
    cfg = load_config(config) if config else load_config()
    ref = load_model(ensure_reference(folder / "ref", cfg, say=lambda m: print(m, file=sys.stderr)))
    return folder, cfg, ref
