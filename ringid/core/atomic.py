"""Write files so that a crash or kill never leaves a half-written output.

Every output is written to a temporary name in the target folder and renamed
into place (an atomic rename on POSIX file systems).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import tempfile
from pathlib import Path


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, suffix: str = ""):
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    The temporary file is removed if the block raises.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp" + suffix, dir=path.parent)
    os.close(fd)
    os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; outputs get the usual permissions
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json(path: str | os.PathLike, obj) -> None:
    """Write ``obj`` as indented, key-ordered JSON atomically (deterministic bytes)."""
    text = json.dumps(_finite(obj), indent=2, allow_nan=False, default=_json_default)
    write_text(path, text + "\n")


def _finite(obj):
    """Replace non-finite floats by None (JSON has no NaN), recursively."""
    import math

    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def _json_default(o):
    import numpy as np

    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def format_cell(x, spec: str = ".6g") -> str:
    """One table cell: "" for None or NaN, ``inf``/``-inf``, ``true``/``false`` for booleans,
    integers as they are, other numbers with the format ``spec`` (e.g. ``.6g``, ``.3f``), text as it is."""
    if isinstance(x, float):  # the common case first (numpy float64 is a float)
        if x != x:
            return ""
        if x in (math.inf, -math.inf):
            return "inf" if x > 0 else "-inf"
        return format(x, spec)
    if x is None or isinstance(x, str):
        return "" if x is None else x
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, int):
        return str(x)
    import numpy as np

    if isinstance(x, np.bool_):
        return "true" if x else "false"
    if isinstance(x, np.integer):
        return str(int(x))
    return format_cell(float(x), spec)


def write_csv(path: str | os.PathLike, header: list[str], rows) -> None:
    """Write a CSV table atomically with the stdlib writer (no pandas on cheap paths)."""
    import csv

    with atomic_path(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(header)
            for row in rows:
                w.writerow(row)
