"""Wiring rules checked before soldering: the library behind ``halfrail check``.

Each rule has a short code of our own, a severity and a one-line explanation
(:data:`RULES`); a :class:`Finding` names the rule, the parts it concerns and what to
do. Errors are wiring that damages a part or cannot work as drawn; warnings are
wiring that works but costs something (a sagging output, a spare input to tie).

Static rules read the patch and the parts' own equations: every part's currents and
their derivatives come from the compiled kernel (``sim/kernel.py``), evaluated one
part at a time, so a new kind of part is checked without an edit here. A part
*conducts* between two of its nodes when each node's current depends on the other's
voltage (a resistor, a pot, a diode, a coil; not a capacitor, and not a gate from its
input to anything). Nets are *driven* when a part declares the terminal on them an
output (``Kind.outputs``: a gate's output, a test source) or they are rails.

Dynamic rules (``CheckOptions(simulate=True)``) simulate the patch from power-on as
``render`` does and read the currents of the gates and speakers from the trace,
averaged over 1 / DYNAMIC_RATE_HZ: sustained currents, not the nanosecond charge of a
stray capacitance at a flip.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from blocks import REGISTRY
from blocks._junction import JUNCTION_MIN_SIEMENS
from sim import kernel as kernel_builder
from sim.compile import Circuit, compile_patch
from sim.errors import HalfrailError, PatchError, UsageError
from sim.fileio import write_json
from sim.patch import RAILS, SUPPLY, Part, Patch, is_spare
from sim.render import (QUALITIES, SUPPLY_ABSOLUTE_MAX_VOLTS, SUPPLY_MIN_VOLTS,
                        SUPPLY_RECOMMENDED_MAX_VOLTS, RenderOptions, simulate_patch)
from sim.units import format_quantity

ERROR, WARNING = "error", "warning"
SEVERITIES = (ERROR, WARNING)


@dataclass(frozen=True)
class Rule:
    """One wiring rule: its code, its usual severity and what it is about."""

    code: str
    severity: str
    summary: str
    dynamic: bool = False


#: Every rule, by code. The codes are halfrail's own.
RULES: dict[str, Rule] = {rule.code: rule for rule in (
    Rule("spare-input", WARNING, "an unused gate of a package needs its input tied to a rail: "
         "a floating CMOS input drifts through the switching point, draws current and can "
         "oscillate"),
    Rule("package-full", ERROR, "a hex inverter package has six gates"),
    Rule("floating-input", ERROR, "a gate input needs a DC path to a defined voltage; behind "
         "a coupling capacitor that takes a bias resistor"),
    Rule("outputs-tied", ERROR, "two outputs on one net fight whenever they disagree (gates "
         "sharing their input too are paralleled for drive, and agree)"),
    Rule("output-on-rail", ERROR, "a gate output tied to a rail is a short whenever it drives "
         "the other way"),
    Rule("heavy-load", WARNING, "an output loaded below what its output resistance can drive "
         "sags and draws heavy current (an error when it loses more than half its swing)"),
    Rule("speaker-dc", WARNING, "a speaker with DC paths to two different driven nets passes "
         "a DC current that heats the coil and pushes the cone off centre (bridged between "
         "two outputs, --simulate measures it)"),
    Rule("supply-over-max", ERROR, "the supply is above the B-series absolute maximum"),
    Rule("supply-over-rated", WARNING, "the supply is above the highest voltage B-series "
         "parts are characterised at"),
    Rule("supply-low", WARNING, "the supply is below the range where B-series parts (and "
         "this model) are characterised"),
    Rule("diode-unlimited", ERROR, "a diode or LED needs a resistance in its path that limits "
         "its current"),
    Rule("wiper-open", WARNING, "a pot's wiper connects to nothing: the pot is a fixed "
         "resistor and its knob does nothing"),
    Rule("lone-net", ERROR, "a net that only one part touches is likely a typo (a warning "
         "when it is probed)"),
    Rule("output-current", WARNING, "a gate output carried a sustained current that sags it "
         "(an error when its output transistor dissipates more than it is rated for)",
         dynamic=True),
    Rule("input-clamp", WARNING, "a gate's input protection diodes conducted: the input went "
         "past a rail (an error above the per-pin maximum)", dynamic=True),
    Rule("supply-sag", WARNING, "the supply sagged under load by more than the set fraction",
         dynamic=True),
    Rule("speaker-dc-current", WARNING, "a speaker carried a DC current", dynamic=True),
    Rule("simulation", ERROR, "the simulation for the dynamic checks did not finish",
         dynamic=True),
)}

#: The cautions ``check`` prints and writes with its findings.
CAUTIONS = (
    "Start listening at a low level: renders and real circuits can be loud.",
    "Headphones need extra care: turn the level down before you put them on.",
    "These circuits are meant for batteries or an isolated, certified low-voltage adapter.",
    "Never work on mains wiring yourself: local electrical codes and licensed practice "
    "govern anything mains-powered.",
)

#: Kinds whose part is a loudspeaker coil (the speaker rules look at these): the kinds
#: that declare ``Kind.sound_ohms``.
SPEAKER_KINDS = tuple(name for name, kind in REGISTRY.items() if kind.sound_ohms)

#: Voltage steps between a part's terminals when its conductances are probed, V. Two
#: states, this and its mirror, put every junction at 3 V forward in one of them:
#: past a red LED's 1.8 V knee, so every diode shows its forward conductance.
PROBE_SPACING_VOLTS = 6.0

#: Mutual conductance above which a part conducts between two nodes, S: ten times the
#: 1 nS every junction keeps for Newton's method (blocks/_junction.py), 100 MOhm, far
#: below any resistor in a patch.
CONDUCTS_SIEMENS = 10.0 * JUNCTION_MIN_SIEMENS

#: A part whose conductance differs by this factor between the two probe states
#: rectifies (a diode or LED).
RECTIFY_RATIO = 1e3

#: Frequency at which a load is judged, Hz: the middle of the range these circuits
#: play, where a capacitor on an output counts by its impedance.
LOAD_HZ = 1000.0

#: Conductance from every node to ground in the load network, S: keeps the equations
#: regular for nets that reach nothing; 1 TOhm, far above any load.
LOAD_FLOOR_SIEMENS = 1e-12

#: Swing lost to an output's own resistance R_o into a load R_L, R_o / (R_o + R_L):
#: above 10 % the output visibly sags (warning: R_L < 9 R_o); above 50 % it drives
#: a load smaller than itself and most of its power heats the chip (error).
SWING_LOSS_WARN = 0.10
SWING_LOSS_ERROR = 0.50

#: Largest current a diode path may carry when only its wiring limits it, A.
#: common practice: a standard 5 mm LED is rated 20 mA continuous; a small-signal
#: diode takes more, but nothing here needs more than that.
DIODE_LIMIT_AMPS = 20e-3

#: Absolute maximum DC current into any one input, A.
#: source: from memory, B-series CMOS datasheets (CD4000B family): +-10 mA DC per input.
INPUT_MAX_AMPS = 10e-3

#: Absolute maximum dissipation of one output transistor, W.
#: source: from memory, B-series CMOS datasheets (CD4000B family): 100 mW per output
#: transistor over the full temperature range.
OUTPUT_TRANSISTOR_MAX_WATTS = 0.1

#: Current through an input's protection diodes that counts as conducting, A: ten
#: thousand times their leakage floor (1 nA at 1 V), the current of an input driven a
#: diode drop past a rail through 100 kOhm or less.
CLAMP_CONDUCTING_AMPS = 10e-6

#: Mean current through a speaker that counts as DC, A: far above what leaks through
#: a coupling capacitor in this model, well below what moves a cone off centre.
SPEAKER_DC_AMPS = 1e-3

#: Grid on which the dynamic checks read the trace, Hz: a current is judged by its
#: average over about 21 us, so a flip's nanosecond charge of stray capacitance does
#: not count.
DYNAMIC_RATE_HZ = 48000.0


# ---------------------------------------------------------------------------------
# findings and options


@dataclass(frozen=True)
class Finding:
    """One broken rule: its code, severity, the parts it concerns and what to do."""

    code: str
    severity: str
    parts: tuple[str, ...]
    message: str

    def to_json(self) -> dict:
        return {"code": self.code, "severity": self.severity, "parts": list(self.parts),
                "message": self.message}

    def line(self) -> str:
        """One line for a terminal: ``error [outputs-tied] U1A, U1B: ...``."""
        who = f" {', '.join(self.parts)}:" if self.parts else ""
        return f"{self.severity} [{self.code}]{who} {self.message}"


@dataclass
class CheckOptions:
    """Options of ``halfrail check`` (defaults are the CLI's defaults)."""

    simulate: bool = False
    seconds: float = 0.3
    settle: float = RenderOptions.settle
    sag_fraction: float = 0.10
    quality: str = "default"

    def check(self) -> None:
        if not (self.seconds > 0 and math.isfinite(self.seconds)):
            raise UsageError(f"--seconds must be positive, got {self.seconds!r}")
        if not (self.settle >= 0 and math.isfinite(self.settle)):
            raise UsageError(f"--settle must be zero or positive, got {self.settle!r}")
        if not 0 < self.sag_fraction < 1:
            raise UsageError(f"--sag must be a fraction between 0 and 1 (such as 0.1), "
                             f"got {self.sag_fraction!r}")
        if self.quality not in QUALITIES:
            raise UsageError(f"Unknown quality {self.quality!r} (choices: {', '.join(QUALITIES)})")


@dataclass
class CheckReport:
    """What ``check`` found; ``simulated`` tells whether the dynamic rules ran."""

    patch: str
    findings: list[Finding]
    simulated: bool = False
    measured: dict = field(default_factory=dict)

    @property
    def errors(self) -> list[Finding]:
        return [f for f in self.findings if f.severity == ERROR]

    @property
    def warnings(self) -> list[Finding]:
        return [f for f in self.findings if f.severity == WARNING]

    @property
    def exit_status(self) -> int:
        """1 when any error was found, else 0."""
        return 1 if self.errors else 0

    def to_json(self) -> dict:
        return {"patch": self.patch, "findings": [f.to_json() for f in self.findings],
                "errors": len(self.errors), "warnings": len(self.warnings),
                "simulated": self.simulated, "measured": self.measured,
                "cautions": list(CAUTIONS)}


def _finding(code: str, parts, message: str, severity: str | None = None) -> Finding:
    rule = RULES[code]
    return Finding(code=code, severity=severity or rule.severity,
                   parts=tuple(dict.fromkeys(parts)), message=message)


# ---------------------------------------------------------------------------------
# the parts' equations, one part at a time


class _Network:
    """The compiled patch with each part's conductances and capacitances, by global node.

    ``conductance[ref]`` (L, L) is the part's Jacobian in its forward probe state,
    ``mass[ref]`` (L, L) its capacitances/inductances, ``nodes[ref]`` (L,) the global
    unknowns of its local ones (``Kind.local_names`` order).
    """

    def __init__(self, patch: Patch):
        self.patch = patch
        self.volts = float(patch.supply.values["volts"])
        self.circuit: Circuit = compile_patch(patch)
        self.kernel = kernel_builder.load()
        n = self.circuit.size
        self.f = np.zeros(n)
        self.G = np.zeros((n, n))
        self.parts: dict[str, Part] = dict(patch.parts)
        self.nodes = {ref: list(self.circuit.parts[ref][1]) for ref in self.parts}
        self.tabs = {ref: self._tab(ref) for ref in self.parts}
        self.conductance: dict[str, np.ndarray] = {}
        self.rectifies: dict[str, bool] = {}
        self.first_is_anode: dict[str, bool] = {}
        self.mass: dict[str, np.ndarray] = {}
        for ref, part in self.parts.items():
            kind = REGISTRY[part.kind]
            size = len(self.nodes[ref])
            mass = np.zeros((size, size))
            for i, j, value in kind.mass(part.values):
                mass[i, j] += value
            self.mass[ref] = mass
            rising, falling = (self._local_jacobian(ref, sign) for sign in (1.0, -1.0))
            # falling: the first terminal is the highest; a diode conducts then from it
            g_rising, g_falling = (_between_terminals(g, kind) for g in (rising, falling))
            first_high = g_falling > g_rising
            self.conductance[ref] = falling if first_high else rising
            self.first_is_anode[ref] = bool(first_high)
            self.rectifies[ref] = bool(max(g_rising, g_falling) > RECTIFY_RATIO * max(
                min(g_rising, g_falling), CONDUCTS_SIEMENS))
        self.driven = self._driven()
        self.out_ohms = {ref: self._output_ohms(part) for ref, part in self.parts.items()
                         if _is_gate(part)}

    def _tab(self, ref: str) -> np.ndarray:
        """The kind table with every kind empty but ``ref``'s one row."""
        kind_name = self.circuit.parts[ref][0]
        row = [r for r, (name, _) in self.circuit.parts.items() if name == kind_name].index(ref)
        k = kernel_builder.kind_order().index(kind_name)
        tab = self.circuit.tab.copy()
        tab[:, kernel_builder.TAB_COUNT] = 0
        tab[k, kernel_builder.TAB_P_OFF] += row * tab[k, kernel_builder.TAB_P_COLS]
        tab[k, kernel_builder.TAB_N_OFF] += row * tab[k, kernel_builder.TAB_N_COLS]
        tab[k, kernel_builder.TAB_COUNT] = 1
        return tab

    def evaluate(self, ref: str | None, x: np.ndarray, t: float = 0.0
                 ) -> tuple[np.ndarray, np.ndarray]:
        """Currents (n,) leaving each node into part ``ref`` (None: into every part, the
        battery included) and their Jacobian (n, n); both are overwritten by the next call."""
        c = self.circuit
        tab = c.tab if ref is None else self.tabs[ref]
        self.kernel.evaluate(x, t, c.pf, c.nf, tab, c.df, self.f, self.G)
        return self.f, self.G

    def _local_jacobian(self, ref: str, sign: float) -> np.ndarray:
        """The part's Jacobian (L, L) with its terminals PROBE_SPACING_VOLTS apart,
        rising along the terminals (``sign`` 1) or falling (-1); internal nodes midway."""
        kind = REGISTRY[self.parts[ref].kind]
        nodes = self.nodes[ref]
        terminals = len(kind.terminal_names())
        volts = [sign * PROBE_SPACING_VOLTS * i for i in range(terminals)]
        grounded = [v for node, v in zip(nodes, volts) if node == 0]
        shift = grounded[0] if grounded else 0.0  # ground stays at 0 V
        x = np.zeros(self.circuit.size)
        for node, v in zip(nodes, volts):
            x[node] = v - shift
        middle = float(np.mean(volts)) - shift if terminals else 0.0
        for i in range(terminals + (2 if kind.rails else 0), len(nodes)):
            if self.circuit.is_volt[nodes[i]]:
                x[nodes[i]] = middle
        x[0] = 0.0
        _, G = self.evaluate(ref, x)
        return G[np.ix_(nodes, nodes)].copy()

    def _driven(self) -> set[int]:
        driven = {self.circuit.index[rail] for rail in RAILS}
        for part in self.parts.values():
            for key in REGISTRY[part.kind].outputs:
                driven.update(self.circuit.index[net] for net in part.nets[key])
        return driven

    def _output_ohms(self, part: Part) -> float | None:
        """The gate's output resistance at the supply voltage, ohm (the weaker side).

        Read from its equations: the output's own conductance with the input on one
        rail and the output at the rail it then drives, and the other way round.
        """
        kind = REGISTRY[part.kind]
        nodes = self.nodes[part.ref]
        names = kind.local_names()
        ins = [nodes[names.index(key)] for key in kind.inputs]
        outs = [nodes[names.index(key)] for key in kind.outputs]
        vdd = self.circuit.index["vdd"]
        if not ins or len(outs) != 1 or set(ins) & ({0, vdd} | set(outs)) or outs[0] in (0, vdd):
            return None
        out = outs[0]
        siemens = []
        for v_in in (0.0, self.volts):
            best = None
            for v_out in (0.0, self.volts):
                x = np.zeros(self.circuit.size)
                x[vdd] = self.volts
                x[ins] = v_in
                x[out] = v_out
                f, G = self.evaluate(part.ref, x)
                if best is None or abs(f[out]) < best[0]:
                    best = (abs(f[out]), G[out, out])
            siemens.append(best[1])
        weakest = min(siemens)
        return 1.0 / weakest if weakest > 0 else None

    # -- connectivity ------------------------------------------------------------
    def components(self, without: tuple[str, ...] = ()) -> list[int]:
        """Union-find root of every global node over the parts' DC conduction.

        Gates (parts with inputs) never conduct here: their input draws no DC current,
        and their output is a driven net of its own.
        """
        root = list(range(self.circuit.size))

        def find(a: int) -> int:
            while root[a] != a:
                root[a] = root[root[a]]
                a = root[a]
            return a

        for ref, part in self.parts.items():
            if ref in without or _is_gate(part):
                continue
            G = self.conductance[ref]
            nodes = self.nodes[ref]
            for i in range(len(nodes)):
                for j in range(i + 1, len(nodes)):
                    if abs(G[i, j]) > CONDUCTS_SIEMENS and abs(G[j, i]) > CONDUCTS_SIEMENS:
                        root[find(nodes[i])] = find(nodes[j])
        return [find(a) for a in range(self.circuit.size)]

    def reaches_drive(self, net: str, without: tuple[str, ...] = ()) -> list[int]:
        """Driven nodes in the DC component of ``net`` (empty: the net floats at DC)."""
        roots = self.components(without)
        start = roots[self.circuit.index[net]]
        return [node for node in self.driven if roots[node] == start]

    def impedance(self, net: str, hz: float, *, grounded: set[int],
                  shunts: dict[int, float] | None = None, without: tuple[str, ...] = ()
                  ) -> complex:
        """Impedance (ohm) from ``net`` to the ``grounded`` nodes at ``hz`` (0 for DC).

        Every part but gates and ``without`` counts with its forward conductance and
        jw times its capacitance/inductance; gates add only their capacitances.
        ``shunts`` adds a conductance (S) from a node to ground. Infinite when the net
        reaches nothing.
        """
        n = self.circuit.size
        omega = 2.0 * math.pi * hz
        Y = np.zeros((n, n), dtype=complex)
        for ref, part in self.parts.items():
            if ref in without:
                continue
            nodes = np.array(self.nodes[ref])
            local = 1j * omega * self.mass[ref]
            if not _is_gate(part):
                local = local + self.conductance[ref]
            Y[np.ix_(nodes, nodes)] += local
        for node, siemens in (shunts or {}).items():
            Y[node, node] += siemens
        target = self.circuit.index[net]
        if target in grounded or target == 0:
            return 0.0
        free = [i for i in range(1, n) if i not in grounded]
        Y = Y[np.ix_(free, free)]
        volt = self.circuit.is_volt[free]
        Y[np.diag_indices_from(Y)] += np.where(volt, LOAD_FLOOR_SIEMENS, 0.0)
        rhs = np.zeros(len(free), dtype=complex)
        rhs[free.index(target)] = 1.0
        try:
            v = np.linalg.solve(Y, rhs)
        except np.linalg.LinAlgError:
            return complex(math.inf)
        z = v[free.index(target)]
        return complex(math.inf) if abs(z) > 1.0 / LOAD_FLOOR_SIEMENS / 2 else z


def _between_terminals(G: np.ndarray, kind) -> float:
    """Largest conductance (S) between two terminals of a part, its internal nodes
    eliminated (the Schur complement of its local Jacobian ``G``, shape (L, L))."""
    terminals = len(kind.terminal_names())
    inner = list(range(terminals + (2 if kind.rails else 0), G.shape[0]))
    outer = list(range(terminals))
    reduced = G[np.ix_(outer, outer)]
    if inner:
        coupling = np.linalg.pinv(G[np.ix_(inner, inner)])
        reduced = reduced - G[np.ix_(outer, inner)] @ coupling @ G[np.ix_(inner, outer)]
    off = np.abs(reduced - np.diag(np.diag(reduced)))
    return float(off.max()) if off.size else 0.0


def _is_gate(part: Part) -> bool:
    return bool(REGISTRY[part.kind].inputs)


def _terminals(part: Part, keys) -> list[str]:
    return [net for key in keys for net in part.nets[key]]


def _uses(patch: Patch) -> dict[str, list[tuple[Part, str]]]:
    """Net -> every (part, terminal key) on it, in file order."""
    uses: dict[str, list[tuple[Part, str]]] = {}
    for part in patch.parts.values():
        for key, nets in part.nets.items():
            for net in nets:
                uses.setdefault(net, []).append((part, key))
    return uses


def _ohms(value: float) -> str:
    return "no load" if math.isinf(value) else format_quantity(value, "ohm")


def _amps(value: float) -> str:
    return format_quantity(value, "A", 2)


# ---------------------------------------------------------------------------------
# the static rules


def supply_findings(volts: float) -> list[Finding]:
    """The supply voltage against the B-series ratings (JEDEC JESD13-B)."""
    shown = format_quantity(volts, "V")
    if volts > SUPPLY_ABSOLUTE_MAX_VOLTS:
        return [_finding("supply-over-max", [SUPPLY], (
            f"supply {shown} is above the {SUPPLY_ABSOLUTE_MAX_VOLTS:g} V maximum of B-series "
            "CMOS (JEDEC JESD13-B): a real chip would be damaged; use a lower battery"))]
    found = []
    if volts > SUPPLY_RECOMMENDED_MAX_VOLTS:
        found.append(_finding("supply-over-rated", [SUPPLY], (
            f"supply {shown} is above {SUPPLY_RECOMMENDED_MAX_VOLTS:g} V, the highest voltage "
            "B-series parts are characterised at (JEDEC JESD13-B: 5, 10 and 15 V); allowed "
            f"up to {SUPPLY_ABSOLUTE_MAX_VOLTS:g} V, but there is no margin left")))
    if volts < SUPPLY_MIN_VOLTS:
        found.append(_finding("supply-low", [SUPPLY], (
            f"supply {shown} is below {SUPPLY_MIN_VOLTS:g} V, where B-series parts are not "
            "characterised (JEDEC JESD13-B) and this model is a rough guess")))
    return found


def _package_findings(patch: Patch) -> list[Finding]:
    from sim.sheet import PINS, assign_packages

    try:
        packages = assign_packages(patch)
    except PatchError as error:
        return [_finding("package-full", [error.part] if error.part else [], error.detail)]
    found = []
    for name, package in packages.items():
        free = package.free_letters()
        if not free:
            continue
        ins = ", ".join(str(PINS[letter][0]) for letter in free)
        outs = ", ".join(str(PINS[letter][1]) for letter in free)
        gates = ", ".join(free)
        found.append(_finding("spare-input", [name], (
            f"gate{'s' if len(free) > 1 else ''} {gates} of {name} "
            f"{'are' if len(free) > 1 else 'is'} unused: tie input pin{'s' if len(free) > 1 else ''} "
            f"{ins} to gnd (or vdd) and leave pin{'s' if len(free) > 1 else ''} {outs} open; the "
            f"build sheet lists these ties (or write each spare in the patch, such as "
            f"{name}{free[0]}: {{kind: inverter, in: gnd, out: {name.lower()}{free[0].lower()}_nc, "
            f"chip: {name}}})")))
    return found


def _connection_findings(patch: Patch) -> list[Finding]:
    """Lone nets, open wipers, outputs tied together or to a rail."""
    named = set(patch.probes) | set(patch.listen.nets)
    found = []
    for net, where in _uses(patch).items():
        refs = list(dict.fromkeys(part.ref for part, _ in where))
        drivers = [(part, key) for part, key in where if key in REGISTRY[part.kind].outputs]
        gate_outputs = [part.ref for part, key in drivers if _is_gate(part)]
        if net in RAILS:
            for ref in gate_outputs:
                found.append(_finding("output-on-rail", [ref], (
                    f"the output of {ref} is tied to {net}: whenever the gate drives the other "
                    "way it shorts the supply through itself; connect the output to its own "
                    "net (a spare gate's output stays open)")))
            continue
        inputs_of = {tuple(_terminals(p, REGISTRY[p.kind].inputs)) for p, _ in drivers}
        paralleled = len(gate_outputs) == len(drivers) and len(inputs_of) == 1
        if gate_outputs and len(drivers) > 1 and not paralleled:
            found.append(_finding("outputs-tied", [p.ref for p, _ in drivers], (
                f"net {net} is driven by {', '.join(f'{p.ref}.{k}' for p, k in drivers)}: "
                "outputs fight whenever they disagree; join them through resistors "
                "(a mixer) instead")))
        if len(refs) > 1:
            continue
        part = where[0][0]
        keys = [key for _, key in where]
        kind = REGISTRY[part.kind]
        if is_spare(part) and all(key in kind.outputs for key in keys):
            continue  # a spare gate's output stays open
        if keys == ["wiper"]:
            found.append(_finding("wiper-open", [part.ref], (
                f"the wiper of {part.ref} (net {net}) connects to nothing: the pot is a fixed "
                f"{format_quantity(float(part.values[kind.main_param]), 'ohm')} resistor; "
                "connect the wiper (to one end, for a variable resistor)")))
            continue
        terminals = ", ".join(f"{part.ref}.{key}" for key in keys)
        if net in named:
            found.append(_finding("lone-net", [part.ref], (
                f"net {net} is probed but only {terminals} touches it: is a connection "
                "missing?"), severity=WARNING))
        else:
            found.append(_finding("lone-net", [part.ref], (
                f"net {net} connects only to {terminals}: a typo? (a net needs a second "
                "connection)")))
    return found


def _input_findings(net_model: _Network) -> list[Finding]:
    """Gate inputs with no DC path to a driven net."""
    found = []
    uses = _uses(net_model.patch)
    for part in net_model.parts.values():
        kind = REGISTRY[part.kind]
        if not kind.inputs:
            continue
        for net in _terminals(part, kind.inputs):
            if net in RAILS or net_model.reaches_drive(net):
                continue
            others = [p.ref for p, _ in uses[net] if p.ref != part.ref]
            reach = (f"only {', '.join(others)} reach{'es' if len(others) == 1 else ''} it"
                     if others else "nothing else touches it")
            found.append(_finding("floating-input", [part.ref, *others], (
                f"the input of {part.ref} (net {net}) has no DC path to a rail or an output "
                f"({reach}, and no DC flows through a capacitor): it floats; add a bias "
                "resistor, such as a feedback resistor from the gate's output")))
    return found


def _load_findings(net_model: _Network) -> list[Finding]:
    """Gate outputs loaded below what their output resistance drives without sagging."""
    found = []
    uses = _uses(net_model.patch)
    volts = net_model.volts
    for part in net_model.parts.values():
        r_out = net_model.out_ohms.get(part.ref)
        if r_out is None or is_spare(part):
            continue
        kind = REGISTRY[part.kind]
        net = _terminals(part, kind.outputs)[0]
        if sum(1 for p, key in uses[net] if key in REGISTRY[p.kind].outputs) > 1:
            continue  # outputs-tied says it
        node = net_model.circuit.index[net]
        z = net_model.impedance(net, LOAD_HZ, grounded=net_model.driven - {node},
                                without=(part.ref,))
        load = abs(z)
        loss = r_out / (r_out + load)
        if loss <= SWING_LOSS_WARN:
            continue
        severity = ERROR if loss > SWING_LOSS_ERROR else WARNING
        loads = [p.ref for p, _ in uses[net] if p.ref != part.ref]
        found.append(_finding("heavy-load", [part.ref, *loads], (
            f"{part.ref} drives about {_ohms(load)} at {LOAD_HZ:g} Hz (through "
            f"{', '.join(loads)}) with an output resistance of about {_ohms(r_out)} at "
            f"{format_quantity(volts, 'V')}: it loses about {loss:.0%} of its swing and gives "
            f"up to {_amps(volts / (r_out + load))}; raise the load or buffer it with more "
            "gates in parallel"), severity=severity))
    return found


def _speaker_findings(net_model: _Network) -> list[Finding]:
    """Speakers whose two sides both have DC paths to driven nets."""
    found = []
    for part in net_model.parts.values():
        if part.kind not in SPEAKER_KINDS:
            continue
        key, _ = REGISTRY[part.kind].terminals[0]
        sides = part.nets[key]
        reached = [net_model.reaches_drive(net, without=(part.ref,)) for net in sides]
        if not all(reached) or len(set(reached[0]) | set(reached[1])) < 2:
            continue  # one side floats at DC, or both reach the same one driven net
        names = net_model.circuit.names
        rails = {net_model.circuit.index[rail] for rail in RAILS}
        if not (set(reached[0]) | set(reached[1])) & rails:
            continue  # bridged between outputs: DC only if their averages differ (dynamic)
        driven = {names[node] for node in net_model.driven}
        how = "a DC current flows through its coil"

        def side(net: str, nodes: list[int]) -> str:
            if net in RAILS:
                return f"{net} is a rail"
            if net in driven:
                return f"{net} is driven"
            return f"{net} reaches {', '.join(names[n] for n in nodes)}"

        found.append(_finding("speaker-dc", [part.ref], (
            f"{part.ref} has DC paths on both sides ({side(sides[0], reached[0])}; "
            f"{side(sides[1], reached[1])}): {how}; put a capacitor in series (or measure "
            "with --simulate)")))
    return found


def _diode_findings(net_model: _Network) -> list[Finding]:
    """Rectifying parts whose path has too little resistance to limit their current."""
    found = []
    volts = net_model.volts
    gate_outputs = {}
    for ref, ohms in net_model.out_ohms.items():
        part = net_model.parts[ref]
        if ohms is not None:
            for net in _terminals(part, REGISTRY[part.kind].outputs):
                gate_outputs[net_model.circuit.index[net]] = 1.0 / ohms
    grounded = net_model.driven - set(gate_outputs)
    for ref, part in net_model.parts.items():
        if _is_gate(part) or not net_model.rectifies[ref]:
            continue
        kind = REGISTRY[part.kind]
        ends = _terminals(part, [key for key, _ in kind.terminals])[:2]
        if len(ends) < 2:
            continue
        anode, cathode = ends if net_model.first_is_anode[ref] else ends[::-1]
        if anode == "gnd" or cathode == "vdd":
            continue  # never forward-biased while the battery is the right way round
        sides = [abs(net_model.impedance(net, 0.0, grounded=grounded, shunts=gate_outputs,
                                         without=(ref,))) for net in ends]
        path = sum(sides)
        if math.isinf(path):
            continue  # one side reaches nothing at DC: no steady current
        amps = volts / path if path > 0 else math.inf
        if amps <= DIODE_LIMIT_AMPS:
            continue
        what = ("nothing but the battery limits it" if path == 0 else
                f"only about {_ohms(path)} limits it (gate outputs count with their output "
                "resistance)")
        shown = "far above" if math.isinf(amps) else f"up to {_amps(amps)}, above"
        found.append(_finding("diode-unlimited", [ref], (
            f"{ref} ({anode} to {cathode}): {what}: {shown} the "
            f"{_amps(DIODE_LIMIT_AMPS)} a small diode or LED takes; add a series resistor "
            f"(for an LED: (supply - 2 V) / 10 mA, about "
            f"{_ohms(max(volts - 2.0, 1.0) / 10e-3)})")))
    return found


def static_findings(patch: Patch) -> list[Finding]:
    """Every static rule on ``patch`` (see the module docstring)."""
    found = supply_findings(float(patch.supply.values["volts"]))
    found += _package_findings(patch)
    found += _connection_findings(patch)
    net_model = _Network(patch)
    found += _input_findings(net_model)
    found += _load_findings(net_model)
    found += _speaker_findings(net_model)
    found += _diode_findings(net_model)
    return found


# ---------------------------------------------------------------------------------
# the dynamic rules


def dynamic_findings(patch: Patch, opts: CheckOptions) -> tuple[list[Finding], dict]:
    """Simulate ``patch`` and check the gates' currents, the clamps and the supply.

    Returns the findings and the figures measured (peak output and clamp currents per
    gate in mA, the lowest supply volts, mean speaker currents in mA).
    """
    net_model = _Network(patch)
    names = net_model.circuit.names[1:]
    render_opts = RenderOptions(seconds=opts.seconds, settle=opts.settle, quality=opts.quality,
                                progress=False)
    try:
        _, trace = simulate_patch(patch, render_opts, names)
    except HalfrailError as error:
        return [_finding("simulation", [], f"{error}")], {}
    times, y = trace.uniform(DYNAMIC_RATE_HZ, opts.settle, opts.settle + opts.seconds)
    states = np.zeros((len(times), net_model.circuit.size))
    states[:, 1:] = y
    # Currents into every part, and the capacitive currents M dx/dt, at every sample.
    # A gate's output current is read from the rest of the circuit (Kirchhoff's current
    # law at its output): the rest is linear or nearly so, so its current at the
    # interval-averaged voltages is the averaged current; the gate's own equations at
    # averaged voltages are not (a flip inside an interval would read as a large
    # mid-rail current).
    total = np.array([net_model.evaluate(None, state, float(t))[0].copy()
                      for state, t in zip(states, times)])
    slopes = (np.gradient(states, times, axis=0) if len(times) > 1
              else np.zeros_like(states))
    charging = slopes @ net_model.circuit.mass.T
    found: list[Finding] = []
    measured: dict = {"gates": {}, "speakers": {}}
    volts = net_model.volts
    for ref, part in net_model.parts.items():
        kind = REGISTRY[part.kind]
        if not (_is_gate(part) or part.kind in SPEAKER_KINDS):
            continue
        own = np.array([net_model.evaluate(ref, state, float(t))[0].copy()
                        for state, t in zip(states, times)])
        nodes = net_model.nodes[ref]
        names_local = kind.local_names()
        if part.kind in SPEAKER_KINDS:
            mean = float(np.mean(own[:, nodes[0]])) if len(own) else 0.0
            measured["speakers"][ref] = {"mean_ma": mean * 1e3}
            if abs(mean) > SPEAKER_DC_AMPS:
                found.append(_finding("speaker-dc-current", [ref], (
                    f"{ref} carried a mean (DC) current of {_amps(abs(mean))}: put a "
                    "capacitor in series with it")))
            continue
        outs = [nodes[names_local.index(key)] for key in kind.outputs]
        ins = [nodes[names_local.index(key)] for key in kind.inputs]
        delivered = (total - own + charging)[:, outs]
        # an output sources from vdd through its p channel and sinks to gnd through its n
        vdd = states[:, [net_model.circuit.index["vdd"]]]
        across = np.where(delivered > 0.0, vdd - states[:, outs], states[:, outs])
        out_peak = float(np.max(np.abs(delivered))) if delivered.size else 0.0
        watts = float(np.max(np.abs(delivered) * np.abs(across))) if delivered.size else 0.0
        clamp_peak = float(np.max(np.abs(own[:, ins]))) if len(own) and ins else 0.0
        measured["gates"][ref] = {"peak_output_ma": out_peak * 1e3,
                                  "peak_output_mw": watts * 1e3,
                                  "peak_clamp_ma": clamp_peak * 1e3}
        r_out = net_model.out_ohms.get(ref)
        if watts > OUTPUT_TRANSISTOR_MAX_WATTS:
            found.append(_finding("output-current", [ref], (
                f"the output of {ref} carried up to {_amps(out_peak)} and its output "
                f"transistor dissipated up to {format_quantity(watts, 'W', 2)}, above the "
                f"{format_quantity(OUTPUT_TRANSISTOR_MAX_WATTS, 'W')} B-series parts are rated "
                "for: raise its load"), severity=ERROR))
        elif r_out is not None and out_peak * r_out > SWING_LOSS_WARN * volts:
            found.append(_finding("output-current", [ref], (
                f"the output of {ref} carried up to {_amps(out_peak)}, which sags it by about "
                f"{format_quantity(out_peak * r_out, 'V', 2)} through its "
                f"{_ohms(r_out)} output resistance")))
        if clamp_peak > CLAMP_CONDUCTING_AMPS:
            severity = ERROR if clamp_peak > INPUT_MAX_AMPS else WARNING
            found.append(_finding("input-clamp", [ref], (
                f"the input protection diodes of {ref} conducted up to {_amps(clamp_peak)}: "
                f"its input (net {_terminals(part, kind.inputs)[0]}) went past a rail; add "
                "series resistance or reduce the signal"), severity=severity))
    vdd = y[:, names.index("vdd")]
    lowest = float(np.min(vdd)) if len(vdd) else volts
    measured["supply_volts_min"] = lowest
    if lowest < (1.0 - opts.sag_fraction) * volts:
        found.append(_finding("supply-sag", [SUPPLY], (
            f"the supply sagged to {format_quantity(lowest, 'V')} under load, more than "
            f"{opts.sag_fraction:.0%} below its {format_quantity(volts, 'V')}: a weak battery "
            "or a heavy load; check the loads (and use a fresh battery)")))
    return found, measured


# ---------------------------------------------------------------------------------
# the whole check


def check_patch(patch: Patch, opts: CheckOptions | None = None) -> CheckReport:
    """Every static rule on ``patch``, and the dynamic rules when ``opts.simulate``."""
    opts = opts or CheckOptions()
    opts.check()
    findings = static_findings(patch)
    measured: dict = {}
    if opts.simulate:
        dynamic, measured = dynamic_findings(patch, opts)
        findings += dynamic
    order = {severity: i for i, severity in enumerate(SEVERITIES)}
    findings.sort(key=lambda f: order[f.severity])
    return CheckReport(patch=patch.name, findings=findings, simulated=opts.simulate,
                       measured=measured)


def write_report(report: CheckReport, out_dir: str | os.PathLike) -> Path:
    """Write ``<patch>.check.json`` into ``out_dir``; return its path."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    return write_json(out / f"{report.patch}.check.json", report.to_json())
