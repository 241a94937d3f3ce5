"""The ``halfrail`` program's entry point: the command line, with the garbage collector
off while the engine is imported (see ``sim.cli.UNCOLLECTED_COMMANDS``).

Kept apart from :mod:`sim.cli` because importing that module imports the engine (numpy,
numba and the kinds of part: about half a second), before any of its code can run.
"""

from __future__ import annotations

import gc


def main() -> int:
    gc.disable()  # sim.cli.main turns it back on for the commands that collect
    from sim.cli import main as run

    return run()
