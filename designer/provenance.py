"""Where a result came from: tool version, library versions, spec hash, date."""

from __future__ import annotations

import datetime as _dt
import platform
from importlib import metadata


def version() -> str:
    try:
        return metadata.version("velomatch")
    except metadata.PackageNotFoundError:
        return "0+unknown"


def provenance(spec_sha256: str | None = None, **extra) -> dict:
    """Provenance block for every JSON output (keys: version, spec_sha256, ... )."""
    libs = {}
    for name in ("numpy", "scipy", "jax", "optax"):
        try:
            libs[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    out = {"version": version(), "spec_sha256": spec_sha256,
           "date": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
           "python": platform.python_version(), "libraries": libs}
    out.update(extra)
    return out
