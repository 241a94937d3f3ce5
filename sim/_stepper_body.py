"""The compiled time stepper (source text compiled inside a generated kernel module).

This file is not imported on its own: :mod:`sim.kernel` writes a module that defines
``evaluate`` (the sum of every kind's stamp) and then this text, and numba compiles
and caches that module. See DEVELOPERS.md, "The stepper".

The system is ``M dx/dt + f(x, t) = 0`` with a constant mass matrix ``M`` (stray and
part capacitances, inductances) and ``f``/``G = df/dx`` from ``evaluate``.

Method
------
- BDF2 with variable steps (L-stable), backward Euler for (re)starts; Newton's method
  with the analytic Jacobian and an LU at every iteration, in the compiler's
  fill-reducing order over the nonzeros it predicts (``lu_static``; partial pivoting
  when a pivot is too small).
- Local error from the difference between the corrector and an extrapolating
  predictor (Milne's device), weighted per unknown: "slow" unknowns (carrying a part's
  capacitance or inductance) at the asked tolerance, "fast" ones (only stray
  capacitance, i.e. algebraic in practice) at ``fast_factor`` times looser.
- Step size: Gustafsson's predictive controller on accepted steps in normal mode
  (Hairer & Wanner, Solving ODEs II, IV.8, eq. 8.21): the step follows a rising error
  (a flip's slow passage) instead of overshooting and being rejected.
- Newton stops when its last update times the contraction rate remembered from the
  previous iterations (decaying by ``RATE_DECAY`` when measured) is below the Newton
  tolerance, as CVODE's corrector test does: one evaluation per step in smooth stretches.
  The remembered rate counts at least ``newton_rate_floor`` (0.05: a clamp diode that
  starts to conduct within a step then still gets its second iteration). Newton starts
  from the quadratic extrapolation (as the error estimate's predictor), not the linear
  one, so the first update is small. The same test holds in recovery after a flip
  (measured: 6 % fewer iterations, every scenario's pitch unchanged to 0.002 cent).
- Flips: an accepted normal step in which a fast unknown (no part capacitance) moved by
  more than ``flip_volts`` at more than ``flip_slew`` volts per second is the regenerative
  part of a flip: recovery mode (below) takes over at once, and until the second step of
  ``RELAX_SECONDS`` or more the step is "relaxed": its error is measured on the part
  capacitors' own voltages (the slow states that carry the flip's timing on) and on
  audible nets by their share of an audio sample, not on the node voltages' nanosecond
  transient (inaudible; the flip's timing was decided during the slow passage, resolved
  at full tolerance). While relaxed, Newton's method starts the fast unknowns from their
  last value, the jump test is off, and backward Euler goes on while its steps may grow
  (``RELAXED_BE_GROWTH``).
- Events: a step whose Newton iteration fails, or whose solution jumps by more than
  ``jump_volts`` from the predictor, contains a flip of a regenerative loop (a Schmitt
  trigger switching). The step is bisected until the flip instant is bracketed to
  ``event_seconds``; the part before it is accepted, then a recovery phase steps over
  the flip's nanosecond transient with backward Euler steps that grow geometrically
  back to the step size used before (L-stable, so the parasitic modes settle without
  ringing and without spending steps resolving them).
"""
# The names below are resolved in the generated module that includes this text.
# flake8: noqa: F821

import math

import numpy as np
import numba

from blocks._base import FASTMATH

# option vector ``opt``
O_T_END = 0
O_RTOL = 1
O_HMAX = 2
O_HMIN = 3
O_EVENT_DT = 4
O_JUMP_V = 5
O_MAX_ITER = 6
O_GROWTH = 7
O_NEWTON_FRAC = 8
O_DV_MAX = 9
O_H_RESTART = 10
O_SAMPLE_SECONDS = 11
O_FLIP_VOLTS = 12
O_FLIP_SLEW = 13
O_RATE_FLOOR = 14
O_QUAD_GUESS = 15
O_LAND = 16  # 1.0: the last step lands exactly on O_T_END (else it may pass it)
O_SIZE = 17

# state vector ``st``
S_T = 0
S_H = 1
S_H1 = 2
S_H2 = 3
S_NHIST = 4
S_MODE = 5
S_HGOAL = 6
S_FAIL_INDEX = 7
S_HNORMAL = 8
S_ERR_OLD = 9  # error norm of the last accepted normal step (0: none)
S_RATE = 10  # Newton contraction rate remembered across steps
S_RELAX = 11  # > 0 after a flip until relaxed stepping ends (see run)
S_FLIP_T = 12  # time of the last flip's recovery start
S_SIZE = 13

