"""velomatch from Python: the functions behind the commands, for scripts and notebooks.

    from designer import api as vm

    spec = vm.load_spec("sample.toml")                 # or vm.build_spec({...})
    result = vm.evaluate(spec)                         # = velomatch evaluate --json
    spec2 = vm.with_values(spec, {"sample.thickness_nm": 80.0, "laser.angle_deg": 40.0})
    sweep = vm.sweep(spec, ["laser.angle_deg=0:60:13"], "map/")          # sweep.json
    run = vm.design(spec, "run1/")                     # design.toml, evaluation.json, ...
    layout = vm.export(run["design_spec"], "chip.gds", preview="chip.svg")

Every function calls what the matching ``velomatch`` command calls and returns what
the command writes as JSON (a dict: SI units, the same keys), so a notebook and the
command line give the same numbers.  Specs are :class:`designer.spec.Spec` objects
(frozen; change them with :func:`with_values`).  Errors are the commands' errors
(:class:`designer.errors.VelomatchError` and subclasses, each with one clear message).
Files are written only where an argument asks for them, never overwritten without
``overwrite=True``.  Progress goes to stderr as on the command line (``quiet=True``
silences it).

Cautions: results at real-laser fields (1 MV/m and more) carry a ``cautions`` list;
the laser, high voltage and X-ray hazards are for your local laser-safety officer,
local codes and licensed practice (README, Cautions).
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import io as _io
import json
import sys
import tempfile
from pathlib import Path
from typing import Any, Iterable

from designer.runtime import configure_jax_cache
from designer.spec import Spec

configure_jax_cache()

__all__ = ["load_spec", "build_spec", "with_values", "evaluate", "evaluation", "figure",
           "spectrum", "sweep", "compare", "design", "export", "material_catalogue"]


def _say(quiet: bool):
    if quiet:
        return None
    return lambda message: print(f"  {message}", file=sys.stderr, flush=True)


# -- specs ---------------------------------------------------------------------------

def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file (TOML), as every command does."""
    from designer.spec import load_spec as _load

    return _load(path)


def build_spec(tables: dict | str, *, base_dir: str | Path | None = None,
               source: str = "<python>") -> Spec:
    """A spec from a dict of tables (as TOML would give) or from TOML text.

    ``base_dir`` resolves relative file names inside the spec (material tables,
    density files); ``source`` names the spec in error messages.
    """
    import tomllib

    from designer.errors import SpecError
    from designer.spec import parse_spec

    if isinstance(tables, str):
        try:
            tables = tomllib.loads(tables)
        except tomllib.TOMLDecodeError as exc:
            raise SpecError(source, None, f"malformed TOML: {exc}") from None
    return parse_spec(tables, source=source,
                      base_dir=None if base_dir is None else Path(base_dir).resolve())


def with_values(spec: Spec, values: dict[str, Any]) -> Spec:
    """A new spec with dotted keys set (``"sample.thickness_nm"``, ``"laser.angle_deg"``;
    the table may be left out for sample keys, as in ``velomatch sweep --vary``)."""
    from designer.spec import parse_spec
    from designer.sweep import point_raw, resolve_sweep_key

    raw = copy.deepcopy(spec.raw)
    resolved = {resolve_sweep_key(raw, k, source=spec.source): v for k, v in values.items()}
    return parse_spec(point_raw(raw, resolved), source=spec.source, base_dir=spec.base_dir)


def _spec(spec: Spec | str | Path) -> Spec:
    return spec if isinstance(spec, Spec) else load_spec(spec)


# -- evaluate, spectrum ----------------------------------------------------------------

def evaluation(spec: Spec | str | Path, *, grid_step_nm: float | None = None,
               quiet: bool = False):
    """The full :class:`designer.evaluate.Evaluation` (fields, layout, maps) of a spec:
    for pictures and your own analysis.  :func:`evaluate` gives its JSON form."""
    from designer.evaluate import evaluate as _evaluate

    return _evaluate(_spec(spec), grid_step_m=None if grid_step_nm is None
                     else grid_step_nm * 1e-9, progress=_say(quiet))


def evaluate(spec: Spec | str | Path, *, plot: str | Path | None = None,
             report: str | Path | None = None, quiet: bool = False) -> dict:
    """``velomatch evaluate --json``: coupling figures, the sample as evaluated, notes,
    cautions and provenance.  ``plot``/``report`` also write the picture / HTML page."""
    from designer import io as vio
    from designer.evaluate import evaluation_json

    ev = evaluation(spec, quiet=quiet)
    result = evaluation_json(ev)
    if plot is not None:
        vio.save_figure(figure(ev), plot)
    if report is not None:
        from designer.report import evaluation_report

        vio.write_atomic(report, evaluation_report(ev, result))
    return result


def figure(ev):
    """The evaluation picture (a matplotlib Figure) of an :func:`evaluation`."""
    from designer.plots import evaluation_figure

    return evaluation_figure(ev)


def spectrum(spec: Spec | str | Path, *, plot: str | Path | None = None,
             quiet: bool = False) -> dict:
    """``velomatch spectrum --json``: the PINEM lines and the broadened spectrum."""
    from designer.commands import spectrum_picture, spectrum_result
    from designer.evaluate import evaluate as _evaluate

    ev = _evaluate(_spec(spec), refine=False, progress=_say(quiet))
    result, lines = spectrum_result(ev)
    if plot is not None:
        spectrum_picture(plot, result, lines)
    return result


