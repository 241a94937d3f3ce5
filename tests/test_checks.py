"""Wiring rules before soldering: each rule trips on a patch that breaks it, and not on one that doesn't."""

import math
import re
import string
import textwrap

import pytest

from blocks import REGISTRY
from sim import checks
from sim.checks import CheckOptions, _Network, check_patch, supply_findings
from sim.errors import PatchError
from sim.patch import load_patch


@pytest.fixture
def load(tmp_path):
    """``(text, **fields) -> Patch``, loaded as ``halfrail check`` does (lone nets allowed)."""
    names = iter(range(1000))

    def build(text: str, strict: bool = False, **fields):
        body = string.Template(textwrap.dedent(text)).substitute(fields)
        path = tmp_path / f"patch-{next(names)}.yaml"
        path.write_text(body, encoding="utf-8")
        return load_patch(path, lone_nets_ok=not strict)

    return build


def found(patch, code: str | None = None, opts: CheckOptions | None = None):
    """The findings of ``patch`` (of one rule when ``code`` is given)."""
    report = check_patch(patch, opts)
    return [f for f in report.findings if code is None or f.code == code]


#: A self-biased gate (its input held at its own threshold by R1): the usual amplifier
#: stage; $extra adds parts.
BIASED = """
    format: 1
    patch: t
    supply: {volts: $volts}
    parts:
      U1A: {kind: inverter, in: a, out: b, chip: U1}
      R1:  {kind: resistor, between: [b, a], value: 1M}
    $extra
    probes: [$probes]
"""


def biased(load, extra: str = "", volts: float = 9.0, probes: str = "b", **kw):
    lines = textwrap.indent(textwrap.dedent(extra).strip(), "  ")  # under parts:
    return load(BIASED, extra=lines, volts=volts, probes=probes, **kw)


# ---------------------------------------------------------------------------------
# every rule is declared once, with a severity and an explanation


def test_every_rule_has_a_severity_and_a_one_line_explanation():
    for code, rule in checks.RULES.items():
        assert rule.code == code
        assert rule.severity in checks.SEVERITIES
        assert rule.summary and "\n" not in rule.summary


def test_a_clean_patch_has_no_findings_but_its_spare_gates(load):
    patch = biased(load)
    assert {f.code for f in found(patch)} == {"spare-input"}


# ---------------------------------------------------------------------------------
# spare gates and packages


def test_unused_gates_of_a_package_are_reported_with_their_input_pins(load):
    (finding,) = found(biased(load), "spare-input")
    assert finding.severity == "warning"
    assert finding.parts == ("U1",)
    # common practice: gates B-F of a 14-pin hex inverter take inputs on 3, 5, 9, 11, 13
    assert "3, 5, 9, 11, 13" in finding.message


def test_spare_gates_written_with_their_input_on_a_rail_are_not_reported(load):
    spares = "\n".join(f"U1{g}: {{kind: inverter, in: {rail}, out: nc{g}, chip: U1}}"
                       for g, rail in zip("BCDEF", ["gnd", "vdd", "gnd", "gnd", "vdd"]))
    patch = biased(load, spares, strict=True)  # the loader accepts a spare's open output
    assert found(patch, "spare-input") == []
    assert found(patch, "lone-net") == []
    assert found(patch, "heavy-load") == []


def test_the_loader_still_rejects_an_open_output_of_a_gate_that_is_not_a_spare(load):
    with pytest.raises(PatchError, match="net nc connects only to U1B.out"):
        biased(load, "U1B: {kind: inverter, in: b, out: nc, chip: U1}", strict=True)


@pytest.mark.parametrize(("gates", "full"), [(6, False), (7, True)])
def test_a_package_holds_six_gates(load, gates, full):
    chain = "\n".join(f"X{i}: {{kind: inverter, in: b, out: o{i}, chip: U1}}\n"
                      f"RL{i}: {{kind: resistor, between: [o{i}, gnd], value: 100k}}"
                      for i in range(gates - 1))
    patch = biased(load, chain)
    assert bool(found(patch, "package-full")) == full


# ---------------------------------------------------------------------------------
# inputs


