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


#: Chunks shorter than the default, so that the run below has four chunk boundaries.
SHORT_CHUNKS = StepOptions(chunk_seconds=0.05)


@pytest.fixture(scope="module")
def trace(circuit):
    return simulate(circuit, 0.25, ["sq", "tri"], SHORT_CHUNKS)


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


def crossing_fit(trace, t_from):
    """Rising crossings of sq through half the supply (interpolated between accepted
    points), their straight-line fit (period, s) and the residuals (s)."""
    t = trace.times
    d = trace.values[:, trace.column("sq")] - 4.5
    keep = t > t_from
    t, d = t[keep], d[keep]
    i = np.flatnonzero((d[:-1] < 0) & (d[1:] >= 0))
    instants = t[i] - d[i] * (t[i + 1] - t[i]) / (d[i + 1] - d[i])
    k = np.arange(instants.size)
    fit = np.polyfit(k, instants, 1)
    return fit[0], instants - np.polyval(fit, k)


def test_a_steady_oscillator_flips_evenly_across_the_chunks_of_a_run(trace):
    # source: a free-running oscillator in its steady state is periodic (a limit cycle
    # of an autonomous system), so the spread of its flips about a straight line is the
    # solver's own. The run is cut into chunks of StepOptions.chunk_seconds (four
    # boundaries here); cutting the step at each boundary restarted the step sequence
    # and scattered the next flip by 2 to 8 ns. 1 ns is 1/5000 of a 192 kHz sample.
    _, residuals = crossing_fit(trace, 0.05)
    assert residuals.size > 60
    assert np.sqrt(np.mean(residuals ** 2)) < 1e-9


def test_the_chunks_of_a_run_do_not_change_its_steps(circuit, trace):
    # The chunks are bookkeeping (progress, a reader beside the run): the default's one
    # chunk over this run and the fixture's five must give the same points to the bit
    # (common practice: a restartable integrator carries its whole state across calls).
    whole = simulate(circuit, 0.25, ["sq", "tri"])
    assert np.array_equal(whole.times, trace.times)
    assert np.array_equal(whole.values, trace.values)


def test_a_part_that_asks_for_short_steps_does_not_change_the_pitch(circuit, trace):
    # A part may limit the step (a test tone asks for 1/STEPS_PER_PERIOD of its period),
    # here to 5 us, below the 10 us at which the relaxed stepping after a flip ended:
    # it must still end (measured without the time limit: +1.9 cents). source: a
    # shorter step limit refines the same solution, so the pitch must agree (measured
    # 0.06 cent apart; both are within 0.15 cent of the Radau reference, bench/run.py).
    short = simulate(circuit, 0.25, ["sq"], StepOptions(max_step_seconds=5e-6))
    period_default, _ = crossing_fit(trace, 0.05)
    period_short, _ = crossing_fit(short, 0.05)
    assert abs(1200 * np.log2(period_default / period_short)) < 0.1


def test_a_speaker_coil_after_each_flip_costs_a_bounded_number_of_iterations():
    # The bridged scenario's speaker current reverses after every flip over a few
    # microseconds. While the steps after a flip are relaxed, an inductor's current is
    # measured against its own scale (amps), not held to the absolute tolerance
    # (microamps): measured 263 Newton iterations per flip, 593 when it was held to atol.
    # The bound only guards the work (performance lives in `make bench`).
    patch = load_patch(OSCILLATOR.parent / "bridged.yaml")
    trace = simulate(compile_patch(patch), 0.2, ["sq"])
    sq = trace.values[:, 0]
    flips = np.count_nonzero(np.diff(np.sign(sq - 4.5)) != 0)
    assert flips > 80
    assert trace.counters["newton_iterations"] / flips < 400


def test_the_unknown_shared_by_every_part_is_eliminated_last():
    # source: minimum-degree ordering (Tinney and Walker 1967, from memory): eliminate
    # the unknowns with the fewest neighbours first. In a star the hub (unknown 1, like
    # vdd beside every gate) goes last, and eliminating the leaves first fills nothing.
    from sim.compile import elimination_order

    assert elimination_order(5, [[1, 2, 0], [1, 3, 0], [1, 4, 0]]) == [0, 2, 3, 4, 1]
    circuit = compile_patch(load_patch(OSCILLATOR.parent / "mixer.yaml"))
    assert circuit.names[0] == "gnd" and circuit.names[-1] == "vdd"


