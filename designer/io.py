"""Files at the edge: atomic writes, JSON with numpy values, output folders, hashes.

Writes go to a temporary file in the same folder and are renamed into place, so an
interrupted run never leaves a half-written file and never clobbers a good one.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from designer.errors import UsageError


def to_jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays, complex numbers and dataclass-like values for JSON.

    Complex numbers become ``[re, im]``; non-finite floats become ``None`` (JSON has
    no NaN).
    """
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (complex, np.complexfloating)):
        return [to_jsonable(float(obj.real)), to_jsonable(float(obj.imag))]
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "__array__") and not isinstance(obj, (str, bytes)):
        return to_jsonable(np.asarray(obj))
    return obj


def dumps(obj: Any) -> str:
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=False)


def write_atomic(path: str | os.PathLike, data: str | bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file + rename)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    mode = "wb" if isinstance(data, bytes) else "w"
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, mode) as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    return write_atomic(path, dumps(obj) + "\n")


def canonical_sha256(obj: Any) -> str:
    """SHA-256 of the canonical JSON form of ``obj`` (sorted keys, no spaces)."""
    text = json.dumps(to_jsonable(obj), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def prepare_output_dir(path: str | os.PathLike, *, overwrite: bool = False,
                       resume: bool = False) -> Path:
    """Create an output folder; refuse to reuse a non-empty one unless asked."""
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise UsageError(f"{path}: exists and is not a folder")
    if path.exists() and any(path.iterdir()) and not (overwrite or resume):
        raise UsageError(f"{path}: folder exists and is not empty; pass --overwrite to "
                         "replace its results or --resume to continue a run there")
    path.mkdir(parents=True, exist_ok=True)
    return path


def save_figure(fig, path: str | os.PathLike) -> Path:
    """Save a matplotlib figure atomically (PNG/SVG by suffix) and close it."""
    import matplotlib.pyplot as plt

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=130, bbox_inches="tight")
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path