@pytest.mark.parametrize(("extra", "floats"), [
    # a gate behind a coupling capacitor with nothing to bias it
    ("C1: {kind: capacitor, between: [b, x], value: 100n}\n"
     "U1B: {kind: inverter, in: x, out: y, chip: U1}\n"
     "R2: {kind: resistor, between: [y, gnd], value: 100k}", True),
    # the same with a bias resistor from its own output (self-bias)
    ("C1: {kind: capacitor, between: [b, x], value: 100n}\n"
     "U1B: {kind: inverter, in: x, out: y, chip: U1}\n"
     "R2: {kind: resistor, between: [y, x], value: 1M}", False),
    # biased by a divider across the supply
    ("C1: {kind: capacitor, between: [b, x], value: 100n}\n"
     "R3: {kind: resistor, between: [vdd, x], value: 100k}\n"
     "R4: {kind: resistor, between: [x, gnd], value: 100k}\n"
     "U1B: {kind: inverter, in: x, out: y, chip: U1}\n"
     "R2: {kind: resistor, between: [y, gnd], value: 100k}", False),
    # two capacitors in a row still pass no DC
    ("C1: {kind: capacitor, between: [b, x], value: 100n}\n"
     "C2: {kind: capacitor, between: [x, z], value: 100n}\n"
     "R3: {kind: resistor, between: [z, w], value: 10k}\n"
     "C3: {kind: capacitor, between: [w, gnd], value: 1n}\n"
     "U1B: {kind: inverter, in: z, out: y, chip: U1}\n"
     "R2: {kind: resistor, between: [y, gnd], value: 100k}", True),
])
def test_a_gate_input_needs_a_dc_path_to_a_defined_voltage(load, extra, floats):
    findings = found(biased(load, extra), "floating-input")
    assert bool(findings) == floats
    if floats:
        assert findings[0].severity == "error" and findings[0].parts[0] == "U1B"


# ---------------------------------------------------------------------------------
# outputs


@pytest.mark.parametrize(("extra", "tied"), [
    ("U1B: {kind: inverter, in: c, out: b, chip: U1}\n"
     "R2: {kind: resistor, between: [c, gnd], value: 100k}", True),
    # common practice: gates with input and output in common are paralleled for drive
    ("U1B: {kind: inverter, in: a, out: b, chip: U1}", False),
    ("V1: {kind: source, between: [b, gnd], wave: sine, hz: 100, volts: 1}", True),
    ("U1B: {kind: inverter, in: a, out: c, chip: U1}\n"
     "R2: {kind: resistor, between: [b, m], value: 10k}\n"
     "R3: {kind: resistor, between: [c, m], value: 10k}\n"
     "R4: {kind: resistor, between: [m, gnd], value: 100k}", False),
])
def test_two_outputs_on_one_net_are_an_error(load, extra, tied):
    findings = found(biased(load, extra), "outputs-tied")
    assert bool(findings) == tied
    assert all(f.severity == "error" for f in findings)


@pytest.mark.parametrize(("out", "shorted"), [("gnd", True), ("vdd", True), ("c", False)])
def test_a_gate_output_on_a_rail_is_an_error(load, out, shorted):
    extra = (f"U1B: {{kind: inverter, in: b, out: {out}, chip: U1}}\n"
             "R2: {kind: resistor, between: [c, b], value: 100k}")
    assert bool(found(biased(load, extra), "output-on-rail")) == shorted


def transistor_on_ohms(volts: float) -> float:
    """Output resistance of the default gate driving a rail: the weaker of its channels.

    source: square-law MOSFET in triode at vds -> 0: 1 / (k (vgs - vt)) (Sedra & Smith).
    """
    defaults = {p.name: p.default for p in REGISTRY["inverter"].params}
    return max(1.0 / (defaults["kn"] * (volts - defaults["vtn"])),
               1.0 / (defaults["kp"] * (volts - defaults["vtp"])))


@pytest.mark.parametrize("volts", [5.0, 9.0, 15.0])
def test_the_output_resistance_is_read_from_the_gate_model(load, volts):
    net = _Network(biased(load, volts=volts))
    assert net.out_ohms["U1A"] == pytest.approx(transistor_on_ohms(volts), rel=0.02)


def test_a_behavioural_gate_has_its_given_output_resistance(load):
    patch = biased(load, "", strict=False)
    patch = patch.variant({"U1A.out_ohms": "330"})
    assert _Network(patch).out_ohms["U1A"] == pytest.approx(330.0, rel=1e-3)


