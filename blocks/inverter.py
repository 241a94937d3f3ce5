"""Inverter: one gate of an unbuffered CMOS hex inverter package used as an analog part.

Two forms share one set of terminals (``in``, ``out``; the rails vdd/gnd implicitly):

``transistor`` (default)
    A complementary pair of square-law MOS channels with channel-length modulation
    (see :func:`blocks._junction.channel`). This one equation gives, without extra
    parameters: finite small-signal gain A = (gm_n + gm_p) / (gds_n + gds_p), smooth
    saturation at the rails, an output resistance (the channel in triode), an output
    current limit (the channel in saturation), a switching threshold that moves with
    the supply, and the class-A current drawn from the supply when biased mid-rail.
``behavioural``
    Gain, threshold fraction, output resistance, current limit and idle current given
    directly: v_target = VSS + S/2 (1 - tanh(2 A (v_in - v_th) / S)), S = VDD - VSS,
    output current I_max tanh((v_target - v_out) / (R_out I_max)). Chosen automatically
    when a patch or model sets ``gain``.

Both forms add the input capacitance (input to gnd) and the input protection diodes
(input to vdd, gnd to input).

Defaults of the transistor form are fitted to the published B-series figures:
JEDEC JESD13-B minimum output drive (sink) of 0.51 mA at VDD = 5 V, VOL = 0.4 V;
1.3 mA at 10 V, 0.5 V; 3.4 mA at 15 V, 1.5 V, and the typical figures printed in
unbuffered B-series hex inverter datasheets (about 0.88, 2.25 and 8.8 mA at the same
points, from memory). With kn = kp = 0.55 mA/V^2 and thresholds 1.3 / 1.5 V the
model gives about 0.78, 2.4 and 11.5 mA there (tests/test_blocks.py checks this).
"""

from __future__ import annotations

import math

from blocks._base import THERMAL_VOLTS, Kind, Param, capacitance_entries, column, stamp_jit
from blocks._junction import channel, junction

FORMS = ("transistor", "behavioural")

#: Smoothing current (A) of the split of a behavioural output current between the
#: rails: below about this current the split is gradual (keeps Newton smooth).
SPLIT_SMOOTHING_AMPS = 1e-6

PARAMS = (
    Param("form", "", "transistor", "common practice: transistor-level unless asked",
          "equation set", choices=FORMS),
    Param("kn", "A/V^2", 0.55e-3,
          "fitted to JESD13-B minimum / datasheet typical sink current (module docstring)",
          "n-channel transconductance factor", positive=True, tolerance_pct=20.0),
    Param("kp", "A/V^2", 0.55e-3,
          "fitted to JESD13-B minimum / datasheet typical source current (datasheets give "
          "equal typical sink and source figures, from memory)",
          "p-channel transconductance factor", positive=True, tolerance_pct=20.0),
    Param("vtn", "V", 1.3, "from memory: B-series threshold voltages of 1 to 2 V",
          "n-channel threshold", positive=True, maximum=5.0, tolerance_pct=10.0),
    Param("vtp", "V", 1.5, "from memory: B-series threshold voltages of 1 to 2 V",
          "p-channel threshold magnitude", positive=True, maximum=5.0, tolerance_pct=10.0),
    Param("clm", "1/V", 0.05,
          "chosen so the mid-rail gain is about 35 at 5 V and 16 at 9 V; from memory "
          "unbuffered gates give a few tens at 5 V, falling with supply",
          "channel-length modulation", minimum=0.0, maximum=1.0),
    Param("slope", "", 1.5, "from memory: MOS subthreshold slope factor 1.3 to 1.7",
          "subthreshold slope factor", positive=True),
    Param("in_farads", "F", 5e-12,
          "from memory: B-series datasheets give 5 pF typical input capacitance, 7.5 pF max",
          "input capacitance", minimum=0.0),
    Param("clamp_amps", "A", 1e-14,
          "from memory: small-junction saturation current; clamps conduct ~0.6 V beyond a rail",
          "input protection diode saturation current", positive=True),
    Param("gain", "", 20.0,
          "from memory: unbuffered gates give a gain of a few tens at 5 to 10 V",
          "behavioural: small-signal gain at threshold", positive=True, tolerance_pct=20.0),
    Param("threshold", "", 0.5, "common practice: a CMOS inverter switches near half supply",
          "behavioural: switching threshold as a fraction of the supply",
          positive=True, maximum=1.0, tolerance_pct=4.0),
    Param("out_ohms", "ohm", 500.0,
          "from memory: unbuffered gate output resistance of a few hundred ohms at 5 to 10 V",
          "behavioural: output resistance", positive=True),
    Param("max_amps", "A", 10e-3,
          "from memory: B-series outputs deliver roughly 5 to 20 mA into a short at 9 V",
          "behavioural: output current limit", positive=True),
    Param("idle_amps", "A", 2e-3,
          "from memory: a few mA of class-A current per gate biased mid-rail at 9 V",
          "behavioural: supply current at threshold", minimum=0.0),
)

