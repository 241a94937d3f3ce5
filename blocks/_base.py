"""The interface every kind of part declares.

A kind of part is one module in ``blocks/`` that defines a module-level ``KIND``
(a :class:`Kind`).  The engine in ``sim/`` reads these declarations; nothing here
imports from ``sim/``.

Checklist for a new kind (see DEVELOPERS.md for a worked example):

1. ``terminals``: the patch keys that name its nets and how many nets each takes,
   e.g. ``(("between", 2),)`` or ``(("anode", 1), ("cathode", 1))``.
2. ``params``: one :class:`Param` per number or choice, each with its unit, default
   and the source of that default.
3. ``stamp``: a function compiled by :data:`stamp_jit` (numba, *not* ``cache=True``: the
   generated kernel module that calls it is cached as a whole, keyed on this file's
   contents; a block-level cache would not notice edits to the helpers it calls) with the fixed signature
   ``stamp(x, t, P, N, D, f, G)`` that *adds* the currents flowing out of each node
   into the part to ``f`` and their partial derivatives to ``G``.

   - ``x``   (n,)   float64: all unknowns; ``x[0]`` is the ground net, always 0 V.
   - ``t``          float: simulated time in seconds.
   - ``P``   (count, len(params) + 2) float64: one row per part of this kind, the
     parameter values in declaration order (choices as their index in
     ``Param.choices``), then the offset and length of this part's slice of ``D``.
   - ``N``   (count, local) uint64: the global index of each local unknown (see
     :meth:`Kind.local_names`); unsigned so that numba indexes ``f`` and ``G`` without
     a test for negative indices. Use them only as indices (numba turns arithmetic
     mixing them with signed integers into floats).
   - ``D``   (m,) float64: data blob shared by all parts of the kind (e.g. WAV samples).
   - ``f``   (n,) float64, ``G`` (n, n) float64: accumulated in place.

   Rows for branch unknowns (inductor currents) hold the branch equation written
   as ``L di/dt + f_row = 0``; ``L`` itself goes into ``mass``.
4. ``mass``: a plain Python function ``mass(values) -> [(i, j, value), ...]`` in
   local indices giving the constant capacitance/inductance matrix entries
   (use :func:`capacitance_entries`).
5. Optional ``max_step``: ``max_step(values, blob) -> seconds or None`` when the part
   has its own time scale (a test tone) that the step size must respect.
6. Optional ``data``: ``data(values, base_dir) -> 1-D float array`` for the blob.
7. Optional ``check``: ``check(values) -> [message, ...]`` for cross-parameter
   rules the per-parameter bounds cannot express.
8. Optional ``resolve``: ``resolve(values, given) -> values`` to derive a choice from
   which parameters the patch set (the inverter picks its behavioural form when
   ``gain`` is given).
9. Optional roles of terminals, read by the wiring checks (``sim/checks.py``):
   ``outputs`` drive their net (a gate's output, a test source: they set its voltage),
   ``inputs`` draw no DC current and need a DC path to a defined voltage (a gate's
   input). A part with inputs, all of them on a rail, is a tied-off spare; its
   outputs may be left open.
10. Optional ``sound_ohms`` for a loudspeaker: the parameter whose ohms turn its first
    branch current into the volts heard (``listen: SP1``); the load report and the
    speaker wiring rules find speakers by it.
11. Optional ``inline``: True compiles the stamp into the stepper's loop instead of
    calling it (numba's ``inline='always'``). A call passes each array as its pointer,
    shape and strides; for the inverter, which every patch has several of, inlining
    made the oscillator scenario 1.12x faster and the mixer 1.15x, for about 2 s more
    of the kernel's one-off compile. Inline only a kind whose stamp is the hot spot:
    each inlined stamp lengthens that compile (all kinds inlined: 18 s to 41 s).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numba
import numpy as np

#: Floating-point freedoms of the compiled stamps and stepper (LLVM's fast-math flags):
#: a multiply and an add fused into one rounding ("contract") and a division done as a
#: multiplication by the reciprocal ("arcp"). A result may change in its last bit. NaN
#: and infinity keep their meaning (the stepper's test for a diverging Newton iteration
#: needs them: no "nnan", "ninf"), and so does the sign of a zero (no "nsz": the
#: readers' output current is the stamp's to the bit, sign included). Measured on the
#: oscillator scenario (interleaved A/B): 5 % faster, 7 % on the two-oscillator mixer.
FASTMATH = {"contract", "arcp"}
#: The decorator of every kind's ``stamp`` and of the helpers a stamp calls.
stamp_jit = numba.njit(fastmath=FASTMATH)

#: Boltzmann constant times 300.15 K over the electron charge, volts.
#: source: CODATA 2018 values of k and q; kT/q at 27 degC.
THERMAL_VOLTS = 0.025865


@dataclass(frozen=True)
class Param:
    """One parameter of a kind of part.

    ``unit`` is the SI symbol the value is in (``"ohm"``, ``"F"``, ``"V"``, ``"A"``,
    ``"Hz"``, ``"s"``, ``"H"``, ``"A/V^2"``, ``"1/V"``) or ``""`` for a plain number
    or a choice.  ``default`` is ``None`` when the patch must give the value.
    ``positive`` forbids zero and negatives; ``minimum``/``maximum`` bound it.
    ``choices`` makes it a named option (stored as the index of the choice).
    ``source`` says where the default number comes from.
    """

    name: str
    unit: str
    default: float | str | None
    source: str
    doc: str = ""
    positive: bool = False
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple[str, ...] | None = None
    tolerance_pct: float | None = None
    text: bool = False  # a free string (a file name); not passed to the kernel


@dataclass(frozen=True)
class Kind:
    """Declaration of one kind of part (see the module docstring)."""

    name: str
    description: str
    terminals: tuple[tuple[str, int], ...]
    params: tuple[Param, ...]
    stamp: Callable
    mass: Callable[[dict], list] = lambda values: []
    rails: bool = False  # True: also connects to the supply nets vdd and gnd
    internal: tuple[str, ...] = ()  # names of internal voltage nodes
    branches: tuple[str, ...] = ()  # names of branch-current unknowns
    models: dict[str, dict] = field(default_factory=dict)
    max_step: Callable[[dict, np.ndarray], float | None] | None = None
    data: Callable[[dict, str], np.ndarray] | None = None
    check: Callable[[dict], list[str]] | None = None
    # adjust resolved values given the set of parameter names the patch set itself
    resolve: Callable[[dict, set], dict] | None = None
    # parameter given in a patch shorthand: e.g. a resistor's ``value``
    main_param: str | None = None
    # terminals that drive their nets / high-impedance inputs (see item 9 above)
    outputs: tuple[str, ...] = ()
    inputs: tuple[str, ...] = ()
    # a loudspeaker's ohms parameter (see item 10 above)
    sound_ohms: str | None = None
    # compile the stamp into the stepper's loop rather than call it (see item 11 above)
    inline: bool = False

    def param(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    @property
    def kernel_params(self) -> tuple[Param, ...]:
        """Parameters passed to the kernel, in column order of ``P``."""
        return tuple(p for p in self.params if not p.text)

    def terminal_names(self) -> list[str]:
        """Local names of the terminals, flattened: ``between`` -> ``between[0]``..."""
        names = []
        for key, count in self.terminals:
            if count == 1:
                names.append(key)
            else:
                names.extend(f"{key}[{i}]" for i in range(count))
        return names

    def local_names(self) -> list[str]:
        """Names of every local unknown in ``N`` column order.

        Terminals (flattened), then ``vdd`` and ``gnd`` when ``rails``, then internal
        nodes, then branch currents.
        """
        names = self.terminal_names()
        if self.rails:
            names += ["vdd", "gnd"]
        return names + list(self.internal) + list(self.branches)

    def row(self, values: dict) -> list[float]:
        """Kernel parameter row (without the two trailing data columns)."""
        out = []
        for p in self.kernel_params:
            v = values[p.name]
            if p.choices is not None:
                out.append(float(p.choices.index(v)))
            else:
                out.append(float(v))
        return out


def capacitance_entries(a: int, b: int, farads: float) -> list[tuple[int, int, float]]:
    """Mass-matrix entries of a capacitance between local unknowns ``a`` and ``b``."""
    return [(a, a, farads), (b, b, farads), (a, b, -farads), (b, a, -farads)]


def column(kind_params: tuple[Param, ...], name: str) -> int:
    """Column of parameter ``name`` in a kind's ``P`` rows (for kernels)."""
    for i, p in enumerate(p for p in kind_params if not p.text):
        if p.name == name:
            return i
    raise KeyError(name)
