"""The bisection of the change-of-state solvers stops early only where it would not change."""
import numpy as np
import pytest

from clearaudit.physics import state_change
from clearaudit.physics.state_change import _BISECTION_STEPS, _bisect


def _full(residual, lo, hi):
    # reference: every one of the _BISECTION_STEPS halvings
    for _ in range(_BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        below = residual(mid) < 0
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return lo, hi


@pytest.mark.parametrize("seed", range(4))
def test_early_stop_is_bit_identical_to_every_step(seed):
    rng = np.random.default_rng(seed)
    roots = rng.uniform(-3.0, 34.0, size=50)
    roots[:3] = [np.log(np.pi), 7.0, np.nextafter(7.0, 8.0)]

    def residual(x):
        return np.tanh(x - roots) * np.exp(0.01 * x)

    lo = np.full(50, np.log(0.02 * 300.0))
    hi = np.full(50, np.log(1e15))
    calls = []
    counted = lambda x: calls.append(1) or residual(x)  # noqa: E731
    got = _bisect(counted, lo, hi)
    want = _full(residual, lo, hi)
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])
    assert len(calls) < _BISECTION_STEPS  # it did stop early


def test_change_of_state_unchanged_by_the_early_stop(monkeypatch):
    # a 300 m span (and a 12 m rise) of a 400 mm2 conductor taken from 15 to 75 degC, and a
    # range of spans at once: the same bits as with every halving run
    args = (np.array([300.0, 120.0, 610.0]), np.array([24e3, 9e3, 31e3]), 15.6, 15.0,
            15.6, 75.0, 400e-6, 70e9, 19e-6)
    got = state_change.change_of_state(*args, height_difference=np.array([12.0, 0.0, -40.0]))
    monkeypatch.setattr(state_change, "_bisect", _full)
    want = state_change.change_of_state(*args, height_difference=np.array([12.0, 0.0, -40.0]))
    np.testing.assert_array_equal(got, want)
