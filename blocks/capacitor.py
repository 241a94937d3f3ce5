"""Capacitor: a linear capacitance between two nets (no leakage)."""

from __future__ import annotations

from blocks._base import Kind, Param, capacitance_entries, stamp_jit


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    # A capacitor draws no current at DC; its C dv/dt lives in the mass matrix.
    return


def mass(values):
    return capacitance_entries(0, 1, values["value"])


KIND = Kind(
    name="capacitor",
    description="A capacitor between two nets, discharged at power-on.",
    terminals=(("between", 2),),
    params=(
        Param("value", "F", None, "given by the patch", "capacitance", positive=True,
              tolerance_pct=10.0),
    ),
    stamp=stamp,
    mass=mass,
    main_param="value",
)