# per-unknown table ``unk`` columns
U_ATOL = 0
U_WEIGHT = 1
U_VOLT = 2
U_SLOW = 3  # 1.0 where a part's capacitance or inductance sits on the unknown
U_AUDIBLE = 4  # 1.0 where the unknown is heard (a listened net or current)

# counters ``cnt``
K_STEPS = 0
K_REJECT_ERROR = 1
K_REJECT_NEWTON = 2
K_ITERATIONS = 3
K_EVENTS = 4
K_TRIALS = 5
K_LU_FALLBACK = 6  # iterations whose LU fell back to partial pivoting
K_SIZE = 7

MODE_NORMAL = 0
MODE_RECOVER = 1

# Newton outcomes
N_OK = 0
N_FAILED = 1
N_JUMPED = 2  # an iterate (the last one included) left the predictor by more than the limit

#: The stepper's inner functions are compiled without numba's reference-counting
#: runtime: they only read and write the arrays they are given (no allocation, no
#: views), and with the runtime on, every array passed to a call costs an atomic
#: increment and decrement. Measured on the oscillator scenario: those took half the
#: stepper's time (4.6x real time with them, 8.6x without). ``run`` and
#: ``evaluate_rows`` allocate their work arrays and keep the runtime; ``run`` hands them
#: to the lean ``_loop`` at once. FASTMATH: the arithmetic freedoms the stamps have
#: (blocks/_base.py), which keep NaN and infinity for Newton's divergence test.
lean = numba.njit(cache=True, _nrt=False, fastmath=FASTMATH)
#: The functions of one step are inlined into ``_loop`` (numba's own inlining, before
#: LLVM sees the code). A call passes every array as its pointer, shape and strides, and
#: the step's calls carry some thirty arrays (the per-kind views among them): measured
#: per Newton iteration on the oscillator scenario, the calls cost a third of the time
#: (interleaved A/B: 1.35x faster inlined, 1.12x on the mixer). The LU stays a call
#: (inlined, it gained nothing), and so do the stamps, except those of a kind that asks
#: to be inlined (``Kind.inline``: the inverter): all of them inlined gained 4 % for a
#: cold compile more than twice as long (18 s to 41 s on this machine).
inlined = numba.njit(cache=True, _nrt=False, inline='always', fastmath=FASTMATH)

#: Step-size controller: never grow by more than this per step (keeps BDF2's
#: variable-step formula well inside its zero-stability bound of 1 + sqrt(2)).
MAX_GROWTH = 2.0
#: ... and never shrink by more than this after a rejected step.
MIN_SHRINK = 0.2
#: Safety factor on the optimal step predicted from the error estimate.
SAFETY = 0.9
#: After a flip the steps are relaxed until the second step of this length or more:
#: their transients (stray capacitance against kilohms, at most a few hundred ns) are
#: over by then, and fast unknowns that carry a slow one's current (a diode in the
#: integrator's path) are watched again before they matter (measured: relaxing until
#: the fast error is back within tolerance instead costs 5 cents on the saw scenario).
RELAX_SECONDS = 10e-6
#: ... and at the latest this long after the flip (when a part asks for steps shorter
#: than RELAX_SECONDS, e.g. a high test tone).
RELAX_LIMIT_SECONDS = 50e-6
#: While relaxed after a flip, the recovery's backward Euler steps go on growing (by up
#: to ``growth`` per step) as long as the error controller lets them grow by at least
#: this factor; then BDF2 takes over. Handing over as soon as the error limited the growth
#: at all (as outside a flip) left BDF2 to double its way from tens of nanoseconds to the
#: ramp's steps, two Newton iterations a step. Measured over 0.5 s of each scenario:
#: Newton iterations 8 % fewer on the oscillator, 9 % on the mixer, 3 to 9 % on the pot,
#: loaded and unloaded scenarios, the others unchanged; pitch against Radau unchanged
#: (+0.080, +0.166, +0.257 cent on the oscillator, mixer and saw). From 1.0 to 1.4 the
#: steps after a flip stopped repeating from one flip to the next: the oscillator's flips
#: scattered by 7 to 9 ns rms about its steady period (0 ns before), and the floor between
#: a square's harmonics rose from -85 to -82 dB; 1.5 to 1.7 repeat exactly, 2.0 gained
#: little. Below 1.0 (going on while the step shrinks) the bridged speaker's iterations
#: doubled: its coil's slow, audible transient held the relaxed window at first order.
RELAXED_BE_GROWTH = 1.6
#: While relaxed, Newton's method starts the fast unknowns from their last value when the
#: step is more than this many times the last one (else from the extrapolation).
HOLD_GROWTH = 1.5
#: Smallest error norm remembered for the predictive controller (keeps the trend
#: factor finite after an exact step).
ERR_FLOOR = 1e-4
#: Shrink factor after Newton's method fails outside an event.
NEWTON_SHRINK = 0.25
#: Newton's LU pivots on the diagonal in the static elimination order (see lu_static)
#: while each pivot is at least this fraction of the largest entry below it in its
#: column; a smaller one sends the iteration to the partial-pivoting LU (lu_solve).
#: Below it, elimination could magnify rounding errors by the inverse of this ratio; a
#: gate's input column, where the gate's transconductance sits below a node conductance
#: a few hundred times smaller, passes. The counter K_LU_FALLBACK shows how often the
#: test fails (measured over 0.5 s: never on nine scenarios, 0.5 % of the mixer's
#: iterations).
PIVOT_THRESHOLD = 1e-4
#: The remembered Newton contraction rate decays by this factor each time it is measured
#: (CVODE's CRDOWN), so one slow iteration does not make every later step iterate twice.
RATE_DECAY = 0.3