@pytest.mark.parametrize(("load_part", "severity"), [
    ("RL: {kind: resistor, between: [b, gnd], value: 100}", "error"),      # loses ~70 %
    ("RL: {kind: resistor, between: [b, gnd], value: 1k}", "warning"),     # loses ~20 %
    ("RL: {kind: resistor, between: [b, gnd], value: 100k}", None),        # loses 0.2 %
    ("RL: {kind: capacitor, between: [b, gnd], value: 10u}", "error"),     # 16 ohm at 1 kHz
    ("RL: {kind: capacitor, between: [b, gnd], value: 1n}", None),         # 160 kohm
    ("RL: {kind: capacitor, between: [b, x], value: 10u}\n"                # coupled into 47 kohm
     "R9: {kind: resistor, between: [x, gnd], value: 47k}", None),
])
def test_an_output_loaded_below_what_it_can_drive_is_reported(load, load_part, severity):
    findings = found(biased(load, load_part), "heavy-load")
    assert [f.severity for f in findings] == ([severity] if severity else [])


def test_the_load_estimate_follows_the_divider_between_output_and_load_resistance(load):
    # source: voltage divider; the swing lost is R_o / (R_o + R_load)
    (finding,) = found(biased(load, "RL: {kind: resistor, between: [b, gnd], value: 1k}"),
                       "heavy-load")
    r_out = transistor_on_ohms(9.0)
    loss_pct = float(re.search(r"loses about (\d+)%", finding.message)[1])
    assert loss_pct == pytest.approx(100.0 * r_out / (r_out + 1000.0), abs=1.0)


# ---------------------------------------------------------------------------------
# speakers (a resistor stands in for the coil until a speaker kind exists)


@pytest.fixture
def resistor_as_speaker(monkeypatch):
    monkeypatch.setattr(checks, "SPEAKER_KINDS", ("resistor",))


@pytest.mark.parametrize(("wiring", "dc"), [
    ("SP: {kind: resistor, between: [b, gnd], value: 100k}", True),
    ("CS: {kind: capacitor, between: [b, s], value: 100u}\n"
     "SP: {kind: resistor, between: [s, gnd], value: 100k}", False),
])
def test_a_speaker_with_dc_paths_on_both_sides_is_reported(load, resistor_as_speaker, wiring,
                                                           dc):
    extra = wiring
    findings = [f for f in found(biased(load, extra), "speaker-dc") if "SP" in f.parts]
    assert bool(findings) == dc


@pytest.mark.parametrize("wiring", [
    # bridged between two outputs: DC flows only if their averages differ (--simulate)
    "U1B: {kind: inverter, in: b, out: c, chip: U1}\n"
    "SP: {kind: resistor, between: [b, c], value: 100k}",
    # both ends reach only gnd (a coil across a transformer winding to gnd, say)
    "R7: {kind: resistor, between: [s, gnd], value: 10}\n"
    "CS: {kind: capacitor, between: [b, s], value: 100u}\n"
    "SP: {kind: resistor, between: [s, gnd], value: 100k}",
])
def test_a_speaker_between_nets_with_no_dc_difference_is_not_reported(load, resistor_as_speaker,
                                                                      wiring):
    assert [f for f in found(biased(load, wiring), "speaker-dc") if "SP" in f.parts] == []


# ---------------------------------------------------------------------------------
# the supply


@pytest.mark.parametrize(("volts", "codes"), [
    # source: JEDEC JESD13-B (B-series CMOS), from memory: characterised at 5, 10 and
    # 15 V, rated to 18 V DC absolute maximum; guaranteed figures start at 3 V
    (2.5, ["supply-low"]),
    (3.0, []),
    (9.0, []),
    (15.0, []),
    (18.0, ["supply-over-rated"]),
    (20.0, ["supply-over-max"]),
])
def test_the_supply_is_checked_against_the_b_series_ratings(volts, codes):
    assert [f.code for f in supply_findings(volts)] == codes


@pytest.mark.parametrize(("volts", "status"), [(15, 0), (18, 0), (20, 1)])
def test_only_a_supply_above_the_absolute_maximum_fails_the_check(load, volts, status):
    # source: JEDEC JESD13-B, from memory (as above)
    assert check_patch(biased(load, volts=volts)).exit_status == status


# ---------------------------------------------------------------------------------
# diodes and LEDs


