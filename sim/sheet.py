"""The build sheet: gates placed on packages and pins, connections, a bill of materials.

:func:`assign_packages` places every inverter of a patch on a 14-pin hex inverter
package. A gate keeps the package its ``chip:`` names, and the gate letter of its
reference when that reads package + letter (``U1C`` on chip ``U1`` is gate C). A
reference of that shape without ``chip:`` (``U3B``) names its package the same way.
Other gates fill the free gates of the packages already used, in order, then new
packages ``U1``, ``U2``... under names no part uses.

:func:`build_sheet` adds the wiring pin by pin and net by net, the spare gates to
tie off, and the bill of materials grouped by kind and value (IEC 60063 series,
IEC 60062 codes); :func:`write_sheet` writes ``<patch>.sheet.md``, ``<patch>.bom.csv``
and ``<patch>.sheet.json``.
"""

from __future__ import annotations

import csv
import io
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from blocks import REGISTRY
from sim import eseries
from sim.errors import PatchError
from sim.fileio import write_json, write_text
from sim.patch import RAILS, Patch, Part, is_spare
from sim.units import format_quantity

#: The kind of part that sits on hex inverter packages.
GATE_KIND = "inverter"

#: Gate letter -> (input pin, output pin) of the 14-pin hex inverter package.
#: common practice: every maker's 14-pin hex inverter (unbuffered or not) uses this
#: pinout: gates A-C on pins 1-6 going down one side, D-F on pins 8-13 coming back up
#: the other with the output pin first, VSS on 7 and VDD on 14.
PINS: dict[str, tuple[int, int]] = {
    "A": (1, 2), "B": (3, 4), "C": (5, 6), "D": (9, 8), "E": (11, 10), "F": (13, 12),
}
VSS_PIN = 7
VDD_PIN = 14
#: Pins of the package (a 14-pin DIP).
PACKAGE_PINS = 14
GATES_PER_PACKAGE = len(PINS)

#: What the package is, as the bill of materials names it.
PACKAGE_NAME = "unbuffered CMOS hex inverter, 14-pin DIP"

#: Rail a spare gate's input is tied to on the sheet (either rail works; gnd is the
#: usual choice and keeps the spare's output high, drawing no current).
SPARE_TIE = "gnd"

#: Decoupling capacitor recommended across each package's supply pins when the patch
#: has none. common practice: 100 nF ceramic, as close to pins 14 and 7 as possible.
DECOUPLING_FARADS = 100e-9

#: Words for diode models in the bill of materials.
DIODE_NAMES = {"signal": "silicon signal diode", "schottky": "Schottky diode",
               "red-led": "red LED"}

#: Kinds bought by an E-series value (named by series and letter code on the sheet).
SERIES_KINDS = ("resistor", "pot", "capacitor")

#: Order of kinds in the bill of materials: what a builder lays out first.
BOM_ORDER = ("battery", GATE_KIND, "resistor", "pot", "capacitor", "diode")

_GATE_REF = re.compile(r"^(?P<package>.*\d)(?P<letter>[A-F])$")


@dataclass
class Gate:
    """One gate on a package: its reference, letter, pins and nets."""

    ref: str
    letter: str
    in_pin: int
    out_pin: int
    in_net: str
    out_net: str
    spare: bool = False  # written in the patch as a tied-off spare (input on a rail)


@dataclass
class Package:
    """One hex inverter package: ``gates`` maps a letter (A-F) to its gate."""

    name: str
    gates: dict[str, Gate] = field(default_factory=dict)

    def free_letters(self) -> list[str]:
        """Letters of the gates no part of the patch uses, A to F."""
        return [letter for letter in PINS if letter not in self.gates]


