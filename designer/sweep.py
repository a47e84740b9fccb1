"""Parameter sweeps: vary one or two spec keys over a grid, evaluate every point.

``velomatch sweep SPEC --vary KEY=START:STOP:N [--vary ...] --out DIR``

* Each point is the base spec's raw table tree with the varied keys set
  (:func:`point_raw`); it is identified by the SHA-256 of its canonical JSON
  (:func:`designer.io.canonical_sha256`), the same hash ``evaluate`` reports.
* Points run on a local process pool (by default one worker per usable core, unless
  the sweep is so cheap that starting workers would cost more than it saves; then
  in this process), in this process (``workers=0``), or on a Dask cluster
  (``scheduler="tcp://HOST:PORT"``).
  The parent process writes each finished point to ``DIR/points/<sha256>.json``
  (atomically), so an interrupted sweep resumes where it stopped and a repeated
  sweep evaluates nothing.
* A point whose spec is invalid or that the physics refuses (a
  :class:`~designer.errors.VelomatchError` or ``ValueError`` from the evaluator) is
  recorded with its message and the sweep goes on; any other exception stops the
  sweep, keeping the finished points.
* Outputs: ``DIR/sweep.json`` (axes and points, see :func:`sweep_json`),
  ``DIR/sweep.png`` (line plots or heat maps of coupling, structure factor and
  damage factor, with known phase-matching/resonance lines), ``DIR/spec.toml`` (the
  base spec) and ``DIR/sweep-plan.json`` (what identifies the sweep for resuming).

Guide lines (:func:`guide_orders`): for every point a continuous "order" number is
computed from the parsed spec alone (no field solve); a guide is drawn where it
takes an integer value:

* grating: ``m = (P / lambda) (1/beta - n_inc sin(theta))`` — the m-th spatial
  harmonic travels with the electron (``n_inc k sin(theta) + 2 pi m / P = omega/v``;
  at normal incidence ``P = m beta lambda``, the synchronicity condition of
  dielectric laser acceleration);
* unpatterned membrane (film of index n, thickness d, vacuum both sides):
  ``m = 2 d Re sqrt(n^2 - sin^2 theta) / lambda`` — the round-trip phase is
  ``2 pi m``, the transmission maxima of the Airy formula (M. Born & E. Wolf,
  *Principles of Optics*, sec. 7.6.1);
* prism: ``n beta sin(theta)``, drawn at 1 (phase matching ``sin theta = 1/(n beta)``
  measured from the surface normal inside the prism).
"""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from designer import io as vio
from designer.errors import SpecError, UsageError, VelomatchError

PLAN_FILE = "sweep-plan.json"
RESULT_FILE = "sweep.json"
PLOT_FILE = "sweep.png"
SPEC_FILE = "spec.toml"
POINTS_DIR = "points"
MAX_POINTS = 100_000
DASK_CONNECT_TIMEOUT = "10s"
# start-up of one pool worker: importing the pipeline and JAX, first compilation
# (measured 8-17 s on 2 shared cores, studies/benchmarks/sweep.py)
POOL_STARTUP_S = 10.0
PLOTTED = (("beta_c", "|β_c| (PINEM coupling)"),
           ("structure_factor", "κ = G/E0 (structure factor)"),
           ("damage_factor", "damage factor G/E_max"))


def _default_evaluator(raw: dict, *, source: str = "<spec>", base_dir=None) -> dict:
    from designer.evaluate import evaluate_raw

    return evaluate_raw(raw, source=source, base_dir=base_dir)


# -- axes --------------------------------------------------------------------------

@dataclass(frozen=True)
class Axis:
    """One varied spec key (dotted) and its values, in spec units."""

    key: str
    values: tuple


