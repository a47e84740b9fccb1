"""Benchmark of the sweep executors; prints one JSON object.

* speed-up of a 64-point film sweep (exact layer-stack solver) with 2 local worker
  processes against 1: on wall time including the workers' start-up (importing the
  pipeline and JAX's first compilation in each process), and in the steady state
  (points finished per second once every worker has finished its first point);
  plus the automatic choice (``workers=None``) and a repeated, fully cached sweep;
* per-point overhead of the Dask path against the local pool: 64 points of an
  evaluator that does nothing, on a running Dask LocalCluster (2 worker processes,
  127.0.0.1) and on a 2-process local pool (whose start-up is included, as a user
  pays it on every sweep).

Run: ``.venv/bin/python studies/benchmarks/sweep.py`` (about a minute on 2 cores).
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from designer.sweep import plan_sweep, run_sweep, usable_cores  # noqa: E402

FILM = {
    "beam": {"voltage_kV": 200.0},
    "laser": {"wavelength_nm": 800.0, "angle_deg": 40.0},
    "sample": {"family": "membrane", "material": {"n": 3.5}, "thickness_nm": 200.0},
    "solver": {"method": "layers"},
}
VARY = ["sample.thickness_nm=100:400:8", "laser.angle_deg=20:55:8"]   # 64 points


def nothing(raw, *, source="<spec>", base_dir=None) -> dict:
    """An evaluator that does no work: isolates the executor's own cost."""
    return {"coupling": {"beta_c": 0.0}}


def stamped(raw, *, source="<spec>", base_dir=None) -> dict:
    """The real pipeline, with the worker's pid and the time each point finished."""
    from designer.evaluate import evaluate_raw

    out = evaluate_raw(raw, source=source, base_dir=base_dir)
    out["bench"] = {"pid": os.getpid(), "end": time.time()}
    return out


def timed(plan, out, **kw) -> tuple[float, int]:
    t0 = time.perf_counter()
    res = run_sweep(plan, out, plot=False, **kw)
    return time.perf_counter() - t0, res.computed


def steady_rate(out: Path) -> float:
    """Points per second after the last worker finished its first point."""
    stamps = [json.loads(p.read_text())["result"]["bench"] for p in (out / "points").iterdir()]
    firsts = {}
    for s in stamps:
        firsts[s["pid"]] = min(firsts.get(s["pid"], s["end"]), s["end"])
    start = max(firsts.values())
    later = [s["end"] for s in stamps if s["end"] > start]
    return len(later) / (max(later) - start) if later else float("nan")


def main() -> None:
    plan = plan_sweep(FILM, VARY)
    n = len(plan.point_values())
    tmp = Path(tempfile.mkdtemp(prefix="velomatch-bench-"))
    t1, c1 = timed(plan, tmp / "w1", workers=1, evaluator=stamped)
    t2, c2 = timed(plan, tmp / "w2", workers=2, evaluator=stamped)
    t_cached, c_cached = timed(plan, tmp / "w2", workers=2)   # repeated sweep: all cached
    t_auto, _ = timed(plan, tmp / "auto", workers=None)
    r1, r2 = steady_rate(tmp / "w1"), steady_rate(tmp / "w2")

    from distributed import LocalCluster

    t0 = time.perf_counter()
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        t_cluster = time.perf_counter() - t0
        t_dask, _ = timed(plan, tmp / "dask", evaluator=nothing,
                          scheduler=cluster.scheduler_address)
    t_pool, _ = timed(plan, tmp / "pool", evaluator=nothing, workers=2)
    print(json.dumps({
        "points": n,
        "cores": usable_cores(),
        "load_average_1min": os.getloadavg()[0],
        "layers_sweep": {"wall_s_1_worker": round(t1, 2), "wall_s_2_workers": round(t2, 2),
                         "speedup_2_vs_1": round(t1 / t2, 3),
                         "steady_points_per_s_1_worker": round(r1, 2),
                         "steady_points_per_s_2_workers": round(r2, 2),
                         "steady_speedup_2_vs_1": round(r2 / r1, 3),
                         "wall_s_automatic_choice": round(t_auto, 2),
                         "computed": [c1, c2],
                         "repeat_wall_s": round(t_cached, 3), "repeat_computed": c_cached},
        "overhead_no_op_evaluator": {
            "dask_cluster_start_s": round(t_cluster, 2),
            "dask_wall_s": round(t_dask, 3),
            "dask_per_point_ms": round(1e3 * t_dask / n, 2),
            "pool_wall_s_including_start": round(t_pool, 3),
            "pool_per_point_ms": round(1e3 * t_pool / n, 2),
            "dask_minus_pool_per_point_ms": round(1e3 * (t_dask - t_pool) / n, 2)},
    }, indent=2))


if __name__ == "__main__":
    main()
