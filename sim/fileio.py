"""Write output files without ever leaving a half-written file behind.

Every output (WAV, PNG, JSON, text) is first written to a hidden temporary file in
the same folder as its destination and then renamed onto it with :func:`os.replace`,
which is atomic on one file system: a reader sees either the old file or the new
one, never a truncated mix, and a crash mid-write leaves the user's file untouched.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import secrets
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

#: Random hex digits in a temporary name: 8 bytes make a clash between two writers
#: of the same file practically impossible.
_TEMP_TOKEN_BYTES = 8


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    The temporary name is hidden (leading dot) and keeps the destination's suffix,
    so writers that choose the format from the suffix (soundfile) still
    do the right thing.  If the ``with`` body raises, the temporary file is removed
    and the exception propagates; ``path`` is left as it was.  The folder must exist.
    """
    final = Path(path)
    token = secrets.token_hex(_TEMP_TOKEN_BYTES)
    temp = final.with_name(f".{final.stem}.{token}.partial{final.suffix}")
    try:
        yield temp
        os.replace(temp, final)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.remove(temp)
        raise


def json_safe(obj: Any) -> Any:
    """Return ``obj`` as plain JSON data: NaN and +-inf become ``None``.

    numpy scalars and arrays become Python numbers and lists, tuples become lists,
    mapping keys become strings.
    """
    if isinstance(obj, Mapping):
        return {str(key): json_safe(value) for key, value in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(value) for value in obj]
    if isinstance(obj, np.ndarray):
        return json_safe(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    return obj


def write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` as UTF-8 to ``path`` atomically; return the path."""
    with atomic_path(path) as temp:
        temp.write_text(text, encoding="utf-8")
    return Path(path)


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    """Write ``obj`` as indented JSON (indent 2, UTF-8) atomically; return the path.

    Non-finite floats (NaN, +-inf) are written as ``null`` so the file is strict
    JSON that every reader accepts.
    """
    text = json.dumps(json_safe(obj), indent=2, ensure_ascii=False, allow_nan=False)
    return write_text(path, text + "\n")