def axis_values(start: float, stop: float, n: int) -> tuple:
    """``n`` values from ``start`` to ``stop`` inclusive.

    Integers when both ends are integers and the step is a whole number (so integer
    keys such as a grating's ``order`` can be swept); otherwise floats rounded to 12
    significant digits, so that a point's hash does not depend on the last bit of a
    ``linspace``.
    """
    if n < 1:
        raise UsageError(f"N = {n}: need at least 1 point")
    if n == 1:
        if start != stop:
            raise UsageError(f"N = 1 needs START = STOP (got {start:g} and {stop:g})")
        return (start,)
    if start == stop:
        raise UsageError(f"START = STOP = {start:g} gives one point; use N = 1")
    if isinstance(start, int) and isinstance(stop, int) and (stop - start) % (n - 1) == 0:
        step = (stop - start) // (n - 1)
        return tuple(start + j * step for j in range(n))
    values = tuple(float(f"{x:.12g}") for x in np.linspace(float(start), float(stop), n))
    if len(set(values)) != n:
        raise UsageError(f"{n} points between {start:g} and {stop:g} are not distinct at "
                         "12 significant digits")
    return values


def _number(text: str, what: str, spec_text: str):
    text = text.strip()
    try:
        return int(text)
    except ValueError:
        pass
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"--vary {spec_text!r}: {what} {text!r} is not a number") from None
    if not math.isfinite(value):
        raise UsageError(f"--vary {spec_text!r}: {what} must be finite")
    return value


def parse_vary(text: str) -> tuple[str, tuple]:
    """``"KEY=START:STOP:N"`` -> ``(KEY, values)``; a :class:`UsageError` otherwise."""
    form = "expected KEY=START:STOP:N, e.g. laser.angle_deg=0:30:16"
    if text.count("=") != 1:
        raise UsageError(f"--vary {text!r}: {form}")
    key, rng = (s.strip() for s in text.split("="))
    parts = rng.split(":")
    if not key or len(parts) != 3:
        raise UsageError(f"--vary {text!r}: {form}")
    start = _number(parts[0], "START", text)
    stop = _number(parts[1], "STOP", text)
    n_text = parts[2].strip()
    try:
        n = int(n_text)
    except ValueError:
        raise UsageError(f"--vary {text!r}: N {n_text!r} must be a whole number") from None
    if n < 1:
        raise UsageError(f"--vary {text!r}: N = {n}: need at least 1 point")
    try:
        return key, axis_values(start, stop, n)
    except UsageError as exc:
        raise UsageError(f"--vary {text!r}: {exc}") from None


# -- editing the raw tree ----------------------------------------------------------

def resolve_sweep_key(raw: dict, key: str, *, source: str = "<spec>") -> str:
    """Dotted spec key for ``key`` (:func:`designer.spec.resolve_key`), accepting list
    indices as path parts (``sample.layers.0.thickness_nm``)."""
    from designer.spec import resolve_key

    dotted = resolve_key(raw, key, source=source)
    node: Any = raw
    parts = dotted.split(".")
    for depth, part in enumerate(parts[:-1]):
        if isinstance(node, list):
            if not (part.isdigit() and int(part) < len(node)):
                where = ".".join(parts[:depth])
                raise SpecError(source, dotted, f"{where} is a list of {len(node)}; "
                                "index it with 0 .. " + str(len(node) - 1))
            node = node[int(part)]
        elif isinstance(node, dict):
            node = node.get(part, {})
        else:
            raise SpecError(source, dotted, f"{'.'.join(parts[:depth])} is not a table")
    return dotted


def set_value(raw: dict, dotted_key: str, value: Any) -> dict:
    """A deep copy of ``raw`` with ``dotted_key`` set; integer parts index lists."""
    import copy

    out = copy.deepcopy(raw)
    node: Any = out
    parts = dotted_key.split(".")
    for part in parts[:-1]:
        if isinstance(node, list):
            node = node[int(part)]
        else:
            node = node.setdefault(part, {})
    last = parts[-1]
    if isinstance(node, list):
        node[int(last)] = value
    else:
        node[last] = value
    return out


