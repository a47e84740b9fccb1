"""Files at the edge: atomic writes, JSON with numpy values, output folders, hashes.

Writes go to a temporary file in the same folder and are renamed into place, so an
interrupted run never leaves a half-written file and never clobbers a good one.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from designer.errors import NumericalError, UsageError

FIGURE_SUFFIXES = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


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
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return to_jsonable({f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)})
    if hasattr(obj, "__array__") and not isinstance(obj, (str, bytes)):
        return to_jsonable(np.asarray(obj))
    return obj


def non_finite(obj: Any, prefix: str = "") -> list[str]:
    """Dotted keys of every NaN or infinite number in a result tree."""
    out = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            out += non_finite(v, f"{prefix}.{k}" if prefix else str(k))
    elif isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            out += non_finite(v, f"{prefix}[{i}]")
            if len(out) > 3:
                break
    elif isinstance(obj, np.ndarray):
        if obj.dtype.kind in "fc" and not np.all(np.isfinite(obj)):
            out.append(prefix)
    elif isinstance(obj, (float, np.floating, complex, np.complexfloating)):
        if not np.isfinite(obj):
            out.append(prefix)
    return out


def require_finite(result: dict, source: str = "") -> dict:
    """``result`` unchanged if every number in it is finite; else a :class:`NumericalError`
    naming the first bad keys (no NaN or infinity ever reaches a file or the terminal
    as a result)."""
    bad = non_finite(result)
    if bad:
        where = f"{source}: " if source else ""
        raise NumericalError(f"{where}the solve gave a non-finite result ({', '.join(bad[:3])}"
                             f"{', ...' if len(bad) > 3 else ''}); nothing written — check the "
                             "material values, or use a coarser [solver] grid_step_nm or "
                             "method = \"layers\" for planar samples")
    return result


def dumps(obj: Any) -> str:
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=False)


def file_mode() -> int:
    """Permission bits a new file gets under the process umask (0644 under 022).

    Temporary files from :func:`tempfile.mkstemp` are created 0600 whatever the
    umask; every output is set to this mode before it is renamed into place, so a
    replaced file gets the same mode as a newly created one.
    """
    mask = _umask()
    return 0o666 & ~mask


def _umask() -> int:
    try:
        with open("/proc/self/status") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)   # no /proc: read it by setting it (and put it back)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success give it the umask's mode and
    rename it onto ``path``; on any error remove it (``path`` stays as it was)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp" + path.suffix,
                               dir=path.parent)
    os.close(fd)
    try:
        yield tmp
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_atomic(path: str | os.PathLike, data: str | bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file + rename, umask mode)."""
    path = Path(path)
    mode = "wb" if isinstance(data, bytes) else "w"
    with atomic_path(path) as tmp:
        with open(tmp, mode) as handle:
            handle.write(data)
    return path


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    return write_atomic(path, dumps(obj) + "\n")