@lean
def lu_solve(A, b, n):
    """Solve A[1:n,1:n] y = b[1:n] in place (b becomes y); Gaussian elimination with
    partial pivoting. Row/column 0 (ground) is ignored. Returns False if singular."""
    for c in range(1, n):
        p = c
        best = abs(A[c, c])
        for r in range(c + 1, n):
            v = abs(A[r, c])
            if v > best:
                best = v
                p = r
        if best == 0.0:
            return False
        if p != c:
            for j in range(1, n):
                tmp = A[c, j]
                A[c, j] = A[p, j]
                A[p, j] = tmp
            tmp = b[c]
            b[c] = b[p]
            b[p] = tmp
        inv = 1.0 / A[c, c]
        for r in range(c + 1, n):
            m = A[r, c] * inv
            if m != 0.0:
                A[r, c] = 0.0
                for j in range(c + 1, n):
                    A[r, j] -= m * A[c, j]
                b[r] -= m * b[c]
    for r in range(n - 1, 0, -1):
        s = b[r]
        for j in range(r + 1, n):
            s -= A[r, j] * b[j]
        b[r] = s / A[r, r]
    return True


@lean
def lu_static(A, b, n, ptr, idx):
    """Solve A[1:n,1:n] y = b[1:n] in place (b becomes y) by Gaussian elimination in
    index order with the pivots on the diagonal, touching only the nonzeros the
    elimination meets (``ptr``, ``idx``: :func:`sim.compile.elimination_pattern`).

    The unknowns are numbered for little fill-in (sim.compile.elimination_order); with
    the pattern known before the run, the factorisation skips every structural zero
    (the mixer scenario: 107 multiply-adds instead of 1015 for the dense loop). Returns
    False, with A and b partly overwritten, when a pivot is zero or smaller than
    PIVOT_THRESHOLD times the largest entry below it (tested once its column is done:
    the caller starts again from a new A). Each pivot's inverse is kept on the diagonal
    so that the back substitution multiplies: a division on that chain of dependent
    steps costs three or four multiplications' time (measured: the solve 17 % faster).
    """
    for k in range(1, n):
        piv = A[k, k]
        inv = 1.0 / piv
        bk = b[k]
        big = 0.0
        q0 = ptr[k]
        q1 = ptr[k + 1]
        for q in range(q0, q1):
            i = idx[q]
            a = A[i, k]
            big = max(big, abs(a))
            m = a * inv
            for p in range(q0, q1):
                j = idx[p]
                A[i, j] -= m * A[k, j]
            b[i] -= m * bk
        if not abs(piv) >= PIVOT_THRESHOLD * big or piv == 0.0:
            return False
        A[k, k] = inv
    for k in range(n - 1, 0, -1):
        s = b[k]
        for q in range(ptr[k], ptr[k + 1]):
            j = idx[q]
            s -= A[k, j] * b[j]
        b[k] = s * A[k, k]
    return True


