"""Traces: what a simulation leaves behind, read through time.

A :class:`StepTrace` holds the stepper's accepted points; nobody pokes at them
directly. Readers ask for a uniform grid with :meth:`StepTrace.uniform`, which
returns the *average* of the signal over each sample interval (centred on the sample
time), integrated exactly from the stepper's own interpolating polynomials. Averaging
is a box filter: a square edge that falls between two grid points lands as a partial
sample instead of snapping to the grid, so edge timing survives resampling and the
decimation to audio aliases far less.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
def box_average(t, y, cols, order, base, t_first, rate_hz, count):
    """Averages of y's columns ``cols`` over [T_i - d/2, T_i + d/2], T_i = t_first + i d,
    d = 1/rate_hz.

    t: (K,) accepted times, increasing; y: (K, r) values, read in place (a copy of the
    columns read cost as much as the walk); cols: (m,) the columns read; order: (K,)
    interpolation order on the interval ending at each point; the trace's points from
    index ``base`` on (at least the two before the grid's first step, and one at or
    after its end).
    Returns (count, m), each column contiguous (column-major: the walk writes one column
    after the other, and the measures read one signal at a time, about a fifth faster
    than from every m-th number). The grid must lie inside [t[0], t[-1]]. See
    :func:`_box_walk`.
    """
    out = np.zeros((cols.shape[0], count)).T
    state = _walk_state(t, base, t_first, rate_hz, cols.shape[0])
    _box_walk(t, y, cols, order, base, t_first, rate_hz, 0, count + 1, out, 0, False, state)
    return out


@numba.njit(cache=True, nogil=True)
def box_peak(t, y, cols, order, base, t_first, rate_hz, count):
    """The largest magnitude of each column's averages of :func:`box_average`, shape (m,)
    (0 when count is 0), without holding the (count, m) averages: the same numbers,
    one pass, no array of a few tens of MB to write and read back."""
    out = np.zeros((1, cols.shape[0]))
    state = _walk_state(t, base, t_first, rate_hz, cols.shape[0])
    _box_walk(t, y, cols, order, base, t_first, rate_hz, 0, count + 1, out, 0, True, state)
    return out[0]


#: Slots of the state of :func:`_box_walk` (a float array, then for each column the
#: running sum of the current sample and the step's three polynomial coefficients):
#: where the walk stands, so a walk over a trace still being computed can stop at the
#: end of what is known and go on from there with the same arithmetic.
W_CURSOR, W_KSEG, W_SEG, W_T1 = range(4)
W_SIZE = 4


@numba.njit(cache=True, nogil=True)
def _walk_state(t, base, t_first, rate_hz, m):
    """The state of :func:`_box_walk` before its first sample: t (k,) holds the trace's
    points from index ``base`` on, including the last one before the grid's start (or
    the trace's first point) and one at or after it."""
    state = np.zeros(W_SIZE + 4 * m)
    d = 1.0 / rate_hz
    cursor = t_first - 0.5 * d
    last = t.shape[0] - 1
    # the first step ending at or after the grid's start
    state[W_CURSOR] = cursor
    state[W_KSEG] = base + max(1, min(last, np.searchsorted(t, cursor)))
    state[W_SEG] = -1.0  # the step the coefficients belong to: none yet
    return state