@dataclass
class BomLine:
    """One line of the bill of materials (``value`` as people write it)."""

    kind: str
    value: str
    refs: list[str]
    code: str = ""
    series: str = ""
    note: str = ""
    recommended: bool = False  # not in the patch: the sheet recommends adding it
    sort_value: float = 0.0

    @property
    def count(self) -> int:
        return len(self.refs)

    def to_json(self) -> dict:
        return {"kind": self.kind, "value": self.value, "refs": list(self.refs),
                "count": self.count, "code": self.code, "series": self.series,
                "note": self.note, "recommended": self.recommended}


@dataclass
class Sheet:
    """Everything the build sheet says about one patch."""

    patch: str
    supply_volts: float
    packages: dict[str, Package]
    nets: dict[str, list[str]]
    bom: list[BomLine]
    notes: list[str]
    test_signals: list[str]

    def to_json(self) -> dict:
        return {
            "patch": self.patch,
            "packages": {name: {g.ref: {"in_pin": g.in_pin, "out_pin": g.out_pin}
                                for g in package.gates.values()}
                         for name, package in self.packages.items()},
            "spare_gates": {name: [{"letter": letter, "in_pin": PINS[letter][0],
                                    "out_pin": PINS[letter][1], "tie_input_to": SPARE_TIE}
                                   for letter in package.free_letters()]
                            for name, package in self.packages.items()},
            "nets": self.nets,
            "bom": [line.to_json() for line in self.bom],
            "notes": self.notes,
            "test_signals": self.test_signals,
        }


# ---------------------------------------------------------------------------------
# packages


def gates_of(patch: Patch) -> list[Part]:
    """The parts of ``patch`` that sit on hex inverter packages, in file order."""
    return [part for part in patch.parts.values() if part.kind == GATE_KIND]


def _error(patch: Patch, part: Part, message: str) -> PatchError:
    return PatchError(message, file=_display(patch), line=part.line or None, part=part.ref)


def _display(patch: Patch) -> str:
    try:
        return os.path.relpath(patch.path)
    except ValueError:  # another drive (Windows)
        return patch.path


def assign_packages(patch: Patch) -> dict[str, Package]:
    """Place every gate of ``patch`` on a package (see the module docstring).

    Returns packages by name, in order of first use. Raises PatchError naming the
    part when ``chip:`` puts more than six gates on one package.
    """
    packages: dict[str, Package] = {}
    unplaced: list[Part] = []
    wanted: list[tuple[Part, str]] = []
    for part in gates_of(patch):
        shape = _GATE_REF.match(part.ref)
        chip = part.chip or (shape["package"] if shape else None)
        if chip is None:
            unplaced.append(part)
            continue
        packages.setdefault(chip, Package(chip))
        wanted.append((part, chip))
    # gates whose reference names their letter first, so the others fill around them
    later: list[tuple[Part, str]] = []
    for part, chip in wanted:
        shape = _GATE_REF.match(part.ref)
        if shape and shape["package"] == chip and shape["letter"] not in packages[chip].gates:
            packages[chip].gates[shape["letter"]] = _gate(part, shape["letter"])
        else:
            later.append((part, chip))
    for part, chip in later:
        free = packages[chip].free_letters()
        if not free:
            raise _error(patch, part, f"chip {chip} already holds {GATES_PER_PACKAGE} gates "
                                      f"({', '.join(g.ref for g in packages[chip].gates.values())}"
                                      f"): a hex inverter has {GATES_PER_PACKAGE}; put "
                                      f"{part.ref} on another chip")
        packages[chip].gates[free[0]] = _gate(part, free[0])
    taken = set(patch.parts) | set(packages)
    number = 1
    for part in unplaced:
        home = next((p for p in packages.values() if p.free_letters()), None)
        if home is None:
            while f"U{number}" in taken:
                number += 1
            home = packages.setdefault(f"U{number}", Package(f"U{number}"))
            taken.add(home.name)
        letter = home.free_letters()[0]
        home.gates[letter] = _gate(part, letter)
    for package in packages.values():
        package.gates = dict(sorted(package.gates.items()))
    return packages


