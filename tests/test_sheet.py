"""The build sheet: gates on packages and pins, wiring, and the bill of materials."""

import csv
import io
import json
import math
import string
import textwrap
from collections import Counter
from pathlib import Path

import pytest
import yaml

from sim import eseries
from sim.errors import PatchError
from sim.patch import load_patch
from sim.sheet import (PINS, VDD_PIN, VSS_PIN, assign_packages, bom_csv, build_sheet,
                       pin_table, write_sheet)

ROOT = Path(__file__).resolve().parents[1]
SCENARIOS = sorted((ROOT / "scenarios").glob("*.yaml"))


@pytest.fixture
def load(tmp_path):
    names = iter(range(1000))

    def build(text: str, **fields):
        body = string.Template(textwrap.dedent(text)).substitute(fields)
        path = tmp_path / f"patch-{next(names)}.yaml"
        path.write_text(body, encoding="utf-8")
        return load_patch(path)

    return build


def gates_patch(load, gates: list[str]):
    """A patch of gates in a ring of 100k loads; each entry is ``REF`` or ``REF@CHIP``."""
    parts = []
    for i, entry in enumerate(gates):
        ref, _, chip = entry.partition("@")
        chip_key = f", chip: {chip}" if chip else ""
        parts.append(f"  {ref}: {{kind: inverter, in: n{i}, out: n{i + 1}{chip_key}}}")
        parts.append(f"  R{i}: {{kind: resistor, between: [n{i + 1}, n{i}], value: 1M}}")
    text = "format: 1\npatch: g\nsupply: {volts: 9}\nparts:\n" + "\n".join(parts)
    return load(text + "\nprobes: [n1]\n")


# ---------------------------------------------------------------------------------
# the pinout


def test_the_pin_map_is_the_standard_14_pin_hex_inverter_pinout():
    # common practice: every maker's 14-pin hex inverter: inputs 1, 3, 5, 9, 11, 13;
    # outputs 2, 4, 6, 8, 10, 12; VSS 7; VDD 14; gate A on 1-2 ... gate F on 13-12
    assert PINS == {"A": (1, 2), "B": (3, 4), "C": (5, 6), "D": (9, 8), "E": (11, 10),
                    "F": (13, 12)}
    assert (VSS_PIN, VDD_PIN) == (7, 14)


def test_every_pin_of_a_package_is_on_the_sheet_once(load):
    package = assign_packages(gates_patch(load, ["U1A@U1", "U1B@U1"]))["U1"]
    rows = pin_table(package)
    assert [pin for pin, _, _ in rows] == list(range(1, 15))
    assert rows[VSS_PIN - 1][2] == "gnd" and rows[VDD_PIN - 1][2] == "vdd"
    spare_inputs = [pin for pin, what, net in rows if "input (spare)" in what]
    assert spare_inputs == [5, 9, 11, 13] and all(
        net == "tie to gnd" for pin, _, net in rows if pin in spare_inputs)


# ---------------------------------------------------------------------------------
# placing gates on packages


def test_a_gate_named_by_package_and_letter_keeps_its_letter(load):
    packages = assign_packages(gates_patch(load, ["U1C@U1", "X1@U1", "U1A@U1"]))
    gates = {g.ref: (g.letter, g.in_pin, g.out_pin) for g in packages["U1"].gates.values()}
    assert gates == {"U1A": ("A", 1, 2), "X1": ("B", 3, 4), "U1C": ("C", 5, 6)}


def test_a_reference_like_u3b_names_its_package_without_chip(load):
    packages = assign_packages(gates_patch(load, ["U3B", "U3E"]))
    assert list(packages) == ["U3"]
    assert {g.ref: g.letter for g in packages["U3"].gates.values()} == {"U3B": "B", "U3E": "E"}


def test_gates_without_a_chip_fill_the_packages_in_use_then_new_ones(load):
    packages = assign_packages(gates_patch(load, ["U1A@U1", *(f"G{i}" for i in range(8))]))
    assert {name: len(p.gates) for name, p in packages.items()} == {"U1": 6, "U2": 3}
    assert math.ceil(9 / 6) == len(packages)


def test_new_packages_take_names_no_part_uses(load):
    packages = assign_packages(gates_patch(load, ["U1", "G1"]))  # a gate called U1
    assert "U1" not in packages and list(packages) == ["U2"]


def test_more_than_six_gates_on_one_chip_is_an_error_naming_the_part(load):
    patch = gates_patch(load, [f"G{i}@U1" for i in range(7)])
    with pytest.raises(PatchError, match=r":\d+: part G6: chip U1 already holds 6 gates"):
        assign_packages(patch)