@numba.njit(cache=True)
def mass_rows(M):
    """The nonzeros of M[1:, 1:] by rows (compressed rows): entries mrow[i]..mrow[i+1]-1
    of mcol (columns, increasing) and mval (values) belong to row i (row 0, ground, is
    empty). Newton's iteration reads the mass matrix only there."""
    n = M.shape[0]
    count = 0
    for i in range(1, n):
        for j in range(1, n):
            if M[i, j] != 0.0:
                count += 1
    mrow = np.zeros(n + 1, dtype=np.int64)
    mcol = np.zeros(count, dtype=np.uint64)
    mval = np.zeros(count)
    q = 0
    for i in range(n):
        mrow[i] = q
        if i > 0:
            for j in range(1, n):
                if M[i, j] != 0.0:
                    mcol[q] = j
                    mval[q] = M[i, j]
                    q += 1
    mrow[n] = q
    return mrow, mcol, mval


@inlined
def apply_automation(pf, auto, t):
    """Move automated parameters: rows (flat index, t0, t1, v0, v1), linear in time."""
    for r in range(auto.shape[0]):
        t0 = auto[r, 1]
        t1 = auto[r, 2]
        if t <= t0:
            v = auto[r, 3]
        elif t >= t1:
            v = auto[r, 4]
        else:
            v = auto[r, 3] + (auto[r, 4] - auto[r, 3]) * (t - t0) / (t1 - t0)
        pf[int(auto[r, 0])] = v


@inlined
def _assemble(xn, t_new, a0, c, mrow, mcol, mval, P, N, D, f, J, r, v):
    """Newton's matrix J = G + a0 M and right-hand side r = -(M (a0 xn + c) + f) at xn."""
    n = xn.shape[0]
    evaluate_parts(xn, t_new, P, N, D, f, J)
    for j in range(1, n):
        v[j] = a0 * xn[j] + c[j]
    for i in range(1, n):
        s = f[i]
        for q in range(mrow[i], mrow[i + 1]):
            j = mcol[q]
            s += mval[q] * v[j]
            J[i, j] += a0 * mval[q]
        r[i] = -s


@inlined
def newton(xn, t_new, a0, c, mrow, mcol, mval, P, N, D, unk, opt, f, J, r, v, xref, jump_v,
           cnt, st, lu):
    """Solve M (a0 xn + c) + f(xn, t_new) = 0 for xn (in place, starting from xn).

    ``v`` (n,) is work space (the derivative a0 xn + c of the current iterate). The mass
    matrix comes as its nonzeros by rows (:func:`mass_rows`); the stamps write their
    Jacobian straight into ``J``, and a0 M is added where M is nonzero. ``lu``: the
    elimination pattern (ptr, idx) for :func:`lu_static`.

    Returns (outcome, worst unknown index). ``jump_v`` > 0 makes an iterate farther than
    that from ``xref`` (volts) end the iteration as N_JUMPED. The iteration stops once
    its update times the contraction rate remembered in st[S_RATE] is below the
    tolerance.
    """
    n = xn.shape[0]
    rtol = opt[O_RTOL] * opt[O_NEWTON_FRAC]
    frac = opt[O_NEWTON_FRAC]
    dv_max = opt[O_DV_MAX]
    max_iter = int(opt[O_MAX_ITER])
    worst = 1
    conv_prev = -1.0
    for _ in range(max_iter):
        cnt[K_ITERATIONS] += 1
        # one call site of _assemble (inlined: a second one would double its compiled
        # code); a small pivot, rare, sends the iteration round again to pivot by rows
        by_rows = False
        while True:
            _assemble(xn, t_new, a0, c, mrow, mcol, mval, P, N, D, f, J, r, v)
            if by_rows:
                solved = lu_solve(J, r, n)
                break
            solved = lu_static(J, r, n, lu[0], lu[1])
            if solved:
                break
            cnt[K_LU_FALLBACK] += 1
            by_rows = True
        if not solved:
            return N_FAILED, worst
        big = 0.0
        for i in range(1, n):
            if unk[i, U_VOLT] > 0.0:
                a = abs(r[i])
                if a > big:
                    big = a
        scale = 1.0
        if big > dv_max:
            scale = dv_max / big
        conv = 0.0
        dev = 0.0
        for i in range(1, n):
            d = scale * r[i]
            xn[i] += d
            e = abs(d) / (frac * unk[i, U_ATOL] + rtol * abs(xn[i]))
            if e > conv:
                conv = e
                worst = i
            if unk[i, U_VOLT] > 0.0:
                dv = abs(xn[i] - xref[i])
                if dv > dev:
                    dev = dv
        if not np.isfinite(conv):
            return N_FAILED, worst
        if jump_v > 0.0 and dev > jump_v:
            return N_JUMPED, worst
        if scale == 1.0 and conv_prev > 0.0:
            st[S_RATE] = max(RATE_DECAY * st[S_RATE], conv / conv_prev)
        rate = min(1.0, max(st[S_RATE], opt[O_RATE_FLOOR]))
        if scale == 1.0 and conv * rate <= 1.0:
            return N_OK, worst
        conv_prev = conv if scale == 1.0 else -1.0
    return N_FAILED, worst