def _gate(part: Part, letter: str) -> Gate:
    in_pin, out_pin = PINS[letter]
    return Gate(ref=part.ref, letter=letter, in_pin=in_pin, out_pin=out_pin,
                in_net=part.nets["in"][0], out_net=part.nets["out"][0], spare=is_spare(part))


# ---------------------------------------------------------------------------------
# connections


def _endpoint(part: Part, key: str, index: int, count: int) -> str:
    """How a builder finds one terminal: ``R3``, ``D1 anode``, ``RV1 end 2``."""
    kind = REGISTRY[part.kind]
    if len(kind.terminals) == 1 and count == 2 and key == "between":
        return part.ref  # a part with two like ends: either way round
    if count == 1:
        return f"{part.ref} {key}"
    label = "end" if key == "ends" else key
    return f"{part.ref} {label} {index + 1}"


def has_decoupling(patch: Patch) -> bool:
    """True when a capacitor sits directly across the supply (vdd to gnd)."""
    return any(part.kind == "capacitor" and set(part.nets["between"]) == set(RAILS)
               for part in patch.parts.values())


def net_connections(patch: Patch, packages: dict[str, Package],
                    decoupling: list[str]) -> dict[str, list[str]]:
    """Every net with everything that connects to it, for the breadboard.

    Rails list the battery, each package's supply pin, the recommended decoupling
    capacitors (``decoupling``: their references) and the spare gates' inputs.
    """
    where = {gate.ref: (package.name, gate) for package in packages.values()
             for gate in package.gates.values()}
    nets: dict[str, list[str]] = {"vdd": ["battery +"], "gnd": ["battery -"]}
    for package in packages.values():
        nets["vdd"].append(f"{package.name} pin {VDD_PIN} (VDD)")
        nets["gnd"].append(f"{package.name} pin {VSS_PIN} (VSS)")
    for ref in decoupling:
        nets["vdd"].append(ref)
        nets["gnd"].append(ref)
    for part in patch.parts.values():
        for key, terminals in part.nets.items():
            for index, net in enumerate(terminals):
                if part.ref in where:
                    name, gate = where[part.ref]
                    pin = gate.in_pin if key == "in" else gate.out_pin
                    label = f"{name} pin {pin} ({part.ref} {key})"
                else:
                    label = _endpoint(part, key, index, len(terminals))
                nets.setdefault(net, []).append(label)
    for package in packages.values():
        for letter in package.free_letters():
            in_pin, out_pin = PINS[letter]
            nets[SPARE_TIE].append(f"{package.name} pin {in_pin} (spare gate {letter} input; "
                                   f"its output, pin {out_pin}, stays open)")
    return nets


def pin_table(package: Package) -> list[tuple[int, str, str]]:
    """(pin, what it is, net or instruction) for pins 1..14 of ``package``."""
    rows: dict[int, tuple[str, str]] = {VSS_PIN: ("VSS", "gnd"), VDD_PIN: ("VDD", "vdd")}
    for letter, (in_pin, out_pin) in PINS.items():
        gate = package.gates.get(letter)
        if gate is None:
            rows[in_pin] = (f"gate {letter} input (spare)", f"tie to {SPARE_TIE}")
            rows[out_pin] = (f"gate {letter} output (spare)", "leave open")
        else:
            rows[in_pin] = (f"{gate.ref} input", gate.in_net)
            out_net = gate.out_net
            if gate.spare:
                out_net = f"leave open ({out_net})"
            rows[out_pin] = (f"{gate.ref} output", out_net)
    return [(pin, *rows[pin]) for pin in range(1, PACKAGE_PINS + 1)]


# ---------------------------------------------------------------------------------
# bill of materials


