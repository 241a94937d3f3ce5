"""From a simulated listening-point voltage to 16-bit WAV audio.

The engine simulates well above the audio rate (typically 192 kHz).  The steps to a
WAV file are: :func:`decimate` to the audio rate with a linear-phase anti-alias
filter, :func:`to_wav_samples` to remove DC, scale, fade and count clipping, and
:func:`write_wav` to write the file atomically.

Only numpy (its FFT for the drift filter) and numba are used: the filters are designed
here (Kaiser's window method) and applied by compiled loops that release the GIL, so
the WAV path can run in a thread beside the rest of a render. ``soundfile`` is imported
when first needed. (scipy.fft would do the same FFTs; its import took 0.19 s of a
render's start, numpy's is already paid.)
"""

from __future__ import annotations

import math
import os
from functools import lru_cache
from typing import BinaryIO

import numba
import numpy as np

from sim.fileio import atomic_path

#: The anti-alias filter passes the band up to this fraction of the *output*
#: Nyquist frequency flat (within ~0.001 dB): 20 kHz of the 24 kHz Nyquist
#: frequency at 48 kHz, i.e. the whole audible band.
PASSBAND_FRACTION = 20.0 / 24.0
#: ...and attenuates everything from the output Nyquist frequency up by at least
#: this much, so nothing aliases back into the output band above the noise floor
#: of 16-bit audio (about 98 dB below full scale).
STOPBAND_ATTENUATION_DB = 100.0

#: Length of the moving average whose subtraction removes slow drift (a zero-phase
#: FIR high-pass).  A Hann-weighted average over 0.4 s has its first null at
#: 2 / 0.4 s = 5 Hz: the resulting high-pass is -9 dB at 2 Hz, -3.8 dB at 3 Hz,
#: within 0.25 dB from 5 Hz up, within 0.04 dB from 10 Hz up and flat (under
#: 0.001 dB) from 20 Hz up, so it takes out the settling of coupling capacitors
#: and supply drift without touching any audible pitch.
DRIFT_WINDOW_SECONDS = 0.4
#: Peak level a normalised render is scaled to, in dBFS (1 dB of headroom so
#: inter-sample peaks of the decoded audio do not clip).
NORMALIZE_PEAK_DBFS = -1.0
#: RMS level above which the first play of a render deserves a caution.  Levels are
#: ``20 * log10(rms)`` of the samples (a full-scale square wave reads 0 dBFS, a
#: full-scale sine -3 dBFS).  -12 dBFS RMS is about as loud as heavily compressed
#: commercial music gets (a figure of common mastering practice, not a standard);
#: above it a render is louder than the loudest ordinary program material at the
#: same volume setting, and inverter circuits clipping into square waves easily
#: reach -6 to 0 dBFS.
LOUD_RMS_DBFS = -12.0
#: Caution shown for a loud render.
LOUD_WARNING = ("this render is loud ({rms_dbfs:.1f} dBFS RMS): start playback at a low "
                "volume; headphones need extra care")


#: Kaiser's empirical design formulas for a window-method low-pass FIR (J. F. Kaiser,
#: "Nonrecursive digital filter design using the I0-sinh window function", 1974, as
#: given in Oppenheim & Schafer, Discrete-Time Signal Processing, section 7.5.3):
#: taps = (A - KAISER_OFFSET_DB) / (KAISER_SLOPE_DB * delta_omega) + 1 for A dB of
#: attenuation and a transition of delta_omega radians per sample, and the window's
#: beta for A above 50 dB.  (source: from memory; tests/test_audio.py checks the taps
#: against scipy.signal's kaiserord and firwin.)
KAISER_OFFSET_DB = 7.95
KAISER_SLOPE_DB = 2.285
KAISER_BETA_PER_DB = 0.1102
KAISER_BETA_OFFSET_DB = 8.7