@inlined
def _coefficients(order, h, h1, x, x1, c):
    """Fill ``c`` and return a0 so that dx/dt at the new point is a0 xn + c."""
    n = x.shape[0]
    if order == 2:
        w = h / h1
        a0 = (1.0 + 2.0 * w) / ((1.0 + w) * h)
        b1 = -(1.0 + w) / h
        b2 = w * w / ((1.0 + w) * h)
        for i in range(n):
            c[i] = b1 * x[i] + b2 * x1[i]
    else:
        a0 = 1.0 / h
        for i in range(n):
            c[i] = -x[i] / h
    return a0


@inlined
def _predict(nh, h, h1, x, x1, xp):
    """Linear extrapolation (or a copy of x without history) into ``xp``."""
    n = x.shape[0]
    if nh >= 1:
        s = h / h1
        for i in range(n):
            xp[i] = x[i] + s * (x[i] - x1[i])
    else:
        for i in range(n):
            xp[i] = x[i]


@inlined
def _extrapolate2(h, h1, h2, x, x1, x2, out):
    """Quadratic through (-h1-h2, x2), (-h1, x1), (0, x), evaluated at h, into ``out``."""
    ta = -(h1 + h2)
    tb = -h1
    la = (h * (h - tb)) / (ta * (ta - tb))
    lb = (h * (h - ta)) / (tb * (tb - ta))
    lc = ((h - ta) * (h - tb)) / (ta * tb)
    for i in range(x.shape[0]):
        out[i] = la * x2[i] + lb * x1[i] + lc * x[i]


@inlined
def _attempt(order, nh, t, h, h1, x, x1, xn, xp, xq, c, mrow, mcol, mval, pf, P, N, D, unk,
             opt, auto, f, J, r, v, jump_v, cnt, st, x2, lu):
    """One implicit step of size h from (t, x); the result in xn. Returns (outcome, worst).

    Leaves the linear predictor in ``xp`` (the jump test's reference and backward
    Euler's error predictor) and, for order 2, the quadratic one in ``xq`` (BDF2's error
    predictor, and Newton's starting point unless opt[O_QUAD_GUESS] is off)."""
    apply_automation(pf, auto, t + h)
    _predict(nh, h, h1, x, x1, xp)
    a0 = _coefficients(order, h, h1, x, x1, c)
    guess = xp
    if order == 2:
        _extrapolate2(h, h1, st[S_H2], x, x1, x2, xq)
        if opt[O_QUAD_GUESS] > 0.0:
            guess = xq
    # After a flip the fast unknowns settle within a few of their time constants:
    # extrapolating their decay over a much longer step overshoots (past a rail, where an
    # input clamp makes Newton's method crawl); their last value is then the better start.
    # Over a step about as long as the last one the extrapolation is better: it follows
    # fast nets that track a slow transient (a bridged speaker's outputs as its current
    # reverses), where the last value would cost every step a second iteration.
    hold = st[S_RELAX] > 0.0 and (order == 1 or h > HOLD_GROWTH * h1)
    for i in range(x.shape[0]):
        xn[i] = x[i] if (hold and unk[i, U_SLOW] == 0.0) else guess[i]
    return newton(xn, t + h, a0, c, mrow, mcol, mval, P, N, D, unk, opt, f, J, r, v, xp,
                  jump_v, cnt, st, lu)


