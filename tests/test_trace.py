"""Reading a trace through time: interval averages are exact for the stepper's interpolants."""

import numpy as np
import pytest

from sim.trace import StepTrace


def _trace(times, values, order):
    return StepTrace(names=["v"], times=np.asarray(times, float),
                     values=np.asarray(values, float).reshape(-1, 1),
                     order=np.asarray(order, np.int64))


def test_averages_of_a_quadratic_equal_its_exact_integrals():
    # source: calculus; the average of t^2 over [a, b] is (b^3 - a^3) / (3 (b - a)).
    rng = np.random.default_rng(1)
    t = np.sort(np.concatenate([[0.0, 1.0], rng.uniform(0, 1, 40)]))
    tr = _trace(t, t ** 2, [1] + [2] * (t.size - 1))
    rate = 50.0
    grid, avg = tr.uniform(rate, 0.1, 0.9)
    a, b = grid - 0.5 / rate, grid + 0.5 / rate
    exact = (b ** 3 - a ** 3) / (3 * (b - a))
    assert np.max(np.abs(avg[:, 0] - exact)) < 1e-12


def test_an_edge_between_grid_points_lands_as_a_partial_sample():
    # A jump from 0 to 1 V at t = 12.3 ms, 30 % into the sample centred at 12.5 ms
    # (interval 12.0 .. 13.0 ms at 1 kHz from t = 0): the average is the part above, 0.7.
    t = [0.0, 0.0123, 0.0123 + 1e-12, 0.05]
    tr = _trace(t, [0.0, 0.0, 1.0, 1.0], [1, 1, 1, 1])
    grid, avg = tr.uniform(1000.0, 0.0, 0.03)
    i = int(np.argmin(np.abs(grid - 0.0125)))
    assert grid[i] == pytest.approx(0.0125)
    assert avg[i, 0] == pytest.approx(0.7, abs=1e-6)
    assert avg[i - 1, 0] == pytest.approx(0.0, abs=1e-9)
    assert avg[i + 1, 0] == pytest.approx(1.0, abs=1e-9)


def test_uniform_grid_has_the_asked_rate_and_span():
    tr = _trace([0.0, 1.0], [2.0, 2.0], [1, 1])
    grid, avg = tr.uniform(1000.0, 0.25, 0.75)
    assert grid.size == 500
    assert np.allclose(np.diff(grid), 1e-3)
    assert np.allclose(avg, 2.0)