def test_the_order_of_the_unknowns_does_not_change_the_pitch(monkeypatch, trace):
    # The order of the unknowns is bookkeeping (it only changes how the LU eliminates):
    # in the order the nets were named, the oscillator must keep its pitch to far below
    # anything audible (source: the equations are the same, only rounding differs).
    import sim.compile

    monkeypatch.setattr(sim.compile, "elimination_order", lambda n, groups: list(range(n)))
    named = simulate(sim.compile.compile_patch(load_patch(OSCILLATOR)), 0.25, ["sq"])
    assert named.values.shape[1] == 1
    period_named, _ = crossing_fit(named, 0.05)
    period_ordered, _ = crossing_fit(trace, 0.05)
    assert abs(1200 * np.log2(period_named / period_ordered)) < 0.001


def test_the_elimination_pattern_holds_every_nonzero_and_solves_like_pivoting():
    # source: Gaussian elimination without pivoting computes the same solution as with
    # partial pivoting whenever its pivots are nonzero (any numerical analysis text);
    # numpy's LAPACK solve is the independent reference. Each scenario's Jacobian (the
    # stamps at random states beyond the rails, plus a0 times the mass matrix) must lie
    # inside the pattern the compiler predicts, fill-in included, and the static-order
    # solver must agree with LAPACK on it.
    from sim import kernel
    from sim.compile import elimination_pattern

    assert elimination_pattern(4, [[1, 3], [2, 3]])[1].tolist() == [3, 3]  # 3 fills nothing
    # a star eliminated centre-first fills the leaves' square (source: elimination graphs)
    ptr, idx = elimination_pattern(4, [[1, 2], [1, 3]])
    assert idx[ptr[1]:ptr[2]].tolist() == [2, 3] and idx[ptr[2]:ptr[3]].tolist() == [3]
    k = kernel.load()
    rng = np.random.default_rng(7)
    for path in sorted(OSCILLATOR.parent.glob("*.yaml")):
        c = compile_patch(load_patch(path))
        n = c.size
        inside = np.eye(n, dtype=bool)
        for q in range(n):
            for j in c.lu_idx[c.lu_ptr[q]:c.lu_ptr[q + 1]]:
                inside[q, j] = inside[j, q] = True
        for trial in range(5):
            x = rng.uniform(-2.0, c.supply_volts + 2.0, n)
            x[0] = 0.0
            f, G = np.zeros(n), np.zeros((n, n))
            k.evaluate(x, 1e-3 * trial, c.pf, c.nf, c.tab, c.df, f, G)
            J = G + 1e5 * c.mass
            assert not np.any((J[1:, 1:] != 0) & ~inside[1:, 1:]), path.name
            b = rng.standard_normal(n)
            expected = np.linalg.solve(J[1:, 1:], b[1:])
            A, y = J.copy(), b.copy()
            assert k.lu_static(A, y, n, c.lu_ptr, c.lu_idx), path.name
            # source: backward and forward error of a stable solve (Higham, Accuracy and
            # Stability of Numerical Algorithms, ch. 7 and 9): the residual within a few
            # rounding errors of J's size, the solution within cond(J) of them of LAPACK's
            # (some of these states, a diode linearised far beyond its knee, give cond
            # 1e13: there the forward error may reach 1e-4 for any solver)
            Jr, scale = J[1:, 1:], np.abs(expected).max()
            backward = np.abs(Jr @ y[1:] - b[1:]).max() / (np.abs(Jr).max() * np.abs(y[1:]).max())
            assert backward < 1e-14, (path.name, backward)
            forward = np.abs(y[1:] - expected).max() / scale
            assert forward < 1e-13 + 10 * n * np.linalg.cond(Jr) * np.finfo(float).eps, path.name
    # a pivot far below the entry under it is refused (the caller then pivots by rows)
    ptr, idx = elimination_pattern(3, [[1, 2]])
    tiny = np.array([[0.0, 0.0, 0.0], [0.0, 1e-9, 1.0], [0.0, 1.0, 1.0]])
    assert not k.lu_static(tiny.copy(), np.ones(3), 3, ptr, idx)
    b = np.ones(3)
    assert k.lu_solve(tiny.copy(), b, 3) and np.allclose(b[1:], np.linalg.solve(tiny[1:, 1:], [1, 1]))


