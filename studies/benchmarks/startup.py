"""Start-up cost of the command line: whole ``velomatch`` processes, first and second run.

Scenario (our own): ``beam`` at 200 kV; ``evaluate`` of a 50 nm silicon-nitride film lit
at 35° (exact layer-stack solver); ``evaluate`` of the 30 kV fused-silica grating of
``studies/grating_30kV`` (FDFD, two grids for the error estimate).  Each command runs
as its own process.  The "first" run starts with an empty JAX compilation cache (a
fresh ``VELOMATCH_CACHE_DIR``), the "second" run reuses the cache the first one filled,
as a user's second command would; "no_cache" runs with the cache switched off
(``VELOMATCH_CACHE_DIR=off``: every process compiles again, as before the cache
existed).  Also reports the time to import the package alone.

    python studies/benchmarks/startup.py             # about a minute on 2 cores
    python studies/benchmarks/startup.py --repeats 3

Prints one JSON object (seconds; wall clock; median over the repeats).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))

FILM = """
[beam]
voltage_kV = 200.0
[laser]
wavelength_nm = 800.0
angle_deg = 35.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 50.0
pattern = "none"
[path]
x_nm = 0.0
"""


def _velomatch() -> list[str]:
    exe = os.path.join(os.path.dirname(sys.executable), "velomatch")
    if os.path.exists(exe):
        return [exe]
    return [sys.executable, "-m", "designer.cli"]


def _timed(cmd: list[str], env: dict) -> float:
    t0 = time.perf_counter()
    done = subprocess.run(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                          text=True)
    elapsed = time.perf_counter() - t0
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed: {done.stderr.strip()}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()
    vm = _velomatch()
    with tempfile.TemporaryDirectory() as tmp:
        film = os.path.join(tmp, "film.toml")
        with open(film, "w") as fh:
            fh.write(FILM)
        grating = os.path.join(ROOT, "studies", "grating_30kV", "grating.toml")
        commands = {
            "import_designer": [sys.executable, "-c", "import designer.cli, designer.commands"],
            "beam": vm + ["beam", "--voltage-kV", "200", "--index", "2.0", "--json"],
            "evaluate_film_layers": vm + ["evaluate", film, "--json"],
            "evaluate_grating_fdfd": vm + ["evaluate", grating, "--json"],
        }
        result = {"unit": "s", "repeats": args.repeats}
        for name, cmd in commands.items():
            off, firsts, seconds = [], [], []
            for r in range(args.repeats):
                off.append(_timed(cmd, dict(os.environ, VELOMATCH_CACHE_DIR="off")))
                env = dict(os.environ, VELOMATCH_CACHE_DIR=os.path.join(tmp, f"cache{name}{r}"))
                firsts.append(_timed(cmd, env))
                seconds.append(_timed(cmd, env))
            result[name] = {"no_cache": round(statistics.median(off), 3),
                            "first_run": round(statistics.median(firsts), 3),
                            "second_run": round(statistics.median(seconds), 3)}
    print(json.dumps(result))


if __name__ == "__main__":
    main()