# -- many samples --------------------------------------------------------------------

def sweep(spec: Spec | str | Path, vary: Iterable[str], out_dir: str | Path, *,
          workers: int | None = 0, quiet: bool = False) -> dict:
    """``velomatch sweep``: ``vary`` holds one or two ``"KEY=START:STOP:N"``; writes
    ``out_dir`` (sweep.json, sweep.png, cached points: a repeated call costs nothing)
    and returns the sweep.json object.  ``workers=0`` computes in this process."""
    from designer.sweep import plan_sweep, run_sweep

    spec = _spec(spec)
    plan = plan_sweep(spec.raw, list(vary), source=spec.source, base_dir=spec.base_dir)
    return run_sweep(plan, out_dir, workers=workers, progress=not quiet).data


def compare(specs: Iterable[Spec | str | Path], out_dir: str | Path, *,
            overwrite: bool = False, workers: int | None = 0, quiet: bool = False) -> dict:
    """``velomatch compare``: rank candidates on the first one's beam and laser; writes
    compare.json and report.html into ``out_dir`` and returns the compare.json object."""
    from designer import io as vio
    from designer import report as rp
    from designer.compare import compare_candidates, compare_report, make_candidates

    out = vio.prepare_output_dir(out_dir, overwrite=overwrite)
    candidates, footing = make_candidates([_spec(s) for s in specs])
    data = compare_candidates(candidates, footing, workers=workers, progress=not quiet)
    vio.write_json(out / "compare.json", data)
    rp.write_report(out / "report.html", compare_report(data))
    return data


# -- design and layout ---------------------------------------------------------------

def design(spec: Spec | str | Path, out_dir: str | Path, *, iterations: int | None = None,
           resume: bool = False, overwrite: bool = False, quiet: bool = False) -> dict:
    """``velomatch design``: optimize under the fabrication rules, write ``out_dir``
    (design.toml, evaluation.json, refined.json, comparison.json, pictures, report,
    checkpoint) and return ``{"comparison", "evaluation", "design_spec", "files"}``
    (``design_spec``: the optimized design as a Spec, loaded from design.toml)."""
    from designer import io as vio
    from designer.design import parse_optimize, run_design, write_outputs
    from designer.holes import is_fmm_sample

    spec = _spec(spec)
    if is_fmm_sample(spec):
        from designer.hole_design import design_holes, parse_hole_optimize

        parse_hole_optimize(spec, iterations)     # bad input before the folder is made
        out = vio.prepare_output_dir(out_dir, overwrite=overwrite, resume=resume)
        design_holes(spec, out, iterations=iterations, resume=resume, progress=not quiet,
                     status=_say(quiet))
    else:
        config = parse_optimize(spec, iterations)
        out = vio.prepare_output_dir(out_dir, overwrite=overwrite, resume=resume)
        result = run_design(spec, out, config, resume=resume, status=_say(quiet))
        write_outputs(result, out, status=_say(quiet))
    return {"comparison": json.loads((out / "comparison.json").read_text()),
            "evaluation": json.loads((out / "evaluation.json").read_text()),
            "design_spec": load_spec(out / "design.toml"),
            "files": sorted(str(p) for p in out.iterdir() if p.is_file())}


def export(spec: Spec | str | Path, out: str | Path, *, preview: str | Path | None = None,
           fmt: str | None = None, ignore_rules: bool = False, overwrite: bool = False) -> dict:
    """``velomatch export --json``: the layout file (GDSII/OASIS by suffix or ``fmt``)
    and its summary; raises :class:`designer.errors.DesignRuleError` on violations
    unless ``ignore_rules``.  A spec built in memory is handed over as a temporary
    TOML file (relative file names in it resolve against its ``base_dir``)."""
    from designer.export import export_command
    from designer.spec import dump_spec

    with contextlib.ExitStack() as stack:
        if isinstance(spec, Spec):
            path = Path(spec.source)
            if not path.is_file():
                folder = Path(stack.enter_context(tempfile.TemporaryDirectory()))
                path = folder / "spec.toml"
                path.write_text(dump_spec(_absolute_files(spec)))
        else:
            path = Path(spec)
        args = argparse.Namespace(spec=str(path), out=str(out), format=fmt,
                                  preview=None if preview is None else str(preview),
                                  ignore_rules=ignore_rules, overwrite=overwrite, json=True)
        buf = _io.StringIO()
        with contextlib.redirect_stdout(buf):
            export_command(args)
    return json.loads(buf.getvalue())


def _absolute_files(spec: Spec) -> dict:
    """The spec tree with relative file names made absolute against its base_dir."""
    raw = copy.deepcopy(spec.raw)
    if spec.base_dir is None:
        return raw

    def walk(node):
        if isinstance(node, dict):
            for k, v in node.items():
                if isinstance(v, str) and k.endswith("_file") and not Path(v).is_absolute():
                    node[k] = str(Path(spec.base_dir) / v)
                else:
                    walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)
    walk(raw)
    return raw


def material_catalogue(wavelength_nm: float | None = None) -> list[dict]:
    """``velomatch materials --json``: the catalogue (name, model, valid range, source,
    aliases, and the complex index at ``wavelength_nm`` when given)."""
    from designer.commands import run_materials

    buf = _io.StringIO()
    with contextlib.redirect_stdout(buf):
        run_materials(argparse.Namespace(wavelength_nm=wavelength_nm, json=True))
    return json.loads(buf.getvalue())["materials"]
