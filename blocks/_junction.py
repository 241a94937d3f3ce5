"""Shared equations of a pn junction (Shockley) and of a square-law MOS channel.

Kept in one place so the diode kind and the inverter's input clamps use the same law.
"""

from __future__ import annotations

import math

from blocks._base import stamp_jit

#: Conductance (S) across every junction so a reverse-biased one is never an open
#: circuit to Newton's method; 1 nA at 1 V, below any leakage that matters here.
JUNCTION_MIN_SIEMENS = 1e-9

#: Width (V) over which |vds| is rounded in channel-length modulation; far below the
#: volts an output swings, so the law is unchanged where it matters.
CLM_SMOOTHING_VOLTS = 0.05


#: Exponent above which a junction's exponential continues as a straight line, so
#: Newton's method never overflows: exp(40) Is is far above any current these
#: circuits carry for every diode here (Is >= 1e-18 A gives 0.2 A).
JUNCTION_LINEAR_ABOVE = 40.0
_EXP_LIMIT = math.exp(JUNCTION_LINEAR_ABOVE)

@stamp_jit
def junction(v, saturation_amps, n_vt):
    """Shockley diode current and conductance at forward voltage ``v`` (V).

    i = Is (exp(v / (n VT)) - 1) + gmin v, continued linearly above the exponent
    JUNCTION_LINEAR_ABOVE. Returns (amps, siemens).
    source: Shockley diode equation (any semiconductor devices textbook).
    """
    u = v / n_vt
    if u > JUNCTION_LINEAR_ABOVE:
        i = saturation_amps * (_EXP_LIMIT * (1.0 + u - JUNCTION_LINEAR_ABOVE) - 1.0)
        g = saturation_amps * _EXP_LIMIT / n_vt
    elif u < -JUNCTION_LINEAR_ABOVE:
        i = -saturation_amps
        g = 0.0
    else:
        e = math.exp(u)
        i = saturation_amps * (e - 1.0)
        g = saturation_amps * e / n_vt
    return i + JUNCTION_MIN_SIEMENS * v, g + JUNCTION_MIN_SIEMENS


#: Beyond this argument (either sign) softplus and sigmoid take their limits: softplus(z)
#: = z and sigmoid(z) = 1 above it, both 0 below minus it. exp(-18) < 1.6e-8, so a
#: conducting channel's overdrive changes by less than 1e-9 of itself, and an off
#: channel's (at most 2 phi 1.6e-8, about a nanovolt) gives below 1e-21 A: far below
#: every tolerance and every leakage here (JUNCTION_MIN_SIEMENS alone is 1e-9 S). The
#: gates' channels sit beyond it about 80 % of the time (oscillator scenario), where
#: the exponential is then skipped: measured with the arithmetic freedoms of
#: ``blocks._base.FASTMATH``, the oscillator steps 10 % faster and the mixer 14 %
#: (interleaved A/B), with the same Newton iterations on the oscillator.
SOFTPLUS_LIMIT = 18.0


@stamp_jit
def softplus_sigmoid(z):
    """(log(1 + exp(z)), 1 / (1 + exp(-z))) sharing one exponential; their limits beyond
    +-SOFTPLUS_LIMIT (so never an overflow)."""
    if z > SOFTPLUS_LIMIT:
        return z, 1.0
    if z < -SOFTPLUS_LIMIT:
        return 0.0, 0.0
    if z > 0.0:
        e = math.exp(-z)
        return z + math.log1p(e), 1.0 / (1.0 + e)
    e = math.exp(z)
    return math.log1p(e), e / (1.0 + e)


@stamp_jit
def channel(vgs, vds, k, vt, clm, two_phi):
    """Drain current of a square-law MOS channel and its partial derivatives.

    I = (k/2) (F(vgs - vt)^2 - F(vgs - vds - vt)^2) (1 + clm |vds|), with the smooth
    overdrive F(u) = 2 phi log(1 + exp(u / (2 phi))): the textbook square law in strong
    inversion (saturation and triode), exponential below threshold, source/drain
    symmetric, smooth (but for steps of 1.6e-8 of its scale where F's argument crosses
    +-SOFTPLUS_LIMIT, see there).
    source: square-law MOSFET model with channel-length modulation (Sedra & Smith,
    Microelectronic Circuits, ch. on MOSFETs); the softplus interpolation is the usual
    inversion-charge interpolation of charge-based compact models.
    Returns (amps, d amps / d vgs, d amps / d vds).
    """
    sp, ss = softplus_sigmoid((vgs - vt) / two_phi)
    dp, sd = softplus_sigmoid((vgs - vds - vt) / two_phi)
    fs = two_phi * sp
    fd = two_phi * dp
    core = 0.5 * k * (fs * fs - fd * fd)
    # |vds| smoothed over CLM_SMOOTHING_VOLTS so the law is the same both ways round
    root = math.sqrt(vds * vds + CLM_SMOOTHING_VOLTS * CLM_SMOOTHING_VOLTS)
    m = 1.0 + clm * root
    i = core * m
    gm = k * (fs * ss - fd * sd) * m
    gds = k * fd * sd * m + core * clm * vds / root
    return i, gm, gds