def point_raw(base_raw: dict, values: dict[str, Any]) -> dict:
    """The raw spec of one sweep point: ``base_raw`` with ``values`` (dotted keys) set."""
    out = base_raw
    for key, value in values.items():
        out = set_value(out, key, value)
    return out


def point_sha256(raw: dict) -> str:
    """Cache key of a point: SHA-256 of its raw spec (as ``evaluate`` reports it)."""
    return vio.canonical_sha256(raw)


# -- the plan ----------------------------------------------------------------------

@dataclass(frozen=True)
class SweepPlan:
    """A base spec and the axes varied over it (first axis outermost)."""

    base_raw: dict
    axes: tuple[Axis, ...]
    source: str = "<spec>"
    base_dir: Path | None = None

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(a.values) for a in self.axes)

    def point_values(self) -> list[dict[str, Any]]:
        """Every point's ``{key: value}``, row-major (last axis fastest)."""
        grids = [a.values for a in self.axes]
        out = []
        for index in np.ndindex(*self.shape):
            out.append({a.key: grids[k][i] for k, (a, i) in enumerate(zip(self.axes, index))})
        return out

    def point_raws(self) -> list[dict]:
        return [point_raw(self.base_raw, v) for v in self.point_values()]

    def identity(self) -> dict:
        return {"base_spec_sha256": vio.canonical_sha256(self.base_raw),
                "axes": [[a.key, list(a.values)] for a in self.axes]}

    @property
    def sha256(self) -> str:
        return vio.canonical_sha256(self.identity())


def plan_sweep(raw: dict, vary: Sequence[str], *, source: str = "<spec>",
               base_dir: Path | None = None, check: bool = True) -> SweepPlan:
    """Parse ``--vary`` options against a base spec.

    One or two axes, distinct keys, each resolvable in the spec.  With ``check`` the
    base spec and the first point are parsed (:func:`designer.spec.parse_spec`), so
    an unknown key or a value the spec refuses is one :class:`SpecError` before any
    work starts.
    """
    if not vary:
        raise UsageError("give one or two --vary KEY=START:STOP:N")
    if len(vary) > 2:
        raise UsageError(f"at most two --vary options (got {len(vary)}): a sweep is drawn as a "
                         "line plot or a heat map")
    axes = []
    for text in vary:
        key, values = parse_vary(text)
        dotted = resolve_sweep_key(raw, key, source=source)
        if any(a.key == dotted for a in axes):
            raise UsageError(f"--vary {text!r}: {dotted} is varied twice")
        axes.append(Axis(dotted, values))
    n = int(np.prod([len(a.values) for a in axes]))
    if n > MAX_POINTS:
        raise UsageError(f"{n} points is more than {MAX_POINTS}; split the sweep")
    plan = SweepPlan(base_raw=raw, axes=tuple(axes), source=source, base_dir=base_dir)
    if check:
        from designer.spec import parse_spec

        parse_spec(raw, source=source, base_dir=base_dir)
        parse_spec(plan.point_raws()[0], source=source, base_dir=base_dir)
    return plan


# -- running points ----------------------------------------------------------------

@dataclass(frozen=True)
class Job:
    """One evaluation: a raw spec tree and where it came from (for messages, files)."""

    raw: dict
    source: str = "<spec>"
    base_dir: Path | None = None


def evaluate_job(evaluator: Callable, job: Job) -> dict:
    """Run one job: ``{"result": ...}`` or ``{"error": message}``.

    Spec problems (:class:`VelomatchError`) and ``ValueError`` from the physics are
    a property of the point and are returned; anything else propagates and stops
    the run.  Module level so that process pools and Dask can pickle it.
    """
    try:
        return {"result": evaluator(job.raw, source=job.source, base_dir=job.base_dir)}
    except (VelomatchError, ValueError) as exc:
        return {"error": f"{type(exc).__name__}: {exc}" if not isinstance(exc, VelomatchError)
                else str(exc)}


