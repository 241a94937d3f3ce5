"""Speaker: a moving-coil speaker as its electrical equivalent between two nets.

The voice coil is a resistance ``ohms`` in series with an inductance ``henries``; its
current is an unknown of its own (``SP1.current``, amperes, flowing from ``between[0]``
through the coil to ``between[1]``).

With ``resonance_hz`` above zero the cone's mechanical resonance is added as the usual
electrical equivalent of the moving system, a parallel R, L, C in series with the coil
(Thiele and Small's equivalent circuit, from memory of Small, "Direct-radiator
loudspeaker system analysis", J. Audio Eng. Soc. 1972)::

    between[0] --[ ohms ]--[ henries ]-- motion --+-- R_es --+-- between[1]
                                                  +-- C_mes -+
                                                  +-- L_ces -+

    C_mes = Qes / (2 pi fs Re)         (the moving mass)
    L_ces = Re / (2 pi fs Qes)         (the suspension's compliance)
    R_es  = Re Qms / Qes               (mechanical losses and radiation)

so the impedance peaks at ``resonance_hz`` (fs) at Re (1 + Qms / Qes). The voltage of
the internal node ``motion`` above ``between[1]`` is the back-EMF of the moving cone
(proportional to its velocity); ``SP1.compliance_current`` is the current in L_ces.

With ``resonance_hz: 0`` (the default) the coil alone connects the two nets; the
internal node then sits on ``between[1]`` through a conductance that carries no current,
and the compliance current stays at zero (both unknowns exist for every speaker so the
engine sees a fixed layout). The built-in model ``small`` switches the resonance on with
figures typical of a small full-range speaker.

The coil current is what ``listen: SP1`` plays; the render reports the mean electrical
power into each speaker and warns about a DC current through one.
"""

from __future__ import annotations

import math

from blocks._base import Kind, Param, capacitance_entries, column, stamp_jit
from blocks._stamps import conductance
from blocks.transformer import inductive_branch

PARAMS = (
    Param("ohms", "ohm", 8.0,
          "common practice: small speakers are sold as 8 ohm; a meter across the coil reads "
          "its DC resistance, a little lower (set what yours reads)",
          "voice-coil resistance (Re)", positive=True),
    Param("henries", "H", 0.2e-3,
          "from memory: small full-range speakers (50 to 100 mm) list a voice-coil inductance "
          "Le of about 0.05 to 0.5 mH",
          "voice-coil inductance (Le)", positive=True),
    Param("resonance_hz", "Hz", 0.0,
          "common practice: off unless asked (model: small gives typical figures)",
          "free-air resonance fs; 0 leaves the cone's resonance out", minimum=0.0,
          maximum=20e3),
    Param("q_mechanical", "", 3.0,
          "from memory: small full-range speakers list Qms of about 2 to 8",
          "mechanical Q at resonance (Qms)", positive=True),
    Param("q_electrical", "", 1.5,
          "from memory: small speakers with light magnets list Qes of about 1 to 3",
          "electrical Q at resonance (Qes)", positive=True),
)

C_OHMS, C_HENRIES, C_FS, C_QMS, C_QES = (
    column(PARAMS, n) for n in ("ohms", "henries", "resonance_hz", "q_mechanical",
                                "q_electrical"))

# local unknowns: between[0], between[1], motion (internal), current, compliance_current
L_A, L_B, L_M, L_I, L_IC = 0, 1, 2, 3, 4

#: With the resonance off, the unused internal node is held on between[1] through this
#: conductance (S). No current flows in it (nothing else touches the node), so its value
#: changes nothing; 1 mS settles the node within nanoseconds against the stray capacitance.
IDLE_NODE_SIEMENS = 1e-3

#: With the resonance off, the unused compliance current obeys L di/dt = -R i with these
#: values: it starts at zero and stays there. Any positive values would do; they only
#: keep the inductance matrix invertible.
IDLE_BRANCH_HENRIES = 1.0
IDLE_BRANCH_OHMS = 1.0


def motional_elements(ohms: float, resonance_hz: float, q_mechanical: float,
                      q_electrical: float) -> tuple[float, float, float]:
    """(R_es ohms, C_mes farads, L_ces henries) of the cone's equivalent parallel circuit.

    source: Thiele/Small equivalent circuit (module docstring).
    """
    omega = 2.0 * math.pi * resonance_hz
    return (ohms * q_mechanical / q_electrical, q_electrical / (omega * ohms),
            ohms / (omega * q_electrical))


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        a, b, m, ic, il = N[k, L_A], N[k, L_B], N[k, L_M], N[k, L_I], N[k, L_IC]
        resonant = P[k, C_FS] > 0.0
        # the coil runs from a to the motion node, or straight to b without the resonance
        inductive_branch(x, f, G, a, m if resonant else b, ic, P[k, C_OHMS])
        if resonant:
            conductance(f, G, x, m, b, P[k, C_QES] / (P[k, C_OHMS] * P[k, C_QMS]))  # 1 / R_es
            inductive_branch(x, f, G, m, b, il, 0.0)  # the compliance L_ces
        else:
            conductance(f, G, x, m, b, IDLE_NODE_SIEMENS)
            f[il] += IDLE_BRANCH_OHMS * x[il]
            G[il, il] += IDLE_BRANCH_OHMS


def mass(values):
    entries = [(L_I, L_I, values["henries"])]
    if values["resonance_hz"] > 0.0:
        _, c_mes, l_ces = motional_elements(values["ohms"], values["resonance_hz"],
                                            values["q_mechanical"], values["q_electrical"])
        entries += capacitance_entries(L_M, L_B, c_mes)
        entries.append((L_IC, L_IC, l_ces))
    else:
        entries.append((L_IC, L_IC, IDLE_BRANCH_HENRIES))
    return entries


KIND = Kind(
    name="speaker",
    description="A moving-coil speaker: voice-coil resistance and inductance, optionally the "
                "cone's resonance.",
    terminals=(("between", 2),),
    internal=("motion",),
    branches=("current", "compliance_current"),
    params=PARAMS,
    stamp=stamp,
    mass=mass,
    main_param="ohms",
    sound_ohms="ohms",
    models={
        "coil": {},
        # from memory: 50 to 66 mm full-range speakers resonate at about 200 to 450 Hz in
        # free air, with Qms 2 to 8 and Qes 1 to 3
        "small": {"resonance_hz": 300.0, "q_mechanical": 3.0, "q_electrical": 1.5},
    },
)