@pytest.mark.parametrize(("extra", "unlimited"), [
    # an LED straight from an output to gnd: only the gate's ~240 ohm limits it (~37 mA)
    ("D1: {kind: diode, anode: b, cathode: gnd, model: red-led}", True),
    # with a 1 kohm series resistor: under 8 mA
    ("R5: {kind: resistor, between: [b, k], value: 1k}\n"
     "D1: {kind: diode, anode: k, cathode: gnd, model: red-led}", False),
    # a diode straight across the battery, forward
    ("D1: {kind: diode, anode: vdd, cathode: gnd}", True),
    # the same diode reversed never conducts while the battery is the right way round
    ("D1: {kind: diode, anode: gnd, cathode: vdd}", False),
    # a peak detector: the capacitor passes no DC, the 1 M bias only microamps
    ("D1: {kind: diode, anode: b, cathode: k}\n"
     "C5: {kind: capacitor, between: [k, gnd], value: 1u}\n"
     "U1B: {kind: inverter, in: k, out: k2, chip: U1}\n"
     "R6: {kind: resistor, between: [k2, k], value: 1M}", False),
])
def test_a_diode_needs_a_current_limiting_path(load, extra, unlimited):
    findings = found(biased(load, extra), "diode-unlimited")
    assert bool(findings) == unlimited
    assert all(f.severity == "error" for f in findings)


def test_the_diode_rule_reads_which_end_is_the_anode_from_the_part(load):
    # the LED turned round, from gnd into the output, never conducts
    extra = "D1: {kind: diode, anode: gnd, cathode: b, model: red-led}"
    assert found(biased(load, extra), "diode-unlimited") == []
    assert _Network(biased(load, extra)).first_is_anode["D1"]


# ---------------------------------------------------------------------------------
# pots and lone nets


@pytest.mark.parametrize(("wiper", "open_"), [("w", True), ("a", False), ("b", False)])
def test_a_pot_whose_wiper_goes_nowhere_is_reported(load, wiper, open_):
    extra = f"RV1: {{kind: pot, ends: [b, a], wiper: {wiper}, value: 100k}}"
    assert bool(found(biased(load, extra), "wiper-open")) == open_


@pytest.mark.parametrize(("extra", "probes", "severity"), [
    ("R5: {kind: resistor, between: [b, typo], value: 10k}", "b", "error"),
    ("R5: {kind: resistor, between: [b, tp], value: 10k}", "b, tp", "warning"),
    ("R5: {kind: resistor, between: [b, gnd], value: 10k}", "b", None),
    ("R5: {kind: resistor, between: [x, x], value: 10k}", "b", "error"),
])
def test_a_net_that_only_one_part_touches_is_reported(load, extra, probes, severity):
    findings = found(biased(load, extra, probes=probes), "lone-net")
    assert [f.severity for f in findings] == ([severity] if severity else [])


# ---------------------------------------------------------------------------------
# the dynamic checks (one short simulation each)

DYNAMIC = CheckOptions(simulate=True, seconds=0.03, settle=0.02)

#: A gate held low at its input (through R1 to gnd), so its output drives high into
#: $ohms to gnd; $coil (a resistor as the speaker) from the output to gnd; a battery of
#: $source_ohms inside.
HEAVY = """
    format: 1
    patch: heavy
    supply: {volts: 9, source_ohms: $source_ohms}
    parts:
      R1:  {kind: resistor, between: [a, gnd], value: 100k}
      U1A: {kind: inverter, in: a, out: b, chip: U1}
      RL:  {kind: resistor, between: [b, gnd], value: $ohms}
      SP:  {kind: resistor, between: [b, gnd], value: $coil}
    probes: [b]
"""


@pytest.fixture(scope="module")
def heavy_and_light(tmp_path_factory):
    folder = tmp_path_factory.mktemp("dynamic")
    reports = {}
    saved = checks.SPEAKER_KINDS
    checks.SPEAKER_KINDS = ("resistor",)  # every resistor counts as a coil here
    try:
        for name, fields in {"heavy": dict(source_ohms=1.5, ohms=22, coil="1k"),
                             "weak battery": dict(source_ohms=200, ohms=220, coil="1M"),
                             "light": dict(source_ohms=1.5, ohms="100k", coil="1M")}.items():
            text = string.Template(textwrap.dedent(HEAVY)).substitute(fields)
            path = folder / f"{name.replace(' ', '-')}.yaml"
            path.write_text(text)
            reports[name] = check_patch(load_patch(path), DYNAMIC)
    finally:
        checks.SPEAKER_KINDS = saved
    return reports


