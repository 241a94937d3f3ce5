"""Kinds of parts. Each module here (not starting with ``_``) declares one ``KIND``.

``REGISTRY`` maps kind names to their :class:`blocks._base.Kind`, discovered from
the modules in this package, so adding a kind is adding one file.
"""

from __future__ import annotations

import importlib
import pkgutil

from blocks._base import Kind, Param  # noqa: F401  (re-exported for kind modules)


def _discover() -> dict[str, Kind]:
    registry: dict[str, Kind] = {}
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"{__name__}.{info.name}")
        kind = getattr(module, "KIND", None)
        if isinstance(kind, Kind):
            registry[kind.name] = kind
    return registry


REGISTRY: dict[str, Kind] = _discover()


def module_of(kind_name: str) -> str:
    """Dotted module name that defines ``kind_name`` (for the kernel generator)."""
    return REGISTRY[kind_name].stamp.__module__
