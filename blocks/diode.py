"""Diode: a Shockley junction behind a series resistance (an internal node between them).

Named defaults (``model:``): ``signal`` (a silicon small-signal diode, the default),
``schottky`` and ``red-led``. Reverse breakdown is not modelled (the circuits here stay
far from it).
"""

from __future__ import annotations

from blocks._stamps import branch, conductance
from blocks._base import THERMAL_VOLTS, Kind, Param, capacitance_entries, column, stamp_jit
from blocks._junction import junction

PARAMS = (
    Param("saturation_amps", "A", 1e-9,
          "fitted so a silicon signal diode drops about 0.64 V at 1 mA (common practice: "
          "0.6-0.7 V)", "junction saturation current", positive=True),
    Param("emission", "", 1.8, "from memory: small-signal silicon diodes fit n of 1.7 to 2",
          "emission coefficient", positive=True, maximum=5.0),
    Param("series_ohms", "ohm", 0.6, "from memory: about 0.5 ohm bulk resistance",
          "series resistance", positive=True),
    Param("junction_farads", "F", 2e-12,
          "from memory: signal diodes are specified at a few pF", "junction capacitance",
          minimum=0.0),
)

C_IS, C_N, C_RS = column(PARAMS, "saturation_amps"), column(PARAMS, "emission"), column(PARAMS, "series_ohms")

# local unknowns: anode, cathode, junction (internal)
L_A, L_K, L_J = 0, 1, 2


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        a, c, j = N[k, L_A], N[k, L_K], N[k, L_J]
        conductance(f, G, x, a, j, 1.0 / P[k, C_RS])
        i, gd = junction(x[j] - x[c], P[k, C_IS], P[k, C_N] * THERMAL_VOLTS)
        branch(f, G, j, c, i, gd)


def mass(values):
    return capacitance_entries(L_J, L_K, values["junction_farads"])


KIND = Kind(
    name="diode",
    description="A diode from anode to cathode (Shockley law with series resistance).",
    terminals=(("anode", 1), ("cathode", 1)),
    internal=("junction",),
    params=PARAMS,
    stamp=stamp,
    mass=mass,
    models={
        "signal": {},
        # from memory: small Schottky diodes drop about 0.25-0.35 V at 1 mA
        "schottky": {"saturation_amps": 1e-7, "emission": 1.05, "series_ohms": 2.0,
                     "junction_farads": 10e-12},
        # common practice: a red LED drops about 1.8-2.0 V at a few mA
        "red-led": {"saturation_amps": 1e-18, "emission": 2.0, "series_ohms": 5.0,
                    "junction_farads": 20e-12},
    },
)
