"""Reading a trace through time: interval averages are exact for the stepper's interpolants."""

import numpy as np
import pytest

from sim.trace import GridReader, StepTrace


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


def test_a_column_reads_the_same_to_the_bit_alone_or_with_others():
    # The weights of a piece are shared by the columns read together; each column's
    # arithmetic must not depend on the others (common practice: reproducible reads).
    rng = np.random.default_rng(5)
    t = np.sort(np.concatenate([[0.0, 1.0], rng.uniform(0, 1, 300)]))
    values = np.column_stack([np.sin(7 * t), t ** 2, rng.standard_normal(t.size)])
    order = rng.integers(1, 3, t.size)
    tr = StepTrace(names=["a", "b", "c"], times=t, values=values, order=order)
    _, together = tr.uniform(997.0, 0.05, 0.95)
    for c in range(3):
        _, alone = tr.uniform(997.0, 0.05, 0.95, [c])
        assert np.array_equal(alone[:, 0], together[:, c])


def test_a_grid_starting_late_in_the_trace_reads_the_same_averages():
    # source: calculus, as above: averages of t^2 over each interval, wherever the grid starts
    t = np.linspace(0.0, 1.0, 2001)
    tr = _trace(t, t ** 2, [1] + [2] * (t.size - 1))
    grid, avg = tr.uniform(100.0, 0.9, 0.99)
    a, b = grid - 0.005, grid + 0.005
    assert np.max(np.abs(avg[:, 0] - (b ** 3 - a ** 3) / (3 * (b - a)))) < 1e-12


def test_the_peak_of_a_grid_is_the_largest_magnitude_of_its_averages_to_the_bit():
    # source: the definition StepTrace.uniform_peak states (the largest |average| of
    # StepTrace.uniform per column), common practice for a fused reduction
    rng = np.random.default_rng(3)
    t = np.sort(np.concatenate([[0.0, 1.0], rng.uniform(0, 1, 300)]))
    values = rng.normal(size=(t.size, 3))
    order = rng.integers(1, 3, t.size)
    tr = StepTrace(names=["a", "b", "c"], times=t, values=values, order=order)
    _, averages = tr.uniform(400.0, 0.05, 0.95)
    assert np.array_equal(tr.uniform_peak(400.0, 0.05, 0.95), np.max(np.abs(averages), axis=0))


@pytest.mark.parametrize("peak", [False, True])
@pytest.mark.parametrize(("t_start", "t_stop"), [(0.0, 1.0), (0.05, 0.95), (0.3, 0.31)])
@pytest.mark.parametrize("seed", [4, 5])
def test_a_grid_read_while_the_trace_grows_is_the_same_to_the_bit(peak, t_start, t_stop, seed):
    # common practice: a streamed reduction that carries its running state from one part
    # to the next equals the one-pass reduction exactly; parts of random sizes, from one
    # point to many steps, put the seams everywhere (inside a step, on a grid edge)
    rng = np.random.default_rng(seed)
    t = np.sort(np.concatenate([[0.0, 1.0], rng.uniform(0, 1, 2000)]))
    values = rng.normal(size=(t.size, 3))
    order = rng.integers(1, 3, t.size)
    tr = StepTrace(names=["a", "b", "c"], times=t, values=values, order=order)
    reader = GridReader(400.0, t_start, t_stop, [2, 0], peak=peak)
    at = 0
    while at < t.size:
        size = int(rng.choice([1, 2, 3, 7, 50, 400]))
        reader.feed(at, t[at:at + size], values[at:at + size], order[at:at + size])
        at += size
    got = reader.finish()
    if peak:
        assert np.array_equal(got, tr.uniform_peak(400.0, t_start, t_stop)[[2, 0]])
    else:
        grid, averages = tr.uniform(400.0, t_start, t_stop, [2, 0])
        assert np.array_equal(got[0], grid) and np.array_equal(got[1], averages)
        assert averages.shape == (int(round((t_stop - t_start) * 400.0)), 2)


def test_a_grid_reader_refuses_points_that_do_not_follow_on():
    # common practice: a gap in a stream is an error, not a silently wrong average
    reader = GridReader(10.0, 0.0, 1.0)
    t = np.linspace(0.0, 1.0, 11)
    reader.feed(0, t[:5], np.zeros((5, 1)), np.ones(5, np.int64))
    with pytest.raises(ValueError, match="expected 5"):
        reader.feed(6, t[6:], np.zeros((5, 1)), np.ones(5, np.int64))
