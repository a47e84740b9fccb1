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

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from designer.demo import (  # noqa: E402
    print_closing,
    run_grating_study,
    study_main,
    study_script,
)


def main(argv: list[str] | None = None) -> dict:
    # the scenario: everything is in the spec file
    spec_text = (HERE / "grating.toml").read_text()
    return study_main(argv, description=__doc__.splitlines()[0], default_out=HERE / "output",
                      quick_help="coarse grid, 15 iterations (~1 min)",
                      run=lambda out, quick: run_grating_study(spec_text, out, quick=quick),
                      closing=print_closing)


if __name__ == "__main__":
    sys.exit(study_script(main))
