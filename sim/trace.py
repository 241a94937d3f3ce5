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
def box_average(t, y, order, t_first, rate_hz, count):
    """Averages of y over [T_i - d/2, T_i + d/2], T_i = t_first + i d, d = 1/rate_hz.

    t: (K,) accepted times, increasing; y: (K, m) values; order: (K,) interpolation
    order on the interval ending at each point. Returns (count, m). The grid must lie
    inside [t[0], t[-1]]. See :func:`_box_walk`.
    """
    out = np.zeros((count, y.shape[1]))
    _box_walk(t, y, order, t_first, rate_hz, count, out, False)
    return out


@numba.njit(cache=True, nogil=True)
def box_peak(t, y, order, t_first, rate_hz, count):
    """The largest magnitude of each column's averages of :func:`box_average`, shape (m,)
    (0 when count is 0), without holding the (count, m) averages: the same numbers,
    one pass, no array of a few tens of MB to write and read back."""
    out = np.zeros((1, y.shape[1]))
    _box_walk(t, y, order, t_first, rate_hz, count, out, True)
    return out[0]


@numba.njit(cache=True, nogil=True)
def _box_walk(t, y, order, t_first, rate_hz, count, out, peak):
    """The walk of :func:`box_average` over the steps: writes each average into
    out[i, :] (count, m), or with ``peak`` keeps the largest magnitude in out[0, :].

    The part of a sample interval that lies within one step is integrated by Simpson's
    rule, exact for the step's interpolant: the quadratic through the step's point and
    the two before it (order 2), else the straight line through its two ends. The
    Lagrange weights of a piece do not depend on the column, so they are formed once and
    applied to every column; each column's arithmetic is the same whichever columns are
    read together. Releases the GIL (a reader thread can run beside the simulation).
    """
    m = y.shape[1]
    d = 1.0 / rate_hz
    acc = np.zeros(m)
    prev = np.zeros(m)
    cursor = t_first - 0.5 * d
    last = t.shape[0] - 1
    # the first step ending at or after the grid's start
    kseg = max(1, min(last, np.searchsorted(t, cursor)))
    seg = -1  # the step the constants below belong to
    t0 = t1 = 0.0
    quad = False
    den0 = den1 = den2 = 0.0
    b0 = b1 = b2 = 0.0
    for j in range(count + 1):
        edge = t_first + (j - 0.5) * d
        while True:
            t2 = t[kseg]
            upper = min(edge, t2)
            if upper > cursor:
                fresh = seg != kseg
                if fresh:
                    seg = kseg
                    t1 = t[kseg - 1]
                    quad = order[kseg] == 2 and kseg >= 2
                    t0 = t[kseg - 2] if kseg >= 2 else t1
                    den0 = (t0 - t1) * (t0 - t2)
                    den1 = (t1 - t0) * (t1 - t2)
                    den2 = (t2 - t0) * (t2 - t1)
                ta, tb = cursor, upper
                tm = 0.5 * (ta + tb)
                if quad:
                    # Lagrange weights at the piece's ends and middle (Simpson's nodes);
                    # a piece starts where the one before ended: within one step, the
                    # weights at its start are those at the last one's end
                    if fresh:
                        a0 = (ta - t1) * (ta - t2) / den0
                        a1 = (ta - t0) * (ta - t2) / den1
                        a2 = (ta - t0) * (ta - t1) / den2
                    else:
                        a0, a1, a2 = b0, b1, b2
                    m0 = (tm - t1) * (tm - t2) / den0
                    m1 = (tm - t0) * (tm - t2) / den1
                    m2 = (tm - t0) * (tm - t1) / den2
                    b0 = (tb - t1) * (tb - t2) / den0
                    b1 = (tb - t0) * (tb - t2) / den1
                    b2 = (tb - t0) * (tb - t1) / den2
                    for c in range(m):
                        y0, y1, y2 = y[kseg - 2, c], y[kseg - 1, c], y[kseg, c]
                        s = 0.0
                        s += 1.0 * (a0 * y0 + a1 * y1 + a2 * y2)
                        s += 4.0 * (m0 * y0 + m1 * y1 + m2 * y2)
                        s += 1.0 * (b0 * y0 + b1 * y1 + b2 * y2)
                        acc[c] += s * (tb - ta) / 6.0
                else:
                    for c in range(m):
                        y1, y2 = y[kseg - 1, c], y[kseg, c]
                        slope = (y2 - y1) / (t2 - t1)
                        acc[c] += (tb - ta) * (y1 + slope * (tm - t1))
                cursor = upper
            if edge <= t2 or kseg == last:
                break
            kseg += 1
        if j > 0:
            for c in range(m):
                average = (acc[c] - prev[c]) / d
                if not peak:
                    out[j - 1, c] = average
                elif abs(average) > out[0, c]:
                    out[0, c] = abs(average)
        for c in range(m):
            prev[c] = acc[c]


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
        grid = first + d * np.arange(count)
        values = self.values if columns is None else self.values[:, columns]
        if count <= 0:
            return grid, np.zeros((0, values.shape[1]))
        out = box_average(self.times, np.ascontiguousarray(values), self.order, first,
                          float(rate_hz), count)
        return grid, out

    def uniform_peak(self, rate_hz: float, t_start: float, t_stop: float) -> np.ndarray:
        """The largest magnitude of each column on the grid of :meth:`uniform`, shape (m,):
        ``np.max(np.abs(uniform(...)[1]), axis=0)`` to the bit (finite values), in one
        compiled pass."""
        d = 1.0 / rate_hz
        count = int(np.floor((t_stop - t_start) * rate_hz + 1e-9))
        if count <= 0:
            raise ValueError("uniform_peak needs at least one sample")
        return box_peak(self.times, np.ascontiguousarray(self.values), self.order,
                        t_start + 0.5 * d, float(rate_hz), count)


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
