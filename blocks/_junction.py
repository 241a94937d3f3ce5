"""Shared equations of a pn junction (Shockley) and of a square-law MOS channel.

Kept in one place so the diode kind and the inverter's input clamps use the same law.
"""

from __future__ import annotations

import math

import numba

#: Current (A) above which a junction's exponential is continued as a straight line,
#: so Newton's method never overflows; far above anything a small-signal part carries.
JUNCTION_LINEAR_ABOVE_AMPS = 10.0

#: Conductance (S) across every junction so a reverse-biased one is never an open
#: circuit to Newton's method; 1 nA at 1 V, below any leakage that matters here.
JUNCTION_MIN_SIEMENS = 1e-9

#: Width (V) over which |vds| is rounded in channel-length modulation; far below the
#: volts an output swings, so the law is unchanged where it matters.
CLM_SMOOTHING_VOLTS = 0.05


@numba.njit
def junction(v, saturation_amps, n_vt):
    """Shockley diode current and conductance at forward voltage ``v`` (V).

    i = Is (exp(v / (n VT)) - 1) + gmin v, continued linearly above
    JUNCTION_LINEAR_ABOVE_AMPS. Returns (amps, siemens).
    source: Shockley diode equation (any semiconductor devices textbook).
    """
    u = v / n_vt
    u_max = math.log(JUNCTION_LINEAR_ABOVE_AMPS / saturation_amps)
    if u > u_max:
        e = math.exp(u_max)
        i = saturation_amps * (e * (1.0 + u - u_max) - 1.0)
        g = saturation_amps * e / n_vt
    else:
        e = math.exp(u)
        i = saturation_amps * (e - 1.0)
        g = saturation_amps * e / n_vt
    return i + JUNCTION_MIN_SIEMENS * v, g + JUNCTION_MIN_SIEMENS


@numba.njit
def softplus(z):
    """log(1 + exp(z)) without overflow."""
    if z > 0.0:
        return z + math.log1p(math.exp(-z))
    return math.log1p(math.exp(z))


@numba.njit
def sigmoid(z):
    """1 / (1 + exp(-z)) without overflow (the derivative of softplus)."""
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@numba.njit
def channel(vgs, vds, k, vt, clm, two_phi):
    """Drain current of a square-law MOS channel and its partial derivatives.

    I = (k/2) (F(vgs - vt)^2 - F(vgs - vds - vt)^2) (1 + clm |vds|), with the smooth
    overdrive F(u) = 2 phi log(1 + exp(u / (2 phi))): the textbook square law in strong
    inversion (saturation and triode), exponential below threshold, source/drain
    symmetric, continuous in every derivative.
    source: square-law MOSFET model with channel-length modulation (Sedra & Smith,
    Microelectronic Circuits, ch. on MOSFETs); the softplus interpolation is the usual
    inversion-charge interpolation of charge-based compact models.
    Returns (amps, d amps / d vgs, d amps / d vds).
    """
    us = (vgs - vt) / two_phi
    ud = (vgs - vds - vt) / two_phi
    fs = two_phi * softplus(us)
    fd = two_phi * softplus(ud)
    ss = sigmoid(us)
    sd = sigmoid(ud)
    core = 0.5 * k * (fs * fs - fd * fd)
    # |vds| smoothed over CLM_SMOOTHING_VOLTS so the law is the same both ways round
    root = math.sqrt(vds * vds + CLM_SMOOTHING_VOLTS * CLM_SMOOTHING_VOLTS)
    m = 1.0 + clm * root
    i = core * m
    gm = k * (fs * ss - fd * sd) * m
    gds = k * fd * sd * m + core * clm * vds / root
    return i, gm, gds
