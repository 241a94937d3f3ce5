"""The blocks' equations against published figures and against their own derivatives.

Fast checks that evaluate a kind's ``stamp`` directly on a small state vector, with no
time simulation: output drive of the inverter, Jacobians against finite differences,
input capacitance, diode forward voltages, pot tapers.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

import blocks
from blocks import diode, inverter, pot, source, supply
from blocks._base import THERMAL_VOLTS

#: Values for parameters a patch must give (no default), by unit, so that every kind
#: of part can be stamped on its own.
REQUIRED_VALUE_BY_UNIT = {"ohm": 10e3, "F": 10e-9, "V": 9.0, "H": 10e-3, "Hz": 440.0, "A": 1e-3}


def part_values(kind_name: str, model: str | None = None, **given) -> dict:
    """Every parameter of one part: defaults < the kind's built-in model < ``given``."""
    kind = blocks.REGISTRY[kind_name]
    values = {p.name: p.default for p in kind.params}
    for p in kind.params:
        if values[p.name] is None:
            values[p.name] = REQUIRED_VALUE_BY_UNIT.get(p.unit, 1.0)
    if model is not None:
        values.update(kind.models[model])
    values.update(given)
    if kind.resolve is not None:
        values = kind.resolve(values, set(given))
    return values


class Stamped:
    """One part of a kind wired to unknowns 1..local of a small state vector.

    Unknown 0 is the ground net of the engine; here every local unknown (rails too)
    gets its own index, so the derivatives with respect to each terminal are checked.
    """

    def __init__(self, kind_name: str, values: dict, t_seconds: float = 0.0):
        self.kind = blocks.REGISTRY[kind_name]
        blob = self.kind.data(values, ".") if self.kind.data else np.zeros(0)
        self.P = np.array([self.kind.row(values) + [0.0, float(blob.size)]])
        self.D = np.asarray(blob, dtype=float)
        self.local = self.kind.local_names()
        self.N = np.arange(1, len(self.local) + 1, dtype=np.int64).reshape(1, -1)
        self.t = t_seconds

    @property
    def size(self) -> int:
        return len(self.local) + 1

    def state(self, **volts) -> np.ndarray:
        """A state vector (shape (size,)) with the named local unknowns set."""
        x = np.zeros(self.size)
        for name, v in volts.items():
            x[1 + self.local.index(name)] = v
        return x

    def evaluate(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Currents out of each unknown into the part (A, shape (size,)) and G (size, size)."""
        f = np.zeros(self.size)
        G = np.zeros((self.size, self.size))
        self.kind.stamp(x, self.t, self.P, self.N, self.D, f, G)
        return f, G

    def current_out_of(self, x: np.ndarray, name: str) -> float:
        return float(self.evaluate(x)[0][1 + self.local.index(name)])


# ---------------------------------------------------------------------------------
# inverter output drive

#: (VDD, output voltage, JESD13-B minimum output current, typical datasheet figure), A.
SINK_POINTS = [
    (5.0, 0.4, 0.51e-3, 0.88e-3),   # source: JEDEC JESD13-B, IOL min; typical from memory
    (10.0, 0.5, 1.3e-3, 2.25e-3),   # source: JEDEC JESD13-B, IOL min; typical from memory
    (15.0, 1.5, 3.4e-3, 8.8e-3),    # source: JEDEC JESD13-B, IOL min; typical from memory
]

#: Largest ratio between the model's drive and the typical datasheet figure (either way):
#: typical figures are quoted to one significant digit and real parts scatter by tens of
#: percent around them, so "within a factor of about two" is how close a default can
#: honestly claim to be.
TYPICAL_DRIVE_FACTOR = 2.0


@pytest.mark.parametrize(("vdd", "vout", "minimum", "typical"), SINK_POINTS)
def test_default_inverter_sinks_at_least_the_jedec_minimum_current(vdd, vout, minimum, typical):
    gate = Stamped("inverter", part_values("inverter"))
    sink_amps = gate.current_out_of(gate.state(**{"in": vdd, "out": vout, "vdd": vdd}), "out")
    assert sink_amps >= minimum
    assert typical / TYPICAL_DRIVE_FACTOR <= sink_amps <= typical * TYPICAL_DRIVE_FACTOR


@pytest.mark.parametrize(("vdd", "drop", "minimum", "typical"), SINK_POINTS)
def test_default_inverter_sources_at_least_the_jedec_minimum_current(vdd, drop, minimum, typical):
    # source: JEDEC JESD13-B, IOH min -0.51 / -1.3 / -3.4 mA at VOH = VDD - 0.4 / 0.5 / 1.5 V
    # (negative: current leaves the output); typical figures from memory, equal to sink.
    gate = Stamped("inverter", part_values("inverter"))
    x = gate.state(**{"in": 0.0, "out": vdd - drop, "vdd": vdd})
    source_amps = gate.current_out_of(x, "out")  # current into the gate from the out net
    assert source_amps <= -minimum
    assert typical / TYPICAL_DRIVE_FACTOR <= -source_amps <= typical * TYPICAL_DRIVE_FACTOR


#: Operating points of the output-current check: (in, out) as fractions of the supply,
#: at the rails, at mid-supply, and past the rails (where the input clamps conduct).
OUTPUT_POINTS = [(a, b) for a in (-0.1, 0.0, 0.5, 1.0, 1.1) for b in (-0.1, 0.0, 0.5, 1.0, 1.1)]


@pytest.mark.parametrize(("given", "model"), [({}, None), ({"form": "behavioural"}, None),
                                              ({}, "behavioural"), ({"gain": 8.0}, None)],
                         ids=["transistor", "behavioural", "behavioural-model", "gain-given"])
@pytest.mark.parametrize(("vdd", "gnd"), [(9.0, 0.0), (5.0, 0.2), (0.0, 0.0), (15.0, -0.3)])
def test_the_output_current_alone_is_the_stamps_output_node_current_to_the_bit(given, model,
                                                                                 vdd, gnd):
    # source: the same equations as the stamp's output node (blocks/inverter.py), so the
    # same floating-point operations; (0, 0) is the collapsed supply before power-on
    values = part_values("inverter", model, **given)
    gate = Stamped("inverter", values)
    for in_fraction, out_fraction in OUTPUT_POINTS:
        vin = gnd + in_fraction * (vdd - gnd)
        vout = gnd + out_fraction * (vdd - gnd)
        x = gate.state(**{"in": vin, "out": vout, "vdd": vdd, "gnd": gnd})
        expected = gate.current_out_of(x, "out")
        got = inverter.out_node_amps(gate.P, 0, vin, vout, vdd, gnd)
        assert got == expected and math.copysign(1.0, got) == math.copysign(1.0, expected), \
            (in_fraction, out_fraction, got, expected)


# ---------------------------------------------------------------------------------
# Jacobians

#: Finite-difference step, V (or A for a branch current).
FD_STEP = 1e-4
#: Relative agreement asked of G against the extrapolated central differences. A central
#: difference D(h) errs by h^2/6 |f'''|; Richardson's extrapolation (4 D(h/2) - D(h)) / 3
#: removes that term and leaves O(h^4). The sharpest curves in any stamp are a junction's
#: exponential (n VT >= 25.9 mV) and the behavioural inverter's smooth split of its output
#: current between the rails (1 uA through 500 ohm: 0.5 mV wide); with h = 0.1 mV the
#: remainder is below 1e-7 of the entry, so 1e-6 catches any wrong or missing term.
JACOBIAN_RTOL = 1e-6
#: Rounding error of a difference in row i is about eps T_i / h, where T_i is the size of
#: the currents summed into that row (bounded by |f_i| + sum_j |G_ij x_j|); this many
#: times that is allowed as an absolute error.
ROUNDING_MARGIN = 100.0
#: Absolute floor, S: conductances below a picosiemens (1 pA per volt) move no node of a
#: patch and drown in the rounding of terms like the behavioural inverter's supply
#: current idle * (1 - tanh^2), computed to eps * idle_amps.
JACOBIAN_FLOOR_SIEMENS = 1e-12


def random_state(rng, stamped: Stamped, case: str, values: dict) -> np.ndarray:
    """A state vector for ``stamped`` in the region named by ``case``."""
    local = stamped.local
    x = np.zeros(stamped.size)
    if stamped.kind.name == "inverter":
        gnd = rng.uniform(-0.3, 0.3)
        vdd = gnd + rng.uniform(3.0, 15.0)
        # the input and output range a little past the rails, so clamps and channels in
        # every region (off, subthreshold, saturation, triode, reversed) are visited
        return stamped.state(**{"in": rng.uniform(gnd - 0.8, vdd + 0.8),
                                "out": rng.uniform(gnd - 0.8, vdd + 0.8),
                                "vdd": vdd, "gnd": gnd})
    if stamped.kind.name == "diode":
        cathode = rng.uniform(-1.0, 1.0)
        if case == "forward":
            amps = 10.0 ** rng.uniform(-6.0, -1.0)   # 1 uA to 100 mA
            n_vt = values["emission"] * THERMAL_VOLTS
            drop = n_vt * math.log1p(amps / values["saturation_amps"])
        else:
            drop = -rng.uniform(0.1, 10.0)
        junction = cathode + drop
        # forward: the series resistance carries the junction's current; reverse: the
        # anode sits at the junction, so the tiny reverse conductance is not drowned
        # in the rounding error of a large series current
        anode = junction + (amps * values["series_ohms"] if case == "forward" else 0.0)
        return stamped.state(cathode=cathode, junction=junction, anode=anode)
    for i, name in enumerate(local):
        is_branch = name in stamped.kind.branches
        x[1 + i] = rng.uniform(-0.01, 0.01) if is_branch else rng.uniform(-1.0, 10.0)
    return x


def jacobian_cases():
    cases = [pytest.param(name, {}, None, "any", 0.0, id=f"{name}-defaults")
             for name in sorted(blocks.REGISTRY)]
    cases += [
        pytest.param("inverter", {"form": "behavioural"}, None, "any", 0.0,
                     id="inverter-behavioural"),
        pytest.param("supply", {}, None, "any", 0.4e-3, id="supply-during-power-on-ramp"),
    ]
    for model in diode.KIND.models:
        for case in ("forward", "reverse"):
            cases.append(pytest.param("diode", {}, model, case, 0.0, id=f"diode-{model}-{case}"))
    for taper in pot.TAPERS:
        for position in (0.0, 0.3, 1.0):
            cases.append(pytest.param("pot", {"taper": taper, "position": position}, None, "any",
                                      0.0, id=f"pot-{taper}-{position}"))
    for wave in ("sine", "square", "triangle"):
        cases.append(pytest.param("source", {"wave": wave, "hz": 1000.0}, None, "any", 0.37e-3,
                                  id=f"source-{wave}"))
    return cases


def central_differences(stamped: Stamped, x: np.ndarray, step: float) -> np.ndarray:
    """df/dx by central differences, shape (size, size); column 0 (ground) left at 0."""
    numeric = np.zeros((stamped.size, stamped.size))
    for j in range(1, stamped.size):
        up, down = x.copy(), x.copy()
        up[j] += step
        down[j] -= step
        f_up, _ = stamped.evaluate(up)
        f_down, _ = stamped.evaluate(down)
        numeric[:, j] = (f_up - f_down) / (up[j] - down[j])  # the step as stored
    return numeric


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize(("kind_name", "given", "model", "case", "t_seconds"), jacobian_cases())
def test_analytic_jacobian_matches_central_differences(kind_name, given, model, case, t_seconds,
                                                        seed):
    values = part_values(kind_name, model, **given)
    stamped = Stamped(kind_name, values, t_seconds)
    x = random_state(np.random.default_rng(seed), stamped, case, values)
    f, G = stamped.evaluate(x)
    coarse = central_differences(stamped, x, FD_STEP)
    fine = central_differences(stamped, x, 0.5 * FD_STEP)
    numeric = (4.0 * fine - coarse) / 3.0
    # size of the terms summed into each row (their rounding is what a difference sees)
    term_amps = np.abs(f) + np.abs(G) @ np.abs(x)
    rounding = ROUNDING_MARGIN * np.finfo(float).eps * term_amps / (0.5 * FD_STEP)
    allowed = JACOBIAN_RTOL * np.abs(G) + rounding[:, None] + JACOBIAN_FLOOR_SIEMENS
    wrong = np.argwhere(np.abs(G - numeric)[:, 1:] > allowed[:, 1:])
    assert wrong.size == 0, [(stamped.local[i - 1] if i else "ground", stamped.local[j],
                              G[i, j + 1], numeric[i, j + 1]) for i, j in wrong]


# ---------------------------------------------------------------------------------
# input capacitance

TYPICAL_INPUT_FARADS = 5e-12   # from memory: B-series datasheets, typical input capacitance
MAX_INPUT_FARADS = 7.5e-12     # from memory: JEDEC JESD13-B, input capacitance limit
#: "Near typical": within the +-20 % that separates a typical figure from the spread
#: of parts (common practice for capacitances quoted as typical).
TYPICAL_INPUT_SPREAD = 0.2


def test_default_inverter_input_capacitance_is_near_typical_and_below_the_limit():
    values = part_values("inverter")
    local = inverter.KIND.local_names()
    at_input = sum(c for i, j, c in inverter.KIND.mass(values)
                   if i == j == local.index("in"))
    assert abs(at_input - TYPICAL_INPUT_FARADS) <= TYPICAL_INPUT_SPREAD * TYPICAL_INPUT_FARADS
    assert at_input < MAX_INPUT_FARADS


# ---------------------------------------------------------------------------------
# diodes

FORWARD_AMPS = 1e-3


def diode_amps(stamped: Stamped, volts: float) -> float:
    """Current (A) through the diode with ``volts`` from anode to cathode.

    The internal junction node settles where no current is left over (Kirchhoff's
    current law at that node); the terminal current then flows through the series
    resistance from the anode.
    """
    def left_over(junction):
        x = stamped.state(anode=volts, cathode=0.0, junction=junction)
        return stamped.current_out_of(x, "junction")

    low, high = min(0.0, volts), max(0.0, volts)
    junction = brentq(left_over, low, high, xtol=1e-15, rtol=1e-14) if volts else 0.0
    return stamped.current_out_of(stamped.state(anode=volts, cathode=0.0, junction=junction),
                                  "anode")


@pytest.mark.parametrize(("model", "low_volts", "high_volts"), [
    ("signal", 0.55, 0.75),     # common practice: silicon small-signal diode at 1 mA
    ("schottky", 0.0, 0.4),     # common practice: small Schottky diodes drop under 0.4 V
    ("red-led", 1.6, 2.1),      # common practice: red LEDs drop 1.6 to 2.1 V
])
def test_diode_forward_voltage_at_one_milliamp_is_in_the_usual_range(model, low_volts,
                                                                   high_volts):
    stamped = Stamped("diode", part_values("diode", model))
    volts = brentq(lambda v: diode_amps(stamped, v) - FORWARD_AMPS, 0.01, 5.0, xtol=1e-9)
    assert low_volts < volts < high_volts


@pytest.mark.parametrize("model", sorted(diode.KIND.models))
def test_a_reverse_biased_diode_passes_almost_nothing(model):
    # common practice: small diodes and LEDs leak well under a microamp at a few volts reverse
    stamped = Stamped("diode", part_values("diode", model))
    assert abs(diode_amps(stamped, -5.0)) < 1e-6


# ---------------------------------------------------------------------------------
# pots

def wiper_fraction(taper: str, position: float) -> tuple[float, float]:
    """Fraction of the track's resistance between ends[0] and the wiper, and end_fraction.

    Read from the conductances the stamp puts between the nets.
    """
    values = part_values("pot", taper=taper, position=position)
    stamped = Stamped("pot", values)
    _, G = stamped.evaluate(stamped.state())
    a, b, w = (1 + stamped.local.index(n) for n in ("ends[0]", "ends[1]", "wiper"))
    to_a, to_b = -1.0 / G[a, w], -1.0 / G[w, b]
    return to_a / (to_a + to_b), values["end_fraction"]


@pytest.mark.parametrize("position", [0.0, 0.1, 0.25, 0.5, 0.8, 1.0])
def test_a_linear_pot_divides_its_track_at_the_wiper_position(position):
    # common practice: a linear taper's resistance is proportional to rotation. The
    # tolerance is the residual resistance a real pot keeps at each end (end_fraction).
    fraction, end = wiper_fraction("lin", position)
    assert abs(fraction - position) <= end + 1e-12


@pytest.mark.parametrize(("position", "expected"), [
    (0.0, 0.0),
    (0.5, 0.10),   # common practice: audio taper is 10 % of the track at half rotation
    (1.0, 1.0),
])
def test_a_log_pot_gives_ten_percent_at_mid_travel(position, expected):
    fraction, end = wiper_fraction("log", position)
    assert abs(fraction - expected) <= end + 1e-12


def test_a_log_pot_rises_slowly_then_quickly():
    # common practice: an audio taper is an exponential law, so each step of rotation adds
    # more resistance than the step before.
    fractions = [wiper_fraction("log", p)[0] for p in np.linspace(0.0, 1.0, 11)]
    steps = np.diff(fractions)
    assert np.all(steps > 0.0)
    assert np.all(np.diff(steps) > 0.0)


@pytest.mark.parametrize("position", [0.0, 0.2, 0.5, 0.7, 1.0])
def test_a_reverse_log_pot_mirrors_the_log_pot(position):
    # common practice: reverse-log (anti-log) is the audio law turned end for end
    reverse, _ = wiper_fraction("reverse-log", position)
    forward, _ = wiper_fraction("log", 1.0 - position)
    assert reverse == pytest.approx(1.0 - forward, abs=1e-12)


# ---------------------------------------------------------------------------------
# the two time-dependent sources of the kernel, at the instants a patch relies on

def test_the_supply_reaches_its_volts_at_the_end_of_the_power_on_ramp():
    # design notes: the supply rises from 0 at power-on to its volts over a short ramp
    values = part_values("supply", volts=9.0)
    ramp = values["ramp_seconds"]
    assert supply.emf_volts(0.0, 9.0, ramp) == 0.0
    assert supply.emf_volts(0.5 * ramp, 9.0, ramp) == pytest.approx(4.5, abs=1e-12)
    assert supply.emf_volts(ramp, 9.0, ramp) == 9.0


@pytest.mark.parametrize("wave", ["sine", "square", "triangle"])
def test_a_test_tone_peaks_at_its_volts_a_quarter_period_in(wave):
    # design notes, patch format: a source's volts is its peak amplitude
    values = part_values("source", wave=wave, hz=1000.0, volts=0.5, offset_volts=1.0)
    row = np.array([source.KIND.row(values) + [0.0, 0.0]])
    peak = source.waveform_volts(0.25e-3, row, 0, np.zeros(0))
    assert peak == pytest.approx(1.5, abs=1e-9)


@pytest.mark.parametrize("ramp_seconds", [0.0, 1e-3])
def test_the_supply_emf_of_reports_is_the_emf_the_solver_uses(ramp_seconds):
    # The report's battery current uses a numpy copy of the kernel's power-on ramp:
    # both must give the same EMF at every time (before, during and after the ramp).
    from blocks.supply import emf_volts, emf_volts_array

    times = np.linspace(-1e-4, 2e-3, 57)
    expected = [emf_volts(float(t), 9.0, ramp_seconds) for t in times]
    assert np.allclose(emf_volts_array(times, 9.0, ramp_seconds), expected, rtol=0, atol=1e-12)
