"""One contract over every streaming estimator of wingwatch.daemon.identify.

For each: update does not mutate its input, state_dict/load_state_dict round-trips exactly,
reset equals a fresh instance, and the same seed gives the same outputs.
"""

import numpy as np
import pytest

from wingwatch.daemon.identify.differentiate import DelayLine, SavgolDifferentiator
from wingwatch.daemon.identify.modes import ModeTracker
from wingwatch.daemon.identify.rls import RecursiveLeastSquares


def rls_case():
    def frames(seed):
        rng = np.random.default_rng(seed)
        theta = np.array([[1.0, 0.5], [-0.3, 0.2], [0.1, 0.0]])
        out = []
        for _ in range(12):
            phi = rng.standard_normal((10, 3))
            out.append((phi, phi @ theta + 0.05 * rng.standard_normal((10, 2))))
        return out

    return (lambda: RecursiveLeastSquares(3, 2, half_life=50.0), frames,
            lambda est, f: est.update(*f))


def savgol_case():
    def frames(seed):
        rng = np.random.default_rng(seed)
        return [(rng.standard_normal(10),) for _ in range(12)]

    return lambda: SavgolDifferentiator(11, 3, 100.0), frames, lambda est, f: est.update(*f)


def delay_case():
    def frames(seed):
        rng = np.random.default_rng(seed)
        return [(rng.standard_normal((10, 2)),) for _ in range(12)]

    return lambda: DelayLine(4, 2), frames, lambda est, f: est.update(*f)


def tracker_case():
    def frames(seed):
        rng = np.random.default_rng(seed)
        base = np.array([1.0, 3.0, 8.0])
        return [(base * (1 + 0.02 * rng.standard_normal(3)), np.full(3, 0.02)) for _ in range(12)]

    return lambda: ModeTracker(), frames, lambda est, f: est.update(*f)


CASES = {"rls": rls_case, "savgol": savgol_case, "delay": delay_case, "tracker": tracker_case}


def equal_states(a, b):
    assert a.keys() == b.keys()
    for key in a:
        va, vb = a[key], b[key]
        if isinstance(va, list):
            assert len(va) == len(vb)
            for x, y in zip(va, vb):
                assert np.array_equal(x, y) if x is not None else y is None, key
        elif va is None:
            assert vb is None, key
        else:
            assert np.array_equal(va, vb), key


@pytest.mark.parametrize("name", sorted(CASES))
def test_update_does_not_mutate_input(name):
    make, frames, step = CASES[name]()
    est = make()
    for f in frames(0):
        copies = [np.array(a, copy=True) for a in f]
        step(est, f)
        for a, c in zip(f, copies):
            assert np.array_equal(a, c)


@pytest.mark.parametrize("name", sorted(CASES))
def test_state_round_trip_is_exact(name):
    make, frames, step = CASES[name]()
    fs = frames(1)
    a = make()
    for f in fs[:6]:
        step(a, f)
    b = make()
    b.load_state_dict(a.state_dict())
    for f in fs[6:]:
        assert np.array_equal(step(a, f), step(b, f))
    equal_states(a.state_dict(), b.state_dict())


@pytest.mark.parametrize("name", sorted(CASES))
def test_reset_equals_fresh_and_seed_is_reproducible(name):
    make, frames, step = CASES[name]()
    a = make()
    first = [step(a, f) for f in frames(2)]
    a.reset()
    equal_states(a.state_dict(), make().state_dict())
    again = [step(a, f) for f in frames(2)]
    for x, y in zip(first, again):
        assert np.array_equal(x, y)