def fft_length(n: int) -> int:
    """The smallest length at or above ``n`` whose only prime factors are 2, 3 and 5: an
    FFT of it runs near its n log n speed, where a length with a large prime factor can
    take many times longer (source: the mixed-radix Cooley-Tukey FFT; the lengths are
    the 5-smooth numbers, OEIS A051037 from memory; tests/test_audio.py checks them
    against scipy.fft.next_fast_len)."""
    if n <= 1:
        return 1
    best = 1 << (int(n) - 1).bit_length()  # the power of two at or above n
    fives = 1
    while fives < best:
        threes = fives
        while threes < best:
            size = threes << max(0, (-(-n // threes) - 1).bit_length())  # times 2^k >= n
            if size < best:
                best = size
            threes *= 3
        fives *= 5
    return best


def kaiser_lowpass_taps(attenuation_db: float, pass_edge: float, stop_edge: float) -> np.ndarray:
    """Odd-length linear-phase low-pass taps by Kaiser's window method, unity DC gain.

    ``pass_edge``, ``stop_edge``: band edges as fractions of the Nyquist frequency
    (0 < pass_edge < stop_edge <= 1); the ideal response is cut midway between them
    and ``attenuation_db`` (above 50 dB) sets the window's beta and the length.
    Shape ``(taps,)``.
    """
    if not attenuation_db > 50.0:
        raise ValueError(f"attenuation_db must be above 50 dB, got {attenuation_db!r}")
    if not 0.0 < pass_edge < stop_edge <= 1.0:
        raise ValueError(f"need 0 < pass_edge < stop_edge <= 1, got {pass_edge!r}, {stop_edge!r}")
    width = stop_edge - pass_edge
    numtaps = int(math.ceil((attenuation_db - KAISER_OFFSET_DB) / KAISER_SLOPE_DB
                            / (math.pi * width) + 1.0))
    numtaps |= 1                          # odd length: the centre tap sits on a sample
    beta = KAISER_BETA_PER_DB * (attenuation_db - KAISER_BETA_OFFSET_DB)
    cutoff = 0.5 * (pass_edge + stop_edge)
    m = np.arange(numtaps, dtype=np.float64) - 0.5 * (numtaps - 1)
    taps = cutoff * np.sinc(cutoff * m) * np.kaiser(numtaps, beta)
    return taps / np.sum(taps)


@lru_cache(maxsize=16)
def antialias_taps(factor: int) -> np.ndarray:
    """Linear-phase low-pass FIR taps for decimating by ``factor`` (odd length).

    :func:`kaiser_lowpass_taps` with passband edge ``PASSBAND_FRACTION`` of the output
    Nyquist frequency, stopband from the output Nyquist frequency,
    ``STOPBAND_ATTENUATION_DB`` of attenuation, unity DC gain.  Shape ``(taps,)``;
    the taps are symmetric, so the delay is exactly ``(taps - 1) / 2`` input samples.
    """
    stop = 1.0 / factor                   # output Nyquist, relative to input Nyquist
    taps = kaiser_lowpass_taps(STOPBAND_ATTENUATION_DB, PASSBAND_FRACTION * stop, stop)
    taps.setflags(write=False)
    return taps


#: Output samples computed together by :func:`_fir_decimate`: the taps are applied to a
#: block of this many outputs at a time (a vector loop the compiler can widen), while
#: the block's inputs stay in the processor's cache.
FIR_BLOCK_SAMPLES = 1024


@numba.njit(cache=True, nogil=True)
def _fir_decimate(x, taps, factor):
    """out[k] = sum_i taps[i] * x[k factor + half - i], x held at its end values beyond
    its ends (half = (len(taps) - 1) // 2); shape (ceil(n / factor),).

    Each output sums its products in tap order whatever the block or the processor's
    vector width, so the result is the same to the bit everywhere.
    """
    n = x.shape[0]
    ntaps = taps.shape[0]
    half = (ntaps - 1) // 2
    n_out = (n + factor - 1) // factor
    # polyphase planes of the end-extended input: planes[p, q] = x[q factor + p - pad]
    pad = half + factor
    width = (n + 2 * pad) // factor + 2
    planes = np.empty((factor, width))
    for q in range(width):  # x read once, in order (plane by plane, it was read factor
        for p in range(factor):  # times over: the whole decimation took 1.4 times as long)
            j = min(max(q * factor + p - pad, 0), n - 1)
            planes[p, q] = x[j]
    out = np.zeros(n_out)
    for k0 in range(0, n_out, FIR_BLOCK_SAMPLES):
        size = min(n_out, k0 + FIR_BLOCK_SAMPLES) - k0
        acc = out[k0:k0 + size]
        for i in range(ntaps):
            tap = taps[i]
            offset = half - i + pad          # x index k factor + half - i, shifted by pad
            src = planes[offset % factor, k0 + offset // factor:k0 + offset // factor + size]
            for k in range(size):
                acc[k] += tap * src[k]
    return out


def decimate(volts, factor: int) -> np.ndarray:
    """Low-pass filter (:func:`antialias_taps`) and keep every ``factor``-th sample.

    ``volts``: shape ``(n,)``.  Returns shape ``(ceil(n / factor),)`` where output
    sample ``k`` corresponds to input sample ``k * factor`` (zero delay: the
    linear-phase filter is centred on the kept sample).  The record is extended by
    repeating its end values so the filter does not pull the ends toward zero.
    ``factor == 1`` returns a copy.
    """
    x = np.asarray(volts, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"volts must be 1-D, got shape {x.shape}")
    if int(factor) != factor or factor < 1:
        raise ValueError(f"decimation factor must be a positive integer, got {factor!r}")
    factor = int(factor)
    if factor == 1 or x.size == 0:
        return x.copy()
    return _fir_decimate(np.ascontiguousarray(x), antialias_taps(factor), factor)


def _dbfs(value: float) -> float | None:
    return 20.0 * math.log10(value) if value > 0.0 else None


def remove_dc(volts, rate_hz: float) -> np.ndarray:
    """Remove DC and slow drift: subtract the mean, then a slow moving average.

    The moving average is Hann-weighted over ``DRIFT_WINDOW_SECONDS`` and centred
    (zero phase, so waveforms keep their shape); near the ends it is normalised by
    the part of the window that lies inside the record, so the ends are not pulled
    toward zero and a tone's level is kept there too (an IIR high-pass, even run
    forward and backward, starts out of its steady state and leaves a decaying
    offset of about ``corner / pitch`` of the amplitude at each end).
    Shape ``(n,)`` in and out.
    """
    x = np.asarray(volts, dtype=np.float64)
    if x.size == 0:
        return x.copy()
    x = x - np.mean(x)
    taps = int(round(DRIFT_WINDOW_SECONDS * rate_hz)) | 1     # odd: centred on a sample
    weights = np.hanning(taps + 2)[1:-1]                      # no zero end points
    half = taps // 2
    # the centred moving sum by one FFT convolution (zero outside the record)
    size = fft_length(x.size + taps - 1)
    total = np.fft.irfft(np.fft.rfft(x, size) * np.fft.rfft(weights, size),
                         size)[half:half + x.size]
    # the part of the window inside the record: a running sum of the weights
    cumulative = np.concatenate(([0.0], np.cumsum(weights)))
    i = np.arange(x.size)
    coverage = (cumulative[np.minimum(i + half + 1, taps)]
                - cumulative[np.maximum(i - (x.size - 1) + half, 0)])
    return x - total / coverage


def raised_cosine_fades(n: int, fade_samples: int) -> np.ndarray:
    """Gain curve of shape ``(n,)``: raised-cosine fade in and out, 1 in between.

    The first and last samples are exactly 0; each fade lasts ``fade_samples``
    samples (shortened to half the record if the record is shorter).
    """
    gain = np.ones(n)
    fade = min(int(fade_samples), n // 2)
    if fade > 0:
        ramp = 0.5 - 0.5 * np.cos(np.pi * np.arange(fade) / fade)
        gain[:fade] = ramp
        gain[n - fade:] = ramp[::-1]
    return gain


def clip_to_full_scale(samples) -> tuple[np.ndarray, int]:
    """Clip samples to [-1, 1]; return ``(clipped copy, how many were beyond)``.

    A sample of exactly +-1.0 is full scale, not clipped.
    """
    values = np.array(samples, dtype=np.float64)
    beyond = int(np.count_nonzero(np.abs(values) > 1.0))
    np.clip(values, -1.0, 1.0, out=values)
    return values, beyond


def to_wav_samples(volts, *, full_scale_volts: float, normalize: bool = False,
                   fade_seconds: float = 0.005, rate_hz: float) -> tuple[np.ndarray, dict]:
    """Turn a listening-point voltage into audio samples in [-1, 1].

    ``volts``: shape ``(n,)`` sampled at ``rate_hz`` (the audio rate, after
    :func:`decimate`).  Steps: remove DC (:func:`remove_dc`: the mean, then a
    gentle zero-phase high-pass around 5 Hz for slow drift); scale by
    ``1 / full_scale_volts`` so renders of variants keep their relative
    loudness, or with ``normalize=True`` so the peak lands at
    ``NORMALIZE_PEAK_DBFS``; raised-cosine fades of ``fade_seconds`` at both ends;
    then clip to [-1, 1], counting every sample that was beyond (exactly +-1.0 is
    not clipped).

    Returns ``(samples, info)``: ``samples`` float64 shape ``(n,)``; ``info`` =
    ``{"gain"``: samples per volt, ``"peak_dbfs"``: peak before clipping (above 0
    when clipped), ``"rms_dbfs"``: ``20 log10`` of the RMS of the written samples,
    ``"clipped_samples"``: int, ``"normalized"``: bool``}``; the levels are ``None``
    for silence.
    """
    full_scale = float(full_scale_volts)
    if not math.isfinite(full_scale) or full_scale <= 0.0:
        raise ValueError(f"full_scale_volts must be positive, got {full_scale_volts!r}")
    x = np.asarray(volts, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"volts must be 1-D, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("volts contain NaN or infinite values")
    ac = remove_dc(x, rate_hz)
    ac *= raised_cosine_fades(ac.size, int(round(fade_seconds * rate_hz)))
    peak_volts = float(np.max(np.abs(ac))) if ac.size else 0.0
    gain = 1.0 / full_scale
    if normalize and peak_volts > 0.0:
        gain = 10.0 ** (NORMALIZE_PEAK_DBFS / 20.0) / peak_volts
    peak = peak_volts * gain
    samples, clipped = clip_to_full_scale(ac * gain)
    rms = float(np.sqrt(np.mean(samples * samples))) if samples.size else 0.0
    info = {"gain": gain, "peak_dbfs": _dbfs(peak), "rms_dbfs": _dbfs(rms),
            "clipped_samples": clipped, "normalized": bool(normalize)}
    return samples, info


#: Start of the warning for a clipped render (lets a batch tell its steps' WAV warnings apart).
CLIPPED_PREFIX = "the WAV clipped"


def level_warnings(info: dict, full_scale_volts: float, wav: str = "the WAV",
                   source: str = "the listening signal") -> list[str]:
    """Warnings about a WAV's level from ``info`` (of :func:`to_wav_samples`): clipped
    samples, and a loud first play (:func:`first_play_warning`)."""
    out = []
    if info["clipped_samples"]:
        out.append(f"{wav} clipped {info['clipped_samples']} samples: {source} exceeds the "
                   f"{full_scale_volts:g} V full scale (use --full-scale or --normalize)")
    loud = first_play_warning(info)
    if loud:
        out.append(loud)
    return out


def first_play_warning(info: dict) -> str | None:
    """A caution for the first play when ``info["rms_dbfs"]`` exceeds ``LOUD_RMS_DBFS``."""
    rms_dbfs = info.get("rms_dbfs")
    if rms_dbfs is None or rms_dbfs <= LOUD_RMS_DBFS:
        return None
    return LOUD_WARNING.format(rms_dbfs=rms_dbfs)


def write_wav(path: str | os.PathLike | BinaryIO, samples, rate_hz: float) -> None:
    """Write ``samples`` (shape ``(n,)`` in [-1, 1]) as mono 16-bit PCM WAV.

    A path is written atomically (temporary file in the same folder, then renamed);
    an open binary file object is written in place.  ``rate_hz`` must be a whole
    number of hertz.
    """
    data = np.asarray(samples, dtype=np.float64)
    if data.ndim != 1:
        raise ValueError(f"samples must be 1-D (mono), got shape {data.shape}")
    if np.any(np.abs(data) > 1.0) or not np.all(np.isfinite(data)):
        raise ValueError("samples must be finite and within [-1, 1]; use to_wav_samples")
    rate = int(round(rate_hz))
    if rate <= 0 or abs(rate - rate_hz) > 1e-9 * rate:
        raise ValueError(f"WAV sample rate must be a positive whole number of Hz, got {rate_hz!r}")
    import soundfile

    if hasattr(path, "write"):
        soundfile.write(path, data, rate, subtype="PCM_16", format="WAV")
        return
    with atomic_path(path) as temp:
        soundfile.write(temp, data, rate, subtype="PCM_16", format="WAV")
