"""The ``velomatch`` command line: argument parsing and dispatch, nothing else.

Each subcommand's work lives in its own module; this one turns arguments into calls,
and turns every :class:`~designer.errors.VelomatchError` into one line on stderr
and exit code 2 (no traceback).
"""

from __future__ import annotations

import argparse
import os
import sys

from designer.cautions import SAFETY_NOTE
from designer.errors import VelomatchError


def _add_json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print machine-readable JSON on stdout")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="velomatch",
        description="Design nanostructures that couple a laser field to a passing electron "
                    "beam: evaluate, optimize, cross-check, sweep and export samples.",
        epilog=SAFETY_NOTE)
    parser.add_argument("--version", action="version", version=f"%(prog)s {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("beam", help="electron kinematics and phase-matching aids for a voltage")
    p.add_argument("--voltage-kV", type=float, required=True, dest="voltage_kV",
                   help="accelerating voltage in kV")
    p.add_argument("--wavelength-nm", type=float, default=800.0, dest="wavelength_nm",
                   help="laser wavelength for the phase-matching aids (default 800)")
    p.add_argument("--order", type=int, default=1, help="spatial harmonic m for the grating "
                   "period (default 1)")
    p.add_argument("--index", type=float, action="append", default=None,
                   help="refractive index for a Cherenkov/prism angle (repeatable)")
    _add_json(p)

    p = sub.add_parser("materials", help="list the material catalogue: model, valid range, "
                       "source (and the index at a wavelength)")
    p.add_argument("--wavelength-nm", type=float, dest="wavelength_nm",
                   help="also give each material's complex index at this wavelength")
    _add_json(p)

    p = sub.add_parser("evaluate", help="coupling figures of the sample in a spec")
    p.add_argument("spec", help="spec file (TOML)")
    _add_json(p)
    p.add_argument("--plot", metavar="FILE", help="write a picture of the sample and fields")
    p.add_argument("--report", metavar="FILE", help="write a self-contained HTML report")
    p.add_argument("--out", metavar="FILE", help="also write the JSON result to FILE")

    p = sub.add_parser("spectrum", help="predicted PINEM spectrum of the sample in a spec")
    p.add_argument("spec", help="spec file (TOML)")
    _add_json(p)
    p.add_argument("--plot", metavar="FILE", help="write the spectrum plot (PNG/SVG)")

    p = sub.add_parser("design", help="optimize the geometry of a spec's sample")
    p.add_argument("spec", help="spec file (TOML) with an [optimize] table")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (design.toml, evaluation.json, report.html, ...)")
    p.add_argument("--resume", action="store_true", help="continue the run saved in DIR")
    p.add_argument("--overwrite", action="store_true", help="replace results in a non-empty DIR")
    p.add_argument("--iterations", type=int, help="override [optimize] iterations")

    p = sub.add_parser("sweep", help="vary spec keys over a grid of values")
    p.add_argument("spec", help="spec file (TOML): the point every variation starts from")
    p.add_argument("--vary", action="append", required=True, metavar="KEY=START:STOP:N",
                   help="spec key and N values from START to STOP inclusive (1 or 2 of them)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (sweep.json, sweep.png, one cached result per point)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler (tcp://HOST:PORT)")
    p.add_argument("--workers", type=int, help="local worker processes (default: automatic — "
                   "this process for quick sweeps, else one per core; 0 = this process)")

    p = sub.add_parser("compare", help="rank candidate samples on the same footing")
    p.add_argument("specs", nargs="+", metavar="spec",
                   help="spec files (TOML); the first sets the common beam and laser")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (compare.json, report.html)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler (tcp://HOST:PORT)")
    p.add_argument("--workers", type=int, help="local worker processes (default: automatic)")
    p.add_argument("--overwrite", action="store_true", help="replace results in a non-empty DIR")

    p = sub.add_parser("crosscheck", help="confirm the coupling with the FDTD solver (Meep)")
    p.add_argument("spec", help="spec file (TOML), e.g. a design.toml")
    _add_json(p)
    p.add_argument("--grid-step-nm", type=float, dest="grid_step_nm",
                   help="FDTD grid step (default: chosen automatically)")
    p.add_argument("--max-wall-s", type=float, default=900.0, dest="max_wall_s",
                   help="give up after this many seconds (default 900)")
    p.add_argument("--tolerance", type=float, default=0.02, help="relative tolerance (0.02)")
    p.add_argument("--plot", metavar="FILE", help="write both field profiles along the path")

    p = sub.add_parser("export", help="write a lithography layout (GDSII/OASIS)")
    p.add_argument("spec", help="spec file (TOML) with an optional [layout] table")
    p.add_argument("--out", required=True, metavar="FILE",
                   help="layout file to write (.gds or .oas)")
    p.add_argument("--format", choices=("gds", "oasis"), help="default: from the file suffix")
    p.add_argument("--preview", metavar="FILE", help="SVG or PNG preview")
    p.add_argument("--ignore-rules", action="store_true",
                   help="write even when the design-rule check finds violations")
    p.add_argument("--overwrite", action="store_true", help="replace an existing FILE")
    _add_json(p)

    p = sub.add_parser("demo", help="run the worked grating study end to end (about half a "
                       "minute on 2 cores)")
    p.add_argument("--out", default="demo-output", metavar="DIR",
                   help="output folder (default demo-output)")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier demo in DIR")
    return parser


def _version() -> str:
    from designer.provenance import version

    return version()


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    from designer.runtime import configure_jax_cache

    configure_jax_cache()
    from designer import commands

    handler = getattr(commands, "run_" + args.command)
    try:
        return int(handler(args) or 0)
    except VelomatchError as exc:
        print(f"velomatch {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"velomatch {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