C_FORM = column(PARAMS, "form")
C_KN, C_KP = column(PARAMS, "kn"), column(PARAMS, "kp")
C_VTN, C_VTP = column(PARAMS, "vtn"), column(PARAMS, "vtp")
C_CLM, C_SLOPE = column(PARAMS, "clm"), column(PARAMS, "slope")
C_CLAMP = column(PARAMS, "clamp_amps")
C_GAIN, C_THR = column(PARAMS, "gain"), column(PARAMS, "threshold")
C_ROUT, C_IMAX, C_IDLE = column(PARAMS, "out_ohms"), column(PARAMS, "max_amps"), column(PARAMS, "idle_amps")

# Local unknowns: in, out, vdd, gnd.
L_IN, L_OUT, L_VDD, L_GND = 0, 1, 2, 3


@stamp_jit
def _stamp_behavioural(x, P, k, a, o, s, g_, f, G):
    """Nodes: a input, o output, s vdd, g_ gnd."""
    vin, vout, vdd, vss = x[a], x[o], x[s], x[g_]
    span = vdd - vss
    if span < 1e-3:  # rails collapsed (before power-on): keep the algebra finite
        span = 1e-3
    gain = P[k, C_GAIN]
    thr = P[k, C_THR]
    rel = (vin - vss) / span
    z = 2.0 * gain * (rel - thr)
    dz_in = 2.0 * gain / span
    dz_vdd = -2.0 * gain * (vin - vss) / (span * span)
    dz_gnd = 2.0 * gain * (-span + (vin - vss)) / (span * span)
    th = math.tanh(z)
    sech2 = 1.0 - th * th
    v_t = vss + 0.5 * span * (1.0 - th)
    dvt_in = -0.5 * span * sech2 * dz_in
    dvt_vdd = 0.5 * (1.0 - th) - 0.5 * span * sech2 * dz_vdd
    dvt_gnd = 1.0 - 0.5 * (1.0 - th) - 0.5 * span * sech2 * dz_gnd
    imax = P[k, C_IMAX]
    rout = P[k, C_ROUT]
    u = (v_t - vout) / (rout * imax)
    tu = math.tanh(u)
    i = imax * tu  # into the out node
    di = (1.0 - tu * tu) / rout  # d i / d (v_t - v_out)
    d_i = (di * dvt_in, -di, di * dvt_vdd, di * dvt_gnd)
    root = math.sqrt(i * i + SPLIT_SMOOTHING_AMPS * SPLIT_SMOOTHING_AMPS)
    i_src = 0.5 * (i + root)  # drawn from vdd
    ds = 0.5 * (1.0 + i / root)
    idle = P[k, C_IDLE]
    iq = idle * sech2
    diq = -2.0 * idle * th * sech2
    d_iq = (diq * dz_in, 0.0, diq * dz_vdd, diq * dz_gnd)
    f[o] -= i
    f[s] += i_src + iq
    f[g_] -= i_src - i + iq
    cols = (a, o, s, g_)
    for c in range(4):
        col = cols[c]
        G[o, col] -= d_i[c]
        G[s, col] += ds * d_i[c] + d_iq[c]
        G[g_, col] -= ds * d_i[c] - d_i[c] + d_iq[c]


@stamp_jit
def _clamps(vin, vdd, vss, isat):
    """The input protection diodes: (amps, siemens) of input -> vdd, then of gnd -> input."""
    i_hi, g_hi = junction(vin - vdd, isat, THERMAL_VOLTS)
    i_lo, g_lo = junction(vss - vin, isat, THERMAL_VOLTS)
    return i_hi, g_hi, i_lo, g_lo


