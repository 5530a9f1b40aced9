"""Drawn figures kept in the fit store, so a rerun draws only what changed.

Drawing the report's figures with matplotlib takes seconds, and so does importing
matplotlib. :func:`drawn` calls a drawing function of :mod:`.figures` only when no
figure was drawn before from equal inputs: the key is a SHA-256 of the function's name,
its arguments (walked field by field: numbers by their exact value, arrays by dtype,
shape and bytes), the first SVG id number it will use, the source of this package and
the matplotlib and NumPy versions. An equal key gives the same markup byte for byte, so
a report written from stored figures is identical to one drawn afresh.

The records the drawing functions return (:class:`Rendered`, :class:`Lineup`) and the
SVG id counter live in :mod:`.figure_records`, which imports nothing of matplotlib, so
reading stored figures back does not import it and :mod:`.figures` does not import this
module.
"""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path
from typing import Any

import numpy as np
from contenders.output import figure_records

#: Bumped whenever stored figures change meaning.
FIGURES_FORMAT = 1


# --- keys ---------------------------------------------------------------------------------

class Unhashable(TypeError):
    """An argument this module cannot digest; the figure is then drawn, not stored."""


def _digest(value: Any, h) -> None:
    """Feed a canonical description of ``value`` to the hash ``h``."""
    if value is None or isinstance(value, (bool, str)):
        h.update(f"{type(value).__name__}:{value!r};".encode())
    elif isinstance(value, np.bool_):
        h.update(f"bool:{bool(value)!r};".encode())
    elif isinstance(value, Path):
        h.update(f"path:{str(value)!r};".encode())
    elif isinstance(value, (int, np.integer)):
        h.update(f"int:{int(value)};".encode())
    elif isinstance(value, (float, np.floating)):
        h.update(f"float:{float(value).hex()};".encode())
    elif isinstance(value, np.ndarray):
        arr = np.ascontiguousarray(value)
        if arr.dtype.kind == "O":
            h.update(f"objects{arr.shape}[".encode())
            for item in arr.reshape(-1):
                _digest(item, h)
            h.update(b"]")
        else:
            h.update(f"array:{arr.dtype.str}{arr.shape}:".encode())
            h.update(arr.tobytes())
    elif isinstance(value, (list, tuple)):
        h.update(f"{type(value).__name__}{len(value)}[".encode())
        for item in value:
            _digest(item, h)
        h.update(b"]")
    elif isinstance(value, dict):
        h.update(f"dict{len(value)}{{".encode())
        for k, v in value.items():
            _digest(k, h)
            _digest(v, h)
        h.update(b"}")
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        h.update(f"{type(value).__module__}.{type(value).__qualname__}(".encode())
        for f in dataclasses.fields(value):
            h.update(f.name.encode())
            _digest(getattr(value, f.name), h)
        h.update(b")")
    else:
        raise Unhashable(type(value).__name__)


_SOURCE: list[str] = []


def source_digest() -> str:
    """SHA-256 of every source file of this package (a code change redraws figures) and
    of the matplotlib and NumPy versions; computed once per process."""
    if not _SOURCE:
        from importlib.metadata import version

        root = Path(__file__).resolve().parents[1]
        h = hashlib.sha256(f"matplotlib {version('matplotlib')}|numpy {np.__version__}|".encode())
        for path in sorted(root.rglob("*.py")):
            h.update(str(path.relative_to(root)).encode())
            h.update(path.read_bytes())
        _SOURCE.append(h.hexdigest())
    return _SOURCE[0]


def figure_key(name: str, args: tuple, kwargs: dict, first_id: int) -> str:
    h = hashlib.sha256(f"figures {FIGURES_FORMAT}|{name}|first id {first_id}|{source_digest()}|".encode())
    _digest(list(args), h)
    _digest(dict(sorted(kwargs.items())), h)
    return h.hexdigest()


def drawn(store, name: str, *args: Any, **kwargs: Any):
    """``figures.<name>(*args, **kwargs)``, read from ``store`` (a
    :class:`contenders.pipeline.store.FitStore`, or None) when drawn before from equal inputs."""
    if store is not None:
        first = figure_records.NEXT_ID[0]
        try:
            key = figure_key(name, args, kwargs, first)
        except Unhashable:
            key = ""
        if key:
            found = store.load_value("figures", key)
            if found is not None:
                value, figure_records.NEXT_ID[0] = found
                return value
    from contenders.output import figures

    value = getattr(figures, name)(*args, **kwargs)
    if store is not None and key:
        store.save_value("figures", key, (value, figure_records.NEXT_ID[0]))
    return value