@inlined
def _error_norm(order, h, h1, h2, x, xn, xe, unk, rtol, weighted, relaxed, sample_seconds,
                mrow, mcol, mval):
    """Weighted max-norm of the local error estimate (1.0 = at tolerance).

    ``xe``: the extrapolating predictor of the step's order (quadratic through the last
    three points for BDF2, linear for backward Euler); the local error is its distance
    from the corrector ``xn`` times the method's factor (Milne's device).
    ``weighted`` False holds every unknown to the full tolerance, else unknown i's error
    is divided by unk[i, U_WEIGHT].

    ``relaxed`` (after a flip, until relaxed stepping ends: see RELAX_SECONDS) changes
    what is measured, so the flip's fast transient is stepped over instead of resolved:
    - A part capacitor's own voltage is held to the absolute tolerance: row i of the mass
      matrix times the error, over its diagonal, for every slow voltage unknown i. That
      charge is what carries a flip's error on to the next flips (held to the relative
      tolerance of its voltage instead, the oscillator scenario's flips scatter by 25 ns
      rms). Branch currents (inductors) are measured as in normal steps.
    - Node voltages are not measured, except audible ones (``unk[i, U_AUDIBLE]``), whose
      error counts by its share of an audio sample of ``sample_seconds``: by its area,
      the error times h, which is what a sample's average sees.
    """
    if order == 2:
        fac = h * (h + h1) / ((2.0 * h + h1) * (h + h1 + h2))
        fac = fac / (1.0 + fac)
    else:
        fac = h / (2.0 * h + h1)
    err = 0.0
    for i in range(1, x.shape[0]):
        scale = unk[i, U_ATOL] + rtol * max(abs(x[i]), abs(xn[i]))
        # an inductor's current (slow, not a voltage) is measured as in normal steps: its
        # transient after a flip (a speaker coil's) is slow and audible
        if relaxed and (unk[i, U_VOLT] > 0.0 or unk[i, U_SLOW] == 0.0):
            if unk[i, U_SLOW] > 0.0:
                own = 0.0
                diag = 1.0
                for q in range(mrow[i], mrow[i + 1]):
                    j = mcol[q]
                    own += mval[q] * (xn[j] - xe[j])
                    if j == i:
                        diag = mval[q]
                e = abs(own / diag) * fac / unk[i, U_ATOL]
                if e > err:
                    err = e
            if unk[i, U_AUDIBLE] == 0.0:
                continue
            weight = max(1.0, sample_seconds / h)
        else:
            weight = unk[i, U_WEIGHT] if weighted else 1.0
        e = abs(xn[i] - xe[i]) * fac / (weight * scale)
        if e > err:
            err = e
    return err


@inlined
def _accept(st, t_new, h, x, x1, x2, xn, rec, out_t, out_y, out_o, k, order):
    n = x.shape[0]
    for i in range(n):
        x2[i] = x1[i]
        x1[i] = x[i]
        x[i] = xn[i]
    st[S_H2] = st[S_H1]
    st[S_H1] = h
    st[S_T] = t_new
    st[S_NHIST] = min(st[S_NHIST] + 1.0, 2.0)
    out_t[k] = t_new
    for j in range(rec.shape[0]):
        out_y[k, j] = x[rec[j]]
    out_o[k] = order
    return k + 1


@lean
def _root(value, order):
    """value ** (1 / (order + 1)), the step-size controller's exponent for an order-1 or
    order-2 step (a square or cube root: several times cheaper than a general power)."""
    return math.sqrt(value) if order == 1 else np.cbrt(value)


@inlined
def _flipping(x, x1, h, unk, opt):
    """True when a fast voltage unknown moved by more than opt[O_FLIP_VOLTS] in the step
    just accepted (x1 -> x, size h) at more than opt[O_FLIP_SLEW] volts per second.

    Inlined: asked after nearly every step, and as a call it passed three arrays
    (interleaved A/B: the oscillator 2.3 to 2.7 % faster inlined, the mixer 1.5 to 2.5 %)."""
    for i in range(1, x.shape[0]):
        if unk[i, U_SLOW] == 0.0 and unk[i, U_VOLT] > 0.0:
            dv = abs(x[i] - x1[i])
            if dv > opt[O_FLIP_VOLTS] and dv > opt[O_FLIP_SLEW] * h:
                return True
    return False