@stamp_jit
def out_node_amps(P, k, vin, vout, vdd, vss):
    """Current (A) flowing from the output net into gate k: the stamp's ``f[out]`` term.

    The reports read the gates' output currents at every point of a trace; this is the
    same arithmetic as :func:`stamp` for the output node, without the Jacobian, the rail
    currents and the input clamps (which carry no output current), so cheaper than
    :func:`stamp`.
    tests/test_blocks.py checks it against the stamp to the bit.
    """
    if P[k, C_FORM] == 0.0:
        two_phi = 2.0 * P[k, C_SLOPE] * THERMAL_VOLTS
        clm = P[k, C_CLM]
        i_n = channel(vin - vss, vout - vss, P[k, C_KN], P[k, C_VTN], clm, two_phi)[0]
        i_p = channel(vdd - vin, vdd - vout, P[k, C_KP], P[k, C_VTP], clm, two_phi)[0]
        # added to a zero like the stamp's f (so a zero current is +0.0 there too)
        return 0.0 + (i_n - i_p)
    span = vdd - vss
    if span < 1e-3:  # as in _stamp_behavioural
        span = 1e-3
    gain = P[k, C_GAIN]
    rel = (vin - vss) / span
    th = math.tanh(2.0 * gain * (rel - P[k, C_THR]))
    v_t = vss + 0.5 * span * (1.0 - th)
    imax = P[k, C_IMAX]
    return 0.0 - imax * math.tanh((v_t - vout) / (P[k, C_ROUT] * imax))


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    """Both forms, each gate's currents and Jacobian written once per entry.

    The transistor form (the default, the stepper's inner loop) is written out here
    rather than in helpers: a helper taking the arrays is a call that passes each as
    its pointer, shape and strides, and the channels and clamps summed before they
    are written touch 13 Jacobian entries instead of 18. Measured on the oscillator
    scenario's states: 40 % less time per gate than three helpers. The channel and
    clamp laws themselves live in blocks._junction.
    """
    for k in range(P.shape[0]):
        # node indices read one by one: a row view N[k] would cost a reference count
        a, o, s, g_ = N[k, L_IN], N[k, L_OUT], N[k, L_VDD], N[k, L_GND]
        vin, vout, vdd, vss = x[a], x[o], x[s], x[g_]
        i_hi, g_hi, i_lo, g_lo = _clamps(vin, vdd, vss, P[k, C_CLAMP])
        if P[k, C_FORM] != 0.0:
            _stamp_behavioural(x, P, k, a, o, s, g_, f, G)
            f[a] += i_hi - i_lo
            f[s] -= i_hi
            f[g_] += i_lo
            G[a, a] += g_hi + g_lo
            G[a, s] -= g_hi
            G[s, a] -= g_hi
            G[s, s] += g_hi
            G[a, g_] -= g_lo
            G[g_, a] -= g_lo
            G[g_, g_] += g_lo
            continue
        two_phi = 2.0 * P[k, C_SLOPE] * THERMAL_VOLTS
        clm = P[k, C_CLM]
        # n channel: drain out, source gnd, gate in; current out -> gnd
        i_n, gm_n, gds_n = channel(vin - vss, vout - vss, P[k, C_KN], P[k, C_VTN], clm, two_phi)
        # p channel: source vdd, drain out, gate in; current vdd -> out
        i_p, gm_p, gds_p = channel(vdd - vin, vdd - vout, P[k, C_KP], P[k, C_VTP], clm, two_phi)
        f[o] += i_n - i_p
        f[a] += i_hi - i_lo
        f[s] += i_p - i_hi
        f[g_] += i_lo - i_n
        # rows out, vdd, in, gnd; columns in, out, vdd, gnd
        G[o, a] += gm_n + gm_p
        G[o, o] += gds_n + gds_p
        G[o, s] -= gm_p + gds_p
        G[o, g_] -= gm_n + gds_n
        G[s, a] -= gm_p + g_hi
        G[s, o] -= gds_p
        G[s, s] += gm_p + gds_p + g_hi
        G[a, a] += g_hi + g_lo
        G[a, s] -= g_hi
        G[a, g_] -= g_lo
        G[g_, a] -= gm_n + g_lo
        G[g_, o] -= gds_n
        G[g_, g_] += gm_n + gds_n + g_lo


def mass(values):
    return capacitance_entries(L_IN, L_GND, values["in_farads"])


BEHAVIOURAL_ONLY = ("gain", "threshold", "out_ohms", "max_amps", "idle_amps")


def resolve(values, given):
    """Pick the behavioural form when a behavioural-only parameter is set and the form is not."""
    if "form" not in given and any(name in given for name in BEHAVIOURAL_ONLY):
        return {**values, "form": "behavioural"}
    return values


KIND = Kind(
    name="inverter",
    description="One gate of an unbuffered CMOS hex inverter (input, output; rails implicit).",
    terminals=(("in", 1), ("out", 1)),
    inputs=("in",),
    outputs=("out",),
    rails=True,
    params=PARAMS,
    stamp=stamp,
    mass=mass,
    resolve=resolve,
    inline=True,
    models={
        "typical": {},
        "behavioural": {"form": "behavioural"},
    },
)
