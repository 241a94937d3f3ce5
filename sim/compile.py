"""Compile a Patch into a Circuit: numbered unknowns and flat numeric arrays per kind.

Unknowns: index 0 is the ground net ``gnd`` (always 0 V, never solved for), then the
nets, internal nodes of parts (``D1.junction``) and branch currents (``SP1.current``) in
an order that keeps Newton's LU factorisation sparse (:func:`elimination_order`): the
unknowns tied to the fewest others first, so ``vdd``, which every gate touches, comes last.

Every voltage unknown also gets a stray capacitance to ground, ``STRAY_FARADS``: it is
physically there on a breadboard, and it makes the mass matrix invertible so the very
same equations can be handed to scipy's Radau as an ordinary differential equation.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

import blocks
from sim import kernel

#: Stray capacitance from every net to ground (F).
#: common practice: a breadboard row and its wiring add a few pF to every net.
STRAY_FARADS = 2e-12

#: A diagonal mass entry this many times the stray capacitance marks a "slow" unknown
#: (a part's own capacitor or inductor), whose error is controlled at full tolerance.
SLOW_MASS_RATIO = 10.0

#: Absolute tolerance of a branch current relative to that of a node voltage (A per V):
#: 1 uA for 1 mV, the current of a small signal through a kilohm.
AMPS_PER_VOLT_TOLERANCE = 1e-3


@dataclass
class Circuit:
    """Everything the stepper needs, as flat arrays (see sim/kernel.py for the layout).

    names: (n,) unknown names; ``names[0] == "gnd"``.
    mass: (n, n) constant mass matrix (F, H); row/col 0 unused.
    pf, nf, tab, df: parameters (float64), unknown indices (uint64: numba indexes with
        unsigned integers without testing for a negative index, which measured 8 % of
        the stepper's time), kind table, data blob.
    is_volt: (n,) bool, True for node voltages, False for branch currents.
    slow: (n,) bool, True where a part's capacitance/inductance sits on the unknown.
    lu_ptr, lu_idx: the Jacobian's nonzero pattern after elimination in index order
        (:func:`elimination_pattern`): the unknowns after k that row and column k of the
        factors touch are lu_idx[lu_ptr[k]:lu_ptr[k + 1]].
    max_step_seconds: smallest step limit any part asks for (or None).
    param_index: {(ref, param): flat index into pf} for moving parameters.
    """

    names: list[str]
    index: dict[str, int]
    mass: np.ndarray
    pf: np.ndarray
    nf: np.ndarray
    tab: np.ndarray
    df: np.ndarray
    is_volt: np.ndarray
    slow: np.ndarray
    max_step_seconds: float | None
    param_index: dict[tuple[str, str], int]
    supply_volts: float
    lu_ptr: np.ndarray
    lu_idx: np.ndarray
    parts: dict[str, tuple[str, list[int]]] = field(default_factory=dict)

    @property
    def size(self) -> int:
        return len(self.names)


def _all_parts(patch):
    yield patch.supply
    yield from patch.parts.values()


def elimination_order(n: int, groups: list[list[int]]) -> list[int]:
    """Unknowns 1..n-1 by how many others they share a part with, fewest first (ties in
    their first-named order); ground (0) stays first.

    Newton's LU eliminates in this order and touches only the nonzeros it meets
    (:func:`elimination_pattern`), so an unknown eliminated early that touches few
    others creates little fill-in; one that touches every gate (vdd) fills the whole
    matrix if it comes first. On the two-oscillator mixer (16 unknowns) the elimination
    does 107 multiply-adds in this order, against 1015 for a dense LU.
    source: minimum-degree ordering for sparse Gaussian elimination (Tinney and Walker,
    Proc. IEEE, 1967; the citation from memory), here computed once from the parts'
    terminals.
    """
    neighbours: list[set[int]] = [set() for _ in range(n)]
    for group in groups:
        for i in group:
            neighbours[i].update(group)
    degree = [len(neighbours[i] - {i, 0}) for i in range(n)]
    return [0] + sorted(range(1, n), key=lambda i: (degree[i], i))


def elimination_pattern(n: int, groups: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    """The nonzeros that Gaussian elimination in index order (pivots on the diagonal)
    meets, fill-in included, for unknowns 1..n-1 (ground, 0, is not solved for).

    Every part's stamp and capacitances touch only the unknowns of its own terminals,
    rails and internal nodes (``groups``), and each unknown carries a stray capacitance
    or an inductance on the diagonal, so the Jacobian's pattern is symmetric and lies
    within the union of group x group plus the diagonal. Eliminating unknown k makes
    every pair of its later neighbours neighbours (the fill-in). Returns (ptr, idx):
    the later neighbours of k, increasing, are idx[ptr[k]:ptr[k + 1]].
    source: symbolic factorisation of a symmetric pattern by elimination graphs (George
    and Liu, Computer Solution of Large Sparse Positive Definite Systems, 1981; from
    memory).
    """
    later: list[set[int]] = [set() for _ in range(n)]
    for group in groups:
        for i in group:
            for j in group:
                if 0 < i < j:
                    later[i].add(j)
    ptr = np.zeros(n + 1, np.int64)
    idx: list[int] = []
    for k in range(n):
        ks = sorted(later[k])
        for a, i in enumerate(ks):
            later[i].update(ks[a + 1:])
        idx.extend(ks)
        ptr[k + 1] = len(idx)
    # unsigned: numba then indexes without the check for a negative index (measured:
    # a third of the elimination's time on the oscillator scenario)
    return ptr, np.asarray(idx, dtype=np.uint64)


def compile_patch(patch) -> Circuit:
    """Number the unknowns and lay out the per-kind arrays of ``patch`` (a sim.patch.Patch)."""
    names = ["gnd", "vdd"]
    index = {"gnd": 0, "vdd": 1}

    def net(name: str) -> int:
        if name not in index:
            index[name] = len(names)
            names.append(name)
        return index[name]

    for part in _all_parts(patch):
        for nets in part.nets.values():
            for n in nets:
                net(n)
    is_volt = [True] * len(names)
    part_nodes: dict[str, list[int]] = {}
    per_kind: dict[str, list] = {k: [] for k in kernel.kind_order()}
    for part in _all_parts(patch):
        kind = blocks.REGISTRY[part.kind]
        local = [index[n] for key, _ in kind.terminals for n in part.nets[key]]
        if kind.rails:
            local += [index["vdd"], index["gnd"]]
        for name in kind.internal:
            local.append(len(names))
            names.append(f"{part.ref}.{name}")
            is_volt.append(True)
        for name in kind.branches:
            local.append(len(names))
            names.append(f"{part.ref}.{name}")
            is_volt.append(False)
        per_kind[part.kind].append((part, local))
        part_nodes[part.ref] = local

    n = len(names)
    order = elimination_order(n, [local for rows in per_kind.values() for _, local in rows])
    new_of = {old: new for new, old in enumerate(order)}
    names = [names[i] for i in order]
    is_volt = [is_volt[i] for i in order]
    per_kind = {k: [(part, [new_of[i] for i in local]) for part, local in rows]
                for k, rows in per_kind.items()}
    part_nodes = {ref: [new_of[i] for i in local] for ref, local in part_nodes.items()}
    mass = np.zeros((n, n))
    pf_rows, nf_rows, d_parts, tab = [], [], [], np.zeros((len(per_kind), kernel.TAB_SIZE), np.int64)
    p_off = n_off = d_off = 0
    param_index: dict[tuple[str, str], int] = {}
    steps: list[float] = []
    for ki, kind_name in enumerate(kernel.kind_order()):
        kind = blocks.REGISTRY[kind_name]
        pcols = len(kind.kernel_params) + 2
        ncols = len(kind.local_names())
        kind_blob: list[np.ndarray] = []
        blob_len = 0
        rows = per_kind[kind_name]
        for r, (part, local) in enumerate(rows):
            blob = kind.data(part.values, patch.base_dir) if kind.data else np.zeros(0)
            row = kind.row(part.values) + [float(blob_len), float(blob.size)]
            for c, p in enumerate(kind.kernel_params):
                param_index[(part.ref, p.name)] = p_off + r * pcols + c
            pf_rows.append(row)
            nf_rows.append(local)
            kind_blob.append(np.asarray(blob, dtype=float))
            blob_len += blob.size
            for i, j, value in kind.mass(part.values):
                mass[local[i], local[j]] += value
            if kind.max_step is not None:
                limit = kind.max_step(part.values, blob)
                if limit:
                    steps.append(float(limit))
        tab[ki] = (p_off, pcols, n_off, ncols, len(rows), d_off, blob_len)
        p_off += len(rows) * pcols
        n_off += len(rows) * ncols
        d_off += blob_len
        d_parts.extend(kind_blob)

    diag_part = np.diag(mass).copy()
    for i in range(1, n):
        if is_volt[i]:
            mass[i, i] += STRAY_FARADS
    slow = np.zeros(n, bool)
    slow[1:] = np.where(np.asarray(is_volt[1:]), diag_part[1:] > SLOW_MASS_RATIO * STRAY_FARADS,
                        diag_part[1:] > 0.0)
    pf = np.array([v for row in pf_rows for v in row], dtype=np.float64)
    nf = np.array([v for row in nf_rows for v in row], dtype=np.uint64)
    df = np.concatenate(d_parts) if d_parts else np.zeros(0)
    lu_ptr, lu_idx = elimination_pattern(
        n, [local for rows in per_kind.values() for _, local in rows])
    return Circuit(
        names=names, index={nm: i for i, nm in enumerate(names)}, mass=mass,
        pf=pf if pf.size else np.zeros(1), nf=nf if nf.size else np.zeros(1, np.uint64),
        tab=tab, df=df if df.size else np.zeros(1),
        is_volt=np.asarray(is_volt), slow=slow,
        max_step_seconds=min(steps) if steps else None, param_index=param_index,
        supply_volts=float(patch.supply.values["volts"]),
        parts={ref: (kind, nodes) for ref, kind, nodes in
               ((p.ref, p.kind, part_nodes[p.ref]) for p in _all_parts(patch))},
        lu_ptr=lu_ptr, lu_idx=lu_idx,
    )
