"""Run a compiled Circuit in time: the compiled stepper, or scipy's Radau as reference.

Both start at power-on: every unknown at zero (capacitors discharged) while the
supply's EMF ramps up, and both return a trace read through ``uniform()``.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from sim import kernel
from sim.compile import AMPS_PER_VOLT_TOLERANCE, Circuit
from sim.errors import SolverError
from sim.trace import DenseTrace, StepTrace


@dataclass(frozen=True)
class StepOptions:
    """Accuracy and effort settings of the compiled stepper.

    rtol, atol_volts: local error tolerance on the slow (audible) unknowns.
    fast_factor: how much looser the tolerance is on fast unknowns (nets with only
        stray capacitance, which follow the slow ones algebraically).
    max_step_seconds: longest step (keeps the interpolation between steps faithful to
        the audio band); parts can ask for less (a test tone).
    event_seconds: how closely a flip instant is bracketed.
    jump_fraction: a change beyond this fraction of the supply within one step,
        unexplained by the predictor, marks a flip.
    newton_fraction: Newton's method stops when its last update is below this fraction
        of the step tolerance (its convergence is quadratic, so the error left is far
        smaller; 0.3 gave the same pitch as 0.01 with a quarter fewer iterations).
    growth: step growth per recovery step after a flip.
    restart_seconds: first step after a flip; of the order of the regenerative time
        constant (stray capacitance over a gate's transconductance, 2 pF / 2 mS = 1 ns).
    flip_volts, flip_slew_volts_per_second: an accepted step in which a fast net moved by
        more than flip_volts, faster than flip_slew, is the regenerative part of a flip:
        backward Euler steps over it. Until the second step of 10 us or more (at the
        latest 50 us after the flip) the error is measured on the part capacitors' own
        voltages (held to atol) and on the audible unknowns by their share of an audio
        sample, not on the nets' nanosecond transient. The flip's timing was decided
        before, in its slow passage, at full tolerance.
    sample_seconds: the audio sample interval that audible unknowns' errors are weighed
        against after a flip (the WAV's; 48 kHz unless the render asks for another).
    newton_rate_floor: Newton's method may stop after one iteration when its remembered
        contraction rate times the update is within tolerance (the corrector test of
        CVODE); the rate counts as at least this much.
    quadratic_guess: Newton starts from the quadratic extrapolation of the last points.
    chunk_seconds: simulated time per compiled call; between calls, progress and the
        render's reader beside the run get the new points (the steps do not depend on
        it). Each return needs the GIL back: beside a render's imports in another
        thread, 4 s of the oscillator took 0.67 to 0.80 s in 50 ms chunks and 0.39 s in
        250 ms chunks (0.33 s alone; the program's 0.5 ms GIL switch interval).
    Measured on the oscillator scenario (813 flips/s): these four cut Newton iterations
    from 384k to 137k per second of audio at the same pitch (+0.09 cent vs Radau).
    """

    rtol: float = 3e-4
    atol_volts: float = 3e-5
    # Measured on the relaxation-oscillator scenario against Radau at rtol 1e-8: fast
    # factor 1 gives 0.04 cent, 3 gives 0.09 cent, 100 gives 1.5 cent (the flips'
    # slow passage through the fold must be resolved for the pitch to be right).
    fast_factor: float = 1.0
    max_step_seconds: float = 40e-6
    min_step_seconds: float = 1e-15
    event_seconds: float = 20e-9
    jump_fraction: float = 0.1
    growth: float = 3.0
    restart_seconds: float = 1e-9
    max_newton_iterations: int = 10
    newton_fraction: float = 0.3
    sample_seconds: float = 1.0 / 48000
    flip_volts: float = 0.2
    flip_slew_volts_per_second: float = 1e7
    newton_rate_floor: float = 0.05
    quadratic_guess: bool = True
    chunk_seconds: float = 0.25


#: Newton damping: no node voltage moves by more than this fraction of the supply
#: (and at least 1 V) in one iteration.
NEWTON_STEP_FRACTION = 0.25

COUNTER_NAMES = ("steps", "rejected_error", "rejected_newton", "newton_iterations", "events",
                 "event_trials", "lu_fallbacks")

#: Room for accepted points the stepper gets per call: a call that fills it returns, and
#: the next call goes on from there.
POINTS_PER_CHUNK = 1 << 16


@dataclass
class Automation:
    """A parameter moving linearly from value0 at t0 to value1 at t1 (seconds)."""

    ref: str
    param: str
    t0: float
    t1: float
    value0: float
    value1: float


def _automation_table(circuit: Circuit, automation) -> np.ndarray:
    rows = []
    for a in automation or ():
        rows.append((circuit.param_index[(a.ref, a.param)], a.t0, a.t1, a.value0, a.value1))
    return np.array(rows, dtype=np.float64).reshape(-1, 5)


def _unknown_table(circuit: Circuit, opts: StepOptions, audible=()) -> np.ndarray:
    """The stepper's per-unknown table: atol, error weight, voltage?, slow?, audible?"""
    unk = np.zeros((circuit.size, 5))
    unk[:, 0] = np.where(circuit.is_volt, opts.atol_volts, opts.atol_volts * AMPS_PER_VOLT_TOLERANCE)
    unk[:, 1] = np.where(circuit.slow, 1.0, opts.fast_factor)
    unk[:, 2] = circuit.is_volt.astype(float)
    unk[:, 3] = circuit.slow.astype(float)
    for name in audible:
        unk[circuit.index[name], 4] = 1.0
    return unk


def simulate(circuit: Circuit, seconds: float, record: list[str], opts: StepOptions = StepOptions(),
             automation=(), progress=None, audible=(), on_chunk=None) -> StepTrace:
    """Integrate from power-on to ``seconds`` with the compiled stepper.

    record: names of unknowns to keep (nets, ``D1.junction``...). progress: optional
    callable(simulated_seconds) called between chunks. audible: names of unknowns that
    are heard (the listened nets or current): their error stays watched after a flip
    (see StepOptions.flip_volts). Raises SolverError when Newton's
    method fails at the smallest step, naming the time and the nets involved.

    on_chunk: optional callable(times, values, orders) called after each chunk (before
    ``progress``) with its accepted points, (k,), (k, len(record)), (k,), the first call
    starting with the power-on point: one after the other they are the returned trace's
    arrays, so a reader can start on the finished part of the trace while the rest is
    computed. Read-only; the stepping is the same with or without it.
    """
    k = kernel.load()
    n = circuit.size
    hmax = opts.max_step_seconds
    if circuit.max_step_seconds:
        hmax = min(hmax, circuit.max_step_seconds)
    opt = np.zeros(k.O_SIZE)
    opt[k.O_RTOL] = opts.rtol
    opt[k.O_HMAX] = hmax
    opt[k.O_HMIN] = opts.min_step_seconds
    opt[k.O_EVENT_DT] = opts.event_seconds
    opt[k.O_JUMP_V] = opts.jump_fraction * circuit.supply_volts
    opt[k.O_MAX_ITER] = opts.max_newton_iterations
    opt[k.O_GROWTH] = opts.growth
    opt[k.O_H_RESTART] = opts.restart_seconds
    opt[k.O_NEWTON_FRAC] = opts.newton_fraction
    opt[k.O_DV_MAX] = max(1.0, NEWTON_STEP_FRACTION * circuit.supply_volts)
    opt[k.O_SAMPLE_SECONDS] = opts.sample_seconds
    opt[k.O_FLIP_VOLTS] = opts.flip_volts
    opt[k.O_FLIP_SLEW] = opts.flip_slew_volts_per_second
    opt[k.O_RATE_FLOOR] = opts.newton_rate_floor
    opt[k.O_QUAD_GUESS] = float(opts.quadratic_guess)
    st = np.zeros(k.S_SIZE)
    st[k.S_H] = opts.restart_seconds
    st[k.S_H1] = opts.restart_seconds
    st[k.S_MODE] = k.MODE_RECOVER
    st[k.S_HGOAL] = hmax
    st[k.S_HNORMAL] = hmax
    st[k.S_RATE] = 1.0
    x = np.zeros(n)
    x1 = np.zeros(n)
    x2 = np.zeros(n)
    unk = _unknown_table(circuit, opts, audible)
    auto = _automation_table(circuit, automation)
    pf = circuit.pf.copy()
    rec = np.array([circuit.index[name] for name in record], dtype=np.int64)
    cnt = np.zeros(k.K_SIZE, dtype=np.int64)
    # The stepper writes its points straight into the trace's arrays, which grow as
    # needed (sized after the first chunk for the whole run): copying each chunk out and
    # joining the copies at the end wrote the whole trace twice more, into fresh memory
    # whose page faults cost as much as the copies.
    buf = _TraceBuffer(len(rec))
    started = time.perf_counter()
    sent = 0  # points already handed to on_chunk
    t_chunk = 0.0
    while st[k.S_T] < seconds * (1 - 1e-14):
        t_chunk = min(seconds, st[k.S_T] + opts.chunk_seconds)
        opt[k.O_T_END] = t_chunk
        # Only the last chunk's last step is cut to land on the end: cutting steps at
        # every chunk's end would restart the step sequence there, and the flip after
        # it would carry a different error from the others (measured: period-to-period
        # timing noise of the oscillator's flips of 2 to 8 ns rms with the cuts, none
        # without).
        opt[k.O_LAND] = 1.0 if t_chunk >= seconds else 0.0
        while True:
            out_t, out_y, out_o = buf.room(POINTS_PER_CHUNK, st[k.S_T], seconds)
            got, status = k.run(st, x, x1, x2, circuit.mass, pf, circuit.nf, circuit.tab,
                                circuit.df, unk, opt, auto, rec, out_t, out_y, out_o, cnt,
                                circuit.lu_ptr, circuit.lu_idx)
            buf.size += got
            if status == 2:
                worst = circuit.names[int(st[k.S_FAIL_INDEX])]
                raise SolverError(
                    f"the solver could not converge at t = {st[k.S_T] * 1e3:.6f} ms "
                    f"(simulated time); the net that would not settle: {worst}. "
                    "Check for parts that make this net's voltage undefined (two outputs "
                    "fighting, a diode loop with no resistance) or try --quality fine.",
                    seconds=float(st[k.S_T]), nets=(worst,))
            if status == 0:
                break
        if on_chunk is not None:
            # views: the points up to buf.size are never written again, and a buffer
            # that grows leaves them in the old one
            on_chunk(*buf.points(sent, buf.size))
            sent = buf.size
        if progress is not None:
            progress(float(st[k.S_T]))
    counters = dict(zip(COUNTER_NAMES, (int(c) for c in cnt)))
    counters["wall_seconds"] = time.perf_counter() - started
    times, values, orders = buf.points(0, buf.size)
    return StepTrace(names=list(record), times=times, values=values, order=orders,
                     counters=counters)


class _TraceBuffer:
    """The arrays :func:`simulate` records its points into, with room to spare; point 0
    is the power-on point (t = 0, every unknown at 0 V, order 1)."""

    #: Room for this many more points than the run so far predicts (the step count per
    #: simulated second drifts a little as a patch settles).
    MARGIN = 1.05

    def __init__(self, width: int):
        self.t = np.zeros(1 + POINTS_PER_CHUNK)
        self.y = np.zeros((1 + POINTS_PER_CHUNK, width))
        self.o = np.ones(1 + POINTS_PER_CHUNK, dtype=np.int64)
        self.size = 1

    def room(self, points: int, t_now: float, t_end: float):
        """Views for the next ``points`` points; the arrays grow first if short, to what
        the rate so far predicts for the whole run."""
        need = self.size + points
        if need > self.t.shape[0]:
            rate = self.size / t_now if t_now > 0.0 else 0.0
            grown = max(need, int(self.MARGIN * rate * t_end) + points,
                        int(1.5 * self.t.shape[0]))
            for name in ("t", "y", "o"):
                old = getattr(self, name)
                new = np.empty((grown, *old.shape[1:]), dtype=old.dtype)
                new[:self.size] = old[:self.size]
                setattr(self, name, new)
        end = self.size + points
        return self.t[self.size:end], self.y[self.size:end], self.o[self.size:end]

    def points(self, first: int, last: int):
        """(times, values, orders) of points first to last - 1 (views)."""
        return self.t[first:last], self.y[first:last], self.o[first:last]


def simulate_reference(circuit: Circuit, seconds: float, record: list[str], rtol: float = 1e-9,
                       atol_volts: float = 1e-9, automation=()) -> DenseTrace:
    """The same equations through scipy.integrate.solve_ivp (Radau, dense output).

    dx/dt = -M^-1 f(x, t) with the Jacobian -M^-1 G(x, t), from the same compiled
    ``evaluate`` as the stepper. Slow (minutes per simulated second at tight
    tolerances): for cross-checks, not for listening.
    """
    from scipy.integrate import solve_ivp

    k = kernel.load()
    n = circuit.size
    minv = np.linalg.inv(circuit.mass[1:, 1:])
    pf = circuit.pf.copy()
    auto = _automation_table(circuit, automation)
    f = np.zeros(n)
    G = np.zeros((n, n))
    xfull = np.zeros(n)
    calls = {"f": 0, "jac": 0}

    def rhs(t, y):
        calls["f"] += 1
        xfull[1:] = y
        k.apply_automation(pf, auto, t)
        k.evaluate(xfull, t, pf, circuit.nf, circuit.tab, circuit.df, f, G)
        return -minv @ f[1:]

    def jac(t, y):
        calls["jac"] += 1
        xfull[1:] = y
        k.apply_automation(pf, auto, t)
        k.evaluate(xfull, t, pf, circuit.nf, circuit.tab, circuit.df, f, G)
        return -minv @ G[1:, 1:]

    atol = np.where(circuit.is_volt[1:], atol_volts, atol_volts * AMPS_PER_VOLT_TOLERANCE)
    started = time.perf_counter()
    sol = solve_ivp(rhs, (0.0, seconds), np.zeros(n - 1), method="Radau", rtol=rtol, atol=atol,
                    jac=jac, dense_output=True)
    if not sol.success:
        raise SolverError(f"the reference solver failed: {sol.message}")
    rows = [circuit.index[name] - 1 for name in record]
    counters = {"steps": int(sol.t.size - 1), "rhs_calls": sol.nfev, "jacobians": sol.njev,
                "factorisations": sol.nlu, "wall_seconds": time.perf_counter() - started}
    return DenseTrace(names=list(record), sol=sol.sol, rows=rows, t_end=seconds,
                      counters=counters)