# ---------------------------------------------------------------------------------
# the bill of materials on the demo scenarios


def counted_in_yaml(path: Path) -> tuple[Counter, int, list[str]]:
    """Parts per kind, packages and resistor/capacitor values, read straight from the YAML."""
    data = yaml.safe_load(path.read_text())
    kinds = Counter(part["kind"] for part in data["parts"].values())
    chips = {part["chip"] for part in data["parts"].values() if part["kind"] == "inverter"}
    return kinds, len(chips), [str(part["value"]) for part in data["parts"].values()
                               if part["kind"] in ("resistor", "capacitor")]


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_the_bill_of_materials_counts_every_part_of_each_scenario(path):
    sheet = build_sheet(load_patch(path))
    kinds, packages, _ = counted_in_yaml(path)
    bought = Counter()
    for line in sheet.bom:
        if not line.recommended:
            bought[line.kind] += line.count
    assert bought.pop("inverter") == packages  # every scenario gives chip: on its gates
    assert bought.pop("battery") == 1
    assert bought == Counter({k: n for k, n in kinds.items() if k not in ("inverter", "source")})
    decoupling = [line for line in sheet.bom if line.recommended]
    assert sum(line.count for line in decoupling) == packages  # one per package


def test_the_oscillator_needs_three_resistors_one_capacitor_and_one_package():
    # read off scenarios/tri-square.yaml: R1 47k, R2 150k, R3 100k, C1 22n, U1A-U1C on U1
    sheet = build_sheet(load_patch(ROOT / "scenarios" / "tri-square.yaml"))
    lines = {(line.kind, line.code): line.count for line in sheet.bom if not line.recommended}
    assert lines == {("battery", ""): 1, ("inverter", ""): 1, ("resistor", "47k"): 1,
                     ("resistor", "100k"): 1, ("resistor", "150k"): 1, ("capacitor", "22n"): 1}


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_every_scenario_value_is_named_by_its_e_series(path):
    sheet = build_sheet(load_patch(path))
    for line in sheet.bom:
        if line.kind in ("resistor", "capacitor"):
            assert line.series in eseries.SERIES, line


def test_two_parts_of_one_value_share_a_line():
    sheet = build_sheet(load_patch(ROOT / "scenarios" / "mixer.yaml"))
    (line,) = [line for line in sheet.bom if line.kind == "resistor" and line.code == "100k"]
    # read off scenarios/mixer.yaml: R3, R6, R7, R8, R9 are 100k
    assert line.refs == ["R3", "R6", "R7", "R8", "R9"] and line.count == 5


def test_no_decoupling_is_recommended_when_the_patch_has_one(load):
    text = """
        format: 1
        patch: d
        supply: {volts: 9}
        parts:
          U1A: {kind: inverter, in: a, out: b, chip: U1}
          R1:  {kind: resistor, between: [b, a], value: 1M}
          C9:  {kind: capacitor, between: [vdd, gnd], value: 100n}
        probes: [b]
    """
    sheet = build_sheet(load(text))
    assert not any(line.recommended for line in sheet.bom)
    assert not any("100 nF ceramic" in note for note in sheet.notes)


# ---------------------------------------------------------------------------------
# the files


def test_the_sheet_is_written_as_markdown_csv_and_json(tmp_path):
    sheet = build_sheet(load_patch(ROOT / "scenarios" / "saw.yaml"))
    paths = write_sheet(sheet, tmp_path, ("Start listening at a low level.",))
    assert [p.name for p in paths] == ["saw.sheet.md", "saw.bom.csv", "saw.sheet.json"]
    data = json.loads(paths[2].read_text())
    assert data["packages"] == {"U1": {"U1A": {"in_pin": 1, "out_pin": 2},
                                       "U1B": {"in_pin": 3, "out_pin": 4},
                                       "U1C": {"in_pin": 5, "out_pin": 6}}}
    assert all(set(line) >= {"kind", "value", "refs", "count"} for line in data["bom"])
    rows = list(csv.DictReader(io.StringIO(paths[1].read_text())))
    assert sum(int(row["count"]) for row in rows) == sum(line.count for line in sheet.bom)
    text = paths[0].read_text()
    assert "| 9 | gate D input (spare) | tie to gnd |" in text
    assert "D1 anode" in text and "low level" in text


def test_the_csv_has_one_row_per_bill_line():
    sheet = build_sheet(load_patch(ROOT / "scenarios" / "amp.yaml"))
    rows = list(csv.reader(io.StringIO(bom_csv(sheet))))
    assert rows[0][:5] == ["kind", "value", "code", "series", "count"]
    assert len(rows) == len(sheet.bom) + 1
