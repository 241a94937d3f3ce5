"""Transformer: two coupled windings, e.g. a small audio output transformer.

Each winding's current is an unknown of its own, flowing into its first net (the dotted
end) and out of its second: ``T1.primary_current`` from ``primary[0]`` to
``primary[1]``, ``T1.secondary_current`` from ``secondary[0]`` to ``secondary[1]``.
The windings obey the coupled-inductor equations (any circuits textbook)::

    v_p = R1 i_p + L1 di_p/dt + M  di_s/dt
    v_s = R2 i_s + M  di_p/dt + L2 di_s/dt

    L2 = L1 / ratio^2,  M = coupling sqrt(L1 L2)

where ``ratio`` is the turns ratio N1/N2 (above 1 steps the voltage down), ``coupling``
the coupling factor k (1 - k^2 of the primary's inductance is leakage), ``R1``/``R2``
the windings' DC resistances. With tight coupling and a primary reactance far above
the reflected load, a load R on the secondary looks like ratio^2 R on the primary and the
voltages and currents scale by the turns ratio.

The core's losses are a resistance ``core_ohms`` as seen from the primary. It is placed
across the secondary terminals, as ``core_ohms / ratio^2``: in the audio band, where the
leakage reactance is small, that is the same as across the primary, and it also damps
the secondary's nets. Without it a secondary that feeds only a speaker coil forms, with
the leakage inductance and the 2 pF every net carries, a resonance in the megahertz with
a Q of thousands that every square edge rings (and that the solver would have to follow
step by step); a real core's losses damp it. The current in this resistance is not part
of ``secondary_current``. The core is linear: it never saturates, so a DC current through
a winding shows here only as the current itself.

The coupling stays below 1, so the 2 x 2 inductance matrix [[L1, M], [M, L2]] has the
positive determinant L1 L2 (1 - k^2) and the engine's mass matrix stays invertible.

Defaults: a miniature 1 kohm : 8 ohm output transformer of the size once used in
transistor radios and now sold for small amplifiers and buzzer circuits.
"""

from __future__ import annotations

import math

from blocks._base import Kind, Param, column, stamp_jit
from blocks._stamps import conductance

#: Largest coupling factor accepted: k = 1 makes the inductance matrix singular (no
#: leakage at all); 0.9999 leaves L1 / 5000 of leakage, tighter than any real winding.
MAX_COUPLING = 0.9999

PARAMS = (
    Param("ratio", "", 11.2,
          "from memory: miniature output transformers are sold as 1 kohm : 8 ohm, a turns "
          "ratio of sqrt(1000 / 8) = 11.2",
          "turns ratio N1/N2 (primary turns per secondary turn)", positive=True,
          maximum=1000.0),
    Param("primary_henries", "H", 1.0,
          "from memory: miniature 1 kohm : 8 ohm output transformers measure roughly 0.5 to "
          "3 H at small signal",
          "primary inductance L1", positive=True),
    Param("coupling", "", 0.995,
          "from memory: small laminated audio transformers leak about 0.5 to 2 % of the "
          "primary inductance, k = 0.99 to 0.998",
          "coupling factor k", positive=True, maximum=MAX_COUPLING),
    Param("primary_ohms", "ohm", 60.0,
          "from memory: miniature 1 kohm primaries read about 40 to 100 ohm on a meter",
          "primary winding resistance R1", positive=True),
    Param("secondary_ohms", "ohm", 0.6,
          "from memory: their 8 ohm secondaries read about 0.4 to 1 ohm",
          "secondary winding resistance R2", positive=True),
    Param("core_ohms", "ohm", 20e3,
          "from memory: a small audio transformer loses a few per cent of its power in the "
          "core; 20 kohm across a 1 kohm primary takes 5 %",
          "core loss resistance, seen from the primary", positive=True),
)

C_R1, C_R2 = column(PARAMS, "primary_ohms"), column(PARAMS, "secondary_ohms")
C_RATIO, C_CORE = column(PARAMS, "ratio"), column(PARAMS, "core_ohms")

# local unknowns: primary[0], primary[1], secondary[0], secondary[1], the two currents
L_P1, L_P2, L_S1, L_S2, L_IP, L_IS = range(6)


@stamp_jit
def inductive_branch(x, f, G, a, b, row, ohms):
    """A branch from net ``a`` to net ``b`` whose current is the unknown ``x[row]`` (A),
    through a resistance ``ohms``; its inductance is in the mass matrix, so the branch's
    row reads L di/dt + ohms i - (v_a - v_b) = 0. Shared by the speaker's coil."""
    i = x[row]
    f[a] += i
    f[b] -= i
    G[a, row] += 1.0
    G[b, row] -= 1.0
    f[row] += ohms * i - (x[a] - x[b])
    G[row, row] += ohms
    G[row, a] -= 1.0
    G[row, b] += 1.0


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        # the rows read L1 di_p/dt + M di_s/dt + R1 i_p - v_p = 0 and its twin: the
        # inductances, mutual ones included, are in the mass matrix
        inductive_branch(x, f, G, N[k, L_P1], N[k, L_P2], N[k, L_IP], P[k, C_R1])
        inductive_branch(x, f, G, N[k, L_S1], N[k, L_S2], N[k, L_IS], P[k, C_R2])
        # core losses, across the secondary terminals
        conductance(f, G, x, N[k, L_S1], N[k, L_S2], P[k, C_RATIO] ** 2 / P[k, C_CORE])


def inductances(values) -> tuple[float, float, float]:
    """(L1, L2, M) in henries from the turns ratio, primary inductance and coupling."""
    l1 = values["primary_henries"]
    l2 = l1 / values["ratio"] ** 2
    return l1, l2, values["coupling"] * math.sqrt(l1 * l2)


def mass(values):
    l1, l2, m = inductances(values)
    return [(L_IP, L_IP, l1), (L_IS, L_IS, l2), (L_IP, L_IS, m), (L_IS, L_IP, m)]


KIND = Kind(
    name="transformer",
    description="Two coupled windings (an audio output transformer); dots on primary[0] and "
                "secondary[0].",
    terminals=(("primary", 2), ("secondary", 2)),
    branches=("primary_current", "secondary_current"),
    params=PARAMS,
    stamp=stamp,
    mass=mass,
    main_param="ratio",
)