def usable_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def _progress_bar(total: int, initial: int, desc: str, enabled: bool):
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=total, initial=initial, desc=desc, unit="pt", file=sys.stderr,
                dynamic_ncols=True, leave=True)


def run_jobs(jobs: Sequence[Job], *, evaluator: Callable = _default_evaluator,
             workers: int | None = None, scheduler: str | None = None,
             on_done: Callable[[int, dict], None] | None = None,
             progress: Any = None) -> list[dict]:
    """Evaluate ``jobs`` and return their outcomes (:func:`evaluate_job`) in order.

    ``scheduler``: address of a running Dask scheduler (``tcp://HOST:PORT``);
    otherwise a local process pool of ``workers`` processes (never more than there
    are jobs), this process when ``workers == 0``, or, with ``workers=None``, an
    automatic choice: this process when the work is too small to pay for starting
    workers, else one worker per usable core (:func:`_run_auto`).
    ``on_done(i, outcome)`` is called in this process as each job finishes (the
    sweep caches there); ``progress`` is a tqdm-like bar (``update(1)``) or None.
    """
    out: list[dict | None] = [None] * len(jobs)

    def done(i: int, outcome: dict) -> None:
        out[i] = outcome
        if on_done is not None:
            on_done(i, outcome)
        if progress is not None:
            progress.update(1)

    if not jobs:
        return []
    if scheduler:
        _run_dask(jobs, evaluator, scheduler, done)
    elif workers is None:
        _run_auto(jobs, evaluator, done)
    else:
        n_workers = int(workers)
        if n_workers < 0:
            raise UsageError(f"--workers = {n_workers}: must be >= 0")
        if n_workers == 0:
            for i, job in enumerate(jobs):
                done(i, evaluate_job(evaluator, job))
        else:
            _run_pool(jobs, evaluator, min(n_workers, len(jobs)), done)
    return out  # type: ignore[return-value]


def _run_auto(jobs, evaluator, done) -> None:
    """Run two jobs here (the first pays the pipeline's warm-up, the second gives the
    steady cost of a point); hand the rest to a pool of one process per core only if
    that much work outweighs starting the pool (each worker imports the pipeline and
    compiles again: POOL_STARTUP_S)."""
    import time

    head = min(2, len(jobs))
    cost = 0.0
    for i in range(head):
        t0 = time.perf_counter()
        done(i, evaluate_job(evaluator, jobs[i]))
        cost = time.perf_counter() - t0
    rest = list(range(head, len(jobs)))
    cores = usable_cores()
    if not rest:
        return
    if cores < 2 or cost * len(rest) < POOL_STARTUP_S * 2:
        for i in rest:
            done(i, evaluate_job(evaluator, jobs[i]))
        return
    _run_pool([jobs[i] for i in rest], evaluator, min(cores, len(rest)),
              lambda k, outcome: done(rest[k], outcome))


def _run_pool(jobs, evaluator, n_workers: int, done) -> None:
    import multiprocessing as mp
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    # spawn, not fork: the parent may already run JAX's threads
    ctx = mp.get_context("spawn")
    pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=_worker_init,
                               initargs=(os.getpid(), n_workers > 1))
    futures = {pool.submit(evaluate_job, evaluator, job): i for i, job in enumerate(jobs)}
    pending = set(futures)
    try:
        while pending:
            finished, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in finished:
                done(futures[fut], fut.result())
    except BaseException:
        # interrupted (Ctrl-C) or failed: keep what has finished, stop the rest now
        # instead of waiting for the points in flight
        for fut in list(pending):
            if fut.done() and not fut.cancelled() and fut.exception() is None:
                done(futures[fut], fut.result())
        _stop_pool(pool)
        raise
    pool.shutdown(wait=True)


