"""Shared fixtures: patches written from YAML text, and the compiled kernel."""

from __future__ import annotations

import itertools
import string
import textwrap

import pytest

from sim import kernel as kernel_builder
from sim.patch import load_patch


@pytest.fixture(scope="session")
def patch_from_yaml(tmp_path_factory):
    """A function ``(text, **fields) -> Patch``.

    ``text`` is a patch in YAML (dedented first); ``$name`` fields in it are filled
    from ``fields`` (``string.Template``, so YAML's own braces need no escaping).
    Each call writes a new file in one session-wide temporary folder, so module-scoped
    fixtures (one simulation shared by several tests) can use it too.
    """
    folder = tmp_path_factory.mktemp("patches")
    counter = itertools.count()

    def build(text: str, **fields):
        body = textwrap.dedent(text)
        if fields:
            body = string.Template(body).substitute(fields)
        path = folder / f"patch-{next(counter)}.yaml"
        path.write_text(body, encoding="utf-8")
        return load_patch(path)

    return build


@pytest.fixture(scope="session")
def kernel():
    """The compiled kernel module (``evaluate``, the stepper); compiled once per session."""
    return kernel_builder.load()
