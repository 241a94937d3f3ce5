"""Stamping helpers shared by the kinds' kernels."""

from __future__ import annotations

from blocks._base import stamp_jit


@stamp_jit
def branch(f, G, a, b, amps, siemens):
    """Add a current ``amps`` flowing from node ``a`` to node ``b`` through a part whose
    conductance is ``siemens`` = d amps / d(v_a - v_b)."""
    f[a] += amps
    f[b] -= amps
    G[a, a] += siemens
    G[a, b] -= siemens
    G[b, a] -= siemens
    G[b, b] += siemens


@stamp_jit
def conductance(f, G, x, a, b, siemens):
    """A linear conductance (S) between nodes ``a`` and ``b``."""
    branch(f, G, a, b, siemens * (x[a] - x[b]), siemens)