def codes_of(report):
    return {f.code: f.severity for f in report.findings}


def test_an_output_transistor_dissipating_above_its_rating_is_an_error(heavy_and_light):
    # source: from memory, B-series datasheets: 100 mW per output transistor
    report = heavy_and_light["heavy"]
    assert codes_of(report)["output-current"] == "error"
    assert report.measured["gates"]["U1A"]["peak_output_mw"] > 100.0


def test_an_output_current_that_sags_the_output_is_a_warning(heavy_and_light):
    report = heavy_and_light["weak battery"]
    assert codes_of(report)["output-current"] == "warning"
    gate = report.measured["gates"]["U1A"]
    # source: Ohm's law; the high output sits below the sagged rail, into 220 ohm
    assert gate["peak_output_ma"] < report.measured["supply_volts_min"] / 220.0 * 1e3
    assert gate["peak_output_mw"] < 100.0


def test_a_light_load_draws_what_ohms_law_says_and_trips_nothing_dynamic(heavy_and_light):
    report = heavy_and_light["light"]
    dynamic = {code for code in codes_of(report) if checks.RULES[code].dynamic}
    assert dynamic == set()
    # source: Ohm's law; the output sits at the rail (9 V) into 100 k || 1 M
    amps = 9.0 / 100e3 + 9.0 / 1e6
    assert report.measured["gates"]["U1A"]["peak_output_ma"] == pytest.approx(amps * 1e3,
                                                                              rel=0.02)


def test_a_supply_that_sags_by_more_than_the_set_fraction_is_reported(heavy_and_light):
    report = heavy_and_light["weak battery"]
    assert "supply-sag" in codes_of(report)
    assert report.measured["supply_volts_min"] < 0.9 * 9.0
    assert "supply-sag" not in codes_of(heavy_and_light["light"])


def test_a_dc_current_through_a_speaker_is_reported(heavy_and_light):
    assert "speaker-dc-current" in codes_of(heavy_and_light["heavy"])
    assert "speaker-dc-current" not in codes_of(heavy_and_light["light"])


@pytest.mark.parametrize(("volts", "clamps"), [(12.0, True), (1.0, False)])
def test_input_clamps_conducting_are_reported(load, volts, clamps):
    text = f"""
        format: 1
        patch: clamp
        supply: {{volts: 9}}
        parts:
          V1:  {{kind: source, between: [s, gnd], wave: sine, hz: 200, volts: {volts},
                 offset_volts: 4.5}}
          R1:  {{kind: resistor, between: [s, a], value: 10k}}
          U1A: {{kind: inverter, in: a, out: b, chip: U1}}
          R2:  {{kind: resistor, between: [b, gnd], value: 100k}}
        probes: [b]
    """
    # settle past the power-on ramp, when the input sits above a rail that is still rising
    report = check_patch(load(text), CheckOptions(simulate=True, seconds=0.01, settle=0.005))
    assert ("input-clamp" in codes_of(report)) == clamps
    peak = report.measured["gates"]["U1A"]["peak_clamp_ma"]
    if clamps:
        # source: Ohm's law; the input sits about a diode drop (0.5-0.8 V) past the rail
        # while the source peaks at 16.5 V: (16.5 - 9 - 0.8) / 10k to (16.5 - 9 - 0.5) / 10k
        assert 0.6 < peak < 0.75
    else:
        assert peak < 1e-3


def test_the_report_lists_findings_with_their_code_severity_parts_and_message(load):
    report = check_patch(biased(load, "RL: {kind: resistor, between: [b, gnd], value: 100}"))
    data = report.to_json()
    assert data["findings"] and all(set(f) >= {"code", "severity", "parts", "message"}
                                    for f in data["findings"])
    assert report.exit_status == 1
    assert any("mains" in caution for caution in data["cautions"])


def test_unreachable_load_is_infinite_not_a_crash(load):
    net = _Network(biased(load, "R5: {kind: resistor, between: [x, y], value: 10k}"))
    assert math.isinf(abs(net.impedance("x", 0.0, grounded=net.driven)))
