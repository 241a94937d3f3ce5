"""halfrail engine: load a patch, compile it, step it in time, render and measure."""

from sim.errors import HalfrailError, PatchError, SolverError, UsageError  # noqa: F401

__version__ = "0.1.0"
