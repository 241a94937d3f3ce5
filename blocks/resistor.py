"""Resistor: a linear conductance between two nets."""

from __future__ import annotations

from blocks._stamps import conductance
from blocks._base import Kind, Param, stamp_jit


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        conductance(f, G, x, N[k, 0], N[k, 1], 1.0 / P[k, 0])


KIND = Kind(
    name="resistor",
    description="A fixed resistor between two nets.",
    terminals=(("between", 2),),
    params=(
        Param("value", "ohm", None, "given by the patch", "resistance", positive=True,
              tolerance_pct=5.0),
    ),
    stamp=stamp,
    main_param="value",
)