def canonical_sha256(obj: Any) -> str:
    """SHA-256 of the canonical JSON form of ``obj`` (sorted keys, no spaces)."""
    text = json.dumps(to_jsonable(obj), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


# -- input files: regular files of bounded size -----------------------------------

MAX_SPEC_BYTES = 16 * 2**20        # a spec is text; 16 MiB holds any hand-written one
MAX_TABLE_BYTES = 16 * 2**20       # material tables
MAX_ARRAY_BYTES = 512 * 2**20      # stored densities (.npy)


def read_input(path: str | os.PathLike, *, limit: int) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes.

    Raises ``ValueError`` with a short reason (never the file's content) for a
    missing file, a folder, a device or pipe (``/dev/zero``, a FIFO: never read), a
    file over the limit, or a read error.
    """
    import stat

    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise ValueError("file not found") from None
    except IsADirectoryError:
        raise ValueError("is a folder, not a file") from None
    except OSError as exc:
        raise ValueError(f"cannot read file ({exc.strerror})") from None
    try:
        info = os.fstat(fd)
        if stat.S_ISDIR(info.st_mode):
            raise ValueError("is a folder, not a file")
        if not stat.S_ISREG(info.st_mode):
            raise ValueError("is not a regular file (device, pipe or socket)")
        if info.st_size > limit:
            raise ValueError(f"file of {info.st_size:,} bytes is larger than the limit of "
                             f"{limit:,} bytes")
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                break
            total += len(chunk)
            if total > limit:
                raise ValueError(f"file is larger than the limit of {limit:,} bytes")
            chunks.append(chunk)
        return b"".join(chunks)
    except OSError as exc:
        raise ValueError(f"cannot read file ({exc.strerror})") from None
    finally:
        os.close(fd)


def decode_text(data: bytes) -> str:
    """UTF-8 text of a spec or table (a BOM is allowed); ``ValueError`` otherwise."""
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise ValueError("is UTF-16 text; save it as UTF-8")
    if b"\x00" in data:
        raise ValueError("is a binary file, not text")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(f"is not UTF-8 text (byte {exc.start})") from None


# -- output paths: checked before any work ---------------------------------------

SYSTEM_ROOTS = ("/proc", "/sys", "/dev")


def _nearest_existing(path: Path) -> Path:
    p = path
    while not os.path.lexists(p) and p != p.parent:
        p = p.parent
    return p


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


def check_output(path: str | os.PathLike, *, flag: str = "--out", overwrite: bool = False,
                 inputs=(), suffixes=None, folder: bool = False) -> Path:
    """Refuse an output path before any work is done (one :class:`UsageError`).

    Refused: an empty name; a path in a system tree (/proc, /sys, /dev); a path
    under a regular file or in a folder that cannot be written; for files, a folder
    or special file at the path, a suffix not in ``suffixes``, an existing file
    without ``overwrite``, and (always, even with ``overwrite``) one of ``inputs``;
    for folders, a file at the path.
    """
    text = os.fspath(path)
    if not text.strip():
        raise UsageError(f"{flag}: empty path")
    path = Path(text)
    absolute = Path(os.path.abspath(path))
    anchor = _nearest_existing(absolute)
    real = os.path.realpath(anchor)
    for root in SYSTEM_ROOTS:
        if real == root or real.startswith(root + "/"):
            raise UsageError(f"{flag} {path}: is in the system folder {root}; choose a "
                             "folder of your own")
    if anchor != absolute and not os.path.isdir(anchor):
        raise UsageError(f"{flag} {path}: {anchor} is a file, not a folder")
    parent = anchor if anchor != absolute else anchor.parent
    if not os.access(parent, os.W_OK | os.X_OK):
        raise UsageError(f"{flag} {path}: cannot write in {parent} (permission denied)")
    if folder:
        if os.path.lexists(absolute) and not os.path.isdir(absolute):
            raise UsageError(f"{flag} {path}: exists and is not a folder")
        return path
    if os.path.isdir(absolute):
        raise UsageError(f"{flag} {path}: is a folder; give a file name")
    if suffixes is not None and path.suffix.lower() not in suffixes:
        raise UsageError(f"{flag} {path}: must end in " + ", ".join(suffixes))
    if os.path.lexists(absolute):
        if not os.path.isfile(absolute):
            raise UsageError(f"{flag} {path}: exists and is not a regular file")
        for item in inputs:
            if item is not None and _same_file(absolute, Path(item)):
                raise UsageError(f"{flag} {path}: is an input of this command "
                                 f"({item}); choose another name")
        if not overwrite:
            raise UsageError(f"{flag} {path}: file exists; pass --overwrite to replace it")
    return path


def check_distinct(outputs) -> None:
    """Refuse two outputs naming one file: ``outputs`` is ``[(flag, path or None), ...]``."""
    seen = {}
    for flag, path in outputs:
        if path is None:
            continue
        key = os.path.realpath(os.path.abspath(path))
        if key in seen:
            raise UsageError(f"{seen[key]} and {flag} name the same file ({path})")
        seen[key] = flag


# -- output folders: locked for the whole run ------------------------------------

LOCK_NAME = ".velomatch.lock"
LOCK_INFO = ".velomatch.lock-holder.json"
_HELD: list = []   # (FileLock, folder, folders this run created)


def is_bookkeeping(name: str) -> bool:
    """Files a folder lock leaves behind (ignored when asking whether a folder is empty)."""
    return name in (LOCK_NAME, LOCK_INFO)


def folder_entries(path: str | os.PathLike) -> list[Path]:
    """The entries of a folder other than the lock's own files."""
    return [p for p in Path(path).iterdir() if not is_bookkeeping(p.name)]


def lock_holder(path: str | os.PathLike) -> str:
    """'pid N on HOST: COMMAND' of the run holding the lock on a folder (as recorded)."""
    try:
        info = json.loads((Path(path) / LOCK_INFO).read_text())
        return f"pid {info['pid']} on {info['host']}: {info['command']}"
    except (OSError, ValueError, KeyError, TypeError):
        return "holder unknown"


def open_output_dir(path: str | os.PathLike, *, flag: str = "--out",
                    create: bool = True) -> Path:
    """Check, create (if ``create``) and lock an output folder for the rest of the run.

    The lock (``filelock``, an ``flock`` on ``DIR/.velomatch.lock``) is held until
    :func:`release_output_dirs` (the CLI calls it when a command ends) or the process
    dies; a second run into the folder is refused with the holder's pid, host and
    command.  A folder this run created and left empty is removed on release.
    """
    import socket
    import sys

    from filelock import FileLock, Timeout

    path = check_output(path, flag=flag, folder=True)
    absolute = Path(os.path.abspath(path))
    if any(folder == absolute for _, folder, _ in _HELD):
        return path   # this process holds it already (a resumed step of the same run)
    if not absolute.is_dir() and not create:
        raise UsageError(f"{flag} {path}: no such folder")
    created = []
    p = absolute
    while not p.exists():
        created.append(p)
        p = p.parent
    absolute.mkdir(parents=True, exist_ok=True)
    lock = FileLock(str(absolute / LOCK_NAME), timeout=0)
    try:
        lock.acquire()
    except Timeout:
        raise UsageError(f"{flag} {path}: in use by another velomatch run "
                         f"({lock_holder(absolute)}); wait for it or choose another "
                         "folder") from None
    info = {"pid": os.getpid(), "host": socket.gethostname(),
            "command": " ".join(["velomatch"] + sys.argv[1:])[:300]}
    try:
        write_atomic(absolute / LOCK_INFO, json.dumps(info) + "\n")
    except OSError:
        pass
    _HELD.append((lock, absolute, created))
    return path


def release_output_dirs() -> None:
    """Release every folder lock of this process; remove folders it created but left
    without results (a refused or failed run leaves nothing behind)."""
    while _HELD:
        lock, folder, created = _HELD.pop()
        try:
            (folder / LOCK_INFO).unlink(missing_ok=True)
        except OSError:
            pass
        empty = False
        try:
            empty = created and not folder_entries(folder)
            if empty:
                (folder / LOCK_NAME).unlink(missing_ok=True)
        except OSError:
            empty = False
        lock.release()
        if empty:
            for p in created:   # deepest first
                try:
                    p.rmdir()
                except OSError:
                    break


@contextlib.contextmanager
def output_session():
    """Release the folder locks taken inside the block when it ends (the CLI does this
    per command; Python callers of the commands' functions wrap each call in it)."""
    held = len(_HELD)
    try:
        yield
    finally:
        newer = _HELD[held:]
        del _HELD[held:]
        outer = list(_HELD)
        _HELD[:] = newer
        try:
            release_output_dirs()
        finally:
            _HELD[:] = outer


def prepare_output_dir(path: str | os.PathLike, *, overwrite: bool = False,
                       resume: bool = False, inputs=(), names=()) -> Path:
    """Check, create and lock an output folder; refuse a non-empty one unless asked.

    ``names`` are the files the command writes there: an input (spec, material
    file) at one of those places is refused even with ``overwrite``.
    """
    absolute = Path(os.path.abspath(path))
    if resume and not absolute.is_dir():
        check_output(path, folder=True)
        raise UsageError(f"--out {path}: no such folder to resume from")
    for item in inputs:
        for name in names:
            if item is not None and (absolute / name).exists() \
                    and _same_file(absolute / name, Path(item)):
                raise UsageError(f"--out {path}: would replace {name}, an input of this "
                                 "command; choose another folder")
    path = open_output_dir(path)
    if folder_entries(path) and not (overwrite or resume):
        raise UsageError(f"{path}: folder exists and is not empty; pass --overwrite to "
                         "replace its results or --resume to continue a run there")
    return Path(path)


def save_figure(fig, path: str | os.PathLike) -> Path:
    """Save a matplotlib figure atomically (PNG/SVG by suffix) and close it."""
    import matplotlib.pyplot as plt

    path = Path(path)
    fmt = FIGURE_SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        plt.close(fig)
        raise UsageError(f"{path}: a picture must end in " + ", ".join(FIGURE_SUFFIXES))
    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=130, bbox_inches="tight", format=fmt)
    finally:
        plt.close(fig)
    return path