@numba.njit(cache=True, nogil=True)
def _box_walk(t, y, cols, order, base, t_first, rate_hz, j_from, j_to, out, out_row0, peak,
              state):
    """The walk of :func:`box_average` over the steps, edges j_from to j_to - 1 (edge j
    closes sample j - 1, from 0 to count): writes the averages of y's column cols[c] into
    out[j - 1 - out_row0, c], or with ``peak`` keeps the largest magnitude in out[0, c].
    t, y, order hold the trace's points from index ``base`` on (from the step before
    the walk's, see ``state``); ``state`` (:func:`_walk_state`) is read and left where
    the walk stops, so a walk cut into parts gives the same numbers to the bit.

    Each step's interpolant (the quadratic through the step's point and the two before
    it, order 2, else the straight line through its two ends) is written as p(u) = y1 +
    b u + g u^2 in u = t - t1 from the step's start t1 (Newton's divided differences).
    The part of a sample interval within the step, u from ua to ub, then integrates
    exactly to (ub - ua) (y1 + b (ua + ub) / 2 + g (ua^2 + ua ub + ub^2) / 3): a few
    multiply-adds and no division (the Lagrange weights of each piece, formed before,
    took fifteen divisions). Each sample sums only its own pieces, so its average carries
    no cancellation from the rest of the trace. The columns are walked one after the
    other, each with its running values in registers (walked together, their values in
    arrays, every sample cost 3.5 times as much), so each column's arithmetic is the same
    whichever columns are read together. Releases the GIL (a reader thread can run beside
    the simulation).
    """
    m = cols.shape[0]
    cursor = state[W_CURSOR]
    kseg = int(state[W_KSEG])
    seg = int(state[W_SEG])
    t1 = state[W_T1]
    for c in range(m):
        at = W_SIZE + 4 * c
        acc, c0, c1, c2 = state[at], state[at + 1], state[at + 2], state[at + 3]
        cursor_c, kseg_c, seg_c, t1_c, acc, c0, c1, c2 = _walk_column(
            t, y, cols[c], order, base, t_first, rate_hz, j_from, j_to, out, out_row0, peak,
            c, cursor, kseg, seg, t1, acc, c0, c1, c2)
        state[at], state[at + 1], state[at + 2], state[at + 3] = acc, c0, c1, c2
        if c == m - 1:
            cursor, kseg, seg, t1 = cursor_c, kseg_c, seg_c, t1_c
    state[W_CURSOR] = cursor
    state[W_KSEG] = kseg
    state[W_SEG] = seg
    state[W_T1] = t1


@numba.njit(cache=True, nogil=True)
def _walk_column(t, y, col, order, base, t_first, rate_hz, j_from, j_to, out, out_row0, peak,
                 c, cursor, kseg, seg, t1, acc, c0, c1, c2):
    """Output column c of :func:`_box_walk` (y's column ``col``), from the walk's position
    (cursor, kseg, seg, t1) and the column's running sum and step coefficients; returns
    them where it stops."""
    d = 1.0 / rate_hz
    last = base + t.shape[0] - 1
    third = 1.0 / 3.0
    for j in range(j_from, j_to):
        edge = t_first + (j - 0.5) * d
        while True:
            t2 = t[kseg - base]
            upper = min(edge, t2)
            if upper > cursor:
                if seg != kseg:
                    seg = kseg
                    k1 = kseg - 1 - base
                    t1 = t[k1]
                    h2 = t2 - t1
                    y1 = y[k1, col]
                    d21 = (y[k1 + 1, col] - y1) / h2 if h2 > 0.0 else 0.0
                    c0 = y1
                    if order[kseg - base] == 2 and kseg >= 2 and t1 > t[k1 - 1]:
                        t0 = t[k1 - 1]
                        g = (d21 - (y1 - y[k1 - 1, col]) / (t1 - t0)) / (t2 - t0)
                        c1 = d21 - g * h2
                        c2 = g
                    else:
                        c1 = d21
                        c2 = 0.0
                ua = cursor - t1
                ub = upper - t1
                acc += (upper - cursor) * (c0 + c1 * (0.5 * (ua + ub))
                                           + c2 * ((ua * ua + ua * ub + ub * ub) * third))
                cursor = upper
            if edge <= t2 or kseg == last:
                break
            kseg += 1
        if j > 0:
            average = acc * rate_hz
            if not peak:
                out[j - 1 - out_row0, c] = average
            elif abs(average) > out[0, c]:
                out[0, c] = abs(average)
        acc = 0.0
    return cursor, kseg, seg, t1, acc, c0, c1, c2


