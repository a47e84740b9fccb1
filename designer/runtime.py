"""Process set-up shared by the command line and the Python interface.

JAX compiles every kernel (layer stacks, rasterizers, the FDFD adjoint wrapper) the
first time a process meets it, which costs most of a short command's wall time.
:func:`configure_jax_cache` points JAX's persistent compilation cache at a user
cache folder so that later processes load the compiled kernels instead:

    $VELOMATCH_CACHE_DIR/jax            when VELOMATCH_CACHE_DIR is set
    $XDG_CACHE_HOME/velomatch/jax       else, when XDG_CACHE_HOME is set
    ~/.cache/velomatch/jax              otherwise

``VELOMATCH_CACHE_DIR=off`` disables it.  The settings go through JAX's environment
variables, so nothing here imports JAX (commands that do not need it stay light),
and values a user has set in the environment already win.
"""

from __future__ import annotations

import os
from pathlib import Path


def cache_dir() -> Path | None:
    """The folder for velomatch's caches, or None when disabled."""
    explicit = os.environ.get("VELOMATCH_CACHE_DIR")
    if explicit is not None:
        if explicit.strip().lower() in ("", "off", "0", "none"):
            return None
        return Path(explicit).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "velomatch"


def configure_jax_cache() -> Path | None:
    """Enable JAX's persistent compilation cache in ``cache_dir()/jax``; returns the
    folder used (None when disabled or not writable).  Call before JAX is imported."""
    root = cache_dir()
    if root is None:
        return None
    folder = root / "jax"
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    except OSError:
        return None
    if not os.access(folder, os.W_OK):
        return None
    os.environ.setdefault("JAX_COMPILATION_CACHE_DIR", str(folder))
    # cache every kernel, however quick to compile: a short command runs many small ones
    os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS", "0")
    os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_ENTRY_SIZE_BYTES", "0")
    return folder
