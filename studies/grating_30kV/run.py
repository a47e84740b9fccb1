"""Worked study: a fused-silica grating for a 30 kV scanning-microscope beam and a 2 um
infrared laser (an invented scenario; see README.md).

    .venv/bin/python studies/grating_30kV/run.py [--quick] [--out DIR] [--overwrite]

Phase-matched start (Lambda = beta lambda), inverse design of tooth height and duty
cycle for the structure factor kappa, kappa and damage factor before and after, the
decay of the coupling with height against beta gamma lambda / 2 pi, a Meep
cross-check, a GDSII layout and an HTML report.  ``velomatch demo`` runs the quick
version of this study.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from designer.cli import SAFETY_NOTE  # noqa: E402
from designer.demo import (  # noqa: E402
    prepare_study_dir,
    print_closing,
    run_grating_study,
    write_manifest,
)


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="coarse grid, 15 iterations (~1 min)")
    p.add_argument("--out", default=str(HERE / "output"), help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier run in --out")
    args = p.parse_args(argv)

    # the scenario: everything is in the spec file
    spec_text = (HERE / "grating.toml").read_text()
    out = prepare_study_dir(args.out, overwrite=args.overwrite)
    try:
        summary = run_grating_study(spec_text, out, quick=args.quick)
    finally:
        write_manifest(out)
    print_closing(out, summary)
    print(SAFETY_NOTE)
    return summary


if __name__ == "__main__":
    main()
