"""Loading a patch: the happy path, precedence of values, overrides, and every rejection."""

from __future__ import annotations

import textwrap

import pytest

from blocks import REGISTRY
from blocks._base import Kind, Param
from sim.errors import PatchError
from sim.patch import Listen, Patch, load_patch, parse_override

#: A small valid patch: two inverters in a ring with a resistor and a capacitor.
GOOD = """\
format: 1
patch: drone
description: a test drone
supply: {volts: 9, source_ohms: 2}
parts:
  U1A: {kind: inverter, in: n1, out: n2, chip: U1}
  U1B: {kind: inverter, in: n2, out: n3, chip: U1}
  R1:  {kind: resistor, between: [n2, n1], value: 2.2M}
  C1:  {kind: capacitor, between: [n1, n3], value: 22n}
probes: [n2, n3]
listen: n3
"""


def write(tmp_path, text: str, name: str = "drone.yaml"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def rejection(tmp_path, text: str, overrides=()) -> PatchError:
    path = write(tmp_path, text)
    with pytest.raises(PatchError) as caught:
        load_patch(path, overrides)
    return caught.value


def two_parts(part_line: str, *, extra: str = "") -> str:
    """A patch whose part R9 (line 5) is ``part_line``, wired to R1 so nets are not dangling."""
    return (f"format: 1\npatch: p\nsupply: {{volts: 9}}\nparts:\n  R9: {part_line}\n"
            f"  R1: {{kind: resistor, between: [n1, n2], value: 1k}}\nprobes: [n1, n2]\n{extra}")


# ---------------------------------------------------------------------------------
# fake kinds, so rules are tested against the Kind interface rather than one kind


def _no_stamp(x, t, P, N, D, f, G):
    return


#: A kind whose parameters are set one layer each: default, built-in model, patch
#: model, part, override.
WIDGET = Kind(
    name="widget",
    description="test kind",
    terminals=(("between", 2),),
    params=tuple(Param(name, "V", 1.0, "test") for name in ("a", "b", "c", "d", "e")),
    stamp=_no_stamp,
    models={"bright": {"b": 2.0, "c": 2.0, "d": 2.0, "e": 2.0}},
    main_param="a",
)

#: A kind with a branch current (a part one can listen to), a file and a cross-check.
COIL = Kind(
    name="coil",
    description="test kind",
    terminals=(("between", 2),),
    params=(Param("henries", "H", 1e-3, "test", positive=True, tolerance_pct=10.0),
            Param("ohms", "ohm", 8.0, "test", positive=True),
            Param("sample", "", "", "test", text=True),
            Param("turns", "", 10.0, "test", minimum=1.0),
            Param("peak_volts", "V", 1.0, "test", maximum=40.0)),
    stamp=_no_stamp,
    branches=("current",),
    check=lambda values: (["ohms must exceed 1 when henries exceed 1"]
                          if values["henries"] > 1 and values["ohms"] <= 1 else []),
)


@pytest.fixture
def fake_kinds(monkeypatch):
    monkeypatch.setitem(REGISTRY, "widget", WIDGET)
    monkeypatch.setitem(REGISTRY, "coil", COIL)


# ---------------------------------------------------------------------------------
# the happy path


def test_a_good_patch_loads_into_plain_data(tmp_path):
    patch = load_patch(write(tmp_path, GOOD))
    assert isinstance(patch, Patch)
    assert (patch.name, patch.description) == ("drone", "a test drone")
    assert list(patch.parts) == ["U1A", "U1B", "R1", "C1"]
    assert patch.parts["R1"].nets == {"between": ("n2", "n1")}
    assert patch.parts["U1A"].chip == "U1"
    assert patch.probes == ["n2", "n3"]
    assert patch.listen == Listen(nets=("n3",), part=None, line=11)
    assert patch.base_dir == str(tmp_path)


def test_each_part_remembers_the_line_of_its_key_and_of_each_field(tmp_path):
    patch = load_patch(write(tmp_path, GOOD))
    assert patch.parts["R1"].line == 8
    assert patch.parts["R1"].lines == {"kind": 8, "between": 8, "value": 8}


def test_every_parameter_of_the_kind_gets_a_value(tmp_path):
    patch = load_patch(write(tmp_path, GOOD))
    for ref, part in patch.parts.items():
        assert set(part.values) == set(REGISTRY[part.kind].param_names), ref


def test_the_supply_is_a_part_on_the_rails_with_defaults_filled_in(tmp_path):
    supply = load_patch(write(tmp_path, GOOD)).supply
    default_ramp = REGISTRY["supply"].param("ramp_seconds").default
    assert (supply.ref, supply.kind, supply.nets) == ("supply", "supply",
                                                      {"rails": ("vdd", "gnd")})
    assert supply.values == {"volts": 9.0, "source_ohms": 2.0, "ramp_seconds": default_ramp}
    assert supply.line == 4


def test_nets_lists_the_rails_first_then_every_net_in_file_order(tmp_path):
    assert load_patch(write(tmp_path, GOOD)).nets() == ["vdd", "gnd", "n1", "n2", "n3"]


@pytest.mark.parametrize(("written", "farads"), [
    ("22n", 22e-9),        # source: SI brochure prefixes
    ("22nF", 22e-9),       # source: SI brochure unit symbols
    ("22 nF", 22e-9),      # source: SI brochure unit symbols
    ("2n2", 2.2e-9),       # source: IEC 60062 letter code
    ("2.2u", 2.2e-6),      # common practice: u for micro
    ("'2.2µF'", 2.2e-6),   # source: SI brochure prefixes
    ("1e-9", 1e-9),        # a YAML 1.1 string, read as a number here
    ("1.0e-9", 1e-9),      # a YAML float
    ("'100p'", 100e-12),   # quoted or not, the same value
])
def test_capacitor_values_in_every_notation_resolve_to_farads(tmp_path, written, farads):
    patch = load_patch(write(tmp_path, GOOD.replace("value: 22n", f"value: {written}")))
    assert patch.parts["C1"].values["value"] == farads


@pytest.mark.parametrize(("written", "ohms"), [
    ("2.2M", 2.2e6),       # source: SI brochure prefixes
    ("2M2", 2.2e6),        # source: IEC 60062 letter code
    ("4k7", 4.7e3),        # source: IEC 60062 letter code
    ("4R7", 4.7),          # source: IEC 60062 letter code
    ("R47", 0.47),         # source: IEC 60062 letter code
    ("4.7kΩ", 4.7e3),      # source: SI brochure unit symbols
    ("4.7kohm", 4.7e3),    # common practice
    ("470R", 470.0),       # common practice
    ("4700", 4700.0),
])
def test_resistor_values_in_every_notation_resolve_to_ohms(tmp_path, written, ohms):
    patch = load_patch(write(tmp_path, GOOD.replace("value: 2.2M", f"value: {written}")))
    assert patch.parts["R1"].values["value"] == ohms


def test_the_supply_accepts_a_unit_symbol_on_its_voltage(tmp_path):
    patch = load_patch(write(tmp_path, GOOD.replace("volts: 9,", "volts: 4.5V,")))
    assert patch.supply.values["volts"] == 4.5


def test_listen_defaults_to_the_first_probe(tmp_path):
    patch = load_patch(write(tmp_path, GOOD.replace("listen: n3\n", "")))
    assert patch.listen == Listen(nets=("n2",), part=None, line=10)


def test_an_empty_listen_also_means_the_first_probe(tmp_path):
    patch = load_patch(write(tmp_path, GOOD.replace("listen: n3", "listen:")))
    assert patch.listen.nets == ("n2",)


def test_listen_to_a_pair_of_nets_gives_plus_then_minus(tmp_path):
    patch = load_patch(write(tmp_path, GOOD.replace("listen: n3", "listen: [n3, n1]")))
    assert patch.listen.nets == ("n3", "n1")


def test_listen_to_a_part_with_a_branch_current_names_the_part(tmp_path, fake_kinds):
    text = GOOD.replace("listen: n3", "listen: L1").replace(
        "probes:", "  L1: {kind: coil, between: [n3, gnd]}\nprobes:")
    assert load_patch(write(tmp_path, text)).listen == Listen(nets=(), part="L1", line=12)


def test_a_net_that_is_probed_may_connect_to_one_terminal(tmp_path):
    text = GOOD.replace("probes:", "  U1C: {kind: inverter, in: n3, out: out}\nprobes:")
    text = text.replace("listen: n3", "listen: out")
    assert load_patch(write(tmp_path, text)).listen.nets == ("out",)


def test_the_rails_need_no_second_connection(tmp_path):
    text = GOOD.replace("probes:", "  R2: {kind: resistor, between: [n3, vdd], value: 1M}\n"
                                   "probes:")
    assert load_patch(write(tmp_path, text)).parts["R2"].nets == {"between": ("n3", "vdd")}


def test_models_are_kept_with_their_values_parsed(tmp_path):
    text = GOOD + "models:\n  slow: {base: capacitor, value: 2n2}\n"
    assert load_patch(write(tmp_path, text)).models == {"slow": {"base": "capacitor",
                                                                 "value": 2.2e-9}}


# ---------------------------------------------------------------------------------
# where values come from


def test_each_layer_of_values_wins_over_the_one_before(tmp_path, fake_kinds):
    text = two_parts("{kind: widget, between: [n1, n2], model: mine, d: 4, e: 4}",
                     extra="models:\n  mine: {base: widget, model: bright, c: 3, d: 3, e: 3}\n")
    patch = load_patch(write(tmp_path, text), ["R9.e=5"])
    # default 1 < built-in model 2 < patch model 3 < the part 4 < the override 5
    assert patch.parts["R9"].values == {"a": 1.0, "b": 2.0, "c": 3.0, "d": 4.0, "e": 5.0}
    assert patch.parts["R9"].model == "mine"


def test_a_built_in_model_of_the_kind_can_be_named_on_the_part(tmp_path):
    builtin = REGISTRY["diode"].models["red-led"]
    text = GOOD.replace("probes:", "  D1: {kind: diode, anode: n3, cathode: gnd, "
                                   "model: red-led}\nprobes:")
    values = load_patch(write(tmp_path, text)).parts["D1"].values
    assert {key: values[key] for key in builtin} == builtin


def test_a_patch_model_sets_the_values_of_the_parts_that_use_it(tmp_path):
    text = GOOD.replace("value: 22n}", "model: slow}") + "models:\n  slow: {base: capacitor, " \
                                                       "value: 2n2}\n"
    patch = load_patch(write(tmp_path, text))
    assert (patch.parts["C1"].values["value"], patch.parts["C1"].model) == (2.2e-9, "slow")


def test_the_supply_may_take_its_values_from_a_patch_model(tmp_path):
    text = GOOD.replace("supply: {volts: 9, source_ohms: 2}", "supply: {model: nine}")
    patch = load_patch(write(tmp_path, text + "models:\n  nine: {base: supply, volts: 9V, "
                                              "source_ohms: 1.5}\n"))
    assert (patch.supply.values["volts"], patch.supply.values["source_ohms"]) == (9.0, 1.5)


def test_an_empty_probes_entry_is_no_probes_when_listen_is_given(tmp_path):
    patch = load_patch(write(tmp_path, GOOD.replace("probes: [n2, n3]", "probes:")))
    assert (patch.probes, patch.listen.nets) == ([], ("n3",))


def test_tolerances_come_from_the_kind_unless_the_part_gives_one(tmp_path):
    text = GOOD.replace("value: 2.2M}", "value: 2.2M, tolerance: 1%}")
    patch = load_patch(write(tmp_path, text))
    assert patch.parts["R1"].tolerance_pct == {"value": 1.0}
    assert patch.parts["C1"].tolerance_pct == {
        "value": REGISTRY["capacitor"].param("value").tolerance_pct}


def test_a_tolerance_mapping_sets_the_named_parameters(tmp_path, fake_kinds):
    text = two_parts("{kind: coil, between: [n1, n2], tolerance: {ohms: 2, henries: 5%}}")
    assert load_patch(write(tmp_path, text)).parts["R9"].tolerance_pct == {
        "henries": 5.0, "ohms": 2.0}


def test_a_text_parameter_keeps_the_name_written_when_the_file_exists(tmp_path, fake_kinds):
    (tmp_path / "take.wav").write_bytes(b"")
    text = two_parts("{kind: coil, between: [n1, n2], sample: take.wav}")
    assert load_patch(write(tmp_path, text)).parts["R9"].values["sample"] == "take.wav"


# ---------------------------------------------------------------------------------
# overrides and variants


def test_overrides_replace_values_from_the_file(tmp_path):
    patch = load_patch(write(tmp_path, GOOD), ["R1.value=4k7", "supply.volts=7.5"])
    assert (patch.parts["R1"].values["value"], patch.supply.values["volts"]) == (4700.0, 7.5)


def test_an_override_may_set_a_choice_and_a_pot_position(tmp_path):
    text = GOOD.replace("probes:", "  RV1: {kind: pot, ends: [n3, n4], wiper: n4, "
                                   "value: 250k}\nprobes:")
    values = load_patch(write(tmp_path, text), ["RV1.position=0.7", "RV1.taper=log"]
                        ).parts["RV1"].values
    assert (values["position"], values["taper"]) == (0.7, "log")


def test_an_override_may_set_the_tolerance_of_the_main_value(tmp_path):
    patch = load_patch(write(tmp_path, GOOD), ["R1.tolerance=1%"])
    assert patch.parts["R1"].tolerance_pct == {"value": 1.0}


def test_a_variant_is_a_new_patch_and_leaves_the_original_untouched(tmp_path):
    original = load_patch(write(tmp_path, GOOD))
    variant = original.variant({"R1.value": "4k7", "supply.volts": 7.5})
    assert (variant.parts["R1"].values["value"], variant.supply.values["volts"]) == (4700.0, 7.5)
    assert (original.parts["R1"].values["value"], original.supply.values["volts"]) == (2.2e6, 9.0)


def test_a_variant_of_a_variant_keeps_the_earlier_overrides(tmp_path):
    first = load_patch(write(tmp_path, GOOD), ["R1.value=4k7"])
    second = first.variant({"C1.value": "1n"})
    assert (second.parts["R1"].values["value"], second.parts["C1"].values["value"]) == (
        4700.0, 1e-9)
    assert second.overrides == ("R1.value=4k7", "C1.value=1n")
    assert first.overrides == ("R1.value=4k7",)


def test_a_variant_may_switch_the_model_of_a_part(tmp_path):
    text = GOOD.replace("probes:", "  D1: {kind: diode, anode: n3, cathode: gnd}\nprobes:")
    variant = load_patch(write(tmp_path, text)).variant({"D1.model": "red-led"})
    builtin = REGISTRY["diode"].models["red-led"]
    assert {key: variant.parts["D1"].values[key] for key in builtin} == builtin


@pytest.mark.parametrize(("text", "expected"), [
    ("RV1.position=0.7", ("RV1", "position", "0.7")),
    (" supply.volts = 7.5V ", ("supply", "volts", "7.5V")),
    ("U1A.model=lowgain", ("U1A", "model", "lowgain")),
])
def test_parse_override_splits_reference_parameter_and_value(text, expected):
    assert parse_override(text) == expected


@pytest.mark.parametrize("text", ["RV1.position", "RV1=0.7", ".position=1", "RV1.=1",
                                  "RV1.position="])
def test_parse_override_rejects_text_that_is_not_ref_dot_param_equals_value(text):
    with pytest.raises(ValueError, match="REF.param=value"):
        parse_override(text)


# ---------------------------------------------------------------------------------
# rejections: each names the file, the line and the part, and says what was expected

REJECTIONS = [
    # (id, patch text, line, part, fragment of the message)
    ("not YAML", "format: 1\npatch: [drone\nparts: {}\n", 3, None, "not valid YAML"),
    ("empty file", "", 1, None, "the file is empty"),
    ("top level a list", "- format: 1\n", 1, None, "top level must be a mapping"),
    ("unknown top-level key", GOOD + "probe: [n1]\n", 12, None,
     "unknown top-level key 'probe' (accepted: format, patch"),
    ("format missing", GOOD.replace("format: 1\n", ""), 1, None, "missing 'format: 1'"),
    ("format 2", GOOD.replace("format: 1", "format: 2"), 1, None, "format must be 1"),
    ("format as text", GOOD.replace("format: 1", "format: '1'"), 1, None,
     "format must be 1 (this halfrail reads patch format version 1), found '1' (text)"),
    ("patch name missing", GOOD.replace("patch: drone\n", ""), 1, None, "missing 'patch: NAME'"),
    ("patch name with a space", GOOD.replace("patch: drone", "patch: my drone"), 2, None,
     "patch name 'my drone' is not safe for file names"),
    ("patch name with a slash", GOOD.replace("patch: drone", "patch: ../drone"), 2, None,
     "letters, digits, - _ and . only"),
    ("description not text", GOOD.replace("description: a test drone", "description: [a]"), 3,
     None, "description must be text"),
    ("parts missing", "format: 1\npatch: p\nsupply: {volts: 9}\nprobes: [n1]\n", 1, None,
     "missing 'parts:'"),
    ("parts empty", "format: 1\npatch: p\nsupply: {volts: 9}\nparts: {}\n", 4, None,
     "parts is empty"),
    ("parts with nothing after it", "format: 1\npatch: p\nsupply: {volts: 9}\nparts:\n", 4,
     None, "parts is empty"),
    ("parts a list", "format: 1\npatch: p\nsupply: {volts: 9}\nparts:\n  - R1\n", 5, None,
     "parts must be a mapping of reference -> part"),
    ("part not a mapping", two_parts("resistor"), 5, "R9", "a part must be a mapping"),
    ("kind missing", two_parts("{between: [n1, n2], value: 1k}"), 5, "R9",
     "missing 'kind' (kinds: capacitor"),
    ("unknown kind", two_parts("{kind: resisor, between: [n1, n2], value: 1k}"), 5, "R9",
     "unknown kind 'resisor' (kinds: capacitor"),
    ("supply as a part kind", two_parts("{kind: supply, volts: 9}"), 5, "R9",
     "the supply is not a part"),
    ("supply as a part reference",
     GOOD.replace("  C1:  {", "  supply: {kind: resistor, between: [n1, n3], value: 1}\n  C1: {"),
     9, None, "'supply' is not a part reference"),
    ("reference with a dash", two_parts("{kind: resistor, between: [n1, n2], value: 1k}")
     .replace("R9:", "R-9:"), 5, None, "reference 'R-9' must start with a letter"),
    ("unknown key on a part", two_parts("{kind: resistor, between: [n1, n2], valeu: 1k}"), 5,
     "R9", "unknown key 'valeu' for a resistor (accepted: kind, between, value, chip, model, "
           "tolerance; did you mean 'value'?)"),
    ("missing terminal", two_parts("{kind: resistor, value: 1k}"), 5, "R9",
     "missing terminal 'between'"),
    ("one net where two are needed", two_parts("{kind: resistor, between: [n1], value: 1k}"),
     5, "R9", "between takes 2 nets such as between: [n1, n2], found 1"),
    ("a single net where a list is needed", two_parts("{kind: resistor, between: n1, "
                                                      "value: 1k}"),
     5, "R9", "between takes 2 nets as a list"),
    ("net not a string", two_parts("{kind: resistor, between: [n1, 5], value: 1k}"), 5, "R9",
     "net 5 is not a name"),
    ("rail in capitals", two_parts("{kind: resistor, between: [n1, GND], value: 1k}"), 5, "R9",
     "the rails are written in lower case"),
    ("missing required value", two_parts("{kind: resistor, between: [n1, n2]}"), 5, "R9",
     "missing value 'value' (a resistance in ohms such as 4.7k or 4k7"),
    ("empty value", two_parts("{kind: resistor, between: [n1, n2], value: }"), 5, "R9",
     "value is empty"),
    ("unparsable value", two_parts("{kind: resistor, between: [n1, n2], value: 4x7}"), 5, "R9",
     "value '4x7' is not a resistance in ohms such as 4.7k or 4k7"),
    ("wrong unit symbol", two_parts("{kind: resistor, between: [n1, n2], value: 22nF}"), 5,
     "R9", "value '22nF' is a capacitance in farads, but a resistance in ohms"),
    ("negative value", two_parts("{kind: resistor, between: [n1, n2], value: -4k7}"), 5, "R9",
     "value '-4k7' must be positive (a resistance in ohms such as 4.7k or 4k7)"),
    ("zero value", two_parts("{kind: capacitor, between: [n1, n2], value: 0}"), 5, "R9",
     "value '0' must be positive (a capacitance in farads"),
    ("pot position out of range",
     two_parts("{kind: pot, ends: [n1, n2], wiper: n1, value: 10k, position: 1.5}"), 5, "R9",
     "position '1.5' is out of range: expected 0 to 1"),
    ("unknown choice",
     two_parts("{kind: pot, ends: [n1, n2], wiper: n1, value: 10k, taper: lg}"), 5, "R9",
     "unknown taper 'lg' (choices: lin, log, reverse-log; did you mean 'log'?)"),
    ("unknown model", two_parts("{kind: resistor, between: [n1, n2], value: 1k, model: hot}"),
     5, "R9", "unknown model 'hot' for resistor (a resistor has no built-in models; define one "
              "under models: with base: resistor)"),
    ("unknown model of a kind with models",
     two_parts("{kind: diode, anode: n1, cathode: n2, model: red_led}"), 5, "R9",
     "unknown model 'red_led' for diode (models: signal, schottky, red-led; did you mean "
     "'red-led'?)"),
    ("model of another kind",
     two_parts("{kind: resistor, between: [n1, n2], value: 1k, model: slow}",
               extra="models:\n  slow: {base: capacitor, value: 1n}\n"),
     5, "R9", "model slow (line 9) is for capacitor, not resistor"),
    ("unknown parameter in a model", GOOD + "models:\n  slow: {base: capacitor, valu: 1n}\n",
     13, None, "model slow: unknown parameter 'valu' for capacitor"),
    ("model without a base", GOOD + "models:\n  slow: {value: 1n}\n", 13, None,
     "model slow: missing 'base: KIND'"),
    ("model with an unknown base", GOOD + "models:\n  slow: {base: capaciter}\n", 13, None,
     "model slow: base: unknown kind 'capaciter'"),
    ("model naming an unknown built-in", GOOD + "models:\n  dim: {base: diode, model: blue}\n",
     13, None, "model dim: unknown built-in model 'blue' of diode"),
    ("bad value in a model", GOOD + "models:\n  slow: {base: capacitor, value: 1nH}\n", 13,
     None, "model slow: value '1nH' is an inductance"),
    ("bad tolerance", two_parts("{kind: resistor, between: [n1, n2], value: 1k, "
                                "tolerance: 150%}"),
     5, "R9", "tolerance 150% is out of range"),
    ("duplicate key in a part",
     two_parts("{kind: resistor, between: [n1, n2], value: 1k, value: 2k}"), 5, "R9",
     "duplicate key 'value' (first given on line 5)"),
    ("duplicate part", GOOD.replace("  C1:  {", "  R1: {kind: resistor, between: [n1, n3], "
                                               "value: 1}\n  C1: {"), 9, "R1",
     "duplicate key 'R1' (first given on line 8)"),
    ("duplicate top-level key", GOOD + "probes: [n1]\n", 12, None,
     "duplicate key 'probes' (first given on line 10)"),
    ("duplicate key in the supply", GOOD.replace("source_ohms: 2}", "source_ohms: 2, volts: 6}"),
     4, "supply", "duplicate key 'volts'"),
    ("unknown key in the supply", GOOD.replace("source_ohms: 2", "source_ohm: 2"), 4, "supply",
     "unknown key 'source_ohm' for the supply"),
    ("supply missing its voltage", GOOD.replace("supply: {volts: 9, source_ohms: 2}\n", ""), 1,
     "supply", "missing value 'volts' (a voltage in volts"),
    ("probe of an unknown net", GOOD.replace("probes: [n2, n3]", "probes: [n2, n33]"), 10, None,
     "probe 'n33' is not a net of this patch (nets: gnd, n1, n2, n3, vdd; did you mean"),
    ("probe listed twice", GOOD.replace("probes: [n2, n3]", "probes: [n2, n2]"), 10, None,
     "probe 'n2' is listed twice"),
    ("listen to an unknown net", GOOD.replace("listen: n3", "listen: n9"), 11, None,
     "listen 'n9' is not a net of this patch"),
    ("listen to a list of three", GOOD.replace("listen: n3", "listen: [n1, n2, n3]"), 11, None,
     "listen takes one net, [plus, minus], or a part reference such as SP1; found a list of 3"),
    ("listen to the same net twice", GOOD.replace("listen: n3", "listen: [n1, n1]"), 11, None,
     "plus and minus are both 'n1'"),
    ("listen to a part without a current", GOOD.replace("listen: n3", "listen: R1"), 11, "R1",
     "part R1 is a resistor, which has no current of its own"),
    ("nothing to listen to", GOOD.replace("probes: [n2, n3]\nlisten: n3\n", ""), 1, None,
     "nothing to listen to"),
    ("net with one connection",
     GOOD.replace("between: [n2, n1]", "between: [n2, n7]").replace("listen: n3", "listen: n1"),
     8, "R1", "net n7 connects only to R1.between — a typo?"),
    ("text file that does not exist",
     two_parts("{kind: source, between: [n1, n2], wave: wav, file: missing.wav}"), 5, "R9",
     "file: no file 'missing.wav'"),
    ("check of the kind", two_parts("{kind: source, between: [n1, n2], wave: wav}"), 5, "R9",
     REGISTRY["source"].check({"wave": "wav", "file": ""})[0]),
]


@pytest.mark.parametrize(("text", "line", "part", "fragment"),
                         [case[1:] for case in REJECTIONS], ids=[case[0] for case in REJECTIONS])
def test_a_malformed_patch_is_rejected_naming_file_line_and_part(tmp_path, text, line, part,
                                                                fragment):
    error = rejection(tmp_path, text)
    path = tmp_path / "drone.yaml"
    assert (error.file, error.line, error.part) == (str(path), line, part)
    assert fragment in str(error)
    who = f"part {part}: " if part else ""
    assert str(error).startswith(f"{path}:{line}: {who}")


def test_a_missing_file_is_rejected_with_its_name(tmp_path):
    with pytest.raises(PatchError, match=r"drone\.yaml: no such file") as caught:
        load_patch(tmp_path / "drone.yaml")
    assert caught.value.line is None


def test_a_file_that_is_not_text_is_rejected(tmp_path):
    path = tmp_path / "drone.yaml"
    path.write_bytes(b"format: 1\npatch: \xff\xfe\n")
    with pytest.raises(PatchError, match="is not UTF-8 text"):
        load_patch(path)


def test_a_check_of_a_kind_is_reported_at_the_part(tmp_path, fake_kinds):
    text = two_parts("{kind: coil, between: [n1, n2], henries: 2, ohms: 0.5}")
    error = rejection(tmp_path, text)
    assert (error.line, error.part) == (5, "R9")
    assert "ohms must exceed 1 when henries exceed 1" in str(error)


@pytest.mark.parametrize(("setting", "fragment"), [
    ("turns: 0.5", "turns '0.5' is out of range: expected at least 1"),
    ("peak_volts: 50V", "peak_volts '50V' is out of range: expected at most 40 V"),
])
def test_a_value_beyond_a_one_sided_bound_is_rejected(tmp_path, fake_kinds, setting, fragment):
    error = rejection(tmp_path, two_parts(f"{{kind: coil, between: [n1, n2], {setting}}}"))
    assert (error.line, error.part) == (5, "R9")
    assert fragment in str(error)


def test_a_tolerance_number_needs_a_kind_with_a_main_value(tmp_path, fake_kinds):
    error = rejection(tmp_path, two_parts("{kind: coil, between: [n1, n2], tolerance: 5}"))
    assert (error.line, error.part) == (5, "R9")
    assert "has no main value: give tolerance as a mapping" in str(error)


OVERRIDE_REJECTIONS = [
    # (id, override, part, fragment)
    ("unknown part", "RV9.position=0.5", "RV9",
     "--set RV9.position=0.5: no part RV9 (parts: supply, U1A, U1B, R1, C1"),
    ("unknown parameter", "R1.valeu=1k", "R1",
     "--set R1.valeu=1k: R1 (resistor) has no parameter 'valeu' (parameters: value, model, "
     "tolerance; did you mean 'value'?)"),
    ("bad value", "R1.value=-4k7", "R1",
     "--set R1.value=-4k7: value '-4k7' must be positive (a resistance in ohms"),
    ("wrong unit", "supply.volts=9F", "supply",
     "--set supply.volts=9F: volts '9F' is a capacitance in farads, but a voltage"),
    ("a terminal", "R1.between=n1", "R1", "--set R1.between=n1: between cannot be changed"),
    ("unknown model", "R1.model=hot", "R1", "--set R1.model=hot: unknown model 'hot'"),
    ("bad tolerance", "R1.tolerance=-1", "R1", "--set R1.tolerance=-1: tolerance -1"),
    ("no equals sign", "R1.value4k7", None, "--set R1.value4k7: no '=' found"),
]


@pytest.mark.parametrize(("override", "part", "fragment"),
                         [case[1:] for case in OVERRIDE_REJECTIONS],
                         ids=[case[0] for case in OVERRIDE_REJECTIONS])
def test_a_bad_override_is_rejected_naming_the_override(tmp_path, override, part, fragment):
    error = rejection(tmp_path, GOOD, [override])
    path = tmp_path / "drone.yaml"
    assert (error.file, error.line, error.part) == (str(path), None, part)
    assert str(error).startswith(f"{path}: {fragment}")


def test_an_override_naming_a_missing_file_is_rejected(tmp_path, fake_kinds):
    text = two_parts("{kind: coil, between: [n1, n2]}")
    error = rejection(tmp_path, text, ["R9.sample=gone.wav"])
    assert str(error).startswith(f"{tmp_path / 'drone.yaml'}: --set R9.sample=gone.wav: "
                                 "sample: no file 'gone.wav'")


@pytest.mark.parametrize("key", ["R1", "R1.", ".value"])
def test_a_variant_key_must_be_ref_dot_param(tmp_path, key):
    with pytest.raises(PatchError, match=f"override {key}=1k: expected REF.param"):
        load_patch(write(tmp_path, GOOD)).variant({key: "1k"})


def test_a_bad_variant_names_the_override_and_leaves_the_original_usable(tmp_path):
    original = load_patch(write(tmp_path, GOOD))
    with pytest.raises(PatchError, match=r"override R1\.value=-1: value '-1' must be positive"):
        original.variant({"R1.value": "-1"})
    assert original.parts["R1"].values["value"] == 2.2e6
