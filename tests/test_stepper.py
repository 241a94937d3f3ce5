"""The compiled stepper's own promises: clean failures, unquantised edges, bounded work."""

from pathlib import Path

import numpy as np
import pytest

from sim.compile import compile_patch
from sim.errors import SolverError
from sim.patch import load_patch
from sim.simulate import StepOptions, simulate

OSCILLATOR = Path(__file__).resolve().parents[1] / "scenarios" / "tri-square.yaml"
RATE = 192000.0
FINE_RATE = 20e6


@pytest.fixture(scope="module")
def circuit():
    return compile_patch(load_patch(OSCILLATOR))


@pytest.fixture(scope="module")
def trace(circuit):
    return simulate(circuit, 0.25, ["sq", "tri"])


def rising_crossings(times, volts, rate):
    mid = 0.5 * (volts.max() + volts.min())
    s = volts - mid
    i = np.flatnonzero((s[:-1] < 0) & (s[1:] >= 0))
    return times[i] + (-s[i]) / (s[i + 1] - s[i]) / rate


def test_a_solver_that_cannot_converge_names_the_time_and_a_net(circuit):
    starved = StepOptions(max_newton_iterations=1, min_step_seconds=1e-6)
    with pytest.raises(SolverError) as info:
        simulate(circuit, 0.01, ["sq"], starved)
    assert info.value.seconds is not None
    assert info.value.nets and info.value.nets[0] in circuit.names
    assert "ms (simulated time)" in str(info.value)


def test_flip_instants_are_not_quantised_to_the_sample_grid(trace):
    # Design notes: edge timing must not be quantised to a fixed grid. A steady
    # oscillator's periods then agree far better than one 192 kHz sample (5.2 us);
    # quantised edges would scatter them by about a sample. Read on a 20 MHz grid so
    # the reading itself is finer than the check.
    times, y = trace.uniform(FINE_RATE, 0.05, 0.25)
    periods = np.diff(rising_crossings(times, y[:, 0], FINE_RATE))
    assert periods.size > 50
    assert np.std(periods) < 0.02 / RATE


def test_the_work_counters_are_reported_and_rejections_stay_a_minority(trace):
    c = trace.counters
    assert c["steps"] > 0 and c["newton_iterations"] >= c["steps"]
    # The error controller rejects steps at the flips; if most steps were rejected the
    # controller would be fighting itself (seen at 26 % on this patch).
    assert c["rejected_error"] + c["rejected_newton"] < 0.5 * c["steps"]
    # Newton's method converges in about two iterations per attempted step here.
    attempts = c["steps"] + c["rejected_error"] + c["rejected_newton"]
    assert c["newton_iterations"] < 4 * attempts


def test_the_run_starts_at_power_on_with_everything_discharged(circuit):
    trace = simulate(circuit, 2e-3, ["vdd", "tri"])
    assert trace.times[0] == 0.0
    assert np.all(trace.values[0] == 0.0)
    # the battery's EMF ramps over 1 ms (blocks/supply.py), so vdd is low early on
    times, y = trace.uniform(1e6, 0.0, 2e-3)
    assert y[100, 0] < 0.2 * 9.0
    assert y[-1, 0] > 0.98 * 9.0