@dataclass
class StepTrace:
    """Accepted points of the compiled stepper.

    times: (K,) s; values: (K, m) for the recorded unknowns ``names``; order: (K,).
    counters: work done (steps, rejected steps, Newton iterations, events...).
    """

    names: list[str]
    times: np.ndarray
    values: np.ndarray
    order: np.ndarray
    counters: dict = field(default_factory=dict)
    solver: str = "compiled"

    def column(self, name: str) -> int:
        return self.names.index(name)

    def uniform(self, rate_hz: float, t_start: float, t_stop: float,
                columns: list[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Sample times (s) and (count, m) interval averages on a uniform grid.

        columns: indices into ``names`` to read (default all, m = len(names))."""
        d = 1.0 / rate_hz
        first = t_start + 0.5 * d
        count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
        grid = np.arange(count, dtype=np.float64)  # in place: each new array of this length
        grid *= d                                   # costs its page faults
        grid += first
        if count <= 0:
            return grid, np.zeros((0, self.values.shape[1] if columns is None else len(columns)))
        return grid, box_average(*self._window(t_start, count * d, columns), first,
                                 float(rate_hz), count)

    def uniform_peak(self, rate_hz: float, t_start: float, t_stop: float) -> np.ndarray:
        """The largest magnitude of each column on the grid of :meth:`uniform`, shape (m,):
        ``np.max(np.abs(uniform(...)[1]), axis=0)`` to the bit (finite values), in one
        compiled pass."""
        d = 1.0 / rate_hz
        count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
        if count <= 0:
            raise ValueError("uniform_peak needs at least one sample")
        return box_peak(*self._window(t_start, count * d), t_start + 0.5 * d, float(rate_hz),
                        count)

    def _window(self, t_start: float, seconds: float, columns: list[int] | None = None):
        """(times, values, columns to read, orders, index of the first) of the points a
        walk over ``seconds`` from ``t_start`` reads: from three before its first step to
        one past its last edge. Views, not copies: a WAV path reads a long trace in 1 s
        windows, and copying every point for each window took a tenth to a third of its
        reading time; copying the columns read of one long window, as long as the walk."""
        lo = max(0, int(np.searchsorted(self.times, t_start)) - 3)
        hi = min(self.times.size, int(np.searchsorted(self.times, t_start + seconds)) + 2)
        cols = np.arange(self.values.shape[1]) if columns is None else np.asarray(columns)
        return (self.times[lo:hi], np.ascontiguousarray(self.values[lo:hi]),
                cols.astype(np.int64), self.order[lo:hi], lo)


class GridReader:
    """:meth:`StepTrace.uniform` (or :meth:`StepTrace.uniform_peak`) of a trace that is
    still being computed: fed the trace's points as they come, it walks the grid as far
    as they reach, and :meth:`finish` gives the same numbers to the bit as reading the
    whole trace at the end (the walk's state is carried from one part to the next).

    columns: indices of the fed values' columns to read (default all). Keeps only the
    points the walk has not passed (the two before its step included).
    """

    def __init__(self, rate_hz: float, t_start: float, t_stop: float,
                 columns: list[int] | None = None, peak: bool = False):
        self.rate_hz = float(rate_hz)
        d = 1.0 / rate_hz
        self.t_first = t_start + 0.5 * d
        self.count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
        self.columns = columns
        self.peak = peak
        self.edges = 0  # edges walked (edge j closes sample j - 1; count + 1 in all)
        self.state = None
        self.base = 0  # trace index of the window's first point
        self.t = self.y = self.order = None
        self.out = None

    @property
    def done(self) -> bool:
        """Every sample is known (the rest of the trace is not needed)."""
        return self.edges == self.count + 1

    def feed(self, first_index: int, times, values, orders) -> None:
        """Points ``first_index``, ``first_index + 1``... of the trace: times (k,), values
        (k, r), orders (k,), following on from those fed before (the first feed may start
        anywhere before the grid's start, or at the trace's first point)."""
        if self.done:
            return
        y = values if self.columns is None else values[:, self.columns]
        if self.t is None:
            self.base, self.t, self.y, self.order = first_index, times, y, orders
            # column-major, as box_average's
            self.out = np.zeros((y.shape[1], 1 if self.peak else max(self.count, 0))).T
        else:
            if first_index != self.base + self.t.size:
                raise ValueError(f"GridReader fed point {first_index}, expected "
                                 f"{self.base + self.t.size}")
            self.t = np.concatenate((self.t, times))
            self.y = np.concatenate((self.y, y))
            self.order = np.concatenate((self.order, orders))
        self._walk(final=False)

    def finish(self):
        """After the trace's last point: ``(grid, (count, m))`` as :meth:`StepTrace.uniform`
        gives, or with ``peak`` the (m,) of :meth:`StepTrace.uniform_peak`."""
        if self.count <= 0:
            if self.peak:
                raise ValueError("uniform_peak needs at least one sample")
            width = len(self.columns) if self.columns is not None else (
                0 if self.y is None else self.y.shape[1])
            return self._grid(), np.zeros((0, width))
        self._walk(final=True)
        if self.peak:
            return self.out[0]
        return self._grid(), self.out

    def _grid(self) -> np.ndarray:
        return self.t_first + (1.0 / self.rate_hz) * np.arange(max(self.count, 0))

    def _walk(self, final: bool) -> None:
        if self.count <= 0 or self.done or self.t is None:
            return
        t = self.t
        d = 1.0 / self.rate_hz
        if self.state is None:
            if not final and t[-1] < self.t_first - 0.5 * d:
                self._keep_from(self.base + t.size - 3)  # the steps before the grid's start
                return
            self.state = _walk_state(t, self.base, self.t_first, self.rate_hz, self.y.shape[1])
        if final:
            edges = self.count + 1
        else:
            # the edges at or before the last point: their walk stops within the window
            # (edge j is t_first + (j - 0.5) d, as the walk computes it)
            edges = min(self.count + 1, max(self.edges, int((t[-1] - self.t_first) / d) - 1))
            while edges <= self.count and self.t_first + (edges - 0.5) * d <= t[-1]:
                edges += 1
            while edges > self.edges and self.t_first + (edges - 1 - 0.5) * d > t[-1]:
                edges -= 1
        if edges > self.edges:
            y = np.ascontiguousarray(self.y)
            _box_walk(t, y, np.arange(y.shape[1]), self.order, self.base, self.t_first,
                      self.rate_hz, self.edges, edges, self.out, 0, self.peak, self.state)
            self.edges = edges
        self._keep_from(int(self.state[W_KSEG]) - 2)

    def _keep_from(self, index: int) -> None:
        cut = max(0, index - self.base)
        if cut:
            self.t, self.y, self.order = self.t[cut:], self.y[cut:], self.order[cut:]
            self.base += cut


@dataclass
class DenseTrace:
    """A trace given by a callable dense output (the reference solver's)."""

    names: list[str]
    sol: object  # callable: times (k,) -> (m, k)
    rows: list[int]
    t_end: float
    counters: dict = field(default_factory=dict)
    solver: str = "reference"

    def column(self, name: str) -> int:
        return self.names.index(name)

    def uniform(self, rate_hz: float, t_start: float, t_stop: float,
                columns: list[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Interval averages on the same grid as :meth:`StepTrace.uniform`.

        The dense output is averaged over each interval with 4-point Gauss-Legendre
        quadrature so both traces describe the same quantity.
        """
        d = 1.0 / rate_hz
        count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
        grid = t_start + 0.5 * d + d * np.arange(count)
        nodes, weights = np.polynomial.legendre.leggauss(4)
        rows = self.rows if columns is None else [self.rows[c] for c in columns]
        out = np.zeros((count, len(rows)))
        chunk = 200_000
        for a in range(0, count, chunk):
            g = grid[a:a + chunk]
            acc = 0.0
            for node, w in zip(nodes, weights):
                tt = np.clip(g + 0.5 * d * node, 0.0, self.t_end)
                acc = acc + 0.5 * w * self.sol(tt)[rows, :].T
            out[a:a + chunk] = acc
        return grid, out

    def uniform_peak(self, rate_hz: float, t_start: float, t_stop: float) -> np.ndarray:
        """The largest magnitude of each column on the grid of :meth:`uniform`, shape (m,)."""
        return np.max(np.abs(self.uniform(rate_hz, t_start, t_stop)[1]), axis=0)
