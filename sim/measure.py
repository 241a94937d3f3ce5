"""Measures of one uniformly sampled node voltage: pitch, levels, duty, harmonics.

Everything here works on a 1-D float array ``volts`` of shape ``(n,)`` sampled at
``rate_hz`` (typically 192 kHz, 0.2 s to 10 s long) and returns plain Python numbers
so the result goes straight into the JSON report.

How the pitch is found (:func:`find_pitch`)
-------------------------------------------
1. *Level crossings with hysteresis.*  The mid level is ``(vmax + vmin) / 2``.  A
   rising event is counted when the signal, having been below
   ``mid - HYSTERESIS_FRACTION * vpp``, rises above ``mid + HYSTERESIS_FRACTION * vpp``
   (a Schmitt trigger), so noise riding on a slow edge makes one event, not many.
2. *Refined crossing times.*  Each event's time is where the signal crosses the mid
   level, found by a least-squares straight line through the samples of its
   traversal of the hysteresis band (centred on the traversal, at most
   ``MAX_FIT_HALF_SAMPLES`` on each side; across an edge sharper than a sample this
   is plain linear interpolation between the two samples that bracket it).
   Crossing times are therefore not tied to the sample grid.
3. *Grouping into periods.*  A waveform may cross its mid level several times per
   period.  A coarse period is taken from a YIN-style estimate (the cumulative
   mean normalised difference function of de Cheveigne and Kawahara, 2002, on a
   segment from the middle of the record): it decides how the crossings group.
   Each crossing must find a partner one coarse period later (within
   ``MATCH_TOLERANCE`` of a period), and the partner must always be the same
   number ``k`` of crossings ahead: a repeating pattern of ``k`` crossings per
   period.  The ``k`` interleaved chains of *aligned* crossings (same place in the
   pattern) each give the mean period as the slope of a least-squares line through
   their times against the period count; for evenly spaced crossings that is
   exactly first-to-last over the whole number of periods, and with noise it
   averages the jitter of every crossing instead of only the two end ones.  The
   reported frequency is ``rate_hz`` over the mean of the chains' periods.

Steadiness rule: the pitch (``freq_hz``, ``note``, ``cents``, ``duty``) is ``None``
unless all of these hold, so a drifting, noisy, chaotic or too short signal never
gets a guessed pitch:

- the YIN dip at the coarse period is below ``YIN_THRESHOLD`` (clearly periodic);
- every crossing (except within ``END_MARGIN_PERIODS`` of the end) has its partner
  exactly ``k`` crossings ahead, and crossings start within ``EDGE_PERIODS`` of the
  start and end within ``EDGE_PERIODS`` of the end of the record (the tone lasts
  the whole record);
- each chain spans at least ``MIN_PERIODS`` whole periods;
- the single periods of a chain scatter by at most ``JITTER_LIMIT`` (relative
  standard deviation; ``GRID_JITTER_SAMPLES`` is added in quadrature for the
  scatter that sampling a sharp edge causes by itself);
- the mean frequency of the first third of a chain's periods and of the last third
  differ by at most ``DRIFT_LIMIT_CENTS``.

Precision: on noise-free records the pitch error is far below 0.01 cent from 2 Hz
to 5 kHz at 192 kHz.  With added noise it is set by the noise on the crossings:
about ``noise / (edge slope * sqrt(fitted samples))`` per crossing, averaged over
all crossings.  For example a 30 Hz sawtooth (the slowest edge tried) of 1 V
amplitude with 5 mV RMS noise measures within 0.03 cent over 0.5 s; with 10 mV
over only 0.2 s (6 periods) the error can reach 0.25 cent.

Harmonics and THD (:func:`harmonic_levels`): the amplitude of harmonic ``h`` is the
magnitude of the signal's projection onto a complex exponential at exactly
``h * freq_hz``, taken over the whole number of periods between the first and last
aligned crossing with a Hann taper across that span.  Over a span of ``M >= 2``
whole periods the Hann window's transform is zero at every other harmonic and at DC,
so the levels neither leak into each other nor depend on FFT bin spacing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from sim.audio import fft_length
from sim.notes import note_of

#: Half-width of the Schmitt-trigger band as a fraction of the peak-to-peak voltage.
#: 10 % each side ignores noise and small wiggles up to a fifth of the swing while
#: still triggering on every real period of any waveform that uses its full swing.
HYSTERESIS_FRACTION = 0.10
#: Most samples used on each side of a crossing for its straight-line fit: enough to
#: average noise on slow edges (+-256 samples is +-1.3 ms at 192 kHz) while keeping
#: the fitted stretch short compared with a period, so curvature does not bias it.
MAX_FIT_HALF_SAMPLES = 256
#: YIN acceptance threshold on the cumulative mean normalised difference (the YIN
#: paper works with thresholds around 0.1, recalled from memory).  At the true
#: period the function is about 1 / SNR, so a steady tone more than 10 dB above its
#: noise dips below 0.1, while white noise stays near 1.
YIN_THRESHOLD = 0.10
#: YIN works on at least this many samples from the middle of the record (about
#: 85 ms at 192 kHz): enough to average noise, cheap to transform.
YIN_MIN_SEGMENT_SAMPLES = 16384
#: Most level crossings in one period that we try to group (a waveform with more
#: wiggles through its mid level than this is treated as unsteady).
MAX_EVENTS_PER_PERIOD = 8
#: A crossing's partner one period later must lie within this fraction of a period
#: of where the coarse period predicts it.
MATCH_TOLERANCE = 0.10
#: Crossings whose partner would fall within this many periods of the record's end
#: need no partner (the signal may end before the partner's hysteresis band).
END_MARGIN_PERIODS = 0.5
#: The first crossing must come within this many periods of the record start, and
#: the last one within as many periods of its end: a tone that starts or stops part
#: way through is not steady.
EDGE_PERIODS = 1.5
#: Fewest whole periods between aligned crossings for a pitch to be reported.
MIN_PERIODS = 3
#: Largest relative standard deviation of single periods (1 % is about 17 cents of
#: period-to-period wobble; a steady oscillator, even with some noise, is far below,
#: chaotic and noise signals far above).
JITTER_LIMIT = 0.01
#: Allowance in samples for the scatter of single periods caused by the sample grid
#: alone: a crossing on an edge sharper than one sample can only be placed within
#: its sample gap (+-0.5 sample), and the difference of two such errors has a
#: standard deviation of 1/sqrt(6) = 0.41 sample.  Added in quadrature to
#: ``JITTER_LIMIT`` so square waves at high pitch still count as steady.
GRID_JITTER_SAMPLES = 0.5
#: Largest pitch change between the first and last third of the record: 5 cents is
#: about the smallest pitch change a trained listener can pick out (a figure from
#: memory), and well above the measurement scatter of a steady tone.  A chirp of
#: 1 % (17 cents) over the record already fails it.
DRIFT_LIMIT_CENTS = 5.0
#: Longest stretch (s) the harmonic levels are measured over: a second of whole periods
#: resolves harmonics far below -80 dB already; longer records only cost time.
HARMONICS_MAX_SECONDS = 1.0
#: Number of harmonics reported (1 = fundamental).
N_HARMONICS = 10
#: Lowest level reported for a harmonic, in dB relative to the fundamental: lower
#: values are rounding noise of the projection and would only be -inf for a
#: harmonic that is exactly absent, which JSON cannot carry.
LEVEL_FLOOR_DB = -200.0
#: Samples per block when refining crossings (bounds the memory of the vectorised fit).
_FIT_BLOCK_EVENTS = 2048

MEASURE_KEYS = ("freq_hz", "note", "cents", "vmin", "vmax", "vpp", "mean", "rms", "duty",
                "harmonics_db", "thd_pct")


@dataclass(frozen=True)
class Pitch:
    """A steady pitch found in a record.

    ``period_samples`` is the mean period in samples (float).  ``start`` and ``end``
    are fractional sample indices of the first and last aligned crossing of one
    chain: ``end - start`` is ``periods`` whole periods.  ``mid`` is the level in
    volts the crossings were taken at.
    """

    freq_hz: float
    period_samples: float
    start: float
    end: float
    periods: int
    mid: float


def _as_signal(volts, rate_hz) -> tuple[np.ndarray, float, float, float]:
    """(samples, rate, vmin, vmax), or ValueError for a bad signal or rate."""
    x = np.asarray(volts, dtype=np.float64)
    if x.ndim != 1 or x.size < 2:
        raise ValueError(f"volts must be a 1-D array of at least 2 samples, got shape {x.shape}")
    # the minimum and maximum are NaN when a sample is, and infinite when one is: one
    # pass each tells both (a separate test of every sample took as long as both)
    vmin, vmax = float(np.min(x)), float(np.max(x))
    if not (math.isfinite(vmin) and math.isfinite(vmax)):
        raise ValueError("volts contain NaN or infinite values")
    rate = float(rate_hz)
    if not math.isfinite(rate) or rate <= 0.0:
        raise ValueError(f"rate_hz must be positive, got {rate_hz!r}")
    return x, rate, vmin, vmax


@numba.njit(cache=True, nogil=True)
def _rising_events(x, low, high):
    """Indices where a Schmitt trigger with thresholds (low, high) switches up: the
    first sample above ``high`` after the last one below ``low`` (one compiled pass;
    with numpy's whole-array steps it took a fifth of a signal's measures)."""
    out = np.empty(x.shape[0], dtype=np.int64)
    count = 0
    state = 0  # 1 above high, -1 below low, 0 before either
    for i in range(x.shape[0]):
        v = x[i]
        if v > high:
            if state == -1:
                out[count] = i
                count += 1
            state = 1
        elif v < low:
            state = -1
    return out[:count].copy()


def _refine_crossings(x: np.ndarray, events: np.ndarray, mid: float, low: float) -> np.ndarray:
    """Fractional sample times where ``x`` rises through ``mid`` for each event.

    For an event at sample ``e`` (first sample above the upper threshold), ``a`` is
    the last sample below ``low`` before it; every sample strictly between them is
    inside the hysteresis band.  A straight line is fitted by least squares to the
    ``2 L`` samples centred on ``(a + e) / 2`` with ``L = (e - a) // 2`` capped at
    ``MAX_FIT_HALF_SAMPLES`` (at least 1, which is linear interpolation across a
    sharp edge), and the time where the line meets ``mid`` is returned.  Centring on
    the band traversal rather than on the noisy last sample below ``mid`` keeps
    noise from biasing which samples are used.
    """
    below = np.flatnonzero(x < low)
    a = below[np.searchsorted(below, events) - 1]
    n = x.size
    half = MAX_FIT_HALF_SAMPLES
    offsets = np.arange(1 - half, half + 1)          # 2 * half samples: m-half+1 .. m+half
    u = offsets - 0.5                                # positions relative to m + 0.5
    times = np.empty(events.size)
    for first in range(0, events.size, _FIT_BLOCK_EVENTS):
        eb, ab = events[first:first + _FIT_BLOCK_EVENTS], a[first:first + _FIT_BLOCK_EVENTS]
        m = (ab + eb) // 2
        width = np.clip((eb - ab) // 2, 1, half)
        # Only gather as many columns as the widest fit in this block needs.
        widest = int(width.max())
        cols = slice(half - widest, half + widest)
        idx = m[:, None] + offsets[cols]
        use = (np.abs(u[cols])[None, :] < width[:, None]) & (idx >= 0) & (idx < n)
        y = np.where(use, x[np.clip(idx, 0, n - 1)], 0.0)
        count = use.sum(axis=1)
        uu = np.where(use, u[cols], 0.0)
        mean_u = uu.sum(axis=1) / count
        mean_y = y.sum(axis=1) / count
        du = np.where(use, uu - mean_u[:, None], 0.0)
        slope = (du * y).sum(axis=1) / (du * du).sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            u_cross = mean_u + (mid - mean_y) / slope
        times[first:first + eb.size] = m + 0.5 + u_cross
        # Where noise made the fit unusable, interpolate across the last gap
        # that rises through mid before the event.
        bad = ~np.isfinite(u_cross) | (slope <= 0.0) | (np.abs(u_cross) > width)
        if np.any(bad):
            times[first:first + eb.size][bad] = _interpolate_crossings(x, eb[bad], mid)
    return times


def _interpolate_crossings(x: np.ndarray, events: np.ndarray, mid: float) -> np.ndarray:
    """Linear interpolation of the last rise through ``mid`` before each event."""
    at_or_below = np.flatnonzero(x <= mid)
    j = at_or_below[np.searchsorted(at_or_below, events) - 1]
    return j + (mid - x[j]) / (x[j + 1] - x[j])


def _yin_period(x: np.ndarray, tau_min: int, tau_max: int) -> float | None:
    """Coarse period in samples by YIN's cumulative mean normalised difference.

    Works on a segment from the middle of ``x``.  Returns the first dip below
    ``YIN_THRESHOLD`` in ``[tau_min, tau_max]`` (refined by a parabola through
    the three values around it), or ``None`` when there is none.
    """
    n = x.size
    length = min(n, max(3 * tau_max, YIN_MIN_SEGMENT_SAMPLES))
    start = (n - length) // 2
    seg = x[start:start + length] - np.mean(x[start:start + length])
    window = length - tau_max - 1     # lags up to tau_max + 1 stay inside
    if window < tau_max or tau_max <= tau_min:
        return None
    nfft = fft_length(length + window)
    spectrum_a = np.fft.rfft(seg[:window], nfft)
    spectrum_b = np.fft.rfft(seg, nfft)
    corr = np.fft.irfft(np.conj(spectrum_a) * spectrum_b, nfft)[:tau_max + 2]
    energy = np.concatenate(([0.0], np.cumsum(seg * seg)))
    lags = np.arange(tau_max + 2)
    diff = energy[window] + (energy[lags + window] - energy[lags]) - 2.0 * corr
    diff = np.maximum(diff, 0.0)
    diff[0] = 0.0
    running = np.cumsum(diff)
    with np.errstate(divide="ignore", invalid="ignore"):
        cmndf = np.where(running > 0.0, diff * lags / running, 1.0)
    cmndf[0] = 1.0
    below = np.flatnonzero(cmndf[tau_min:tau_max + 1] < YIN_THRESHOLD)
    if below.size == 0:
        return None
    tau = tau_min + int(below[0])
    while tau + 1 <= tau_max and cmndf[tau + 1] < cmndf[tau]:
        tau += 1
    a, b, c = cmndf[tau - 1], cmndf[tau], cmndf[tau + 1]
    curvature = a - 2.0 * b + c
    shift = 0.5 * (a - c) / curvature if curvature > 0.0 else 0.0
    return tau + float(np.clip(shift, -0.5, 0.5))


def _partners(times: np.ndarray, period: float) -> tuple[np.ndarray, np.ndarray]:
    """Index of the crossing nearest one ``period`` after each crossing, and its miss."""
    target = times + period
    right = np.clip(np.searchsorted(times, target), 1, times.size - 1)
    left = right - 1
    pick = np.where(np.abs(times[right] - target) < np.abs(times[left] - target), right, left)
    return pick, np.abs(times[pick] - target)


def _chain_unsteadiness(chain: np.ndarray, drift_limit_cents: float = DRIFT_LIMIT_CENTS
                        ) -> str | None:
    """Why one chain of aligned crossing times (samples) is not steady, or ``None``."""
    periods = np.diff(chain)
    if periods.size < MIN_PERIODS:
        return f"only {periods.size} whole periods (at least {MIN_PERIODS} needed)"
    mean = float(np.mean(periods))
    allowed = math.hypot(JITTER_LIMIT * mean, GRID_JITTER_SAMPLES)
    if np.std(periods) > allowed:
        return f"periods scatter by {100.0 * np.std(periods) / mean:.2g} %"
    third = max(1, periods.size // 3)
    drift = 1200.0 * math.log2(np.mean(periods[:third]) / np.mean(periods[-third:]))
    if abs(drift) > drift_limit_cents:
        return f"pitch drifts by {drift:+.3g} cents from the first to the last third"
    return None


def _chain_period(chain: np.ndarray) -> float:
    """Least-squares slope of crossing time against period count (samples)."""
    count = np.arange(chain.size, dtype=np.float64)
    count -= count.mean()
    # numpy's own pairwise sums, not BLAS: the last bits must not depend on threads
    return float(np.sum(count * (chain - chain.mean())) / np.sum(count * count))


def find_pitch(volts, rate_hz: float, drift_limit_cents: float = DRIFT_LIMIT_CENTS
               ) -> Pitch | None:
    """Steady pitch of ``volts`` (shape ``(n,)``, sampled at ``rate_hz``), or ``None``.

    See the module docstring for the method and the steadiness rule.
    """
    found = pitch_or_reason(volts, rate_hz, drift_limit_cents)
    return found if isinstance(found, Pitch) else None


def pitch_or_reason(volts, rate_hz: float, drift_limit_cents: float = DRIFT_LIMIT_CENTS
                    ) -> Pitch | str:
    """Like :func:`find_pitch`, but say why there is no steady pitch (a short text)."""
    return _pitch_of(*_as_signal(volts, rate_hz), drift_limit_cents)


def _pitch_of(x: np.ndarray, rate: float, vmin: float, vmax: float,
              drift_limit_cents: float) -> Pitch | str:
    """:func:`pitch_or_reason` of a checked signal (:func:`_as_signal`)."""
    vpp = vmax - vmin
    if not vpp > 0.0:
        return "the signal is constant"
    mid = 0.5 * (vmax + vmin)
    band = HYSTERESIS_FRACTION * vpp
    events = _rising_events(x, mid - band, mid + band)
    if events.size < MIN_PERIODS + 1:
        return f"only {events.size} rising crossings of the mid level"
    times = _refine_crossings(x, events, mid, mid - band)
    mean_gap = (times[-1] - times[0]) / (times.size - 1)
    tau_min = max(2, int(0.5 * mean_gap))
    tau_max = min(x.size // MIN_PERIODS,
                  int(math.ceil(1.25 * MAX_EVENTS_PER_PERIOD * mean_gap)) + 2)
    coarse = _yin_period(x, tau_min, tau_max)
    if coarse is None:
        return "no clear period (the signal does not repeat)"
    # Sharpen the coarse period on the crossings themselves, then group.
    pick, miss = _partners(times, coarse)
    matched = miss <= MATCH_TOLERANCE * coarse
    if not np.any(matched):
        return "no crossing repeats one period later"
    period = float(np.median(times[pick[matched]] - times[matched]))
    pick, miss = _partners(times, period)
    last_sample = x.size - 1
    needs_partner = times + period <= last_sample - END_MARGIN_PERIODS * period
    if not np.any(needs_partner):
        return f"fewer than {MIN_PERIODS} whole periods"
    if np.any(miss[needs_partner] > MATCH_TOLERANCE * period):
        return "the crossings do not repeat period after period"
    checked = np.flatnonzero(needs_partner)
    steps = pick[checked] - checked
    k = int(steps[0])
    if k < 1 or k > MAX_EVENTS_PER_PERIOD or np.any(steps != k):
        return "the pattern of crossings changes from period to period"
    if times[0] > EDGE_PERIODS * period or times[-1] < last_sample - EDGE_PERIODS * period:
        return "the tone does not last the whole record"
    # Keep the checked crossings, any later ones that still found their partner,
    # and those partners; crossings after that are unverified.
    last = int(checked[-1])
    while (last + 1 + k < times.size and pick[last + 1] == last + 1 + k
           and miss[last + 1] <= MATCH_TOLERANCE * period):
        last += 1
    aligned = times[:last + k + 1]
    chains = [aligned[c::k] for c in range(k)]
    for chain in chains:
        reason = _chain_unsteadiness(chain, drift_limit_cents)
        if reason is not None:
            return reason
    mean_period = float(np.mean([_chain_period(chain) for chain in chains]))
    first = chains[0]
    return Pitch(freq_hz=rate / mean_period, period_samples=mean_period,
                 start=float(first[0]), end=float(first[-1]), periods=first.size - 1, mid=mid)


def duty_cycle(x: np.ndarray, mid: float, start: float, end: float) -> float:
    """Fraction of ``[start, end]`` (fractional sample indices) with ``x`` above ``mid``.

    ``x`` is taken as straight between samples, so the time above the level is
    exact for a piecewise-linear signal and not rounded to whole samples.
    """
    lo_i = max(int(math.floor(start)), 0)
    hi_i = min(int(math.ceil(end)), x.size - 1)
    overlap = _time_above(x, float(mid), float(start), float(end), lo_i, hi_i)
    return float(np.sum(overlap) / (end - start))


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _time_above(x, mid, start, end, lo_i, hi_i):
    """Time (samples) within ``[start, end]`` that the straight line from sample k to
    k + 1 spends above ``mid``, for k in ``[lo_i, hi_i)``; shape ``(hi_i - lo_i,)``."""
    out = np.empty(max(hi_i - lo_i, 0))
    for i in range(out.shape[0]):
        k = float(lo_i + i)
        a, b = x[lo_i + i], x[lo_i + i + 1]
        cross = k + (mid - a) / (b - a)
        above_a, above_b = a > mid, b > mid
        # the part [seg_lo, seg_hi] of the sample gap where the line is above mid
        seg_lo = k if above_a else (cross if above_b else k + 1.0)
        seg_hi = k + 1.0 if above_b else (cross if above_a else k)
        overlap = min(seg_hi, end) - max(seg_lo, start)
        out[i] = overlap if overlap > 0.0 else 0.0
    return out


def load_compiled() -> None:
    """Load this module's compiled helpers from numba's disk cache (a render does it in a
    thread while it simulates, rather than at its first measure)."""
    duty_cycle(np.array([0.0, 1.0, 0.0]), 0.5, 0.0, 2.0)
    _rising_events(np.array([0.0, 1.0]), 0.25, 0.75)


def harmonic_amplitudes(x: np.ndarray, rate_hz: float, freq_hz: float, start: float,
                        end: float, count: int = N_HARMONICS) -> list[float | None]:
    """Amplitudes (volts, peak) of harmonics 1..``count`` of ``freq_hz``.

    Measured over the samples in ``[start, end]`` (fractional sample indices spanning
    a whole number of periods, at least 2) with a Hann taper across that span.
    Harmonics at or above the Nyquist frequency are ``None``.
    """
    lo_i = max(int(math.ceil(start)), 0)
    hi_i = min(int(math.floor(end)), x.size - 1)
    n = np.arange(lo_i, hi_i + 1, dtype=np.float64)
    taper = np.sin(np.pi * (n - start) / (end - start)) ** 2
    seg = x[lo_i:hi_i + 1]
    weighted = ((seg - np.mean(seg)) * taper).astype(np.complex128)
    norm = 2.0 / np.sum(taper)
    step = np.exp(-2j * np.pi * freq_hz / rate_hz * (n - n[0]))
    phasor = step.copy()
    amplitudes: list[float | None] = []
    for h in range(1, count + 1):
        if h > 1:
            phasor *= step          # exp(-2j pi h f t) by recurrence, one product per harmonic
        if h * freq_hz >= rate_hz / 2.0:
            amplitudes.append(None)
            continue
        # np.sum (pairwise, fixed order) rather than a BLAS dot, whose summation order
        # follows the BLAS thread count: reports agree to the bit wherever they run
        amplitudes.append(float(norm * abs(np.sum(weighted * phasor))))
    return amplitudes


def harmonic_levels(amplitudes: list[float | None]) -> tuple[list[float | None] | None,
                                                             float | None]:
    """Harmonic levels in dB re the fundamental, and THD in percent.

    THD follows the wording of IEEE Std 1057 (digitizing waveform recorders), as
    recalled: the ratio of the root-sum-of-squares of the harmonics to the RMS of
    the fundamental, here over harmonics 2..10:
    ``thd_pct = 100 * sqrt(sum_{k=2..10} A_k**2) / A_1``.  Harmonics above the
    Nyquist frequency (``None``) are left out of the sum.
    """
    fundamental = amplitudes[0]
    if fundamental is None or not fundamental > 0.0:
        return None, None
    levels: list[float | None] = []
    for amplitude in amplitudes:
        if amplitude is None:
            levels.append(None)
        elif amplitude <= 0.0:
            levels.append(LEVEL_FLOOR_DB)
        else:
            levels.append(max(LEVEL_FLOOR_DB, 20.0 * math.log10(amplitude / fundamental)))
    levels[0] = 0.0
    harmonics = [a for a in amplitudes[1:] if a is not None]
    thd_pct = 100.0 * math.sqrt(sum(a * a for a in harmonics)) / fundamental
    return levels, thd_pct


def measure_signal(volts, rate_hz: float) -> dict:
    """All report measures of one node voltage.

    ``volts``: shape ``(n,)`` float array, uniformly sampled at ``rate_hz`` (Hz).
    Returns a dict with exactly the keys of :data:`MEASURE_KEYS`:

    - ``freq_hz`` (Hz), ``note`` (e.g. ``"A4"``), ``cents`` (offset from that note,
      in [-50, 50)): the steady pitch, all ``None`` when there is none (see the
      module docstring for the steadiness rule);
    - ``vmin``, ``vmax``, ``vpp``, ``mean`` in volts over the whole record;
    - ``rms``: RMS in volts of the signal with its mean removed (AC RMS); the total
      RMS is ``sqrt(mean**2 + rms**2)``;
    - ``duty``: fraction of each period above ``(vmax + vmin) / 2``, over the whole
      periods between the first and last aligned crossing; ``None`` without pitch;
    - ``harmonics_db``: 10 levels of harmonics 1..10 in dB re the fundamental
      (element 0 is 0.0; ``None`` for a harmonic above Nyquist); ``None`` without pitch;
    - ``thd_pct``: total harmonic distortion in percent over harmonics 2..10
      (see :func:`harmonic_levels`); ``None`` without pitch.
    """
    x, rate, vmin, vmax = _as_signal(volts, rate_hz)
    mean = float(np.mean(x))
    result = {
        "freq_hz": None, "note": None, "cents": None,
        "vmin": vmin, "vmax": vmax, "vpp": vmax - vmin, "mean": mean,
        "rms": float(np.sqrt(np.mean((x - mean) ** 2))),
        "duty": None, "harmonics_db": None, "thd_pct": None,
    }
    pitch = _pitch_of(x, rate, vmin, vmax, DRIFT_LIMIT_CENTS)
    if not isinstance(pitch, Pitch):
        return result
    name, cents = note_of(pitch.freq_hz)
    # harmonics over at most HARMONICS_MAX_SECONDS of whole periods (from the start)
    period = rate / pitch.freq_hz
    periods = (pitch.end - pitch.start) / period
    span = min(round(periods), max(2, int(HARMONICS_MAX_SECONDS * rate / period)))
    amplitudes = harmonic_amplitudes(x, rate, pitch.freq_hz, pitch.start,
                                     pitch.start + span * period)
    levels, thd_pct = harmonic_levels(amplitudes)
    result.update(freq_hz=pitch.freq_hz, note=name, cents=cents,
                  duty=duty_cycle(x, pitch.mid, pitch.start, pitch.end),
                  harmonics_db=levels, thd_pct=thd_pct)
    return result


def pitch_track(volts, rate_hz: float, window_seconds: float,
                hop_seconds: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Pitch over time in short windows.

    Each window of ``window_seconds`` (consecutive windows ``hop_seconds`` apart,
    default half a window) is measured on its own with :func:`find_pitch`, so the
    same steadiness rule applies inside each window (it must hold at least
    ``MIN_PERIODS`` whole periods of the lowest pitch to be tracked).

    Returns ``(times_s, freq_hz)``, both shape ``(windows,)``: the centre time of
    each window in seconds from the first sample, and its frequency in Hz or NaN
    where the window has no steady pitch.
    """
    x, rate = _as_signal(volts, rate_hz)[:2]
    window = int(round(float(window_seconds) * rate))
    hop = window // 2 if hop_seconds is None else int(round(float(hop_seconds) * rate))
    if window < 2 or hop < 1:
        raise ValueError("pitch_track: window_seconds and hop_seconds must span samples")
    starts = np.arange(0, max(x.size - window, 0) + 1, hop)
    freqs = np.full(starts.size, np.nan)
    for i, first in enumerate(starts):
        pitch = find_pitch(x[first:first + window], rate)
        if pitch is not None:
            freqs[i] = pitch.freq_hz
    times = (starts + 0.5 * (min(window, x.size) - 1)) / rate
    return times, freqs