@numba.njit(cache=True, nogil=True)
def run(st, x, x1, x2, M, pf, nf, tab, df, unk, opt, auto, rec, out_t, out_y, out_o, cnt,
        lu_ptr, lu_idx):
    """Step from st[S_T] towards opt[O_T_END], recording accepted points.

    Returns (points recorded, status): 0 reached the end, 1 output buffer full,
    2 failed (st[S_T] is the time and st[S_FAIL_INDEX] the worst unknown).
    ``out_o`` holds the interpolation order valid on the interval ending at each
    point: 2 (quadratic through the last three points) or 1 (linear).
    ``lu_ptr``, ``lu_idx``: the Jacobian's elimination pattern (Circuit.lu_ptr/lu_idx).
    """
    n = x.shape[0]
    P, N, D = tables(pf, nf, tab, df)
    mrow, mcol, mval = mass_rows(M)
    f = np.zeros(n)
    J = np.zeros((n, n))
    r = np.zeros(n)
    c = np.zeros(n)
    xn = np.zeros(n)
    xp = np.zeros(n)
    xq = np.zeros(n)
    v = np.zeros(n)
    xlo = np.zeros(n)
    return _loop(st, x, x1, x2, xn, xp, xq, c, v, xlo, f, J, r, mrow, mcol, mval, pf, P, N,
                 D, unk, opt, auto, rec, out_t, out_y, out_o, cnt, (lu_ptr, lu_idx))


