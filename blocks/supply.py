"""Supply: a battery (EMF behind an internal resistance) feeding the rails vdd and gnd.

The patch declares it at top level (``supply: {volts: 9, source_ohms: 2}``), not under
``parts``. At power-on its EMF rises from 0 to ``volts`` over ``ramp_seconds`` along a
smooth step (continuous slope, so the integrator needs no restart at its ends).
"""

from __future__ import annotations

import numpy as np

from blocks._stamps import branch
from blocks._base import Kind, Param, stamp_jit

COL_VOLTS, COL_OHMS, COL_RAMP = 0, 1, 2


@stamp_jit
def emf_volts(t, volts, ramp_seconds):
    """Battery EMF at time ``t`` (s): a smooth step 3u^2 - 2u^3 over the power-on ramp."""
    if ramp_seconds <= 0.0 or t >= ramp_seconds:
        return volts
    if t <= 0.0:
        return 0.0
    u = t / ramp_seconds
    return volts * u * u * (3.0 - 2.0 * u)


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        vdd, gnd = N[k, 0], N[k, 1]
        g = 1.0 / P[k, COL_OHMS]
        e = emf_volts(t, P[k, COL_VOLTS], P[k, COL_RAMP])
        # The battery delivers (E - (v_vdd - v_gnd)) / R into vdd, i.e. a current
        # g ((v_vdd - v_gnd) - E) flows from vdd to gnd through it.
        branch(f, G, vdd, gnd, g * ((x[vdd] - x[gnd]) - e), g)


def emf_volts_array(t_seconds, volts, ramp_seconds):
    """:func:`emf_volts` for an array of times (numpy, no compile at start-up); shape of t."""
    t = np.asarray(t_seconds, dtype=np.float64)
    if ramp_seconds <= 0.0 or (t.size and t.min() >= ramp_seconds):
        return np.full_like(t, volts)  # (the ramp's polynomial is exactly 1 after it)
    u = np.clip(t / ramp_seconds, 0.0, 1.0)
    return volts * u * u * (3.0 - 2.0 * u)


def supply_amps(t_seconds, vdd_volts, values):
    """Battery current (A), shape (m,), at times ``t_seconds`` (m,) given the vdd net's volts (m,)."""
    e = emf_volts_array(t_seconds, float(values["volts"]), float(values["ramp_seconds"]))
    e -= np.asarray(vdd_volts)  # in place (e is new): a render's 2 million samples
    e /= float(values["source_ohms"])  # cost their page faults for each new array
    return e


KIND = Kind(
    name="supply",
    description="The battery: EMF `volts` behind `source_ohms`, on the rails vdd and gnd.",
    terminals=(),
    rails=True,
    params=(
        Param("volts", "V", None, "given by the patch", "battery EMF", positive=True,
              maximum=40.0),
        Param("source_ohms", "ohm", 1.5,
              "from memory: a fresh 9 V alkaline battery measures about 1 to 2 ohm inside",
              "internal resistance", positive=True),
        Param("ramp_seconds", "s", 1e-3,
              "common practice: a switched battery rail settles within about a millisecond",
              "power-on ramp time", minimum=0.0, maximum=1.0),
    ),
    stamp=stamp,
    main_param="volts",
)
