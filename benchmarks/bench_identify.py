"""Benchmark of the identification core (a script, not a test).

1. Block RLS: cost of one 10-sample frame update of
   :class:`wingwatch.daemon.identify.rls.RecursiveLeastSquares` against a textbook per-sample
   covariance-form RLS loop in numpy (Ljung & Soderstrom 1983, eqs. 2.17-2.19) on the same
   regression: 12 regressors (alpha, rate, acceleration, 8 transient states, bias), 2 outputs.
2. OKID + ERA on a 10 s window at 1 kHz (10 000 samples, one input, two outputs), against the
   realisation rank. The observer order equals the rank (twice what a deadbeat observer with
   two outputs needs) and the Hankel matrix has ``3 * rank`` block rows and columns, so the
   Markov parameters span ``6 * rank`` ms. The test modes lie at 15-150 Hz; modes much slower
   than that span need the window decimated first (the identifier's job, not timed here).
   On a host with busy cores, set OPENBLAS_NUM_THREADS=1: threaded BLAS on these small
   problems waits for cores and the timings scatter.

Run:  python benchmarks/bench_identify.py  (writes benchmarks/results/identify.json)
"""

from __future__ import annotations

import json
import math
import platform
import time
from pathlib import Path

import numpy as np

from wingwatch.daemon.identify.era import era, markov_of
from wingwatch.daemon.identify.okid import observer_markov, system_markov
from wingwatch.daemon.identify.rls import RecursiveLeastSquares

RESULTS = Path(__file__).resolve().parent / "results" / "identify.json"


def best_of(fn, repeats=5):
    """Smallest wall time of ``repeats`` calls (seconds)."""
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def textbook_rls(phi, y, lam):
    """Per-sample covariance-form RLS (Ljung & Soderstrom 1983, eqs. 2.17-2.19)."""
    p, m = phi.shape[1], y.shape[1]
    P = 1e6 * np.eye(p)
    theta = np.zeros((p, m))
    for k in range(phi.shape[0]):
        f = phi[k]
        Pf = P @ f
        gain = Pf / (lam + f @ Pf)  # K = P phi / (lam + phi' P phi)
        err = y[k] - f @ theta  # e = y - theta' phi
        theta = theta + np.outer(gain, err)  # theta <- theta + K e'
        P = (P - np.outer(gain, Pf)) / lam  # P <- (P - K phi' P) / lam
    return theta


def bench_rls(n=20000, frame=10, p=12, m=2):
    rng = np.random.default_rng(0)
    phi = rng.standard_normal((n, p))
    y = phi @ rng.standard_normal((p, m)) + 0.05 * rng.standard_normal((n, m))
    frames = [(phi[k : k + frame], y[k : k + frame]) for k in range(0, n, frame)]
    rows = []
    t_text = best_of(lambda: textbook_rls(phi, y, 2.0 ** (-1 / 2000.0)), repeats=3)
    per_frame_text = t_text / len(frames)
    for label, kw in [
        ("no forgetting", dict()),
        ("forgetting, gate off", dict(half_life=2.0, rate=1000.0, gate=0.0)),
        ("forgetting, gated (default)", dict(half_life=2.0, rate=1000.0)),
    ]:
        def run():
            est = RecursiveLeastSquares(p, m, **kw)
            for f in frames:
                est.update(*f)

        t = best_of(run, repeats=3)
        per_frame = t / len(frames)
        rows.append(
            dict(variant=label, us_per_frame=per_frame * 1e6,
                 textbook_us_per_frame=per_frame_text * 1e6, speedup=per_frame_text / per_frame)
        )
    return rows


def test_system(rank, seed=1):
    rng = np.random.default_rng(seed)
    A0 = np.zeros((rank, rank))
    for i in range(rank // 2):
        f = rng.uniform(15.0, 150.0)  # Hz: bending and fast wake modes at 1 kHz
        zeta = rng.uniform(0.02, 0.1)
        s = -zeta * 2 * np.pi * f + 1j * 2 * np.pi * f * np.sqrt(1 - zeta**2)
        z = np.exp(s * 1e-3)
        A0[2 * i : 2 * i + 2, 2 * i : 2 * i + 2] = [[z.real, -z.imag], [z.imag, z.real]]
    T = rng.standard_normal((rank, rank)) + 3 * np.eye(rank)
    A = T @ A0 @ np.linalg.inv(T)
    return A, rng.standard_normal((rank, 1)), rng.standard_normal((2, rank)), np.zeros((2, 1))


def simulate(A, B, C, D, u):
    x = np.zeros(A.shape[0])
    y = np.empty((u.size, C.shape[0]))
    for k in range(u.size):
        y[k] = C @ x + D[:, 0] * u[k]
        x = A @ x + B[:, 0] * u[k]
    return y


def bench_okid_era(ranks=(2, 4, 6, 8, 10, 12), n=10000):
    rows = []
    rng = np.random.default_rng(2)
    u = rng.standard_normal(n)
    for rank in ranks:
        A, B, C, D = test_system(rank)
        y = simulate(A, B, C, D, u) + 1e-4 * rng.standard_normal((n, 2))
        order = rank
        blocks = 3 * rank

        def run():
            obs = observer_markov(u, y, order)
            mk = system_markov(obs, 2 * blocks + 1)
            return era(mk, rank, rows=blocks, cols=blocks)

        t = best_of(run)
        real = run()
        true = markov_of(A, B, C, D, 2 * blocks + 1)
        err = float(np.abs(real.markov(2 * blocks + 1) - true).max() / np.abs(true).max())
        rows.append(dict(rank=rank, observer_order=order, hankel_blocks=blocks, ms=t * 1e3,
                         markov_rel_error=err))
    return rows


def main():
    rls_rows = bench_rls()
    era_rows = bench_okid_era()
    print("Block RLS, 10-sample frames, p = 12, m = 2")
    print(f"{'variant':30s} {'us/frame':>10s} {'textbook':>10s} {'speed-up':>9s}")
    for r in rls_rows:
        print(f"{r['variant']:30s} {r['us_per_frame']:10.1f} {r['textbook_us_per_frame']:10.1f} "
              f"{r['speedup']:8.1f}x")
    print()
    print("OKID + ERA, 10 s window at 1 kHz (10 000 samples, 1 input, 2 outputs)")
    print(f"{'rank':>4s} {'order':>5s} {'blocks':>6s} {'ms':>8s} {'Markov rel. err':>16s}")
    for r in era_rows:
        print(f"{r['rank']:4d} {r['observer_order']:5d} {r['hankel_blocks']:6d} {r['ms']:8.2f} "
              f"{r['markov_rel_error']:16.2e}")
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    RESULTS.write_text(json.dumps(
        {"python": platform.python_version(), "numpy": np.__version__,
         "machine": platform.machine(), "rls": rls_rows, "okid_era": era_rows},
        indent=2) + "\n")
    print(f"\nwrote {RESULTS}")


if __name__ == "__main__":
    main()