@lean
def _loop(st, x, x1, x2, xn, xp, xq, c, v, xlo, f, J, r, mrow, mcol, mval, pf, P, N, D, unk,
          opt, auto, rec, out_t, out_y, out_o, cnt, lu):
    """The body of :func:`run`, without numba's reference counting (see ``lean``).

    The functions it inlines take at most 31 arguments: with more, Python passes them
    as a tuple (*args), which numba's inlining refuses."""
    n = x.shape[0]
    t_end = opt[O_T_END]
    rtol = opt[O_RTOL]
    hmax = opt[O_HMAX]
    hmin = opt[O_HMIN]
    event_dt = opt[O_EVENT_DT]
    jump_v = opt[O_JUMP_V]
    growth = opt[O_GROWTH]
    cap = out_t.shape[0]
    k = 0
    # Bisection of a flip inside a failed step runs through the same attempt as every
    # step (one call site: the attempt is inlined once, which halves the compile time).
    bisecting = False
    lo = hi = 0.0
    have_lo = False
    t = h = h1 = h2 = 0.0
    mode = nh = order = 0
    while True:
        if bisecting:
            h_try = 0.5 * (lo + hi)
            jv_try = jump_v
            cnt[K_TRIALS] += 1
        else:
            t = st[S_T]
            remaining = t_end - t
            if remaining <= 1e-15 * max(1.0, abs(t_end)):
                return k, 0
            if k >= cap:
                return k, 1
            h = min(st[S_H], hmax)
            if opt[O_LAND] > 0.0:
                if h >= remaining:
                    h = remaining
                elif h > 0.5 * remaining:
                    h = 0.5 * remaining
            mode = int(st[S_MODE])
            nh = int(st[S_NHIST])
            h1 = st[S_H1]
            h2 = st[S_H2]
            order = 2 if (mode == MODE_NORMAL and nh >= 2) else 1
            # no jump test in recovery (jumps are expected) nor while relaxed after a
            # flip (the fast unknowns' decay is not followed, so the predictor misses it)
            jv_try = jump_v if (mode == MODE_NORMAL and st[S_RELAX] == 0.0) else 0.0
            h_try = h
        outcome, worst = _attempt(order, nh, t, h_try, h1, x, x1, xn, xp, xq, c, mrow, mcol,
                                  mval, pf, P, N, D, unk, opt, auto, f, J, r, v, jv_try, cnt,
                                  st, x2, lu)
        if bisecting:
            if outcome == N_OK:
                lo = h_try
                have_lo = True
                for i in range(n):
                    xlo[i] = xn[i]
            else:
                hi = h_try
            if hi - lo > event_dt:
                continue
            bisecting = False
            cnt[K_EVENTS] += 1
            if have_lo:
                k = _accept(st, t + lo, lo, x, x1, x2, xlo, rec, out_t, out_y, out_o, k,
                            order)
                cnt[K_STEPS] += 1
            st[S_HNORMAL] = h
            st[S_MODE] = MODE_RECOVER
            st[S_NHIST] = 0.0
            st[S_HGOAL] = h
            st[S_H] = min(hi - lo, opt[O_H_RESTART])
            continue
        if mode == MODE_NORMAL and outcome != N_OK:
            if h > event_dt:
                # A flip inside (t, t+h]: bracket it by bisection (the attempts above).
                bisecting = True
                lo = 0.0
                hi = h
                have_lo = False
                continue
            if outcome == N_JUMPED:
                # Stepping over a flip (this step was short already): recovery mode,
                # where jumps are expected and no longer cut the iteration short.
                cnt[K_EVENTS] += 1
                st[S_MODE] = MODE_RECOVER
                st[S_HGOAL] = max(st[S_HNORMAL], event_dt)
                st[S_H] = min(h, opt[O_H_RESTART])
                continue
        if outcome == N_FAILED:
            cnt[K_REJECT_NEWTON] += 1
            st[S_H] = h * NEWTON_SHRINK
            if st[S_H] < hmin:
                st[S_FAIL_INDEX] = worst
                return k, 2
            continue
        fac = growth
        if nh >= 1:
            # Error control in both modes; in recovery (backward Euler across a flip)
            # the step may grow faster, by ``growth``, as the transient dies out.
            err = _error_norm(order, h, h1, h2, x, xn, xq if order == 2 else xp, unk, rtol,
                              mode == MODE_NORMAL, st[S_RELAX] > 0.0, opt[O_SAMPLE_SECONDS],
                              mrow, mcol, mval)
            if err > 1.0:
                cnt[K_REJECT_ERROR] += 1
                st[S_H] = h * max(MIN_SHRINK, SAFETY / _root(err, order))
                if st[S_H] < hmin:
                    st[S_FAIL_INDEX] = worst
                    return k, 2
                continue
            top = MAX_GROWTH if mode == MODE_NORMAL else growth
            if err > 0.0:
                ideal = SAFETY / _root(err, order)
                fac = min(top, max(MIN_SHRINK, ideal))
                if mode == MODE_NORMAL and st[S_ERR_OLD] > 0.0:
                    # Gustafsson: also follow the trend of the error from the last step
                    trend = ideal * (h / h1) * _root(st[S_ERR_OLD] / err, order)
                    fac = max(MIN_SHRINK, min(fac, trend))
            else:
                fac = top
            st[S_ERR_OLD] = max(err, ERR_FLOOR) if mode == MODE_NORMAL else 0.0
        k = _accept(st, t + h, h, x, x1, x2, xn, rec, out_t, out_y, out_o, k,
                    order if mode == MODE_NORMAL else 1)
        cnt[K_STEPS] += 1
        if st[S_RELAX] > 0.0:
            # Relaxed stepping ends at the second step of RELAX_SECONDS or more (the
            # points the next predictor reads are then clear of the flip's transient; at
            # the first, the fast unknowns' error would reject the next step), or a
            # while after the flip when a part keeps the steps shorter.
            if h >= RELAX_SECONDS:
                st[S_RELAX] += 1.0
            if st[S_RELAX] > 2.0 or st[S_T] - st[S_FLIP_T] > RELAX_LIMIT_SECONDS:
                st[S_RELAX] = 0.0
        if mode == MODE_RECOVER:
            hn = h * fac
            # Back to BDF2 once the step is back where it was, or as soon as the error
            # controller rather than the recovery ramp limits the step (otherwise a
            # tight tolerance would keep the whole run first-order); while relaxed after
            # a flip, only once the error stops the step from growing (RELAXED_BE_GROWTH).
            limited = fac < growth and (st[S_RELAX] == 0.0 or fac < RELAXED_BE_GROWTH)
            if hn >= st[S_HGOAL] or (nh >= 1 and limited):
                hn = min(hn, st[S_HGOAL])
                st[S_MODE] = MODE_NORMAL
            st[S_H] = hn
        else:
            st[S_HNORMAL] = h
            st[S_H] = h * fac
            if opt[O_FLIP_VOLTS] > 0.0 and st[S_RELAX] == 0.0 and _flipping(x, x1, h, unk, opt):
                # the regenerative part of a flip: recover with BE, fast unknowns relaxed
                cnt[K_EVENTS] += 1
                st[S_MODE] = MODE_RECOVER
                st[S_RELAX] = 1.0
                st[S_FLIP_T] = st[S_T]
                st[S_HGOAL] = hmax
                st[S_ERR_OLD] = 0.0


@numba.njit(cache=True, nogil=True)
def evaluate_rows(X, t, pf, nf, tab, df, F):
    """``f`` for every state row of X (m, n) into F (m, n): post-processing helper
    (e.g. currents out of each gate along a trace), one compiled loop."""
    n = X.shape[1]
    P, N, D = tables(pf, nf, tab, df)
    G = np.zeros((n, n))
    f = np.zeros(n)
    for s in range(X.shape[0]):
        evaluate_parts(X[s], t, P, N, D, f, G)
        for i in range(n):
            F[s, i] = f[i]