def _describe_value(part: Part) -> tuple[str, str, str, float, str]:
    """(value, code, series, sort key, note) of one part for the bill of materials."""
    kind = REGISTRY[part.kind]
    if part.kind == "diode":
        name = part.model or "signal"
        return DIODE_NAMES.get(name, f"diode model {name}"), "", "", 0.0, ""
    main = kind.main_param
    if main is None or not isinstance(part.values.get(main), float):
        return part.model or "", "", "", 0.0, ""
    value = float(part.values[main])
    unit = kind.param(main).unit
    text = format_quantity(value, unit) if unit else f"{main} {value:g}"
    note = f"model {part.model}" if part.model else ""
    if part.kind not in SERIES_KINDS:
        return text, "", "", value, note
    code = eseries.letter_code(value, unit) if unit in eseries.LETTERS else ""
    series = eseries.series_of(value) or "off-series"
    if series == "off-series":
        note = f"not an E96 value; nearest E24: {format_quantity(eseries.nearest(value), unit)}"
    if part.kind == "pot":
        text = f"{text} {part.values['taper']}"
    return text, code, series, value, note


def bill_of_materials(patch: Patch, packages: dict[str, Package],
                      decoupling: list[str]) -> list[BomLine]:
    """Parts to buy, grouped by kind and value; test sources are not parts to buy."""
    volts = float(patch.supply.values["volts"])
    lines: dict[tuple[str, ...], BomLine] = {}
    battery = BomLine(kind="battery", value=format_quantity(volts, "V"), refs=["supply"],
                      note="or an isolated, certified low-voltage adapter", sort_value=volts)
    lines[("battery", battery.value)] = battery
    if packages:
        lines[(GATE_KIND, PACKAGE_NAME)] = BomLine(
            kind=GATE_KIND, value=PACKAGE_NAME, refs=list(packages),
            note=f"{GATES_PER_PACKAGE} gates per package")
    for part in patch.parts.values():
        kind = REGISTRY[part.kind]
        if part.kind == GATE_KIND or (kind.outputs and not kind.inputs):
            continue  # gates are counted as packages; a test source is not bought
        value, code, series, sort_value, note = _describe_value(part)
        key = (part.kind, value, note)
        if key not in lines:
            lines[key] = BomLine(kind=part.kind, value=value, refs=[], code=code,
                                 series=series, note=note, sort_value=sort_value)
        lines[key].refs.append(part.ref)
    if decoupling:
        value = format_quantity(DECOUPLING_FARADS, "F")
        lines[("decoupling", value)] = BomLine(
            kind="capacitor", value=value, refs=list(decoupling),
            code=eseries.letter_code(DECOUPLING_FARADS, "F"),
            series=eseries.series_of(DECOUPLING_FARADS) or "", recommended=True,
            note="ceramic, across pins 14 and 7 of each package (the patch has none)",
            sort_value=DECOUPLING_FARADS)
    order = {kind: i for i, kind in enumerate(BOM_ORDER)}
    return sorted(lines.values(), key=lambda line: (order.get(line.kind, len(order)),
                                                    line.kind, line.recommended,
                                                    line.sort_value, line.value))


def _decoupling_refs(patch: Patch, packages: dict[str, Package]) -> list[str]:
    """References for the recommended decoupling capacitors (none if the patch has one)."""
    if not packages or has_decoupling(patch):
        return []
    taken = set(patch.parts) | set(packages)
    refs: list[str] = []
    number = 1
    while len(refs) < len(packages):
        ref = f"C{number}"
        if ref not in taken:
            refs.append(ref)
        number += 1
    return refs


# ---------------------------------------------------------------------------------
# the sheet


