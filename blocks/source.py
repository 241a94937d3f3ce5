"""Source: a test signal between two nets, behind an output resistance.

``wave`` is ``sine``, ``square``, ``triangle`` or ``wav`` (a WAV file, mixed to mono,
played at its own rate and interpolated linearly). ``volts`` is the peak amplitude
(for ``wav``: the volts of a full-scale sample). The square has smooth edges of about
``rise_seconds`` (v = A tanh(k sin wt) / tanh k), so the integrator never meets a
discontinuity.
"""

from __future__ import annotations

import math

import numpy as np

from blocks._stamps import branch
from blocks._base import Kind, Param, column, stamp_jit

WAVES = ("sine", "square", "triangle", "wav")
AFTER_END = ("loop", "silence")

#: Steps per period of a test tone: the stepper never steps over more than
#: 1/STEPS_PER_PERIOD of a period, so the waveform between steps stays smooth.
STEPS_PER_PERIOD = 24.0

PARAMS = (
    Param("wave", "", "sine", "common practice: a sine test tone", "waveform", choices=WAVES),
    Param("hz", "Hz", 440.0, "ISO 16 reference pitch A4", "frequency", positive=True,
          maximum=100e3),
    Param("volts", "V", 0.1, "common practice: a small test level", "peak amplitude",
          minimum=0.0),
    Param("offset_volts", "V", 0.0, "common practice: no DC offset", "DC offset"),
    Param("source_ohms", "ohm", 50.0, "common practice: signal generators have 50 ohm outputs",
          "output resistance", positive=True),
    Param("rise_seconds", "s", 1e-6, "common practice: bench generators rise in under 1 us",
          "square wave edge time", positive=True),
    Param("start_seconds", "s", 0.0, "common practice: on from power-on", "start time",
          minimum=0.0),
    Param("after_end", "", "loop", "common practice: loop a short sample", "wav: at the end",
          choices=AFTER_END),
    Param("file", "", "", "given by the patch", "wav: file name (relative to the patch)",
          text=True),
)

C_WAVE, C_HZ, C_VOLTS, C_OFFSET, C_OHMS, C_RISE, C_START, C_AFTER = (
    column(PARAMS, n) for n in ("wave", "hz", "volts", "offset_volts", "source_ohms",
                                "rise_seconds", "start_seconds", "after_end"))
C_DATA_OFF = len([p for p in PARAMS if not p.text])
C_DATA_LEN = C_DATA_OFF + 1


@stamp_jit
def waveform_volts(t, P, k, D):
    """Open-circuit source voltage at time ``t`` (s) for part row ``k``."""
    t = t - P[k, C_START]
    if t < 0.0:
        return 0.0
    wave = P[k, C_WAVE]
    amp = P[k, C_VOLTS]
    hz = P[k, C_HZ]
    if wave == 0.0:
        return amp * math.sin(2.0 * math.pi * hz * t) + P[k, C_OFFSET]
    if wave == 1.0:
        sharp = max(1.0, 1.0 / (math.pi * hz * P[k, C_RISE]))
        s = math.sin(2.0 * math.pi * hz * t)
        return amp * math.tanh(sharp * s) / math.tanh(sharp) + P[k, C_OFFSET]
    if wave == 2.0:
        return amp * (2.0 / math.pi) * math.asin(math.sin(2.0 * math.pi * hz * t)) + P[k, C_OFFSET]
    off = int(P[k, C_DATA_OFF])
    length = int(P[k, C_DATA_LEN]) - 1
    if length < 1:
        return P[k, C_OFFSET]
    rate = D[off]
    pos = t * rate
    if pos >= length - 1:
        if P[k, C_AFTER] == 1.0:
            return P[k, C_OFFSET]
        pos = pos % (length - 1)
    i = int(pos)
    frac = pos - i
    s = D[off + 1 + i] * (1.0 - frac) + D[off + 2 + i] * frac
    return amp * s + P[k, C_OFFSET]


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        p, m = N[k, 0], N[k, 1]
        g = 1.0 / P[k, C_OHMS]
        v = waveform_volts(t, P, k, D)
        # Norton form: current from p to m through the source is g ((x_p - x_m) - v).
        branch(f, G, p, m, g * ((x[p] - x[m]) - v), g)


def max_step(values, blob):
    if values["wave"] == "wav":
        return 1.0 / blob[0] if blob.size else None  # one step per sample of the file
    return 1.0 / (STEPS_PER_PERIOD * float(values["hz"]))


def data(values, base_dir):
    """Blob for a ``wav`` source: [rate_hz, samples...] (mono, float); empty otherwise."""
    if values["wave"] != "wav":
        return np.zeros(0)
    import os

    import soundfile

    samples, rate = soundfile.read(os.path.join(base_dir, values["file"]), dtype="float64",
                                   always_2d=True)
    return np.concatenate([[float(rate)], samples.mean(axis=1)])


def check(values):
    if values["wave"] == "wav" and not values["file"]:
        return ["wave: wav needs file: NAME.wav (relative to the patch)"]
    return []


KIND = Kind(
    name="source",
    description="A test signal (sine, square, triangle or WAV file) between two nets.",
    terminals=(("between", 2),),
    outputs=("between",),
    params=PARAMS,
    stamp=stamp,
    max_step=max_step,
    data=data,
    check=check,
)