def test_the_kernel_starts_numba_without_scipy_linalg_or_cffi_and_leaves_them_importable():
    # common practice: a start-up shortcut must not change what works afterwards. The
    # kernel loads and steps with scipy.linalg and cffi never imported (numba's probes
    # answered "not there", sim/kernel.py), then a compiled np.dot (which imports BLAS
    # itself), a plain import of scipy.linalg, a cffi parser and a WAV written through
    # soundfile (cffi's user here) work as usual. In a fresh interpreter: this one
    # imported them long ago.
    import subprocess
    import sys

    code = "\n".join([
        "import sys, numba, numpy as np",
        "from sim.compile import compile_patch",
        "from sim.patch import load_patch",
        "from sim.simulate import simulate",
        f"trace = simulate(compile_patch(load_patch({str(OSCILLATOR)!r})), 0.002, ['sq'])",
        "assert trace.times.size > 10",
        "for name in ('scipy.linalg', 'cffi', 'pycparser'):",
        "    assert name not in sys.modules, name + ' imported'",
        "dot = numba.njit(lambda a, b: np.dot(a, b))",
        "assert dot(np.ones(3), np.arange(3.0)) == 3.0",
        "import scipy.linalg",
        "assert scipy.linalg.det(np.eye(2)) == 1.0",
        "import cffi, io, soundfile",
        "assert cffi.FFI().sizeof('int') == 4",
        "wav = io.BytesIO()",
        "soundfile.write(wav, np.zeros(8), 8000, format='WAV')",
        "assert soundfile.info(io.BytesIO(wav.getvalue())).frames == 8",
        "print('ok')",
    ])
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=Path(__file__).resolve().parents[1], timeout=300)
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr[-2000:]


def test_the_generated_kernel_module_is_started_from_its_bytecode_even_where_python_writes_none(
        tmp_path):
    # source: the Python documentation of PYTHONDONTWRITEBYTECODE (no .pyc written on
    # import) and of py_compile (writes one regardless). A fresh cache folder: the first
    # process writes the module and its bytecode, the second starts from that bytecode.
    import importlib.util
    import os
    import subprocess
    import sys

    env = {**os.environ, "HALFRAIL_CACHE": str(tmp_path), "PYTHONDONTWRITEBYTECODE": "1"}
    code = "from sim import kernel; print(kernel.load().__file__)"
    runs = [subprocess.run([sys.executable, *flags, "-c", code], capture_output=True,
                           text=True, env=env, cwd=Path(__file__).resolve().parents[1],
                           timeout=300) for flags in ((), ("-v",))]
    assert all(run.returncode == 0 for run in runs), runs[0].stderr[-2000:]
    module = runs[0].stdout.strip()
    bytecode = importlib.util.cache_from_source(module)
    assert Path(module).parent == tmp_path and Path(bytecode).is_file()
    assert f"code object from '{bytecode}'" in runs[1].stderr


def test_the_trace_buffer_keeps_every_point_as_it_grows():
    # common practice: a growing buffer keeps what it holds, and views handed out before
    # it grew still read the same points. Rates far off the first estimate force growth.
    from sim.simulate import POINTS_PER_CHUNK, _TraceBuffer

    buf = _TraceBuffer(2)
    handed = []
    for chunk, got in enumerate([10, POINTS_PER_CHUNK, 3, POINTS_PER_CHUNK, POINTS_PER_CHUNK]):
        t, y, o = buf.room(POINTS_PER_CHUNK, 1e-3 * chunk, 1.0)
        start = buf.size
        t[:got] = np.arange(start, start + got)
        y[:got] = np.arange(start, start + got)[:, None] * [1.0, -1.0]
        o[:got] = 2
        buf.size += got
        handed.append((start, buf.points(start, buf.size)))
    times, values, orders = buf.points(0, buf.size)
    assert times.size == 1 + 10 + 3 + 3 * POINTS_PER_CHUNK
    assert np.array_equal(times, np.arange(times.size)) and times[0] == 0.0
    assert np.array_equal(values[:, 0], times) and np.array_equal(values[:, 1], -times)
    assert orders[0] == 1 and np.all(orders[1:] == 2)
    for start, (t, y, o) in handed:
        assert np.array_equal(t, np.arange(start, start + t.size))
        assert np.array_equal(y[:, 1], -t)