def _stop_pool(pool) -> None:
    processes = list(getattr(pool, "_processes", {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in processes:
        try:
            proc.terminate()
        except (OSError, AttributeError):
            pass
    for proc in processes:
        try:
            proc.join(timeout=2.0)
        except (OSError, AssertionError):
            pass


def _worker_init(parent_pid: int, one_thread: bool) -> None:
    """Pool initializer: die with the parent (a sweep killed with SIGKILL must not leave
    its workers behind), leave Ctrl-C to the parent, and optionally one thread each."""
    import signal
    import threading

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:  # Linux: the kernel sends SIGKILL when the parent dies
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL, 0, 0, 0)   # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass
    if os.getppid() != parent_pid:
        os._exit(1)

    def watch():   # elsewhere (and as a second line): poll the parent's pid
        import time

        while True:
            time.sleep(1.0)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, daemon=True, name="velomatch-parent-watch").start()
    if one_thread:
        _one_thread_each()


def _one_thread_each() -> None:
    """Pool initializer: one compute thread per worker process, so that N workers use N
    cores instead of each starting a thread per core (runs before the pipeline, and so
    JAX, is imported in the worker; settings the user made are kept)."""
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")
    flags = os.environ.get("XLA_FLAGS", "")
    if "multi_thread_eigen" not in flags:
        os.environ["XLA_FLAGS"] = (flags + " --xla_cpu_multi_thread_eigen=false "
                                   "intra_op_parallelism_threads=1").strip()


def _run_dask(jobs, evaluator, address: str, done) -> None:
    try:
        from distributed import Client, as_completed
    except ImportError:  # pragma: no cover - dask[distributed] is a dependency
        raise UsageError("--scheduler needs the 'distributed' package") from None
    if "://" not in address:
        address = "tcp://" + address
    try:
        client = Client(address, timeout=DASK_CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise UsageError(f"--scheduler {address}: cannot reach a Dask scheduler ({exc})") from None
    try:
        futures = client.map(evaluate_job, [evaluator] * len(jobs), list(jobs), pure=False)
        index = {fut.key: i for i, fut in enumerate(futures)}
        try:
            for fut in as_completed(futures, loop=client.loop):
                done(index[fut.key], fut.result())
        except BaseException:
            client.cancel(futures)
            raise
    finally:
        client.close()


# -- the sweep ---------------------------------------------------------------------

@dataclass(frozen=True)
class SweepResult:
    """What a sweep produced: the JSON written, and how many points were computed."""

    plan: SweepPlan
    data: dict
    computed: int
    cached: int
    failed: int
    out_dir: Path
    files: dict = field(default_factory=dict)


def _prepare_sweep_dir(out_dir: Path, plan: SweepPlan) -> bool:
    """Create or re-open a sweep folder; True when resuming."""
    vio.open_output_dir(out_dir)   # checked, created and locked for the whole run
    if vio.folder_entries(out_dir):
        plan_path = out_dir / PLAN_FILE
        try:
            stored = _load_json(plan_path)
        except (OSError, ValueError):
            raise UsageError(f"{out_dir}: folder is not empty and holds no velomatch sweep; "
                             "choose another --out") from None
        if stored.get("sweep_sha256") != plan.sha256:
            what = "different --vary axes"
            if stored.get("base_spec_sha256") != plan.identity()["base_spec_sha256"]:
                what = "a different base spec"
            raise UsageError(f"{out_dir}: holds a different sweep ({what}); it is not "
                             "overwritten — choose another --out or remove the folder")
        return True
    return False


def _load_json(path: Path) -> dict:
    import json

    with open(path) as handle:
        data = json.load(handle)
    if not isinstance(data, dict):
        raise ValueError(f"{path}: not a JSON object")
    return data


def cached_point(points_dir: Path, sha: str) -> dict | None:
    """The stored record ``points_dir/<sha>.json`` of a finished point, or None when it
    is missing, unreadable or not that point's."""
    try:
        data = _load_json(points_dir / f"{sha}.json")
    except (OSError, ValueError):
        return None
    if data.get("spec_sha256") != sha or not ("result" in data or "error" in data):
        return None
    return data


def run_sweep(plan: SweepPlan, out_dir: str | os.PathLike, *,
              evaluator: Callable = _default_evaluator, workers: int | None = None,
              scheduler: str | None = None, progress: bool = False,
              plot: bool = True) -> SweepResult:
    """Evaluate every point of ``plan`` (cached under ``out_dir/points``) and write the
    sweep's JSON, plot and base spec.  See the module docstring."""
    out_dir = Path(out_dir)
    resuming = _prepare_sweep_dir(out_dir, plan)
    points_dir = out_dir / POINTS_DIR
    points_dir.mkdir(exist_ok=True)
    if not resuming:
        vio.write_json(out_dir / PLAN_FILE, {"sweep_sha256": plan.sha256, **plan.identity()})
        _write_base_spec(out_dir / SPEC_FILE, plan.base_raw, plan.base_dir)

    values = plan.point_values()
    raws = [point_raw(plan.base_raw, v) for v in values]
    shas = [point_sha256(r) for r in raws]
    records: dict[str, dict] = {}
    for sha in shas:
        hit = cached_point(points_dir, sha)
        if hit is not None:
            records[sha] = hit
    todo = [i for i, sha in enumerate(shas) if sha not in records]
    n_cached = len(shas) - len(todo)
    if resuming and progress:
        print(f"velomatch sweep: resuming {out_dir}: {n_cached} of {len(shas)} points cached",
              file=sys.stderr)

    def store(k: int, outcome: dict) -> None:
        i = todo[k]
        record = {"spec_sha256": shas[i], "values": values[i], **outcome}
        vio.write_json(points_dir / f"{shas[i]}.json", record)
        records[shas[i]] = record

    bar = _progress_bar(len(shas), n_cached, "sweep", progress)
    try:
        jobs = [Job(raws[i], plan.source, plan.base_dir) for i in todo]
        run_jobs(jobs, evaluator=evaluator, workers=workers, scheduler=scheduler,
                 on_done=store, progress=bar)
    finally:
        if bar is not None:
            bar.close()

    data = sweep_json(plan, values, shas, records)
    files = {"json": out_dir / RESULT_FILE, "spec": out_dir / SPEC_FILE}
    from designer.resonances import sweep_resonances
    from designer.slab_modes import sweep_bands

    data["resonances"] = sweep_resonances(data)
    bands = sweep_bands(plan.base_raw, values, plan.shape, source=plan.source,
                        base_dir=plan.base_dir)
    if bands is not None:   # hole membranes: folded guided modes of the film
        data["bands"] = {"label": "empty-lattice guided modes (homogenized film)",
                         "mismatch": {k: g.tolist() for k, g in bands.items()}}
    if plot:
        guides = guide_orders(plan, values)
        data["guides"] = _guides_json(plan, guides)
        files["plot"] = plot_sweep(data, out_dir / PLOT_FILE, guides=guides,
                                   decay_length_m=_decay_length(plan), bands=bands)
    vio.write_json(files["json"], data)
    failed = sum(1 for p in data["points"] if p.get("error"))
    return SweepResult(plan=plan, data=data, computed=len(todo), cached=n_cached,
                       failed=failed, out_dir=out_dir, files=files)


def _write_base_spec(path: Path, raw: dict, base_dir=None) -> None:
    from designer.spec import dump_spec, with_absolute_files

    vio.write_atomic(path, dump_spec(with_absolute_files(raw, base_dir)))


def sweep_json(plan: SweepPlan, values: list[dict], shas: list[str],
               records: dict[str, dict]) -> dict:
    """``{"axes": {KEY: [...]}, "points": [{"values", "coupling", ...}], ...}``.

    ``coupling`` is the ``coupling`` object of ``evaluate --json`` (None for a point
    that failed, whose message is in ``error``).
    """
    from designer.provenance import provenance

    points = []
    for v, sha in zip(values, shas):
        rec = records.get(sha, {})
        result = rec.get("result")
        entry = {"values": v, "coupling": None if result is None else result.get("coupling"),
                 "spec_sha256": sha}
        if result is not None and "laser" in result:
            entry["angle_deg"] = result["laser"].get("angle_deg")
        if rec.get("error") or not rec:
            entry["error"] = rec.get("error", "not evaluated")
        points.append(entry)
    from designer.cautions import cautions

    fields = [r["result"]["laser"]["peak_field_V_per_m"] for r in records.values()
              if (r.get("result") or {}).get("laser", {}).get("peak_field_V_per_m")]
    return {"axes": {a.key: list(a.values) for a in plan.axes},
            "shape": list(plan.shape),
            "points": points,
            "cautions": cautions(max(fields, default=None)),
            "base_spec_sha256": plan.identity()["base_spec_sha256"],
            "provenance": provenance(plan.identity()["base_spec_sha256"],
                                     sweep_sha256=plan.sha256)}


# -- guide lines (phase matching, resonances) --------------------------------------

@dataclass(frozen=True)
class GuideOrders:
    """A continuous order number at every point and the levels at which to draw it."""

    label: str
    orders: np.ndarray          # shape of the sweep; NaN where unknown
    levels: tuple[float, ...]


def order_number(spec) -> tuple[str, float, str] | None:
    """(label, order, kind) of one parsed spec, or None when no closed form is known.

    ``kind`` is ``"integers"`` (draw every integer order >= 1) or ``"one"`` (draw the
    level 1).  Formulas in the module docstring.
    """
    from designer.families import get_family

    family = get_family(spec.family)
    lam = spec.laser.wavelength_m
    beta = spec.beam.beta
    p = spec.sample
    if spec.family == "membrane":
        if getattr(p, "pattern", None) != "none" or spec.laser.angle_rad is None:
            return None
        n2 = complex(p.material.eps)
        s = math.sin(spec.laser.angle_rad)
        return ("film round trip 2π m (Airy maxima)",
                2.0 * p.thickness_m * complex(np.sqrt(n2 - s * s)).real / lam, "integers")
    if spec.family == "grating":
        lay = family.layout(p, spec.context, lam / 8.0)
        n_inc = complex(np.sqrt(complex(lay.eps_incidence))).real
        return ("phase matching of harmonic m",
                p.period_m / lam * (1.0 / beta - n_inc * math.sin(lay.angle_rad)), "integers")
    if spec.family == "prism":
        angle = family.laser_angle(p, spec.context)
        n = complex(np.sqrt(complex(p.material.eps))).real
        return ("phase matching n β sin θ = 1", n * beta * math.sin(angle), "one")
    return None


def guide_orders(plan: SweepPlan, values: list[dict] | None = None) -> GuideOrders | None:
    """The order number of every point (parsing each point's spec; no solve)."""
    from designer.spec import parse_spec

    values = plan.point_values() if values is None else values
    orders = np.full(len(values), np.nan)
    label, kind = None, None
    for k, v in enumerate(values):
        try:
            spec = parse_spec(point_raw(plan.base_raw, v), source=plan.source,
                              base_dir=plan.base_dir)
            got = order_number(spec)
        except (VelomatchError, ValueError):
            continue
        if got is None:
            return None
        label, orders[k], kind = got
    if label is None or not np.isfinite(orders).any():
        return None
    lo, hi = float(np.nanmin(orders)), float(np.nanmax(orders))
    if hi - lo <= 1e-9 * max(abs(hi), 1.0):
        return None     # the swept keys do not change the matching condition
    if kind == "one":
        levels = (1.0,) if lo <= 1.0 <= hi else ()
    else:
        levels = tuple(float(m) for m in range(max(1, math.ceil(lo)), math.floor(hi) + 1))
        levels = levels[:40]
    return GuideOrders(label, orders.reshape(plan.shape), levels)


def guide_positions(axis_values_: Sequence[float], orders: np.ndarray,
                    levels: Iterable[float]) -> list[tuple[float, float]]:
    """(level, position) where a 1D order curve crosses each level (linear interpolation)."""
    x = np.asarray(axis_values_, dtype=float)
    g = np.asarray(orders, dtype=float)
    out = []
    for level in levels:
        for j in range(len(x) - 1):
            a, b = g[j] - level, g[j + 1] - level
            if not (np.isfinite(a) and np.isfinite(b)):
                continue
            if a == 0.0:
                out.append((level, float(x[j])))
            elif a * b < 0:
                out.append((level, float(x[j] + (x[j + 1] - x[j]) * a / (a - b))))
        if np.isfinite(g[-1]) and g[-1] == level:
            out.append((level, float(x[-1])))
    return out


def _guides_json(plan: SweepPlan, guides: GuideOrders | None) -> dict | None:
    if guides is None:
        return None
    out = {"label": guides.label, "levels": list(guides.levels),
           "orders": guides.orders.tolist()}
    if len(plan.axes) == 1:
        out["positions"] = [{"order": m, plan.axes[0].key: x}
                            for m, x in guide_positions(plan.axes[0].values, guides.orders,
                                                        guides.levels)]
    return out


# -- plot --------------------------------------------------------------------------

def quantity_grid(data: dict, name: str) -> np.ndarray:
    """One coupling quantity over the sweep grid (NaN where missing); ``beta_c`` is |β_c|."""
    shape = tuple(data["shape"])
    vals = []
    for p in data["points"]:
        c = p.get("coupling") or {}
        v = c.get(name)
        vals.append(np.nan if v is None else abs(float(v)))
    return np.asarray(vals, dtype=float).reshape(shape)


def plot_sweep(data: dict, path: str | os.PathLike, *, guides: GuideOrders | None = None,
               decay_length_m: float | None = None, bands: dict | None = None):
    """Line plots (1 axis) or heat maps (2 axes) of the plotted quantities
    (:func:`designer.plots.sweep_figure`); saved atomically."""
    from designer.plots import sweep_figure

    return vio.save_figure(sweep_figure(data, PLOTTED, quantity_grid, guides=guides,
                                        guide_positions=guide_positions,
                                        decay_length_m=decay_length_m, bands=bands), path)


def _decay_length(plan: SweepPlan) -> float | None:
    """1/e length of the synchronous field of the base spec (for height sweeps)."""
    from designer.families.base import decay_length
    from designer.spec import parse_spec

    try:
        spec = parse_spec(plan.base_raw, source=plan.source, base_dir=plan.base_dir)
    except (VelomatchError, ValueError):
        return None
    return decay_length(spec.context) if spec.family in ("grating", "prism") else None


# -- command -----------------------------------------------------------------------

def sweep_command(args, *, evaluator: Callable = _default_evaluator) -> int:
    """``velomatch sweep``: returns 0, or 1 when some points failed (see sweep.json)."""
    from designer.spec import load_spec

    spec = load_spec(args.spec)
    plan = plan_sweep(spec.raw, args.vary, source=spec.source, base_dir=spec.base_dir)
    workers = getattr(args, "workers", None)
    if workers is not None and workers < 0:
        raise UsageError(f"--workers = {workers}: must be >= 0 (0 = in this process)")
    result = run_sweep(plan, args.out, evaluator=evaluator, workers=workers,
                       scheduler=getattr(args, "scheduler", None), progress=True)
    n = len(result.data["points"])
    print(f"sweep of {n} point(s): {result.computed} computed, {result.cached} from the cache"
          + (f", {result.failed} failed (messages in {result.files['json']})"
             if result.failed else ""))
    for what, path in result.files.items():
        print(f"  {what}: {path}")
    for line in result.data.get("cautions", []):
        print(line)
    return 1 if result.failed else 0
