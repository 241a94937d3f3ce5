"""Output stages: speakers, transformers and the load report, against closed forms.

The closed-form checks of the two new kinds run the reference solver (scipy's Radau at
tight tolerances) on small patches driven by a sine ``source``, so they test the
equations of the blocks, not the compiled stepper's accuracy. Amplitudes and phases are
read as phasors: a least-squares fit of a sine at the drive frequency over whole periods
after the transients have died away. The load report (speaker power, DC through a
speaker, the gates' output currents) and the scenarios go through ``render``.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

import blocks
from blocks import speaker, transformer
from sim import measure
from sim.compile import compile_patch
from sim.errors import PatchError
from sim.patch import load_patch
from sim.render import RenderOptions, gate_output_amps, render
from sim.simulate import simulate_reference
from test_blocks import Stamped, central_differences, part_values, random_state

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

#: A render long enough for a steady tone: 0.05 s after power-on, then 0.25 s measured.
SHORT = RenderOptions(seconds=0.25, settle=0.05, progress=False)

#: Samples per period when reading a reference trace (the fit needs only a few dozen).
SAMPLES_PER_PERIOD = 64

#: Relative agreement asked of a phasor ratio computed from the reference solver's
#: trace with its closed form. The solver runs at rtol 1e-9; what is left is the fit of
#: a sine over whole periods, far below this.
PHASOR_RTOL = 1e-4


# ---------------------------------------------------------------------------------
# helpers


def phasor(t_seconds: np.ndarray, y: np.ndarray, hz: float) -> complex:
    """Complex amplitude P of y(t) ~ Re(P exp(j w t)) at ``hz``, shapes (m,) -> scalar.

    A constant, a slope and a curvature are fitted alongside, so what is left of a slowly
    dying transient (an inductor's DC offset) does not leak into the sine.
    """
    w = 2.0 * math.pi * hz
    u = t_seconds - t_seconds.mean()
    basis = np.column_stack([np.cos(w * t_seconds), np.sin(w * t_seconds), np.ones_like(u),
                             u, u * u])
    coef, *_ = np.linalg.lstsq(basis, y, rcond=None)
    return complex(coef[0], -coef[1])


def reference_phasors(patch, names: list[str], hz: float, settle_seconds: float,
                      periods: int) -> dict[str, complex]:
    """Phasors of the unknowns ``names`` over ``periods`` whole periods after ``settle_seconds``."""
    circuit = compile_patch(patch)
    stop = settle_seconds + periods / hz
    trace = simulate_reference(circuit, stop, names)
    t_seconds, y = trace.uniform(SAMPLES_PER_PERIOD * hz, settle_seconds, stop)
    return {name: phasor(t_seconds, y[:, j], hz) for j, name in enumerate(names)}


def load_scenario(name: str, *overrides: str):
    return load_patch(SCENARIOS / f"{name}.yaml", overrides)


# ---------------------------------------------------------------------------------
# the stamps' derivatives (tests/test_blocks.py checks each kind with its defaults)

#: Both kinds' stamps are linear, so a central difference is exact but for rounding:
#: eps times the currents summed in a row (tens of volts at most) over the 0.1 mV step.
LINEAR_JACOBIAN_ATOL = 1e-9


@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize(("kind_name", "model", "given"), [
    pytest.param("speaker", "small", {}, id="speaker-with-resonance"),
    pytest.param("transformer", None, {"ratio": 0.5, "coupling": 0.9}, id="transformer-step-up"),
])
def test_the_output_stages_jacobians_match_central_differences(kind_name, model, given, seed):
    values = part_values(kind_name, model, **given)
    stamped = Stamped(kind_name, values)
    x = random_state(np.random.default_rng(seed), stamped, "any", values)
    _, analytic = stamped.evaluate(x)
    numeric = central_differences(stamped, x, 1e-4)
    # source: definition of the Jacobian (the stamp's partial derivatives)
    np.testing.assert_allclose(analytic[:, 1:], numeric[:, 1:], rtol=0.0,
                               atol=LINEAR_JACOBIAN_ATOL)


# ---------------------------------------------------------------------------------
# transformer: ideal limits

#: In the ideal-transformer cases the primary's reactance is this many times the
#: reflected load, and the leakage reactance (1 - k^2 = 2e-4 of it at the tightest
#: coupling the kind accepts) 1/70 of the load. Both act in quadrature, so each changes
#: the magnitudes by about (1/70)^2 / 2 = 1e-4, and turns a phase by about 1/70 rad.
MAGNETISING_OVER_LOAD = 70.0
IDEAL_RTOL = 1e-3
IDEAL_PHASE_RADIANS = 1.5 / MAGNETISING_OVER_LOAD

IDEAL_TRANSFORMER = """
    format: 1
    patch: ideal-transformer
    supply: {volts: 9}
    parts:
      V1: {kind: source, between: [p, gnd], wave: sine, hz: $hz, volts: 1,
           source_ohms: $source_ohms}
      T1: {kind: transformer, primary: [p, gnd], secondary: [s, gnd], ratio: $ratio,
           primary_henries: $henries, coupling: $coupling, primary_ohms: 1m,
           secondary_ohms: 1m, core_ohms: 1G}
      RL: {kind: resistor, between: [s, gnd], value: $load}
    probes: [p, s]
"""

IDEAL_CASES = [
    pytest.param(10.0, 8.0, id="10:1 step-down into 8 ohm"),
    pytest.param(3.0, 100.0, id="3:1 step-down into 100 ohm"),
    pytest.param(0.5, 1000.0, id="1:2 step-up into 1 kohm"),
]
IDEAL_HZ = 1000.0


@pytest.fixture(scope="module")
def ideal_transformer(patch_from_yaml):
    """{(ratio, load): phasors of p, s and the two winding currents}."""
    results = {}
    for case in IDEAL_CASES:
        ratio, load = case.values
        reflected = ratio * ratio * load
        henries = MAGNETISING_OVER_LOAD * reflected / (2.0 * math.pi * IDEAL_HZ)
        # the source's resistance equal to the reflected load makes the magnetising
        # current's DC offset decay in L / (R / 2), a few tens of ms
        patch = patch_from_yaml(IDEAL_TRANSFORMER, hz=IDEAL_HZ, ratio=ratio, load=load,
                                henries=henries, source_ohms=reflected,
                                coupling=transformer.MAX_COUPLING)
        results[(ratio, load)] = reference_phasors(
            patch, ["p", "s", "T1.primary_current", "T1.secondary_current"], IDEAL_HZ,
            settle_seconds=0.004, periods=6)
    return results


@pytest.mark.parametrize(("ratio", "load"), IDEAL_CASES)
def test_a_load_on_the_secondary_looks_like_the_load_times_the_turns_ratio_squared(
        ideal_transformer, ratio, load):
    ph = ideal_transformer[(ratio, load)]
    z_in = ph["p"] / ph["T1.primary_current"]
    # source: ideal transformer, reflected impedance Z_in = (N1/N2)^2 Z_L (any circuits textbook)
    assert abs(z_in) == pytest.approx(ratio * ratio * load, rel=IDEAL_RTOL)


@pytest.mark.parametrize(("ratio", "load"), IDEAL_CASES)
def test_tight_coupling_scales_the_voltage_by_the_turns_ratio(ideal_transformer, ratio, load):
    ph = ideal_transformer[(ratio, load)]
    # source: ideal transformer, V_s / V_p = N2 / N1, in phase at the dotted ends (textbook)
    gain = ph["s"] / ph["p"]
    assert abs(gain) == pytest.approx(1.0 / ratio, rel=IDEAL_RTOL)
    assert abs(np.angle(gain)) < IDEAL_PHASE_RADIANS


@pytest.mark.parametrize(("ratio", "load"), IDEAL_CASES)
def test_tight_coupling_scales_the_current_by_the_inverse_turns_ratio(ideal_transformer, ratio,
                                                                      load):
    ph = ideal_transformer[(ratio, load)]
    # source: ideal transformer, I_s / I_p = N1 / N2; the secondary's current leaves its
    # dotted end when the primary's enters its own (textbook), so the ratio is -N1/N2
    gain = ph["T1.secondary_current"] / ph["T1.primary_current"]
    assert abs(gain) == pytest.approx(ratio, rel=IDEAL_RTOL)
    assert abs(np.angle(-gain)) < IDEAL_PHASE_RADIANS


# ---------------------------------------------------------------------------------
# transformer: every element, against the coupled-inductor closed form

REAL_TRANSFORMER = """
    format: 1
    patch: real-transformer
    supply: {volts: 9}
    parts:
      V1: {kind: source, between: [v, gnd], wave: sine, hz: $hz, volts: 1, source_ohms: 4.7k}
      T1: {kind: transformer, primary: [v, gnd], secondary: [s, gnd]}
      RL: {kind: resistor, between: [s, gnd], value: 8}
    probes: [v, s]
"""


@pytest.mark.parametrize("hz", [200.0, 1000.0, 2500.0])
def test_the_default_transformer_follows_the_coupled_inductor_equations(patch_from_yaml, hz):
    patch = patch_from_yaml(REAL_TRANSFORMER, hz=hz)
    values = patch.parts["T1"].values
    l1, l2, m = transformer.inductances(values)
    w = 2.0 * math.pi * hz
    n = values["ratio"]
    load = 1.0 / (1.0 / 8.0 + n * n / values["core_ohms"])  # RL and the core losses
    # source: coupled inductors, Z_in = R1 + j w L1 + (w M)^2 / (R2 + j w L2 + Z_L)
    # (mutual inductance, any circuit-analysis textbook)
    expected = (values["primary_ohms"] + 1j * w * l1
                + (w * m) ** 2 / (values["secondary_ohms"] + 1j * w * l2 + load))
    # the magnetising current's DC offset dies in L1 / (4.7 kohm || reflected load), ~1 ms
    ph = reference_phasors(patch, ["v", "T1.primary_current"], hz, settle_seconds=0.015,
                           periods=max(4, round(0.01 * hz)))
    measured = ph["v"] / ph["T1.primary_current"]
    assert abs(measured / expected - 1.0) < PHASOR_RTOL


def test_the_windings_inductance_matrix_stays_invertible_at_the_tightest_coupling():
    values = {"ratio": 11.2, "primary_henries": 1.0, "coupling": transformer.MAX_COUPLING}
    l1, l2, m = transformer.inductances(values)
    # source: a 2 x 2 matrix is invertible when its determinant L1 L2 - M^2 is not zero
    assert l1 * l2 - m * m > 0.0
    assert np.linalg.cond(np.array([[l1, m], [m, l2]])) < 1e12


# ---------------------------------------------------------------------------------
# speaker

SPEAKER_ON_A_SINE = """
    format: 1
    patch: speaker-on-a-sine
    supply: {volts: 9}
    parts:
      V1: {kind: source, between: [a, gnd], wave: $wave, hz: $hz, volts: 1,
           source_ohms: $source_ohms}
      SP1: {kind: speaker, between: [a, gnd], ohms: $ohms, henries: $henries, $extra}
    probes: [a]
    listen: SP1
"""

RL_HZ = 1000.0


@pytest.mark.parametrize("reactance_over_resistance", [0.2, 1.0, 5.0])
def test_the_coil_current_lags_the_voltage_as_an_rl_circuit_predicts(patch_from_yaml,
                                                                    reactance_over_resistance):
    ohms = 8.0
    henries = reactance_over_resistance * ohms / (2.0 * math.pi * RL_HZ)
    patch = patch_from_yaml(SPEAKER_ON_A_SINE, wave="sine", hz=RL_HZ, ohms=ohms,
                            henries=henries, source_ohms=1.0, extra="")
    # L / (R + 1 ohm) is at most 0.7 ms: 10 ms leaves nothing of the start
    ph = reference_phasors(patch, ["a", "SP1.current"], RL_HZ, settle_seconds=0.01, periods=5)
    admittance = ph["SP1.current"] / ph["a"]
    # source: series RL circuit, I = V / (R + j w L): |I| / |V| = 1 / sqrt(R^2 + (w L)^2),
    # lagging by atan(w L / R) (any circuits textbook)
    w_l = 2.0 * math.pi * RL_HZ * henries
    assert abs(admittance) == pytest.approx(1.0 / math.hypot(ohms, w_l), rel=PHASOR_RTOL)
    assert -np.angle(admittance) == pytest.approx(math.atan2(w_l, ohms), abs=PHASOR_RTOL)


@pytest.mark.parametrize("fraction_of_resonance", [0.5, 1.0, 2.0])
def test_the_cone_resonance_follows_the_thiele_small_equivalent_circuit(patch_from_yaml,
                                                                        fraction_of_resonance):
    small = speaker.KIND.models["small"]
    hz = small["resonance_hz"] * fraction_of_resonance
    ohms, henries = 8.0, speaker.KIND.param("henries").default
    patch = patch_from_yaml(SPEAKER_ON_A_SINE, wave="sine", hz=hz, ohms=ohms, henries=henries,
                            source_ohms=1.0, extra="model: small")
    ph = reference_phasors(patch, ["a", "SP1.current"], hz, settle_seconds=0.03,
                           periods=max(3, round(0.02 * hz)))
    impedance = ph["a"] / ph["SP1.current"]
    r_es, c_mes, l_ces = speaker.motional_elements(ohms, small["resonance_hz"],
                                                   small["q_mechanical"], small["q_electrical"])
    w = 2.0 * math.pi * hz
    # source: Thiele/Small equivalent circuit: Z = Re + j w Le + 1 / (1/Res + j w Cmes +
    # 1 / (j w Lces)), with Res = Re Qms/Qes, Cmes = Qes / (ws Re), Lces = Re / (ws Qes)
    motional = 1.0 / (1.0 / r_es + 1j * w * c_mes + 1.0 / (1j * w * l_ces))
    expected = ohms + 1j * w * henries + motional
    assert abs(impedance / expected - 1.0) < PHASOR_RTOL
    if fraction_of_resonance == 1.0:
        # source: Thiele/Small: at fs the impedance peaks at Re (1 + Qms/Qes); the coil's
        # w Le (0.4 ohm at 300 Hz) adds in quadrature, under 1e-3 of the peak
        peak = ohms * (1.0 + small["q_mechanical"] / small["q_electrical"])
        assert abs(impedance) == pytest.approx(peak, rel=1e-3)


#: "Resistive": the coil's reactance at the test tone's 200 Hz is 1e-4 of its resistance.
RESISTIVE_HENRIES = 0.6e-6
#: Relative agreement of the reported power with Vrms^2 / R: the reactance above changes
#: the power by its square (1e-8); both sides come from the same sampled signals.
POWER_RTOL = 1e-4


@pytest.mark.parametrize("wave", ["sine", "triangle", "square"])
def test_the_power_into_a_resistive_speaker_is_vrms_squared_over_r(patch_from_yaml, wave):
    ohms = 8.0
    patch = patch_from_yaml(SPEAKER_ON_A_SINE, wave=wave, hz=200.0, ohms=ohms,
                            henries=RESISTIVE_HENRIES, source_ohms=2.0, extra="")
    result = render(patch, write=False, opts=RenderOptions(seconds=0.05, settle=0.01,
                                                           progress=False))
    across = result.report["probes"]["a"]
    vrms_squared = across["rms"] ** 2 + across["mean"] ** 2  # "rms" is the AC part
    # source: definition of power in a resistance, P = Vrms^2 / R
    assert result.report["speakers"]["SP1"]["power_mw"] == pytest.approx(
        vrms_squared / ohms * 1e3, rel=POWER_RTOL)


def test_listening_to_a_speaker_plays_its_coil_current_times_its_ohms(patch_from_yaml):
    patch = patch_from_yaml(SPEAKER_ON_A_SINE, wave="sine", hz=500.0, ohms=16.0,
                            henries=0.2e-3, source_ohms=1.0, extra="")
    result = render(patch, write=False, opts=RenderOptions(seconds=0.02, settle=0.01,
                                                           progress=False))
    # design notes of this change: the WAV's volts are the coil current times the ohms
    np.testing.assert_allclose(result.listen, result.signals["SP1.current"] * 16.0)
    assert result.report["listen_label"].startswith("SP1 current")


def test_listening_to_a_transformer_is_refused_naming_the_file_line_and_part(patch_from_yaml):
    patch = patch_from_yaml("""
        format: 1
        patch: listen-to-a-transformer
        supply: {volts: 9}
        parts:
          V1: {kind: source, between: [p, gnd], wave: sine, hz: 440}
          T1: {kind: transformer, primary: [p, gnd], secondary: [s, gnd]}
          R1: {kind: resistor, between: [s, gnd], value: 8}
        listen: T1
    """)
    with pytest.raises(PatchError) as caught:
        render(patch, write=False, opts=RenderOptions(seconds=0.01, settle=0.0, progress=False))
    assert caught.value.line == 9
    assert caught.value.part == "T1"
    assert "speaker" in str(caught.value)


@pytest.mark.parametrize(("offset_volts", "flagged"), [(0.0, False), (1.0, True)])
def test_a_dc_current_through_a_speaker_is_flagged(patch_from_yaml, offset_volts, flagged):
    patch = patch_from_yaml("""
        format: 1
        patch: speaker-with-dc
        supply: {volts: 9}
        parts:
          V1: {kind: source, between: [a, gnd], wave: sine, hz: 200, volts: 1,
               offset_volts: $offset, source_ohms: 1}
          SP1: {kind: speaker, between: [a, gnd]}
        probes: [a]
    """, offset=offset_volts)
    result = render(patch, write=False, opts=RenderOptions(seconds=0.05, settle=0.01,
                                                           progress=False))
    warned = [w for w in result.report["warnings"] if "SP1" in w and "DC" in w]
    # common practice: DC through a speaker offsets the cone and heats the coil
    assert bool(warned) == flagged
    # a 1 V offset on a 1 V sine through 9 ohm: 1/9 A of DC
    expected_dc_ma = 1e3 * offset_volts / (speaker.KIND.param("ohms").default + 1.0)
    assert result.report["speakers"]["SP1"]["dc_ma"] == pytest.approx(expected_dc_ma, abs=0.1)


# ---------------------------------------------------------------------------------
# the gates' output currents

GATE_INTO_A_LOAD = """
    format: 1
    patch: gate-into-a-load
    supply: {volts: 9, source_ohms: 1.5}
    parts:
      V1: {kind: source, between: [in, gnd], wave: square, hz: 200, volts: 4.5,
           offset_volts: 4.5}
      U1A: {kind: inverter, in: in, out: out}
      RL: {kind: resistor, between: [out, gnd], value: $load}
    probes: [out]
"""


@pytest.mark.parametrize("load", ["10k", "1k"])
def test_a_gate_output_current_is_what_its_resistive_load_draws(patch_from_yaml, load):
    patch = patch_from_yaml(GATE_INTO_A_LOAD, load=load)
    result = render(patch, write=False, opts=RenderOptions(seconds=0.02, settle=0.01,
                                                           progress=False))
    ohms = patch.parts["RL"].values["value"]
    # source: Ohm's law and Kirchhoff's current law: the gate sources what the load draws
    # (the net's stray capacitance takes a charge per edge far below a sample's worth)
    assert result.report["outputs"]["U1A"]["peak_ma"] == pytest.approx(
        result.report["probes"]["out"]["vmax"] / ohms * 1e3, rel=1e-3)
    assert not [w for w in result.report["warnings"] if "asked for more current" in w]


def test_a_gate_driving_8_ohm_is_flagged_as_asked_for_more_than_it_can_give(patch_from_yaml):
    patch = patch_from_yaml(GATE_INTO_A_LOAD, load="8")
    result = render(patch, write=False, opts=RenderOptions(seconds=0.02, settle=0.01,
                                                           progress=False))
    # common practice: a CMOS gate cannot drive an 8 ohm speaker; it gives a few mA
    outputs = result.report["outputs"]["U1A"]
    assert outputs["peak_ma"] > outputs["limit_ma"]
    assert any(w.startswith("U1A is asked for more current") for w in result.report["warnings"])


@pytest.mark.parametrize("vdd", [5.0, 10.0, 15.0])
def test_the_drive_a_gate_can_be_counted_on_for_lies_between_the_standard_and_a_short(vdd):
    from sim.render import gate_limit_amps

    values = {p.name: p.default for p in blocks.REGISTRY["inverter"].params}
    row = np.array([blocks.REGISTRY["inverter"].row(values) + [0.0, 0.0]])
    limit = gate_limit_amps(row, vdd)[0]
    short = -gate_output_amps(row, np.array([[vdd]]), np.array([[vdd]]), np.array([vdd]))[0, 0]
    # source: JEDEC JESD13-B minimum output drive, 0.51 / 1.3 / 3.4 mA at 5 / 10 / 15 V with
    # the output 0.4 / 0.5 / 1.5 V from its rail: a short (the output at the far rail)
    # draws more than that
    jesd_minimum = {5.0: 0.51e-3, 10.0: 1.3e-3, 15.0: 3.4e-3}[vdd]
    assert jesd_minimum < limit < short


# ---------------------------------------------------------------------------------
# scenarios


@pytest.fixture(scope="module")
def scenario_reports():
    """Reports of the speaker scenarios, and of bridged.yaml without its series resistor."""
    runs = {"bridged": load_scenario("bridged"), "step-down": load_scenario("step-down"),
            "bridged-direct": load_scenario("bridged", "R5.value=1")}
    return {name: render(patch, write=False, opts=SHORT).report for name, patch in runs.items()}


@pytest.mark.parametrize("name", ["bridged", "step-down"])
def test_a_bridged_or_transformer_fed_speaker_carries_no_dc(scenario_reports, name):
    report = scenario_reports[name]
    # common practice: antiphase drive, or a transformer with a blocking capacitor, keeps DC
    # out of the speaker
    assert not [w for w in report["warnings"] if "DC" in w]
    assert report["speakers"]["SP1"]["power_mw"] > 0.0


def test_an_8_ohm_speaker_straight_across_two_gates_asks_them_for_more_than_they_can_give(
        scenario_reports):
    warnings = scenario_reports["bridged-direct"]["warnings"]
    # common practice: a CMOS gate cannot drive 8 ohm, bridged or not
    assert any(w.startswith("U1E is asked for more current") for w in warnings)
    assert any(w.startswith("U1F is asked for more current") for w in warnings)


def test_a_step_down_transformer_gives_the_speaker_more_power_than_two_gates_across_it(
        scenario_reports):
    # common practice: matching the speaker to the gate's output resistance through a
    # transformer delivers more power than connecting it across the outputs directly
    assert (scenario_reports["step-down"]["speakers"]["SP1"]["power_mw"]
            > scenario_reports["bridged-direct"]["speakers"]["SP1"]["power_mw"])


#: Finite-difference step for the gate's small-signal parameters (V): far below the
#: volts over which the square-law channels curve, far above rounding.
SMALL_SIGNAL_STEP_VOLTS = 1e-3

#: How far the measured pitch shift may stray from the first-order estimate below, as a
#: fraction of it: the estimate takes the gain at the triangle's mid-point, while along
#: the ramp it changes by a few per cent, and it leaves out the capacitor's own current
#: through the output resistance.
LOADING_ESTIMATE_RTOL = 0.1


def small_signal(values: dict, vdd: float, vout: float, self_biased: bool = False):
    """(gm, go) in siemens of a gate at rest with its output at ``vout`` (V), or, when
    ``self_biased``, with its input tied to its output (a feedback resistor, no load)."""
    row = np.array([blocks.REGISTRY["inverter"].row(values) + [0.0, 0.0]])

    def amps(vin, vo):
        return gate_output_amps(row, np.array([[vin]]), np.array([[vo]]), np.array([vdd]))[0, 0]

    if self_biased:
        vin = brentq(lambda v: amps(v, v), 0.0, vdd)
        vout = vin
    else:
        vin = brentq(lambda v: amps(v, vout), 0.0, vdd)
    h = SMALL_SIGNAL_STEP_VOLTS
    gm = -(amps(vin + h, vout) - amps(vin - h, vout)) / (2 * h)
    go = -(amps(vin, vout + h) - amps(vin, vout - h)) / (2 * h)
    return gm, go


def test_loading_the_integrator_lowers_the_pitch_as_its_finite_gain_predicts():
    """The mixer input (R4, 10k) on the triangle lowers the pitch by about 36 cents.

    The integrator U1A is an inverter with a finite gain A = gm Ro (transconductance times
    output resistance at its bias point: about 4.2 mS and 3.8 kohm at 9 V in the default
    model, A about 16). Its input, the summing node, therefore follows the output:
    v_sum = const - v_tri / A_eff. While the triangle ramps through its swing Vpp (set by
    the trigger, the same with or without the load), the capacitor's voltage changes by
    Vpp (1 + 1/A_eff), and at an almost unchanged charging current (v_sq - v_sum) / R3 the
    ramp takes (1 + 1/A_eff) times the ideal time.

    A_eff = gm (Ro || R_load). Unloaded, the output drives only R1 + R2 (197 kohm) to the
    square wave; the mixer adds R4 in series with its summing node, R5 / (1 + A_mixer),
    to the mixer's steady bias: about 10.6 kohm. That lowers A_eff from about 15.5 to
    11.5, so the period grows by (1 + 1/11.5) / (1 + 1/15.5), 2.1 %: about -36 cents.
    The sign is certain (a load can only lower the gain); the size is the first-order
    estimate computed here from the model's own gm and Ro.
    """
    results = {name: render(load_scenario(name), write=False, opts=SHORT)
               for name in ("unloaded", "loaded")}
    freq_hz = {}
    for name, result in results.items():
        measured = measure.measure_signal(result.signals["tri"], result.sample_rate_hz)
        assert measured["freq_hz"] is not None, name
        freq_hz[name] = measured["freq_hz"]
    shift_cents = 1200.0 * math.log2(freq_hz["loaded"] / freq_hz["unloaded"])

    patch = load_scenario("loaded")
    r = {ref: patch.parts[ref].values["value"] for ref in ("R1", "R2", "R4", "R5")}
    unloaded = results["unloaded"]
    vdd = float(np.mean(unloaded.signals["vdd"]))
    gm, go = small_signal(patch.parts["U1A"].values, vdd,
                          unloaded.report["probes"]["tri"]["mean"])
    gm_mix, go_mix = small_signal(patch.parts["U1D"].values, vdd, 0.0, self_biased=True)
    mixer_in_ohms = r["R4"] + r["R5"] / (1.0 + gm_mix / go_mix)

    def gain(*loads_ohms):
        return gm / (go + sum(1.0 / ohms for ohms in loads_ohms))

    trigger_ohms = r["R1"] + r["R2"]
    a_unloaded, a_loaded = gain(trigger_ohms), gain(trigger_ohms, mixer_in_ohms)
    expected_cents = -1200.0 * math.log2((1.0 + 1.0 / a_loaded) / (1.0 + 1.0 / a_unloaded))
    # source: inverting integrator with finite open-loop gain A: the input node moves by
    # -v_out / A, so the capacitor sees (1 + 1/A) of the output swing (op-amp integrator
    # analysis, any analog electronics textbook); the derivation is in the docstring
    assert shift_cents < 0.0
    assert shift_cents == pytest.approx(expected_cents, rel=LOADING_ESTIMATE_RTOL)