def build_sheet(patch: Patch) -> Sheet:
    """Packages, connections, bill of materials and notes for ``patch``."""
    packages = assign_packages(patch)
    decoupling = _decoupling_refs(patch, packages)
    notes = []
    if decoupling:
        notes.append("The patch has no capacitor across the supply: fit a 100 nF ceramic "
                     "capacitor across pins 14 and 7 of each package ("
                     + ", ".join(f"{ref} on {name}" for ref, name in zip(decoupling, packages))
                     + "), as close to the pins as you can.")
    spares = {name: package.free_letters() for name, package in packages.items()
              if package.free_letters()}
    if spares:
        notes.append("Tie the input of every spare gate to gnd and leave its output open: a "
                     "floating CMOS input drifts through the switching point, draws current "
                     "and can oscillate (" + "; ".join(
                         f"{name}: pins {', '.join(str(PINS[letter][0]) for letter in letters)}"
                         for name, letters in spares.items()) + ").")
    signals = [f"{part.ref}: {part.values.get('wave', part.kind)} between "
               f"{' and '.join(part.nets[REGISTRY[part.kind].terminals[0][0]])}: a test signal "
               "in the patch; on the board, connect your own source here"
               for part in patch.parts.values()
               if REGISTRY[part.kind].outputs and not REGISTRY[part.kind].inputs]
    return Sheet(patch=patch.name, supply_volts=float(patch.supply.values["volts"]),
                 packages=packages, nets=net_connections(patch, packages, decoupling),
                 bom=bill_of_materials(patch, packages, decoupling), notes=notes,
                 test_signals=signals)


def bom_csv(sheet: Sheet) -> str:
    """The bill of materials as CSV text (header row first)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["kind", "value", "code", "series", "count", "refs", "recommended", "note"])
    for line in sheet.bom:
        writer.writerow([line.kind, line.value, line.code, line.series, line.count,
                         " ".join(line.refs), "yes" if line.recommended else "", line.note])
    return buffer.getvalue()


def sheet_markdown(sheet: Sheet, cautions: tuple[str, ...] = ()) -> str:
    """The build sheet as Markdown: packages pin by pin, nets, parts, notes, cautions."""
    out = [f"# Build sheet: {sheet.patch}", "",
           f"Supply: {format_quantity(sheet.supply_volts, 'V')} battery (rails vdd and gnd).", ""]
    for name, package in sheet.packages.items():
        out += [f"## {name}: {PACKAGE_NAME}", "", "| pin | what | connect to |",
                "|---:|---|---|"]
        out += [f"| {pin} | {what} | {net} |" for pin, what, net in pin_table(package)]
        out.append("")
    out += ["## Connections, net by net", "", "| net | connect together |", "|---|---|"]
    out += [f"| {net} | {', '.join(ends)} |" for net, ends in sheet.nets.items()]
    out += ["", "## Bill of materials", "",
            "| kind | value | code | series | count | refs | note |",
            "|---|---|---|---|---:|---|---|"]
    for line in sheet.bom:
        note = ("recommended; " if line.recommended else "") + line.note
        out.append(f"| {line.kind} | {line.value} | {line.code} | {line.series} | "
                   f"{line.count} | {' '.join(line.refs)} | {note.strip('; ')} |")
    out.append("")
    if sheet.test_signals:
        out += ["## Test signals (not parts to buy)", ""]
        out += [f"- {text}" for text in sheet.test_signals]
        out.append("")
    if sheet.notes:
        out += ["## Notes", ""]
        out += [f"- {text}" for text in sheet.notes]
        out.append("")
    if cautions:
        out += ["## Cautions", ""]
        out += [f"- {text}" for text in cautions]
        out.append("")
    return "\n".join(out)


def write_sheet(sheet: Sheet, out_dir: str | os.PathLike,
                cautions: tuple[str, ...] = ()) -> list[Path]:
    """Write ``<patch>.sheet.md``, ``<patch>.bom.csv`` and ``<patch>.sheet.json``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    md = write_text(out / f"{sheet.patch}.sheet.md", sheet_markdown(sheet, cautions))
    bom = write_text(out / f"{sheet.patch}.bom.csv", bom_csv(sheet))
    js = write_json(out / f"{sheet.patch}.sheet.json", sheet.to_json())
    return [md, bom, js]
