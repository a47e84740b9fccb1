"""One design-rule verdict: what `design` reports is what `export` enforces.

For every family, plane and free-form setting, the verdict that `velomatch design`
reports for the spec's own start (designer.design.start_check, before any variable is
moved into its bounds) must equal what `velomatch export` does with the same spec:
write it when the verdict is clean, refuse it (exit 3) with the same violations
otherwise.  Where nothing is moved, the run's own check of its start point
(designer.design._violations, the check behind "design-rule check: clean") must say
the same.
Both sides are computed by the program, so this checks their agreement, not a physical
value; the geometric facts behind the planted violations (a 200 nm wide tooth is
narrower than a 300 nm rule; a column with a solid foot under a void changes
material with depth) are closed-form (common practice, no source).  Spec values are
scenarios of our own.
"""

import numpy as np
import pytest

from designer import design as d
from designer import optimize as opt
from designer.cli import build_parser
from designer.errors import SpecError
from designer.export import DesignRuleError, export_command
from designer.fabrication import check_design
from designer.families import get_family, region
from designer.spec import load_spec

HEAD = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
[solver]
grid_step_nm = 25.0
refine = false
[fabrication]
min_feature_nm = {feature}
min_gap_nm = 40.0
[layout]
line_length_um = 2.0
field_um = 3.0
"""

GRATING = """\
[sample]
family = "grating"
material = "fused_silica"
period_nm = 500.0
duty_cycle = 0.4
tooth_height_nm = 150.0
sides = {sides}
{plane}
{extra}
{freeform}
[path]
length_um = 3.0
{path}
[optimize]
variables = {variables}
iterations = 1
"""

MEMBRANE = """\
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
pattern = "slits"
period_nm = 500.0
slit_widths_nm = [200.0]
{plane}
{freeform}
[path]
x_nm = 0.0
[optimize]
variables = {variables}
iterations = 1
"""

PRISM = """\
[sample]
family = "prism"
material = "silicon"
layers = [{{material = "silicon_nitride", thickness_nm = 50.0}}]
{plane}
[path]
offset_nm = 20.0
length_um = 3.0
[optimize]
variables = ["layers.0.thickness_nm"]
iterations = 1
"""

WAFER = 'plane = "wafer"\ndevice_layer_nm = 2000.0'
CROSS = 'plane = "cross_section"'
FF = "[sample.freeform]\n"


def _grating(sides, plane, freeform):
    extra = "gap_nm = 300.0\nsubstrate = false" if sides == 2 else ""
    path = "" if sides == 2 else "offset_nm = 20.0"
    variables = '["density"]' if freeform is not None else '["duty_cycle"]'
    ff_text = "" if freeform is None else FF + freeform
    return GRATING.format(sides=sides, plane=plane, extra=extra, freeform=ff_text,
                          path=path, variables=variables)


CASES = {
    "grating-1-cross": _grating(1, CROSS, None),
    "grating-2-cross": _grating(2, CROSS, None),
    "grating-1-wafer": _grating(1, WAFER, None),
    "grating-2-wafer": _grating(2, WAFER, None),
    "grating-1-cross-ff-1step": _grating(1, CROSS, ""),
    "grating-1-cross-ff-2steps": _grating(1, CROSS, "etch_steps = 2"),
    "grating-2-cross-ff-mirrored": _grating(2, CROSS, 'upper = "mirrored"'),
    "grating-1-wafer-ff": _grating(1, WAFER, ""),
    "grating-2-wafer-ff-shifted": _grating(2, WAFER, 'upper = "shifted"'),
    "grating-2-wafer-ff-independent": _grating(2, WAFER, 'upper = "independent"'),
    "membrane-cross": MEMBRANE.format(plane=CROSS, freeform="", variables='["thickness_nm"]'),
    "membrane-cross-ff": MEMBRANE.format(plane=CROSS, freeform=FF, variables='["density"]'),
    "prism-cross": PRISM.format(plane=CROSS),
}


def _design_verdict(spec):
    """What `design` reports for the spec's own design (its start): the start check's
    verdict.  When nothing is moved into the bounds, the run's own view of its start
    (the rule check of the problem's start point) must say the same."""
    config = d.parse_optimize(spec)
    problem = d.build_problem(spec, config)
    check = d.start_check(spec, config, problem.grid_step_m)
    if not check["moved"]:
        u0 = opt.to_unit(problem.x_start, problem.box)
        pattern = problem.start_pattern() if problem.chain is not None else None
        assert d._violations(problem, u0, pattern) == check["violations"]
    return check["violations"]


def _export(path, tmp_path, capsys):
    out = tmp_path / "x.gds"
    args = build_parser().parse_args(["export", str(path), "--out", str(out)])
    try:
        code = export_command(args)
    except DesignRuleError:
        err = capsys.readouterr().err
        return "refused", [line.removeprefix("velomatch export: ")
                           for line in err.splitlines() if line.startswith("velomatch export: ")]
    except SpecError as exc:
        return "spec", str(exc)
    capsys.readouterr()
    assert code == 0 and out.exists()
    return "written", []


@pytest.mark.parametrize("feature", [40.0, 300.0], ids=["rules-met", "planted-violation"])
@pytest.mark.parametrize("name", list(CASES))
def test_design_verdict_equals_export(tmp_path, capsys, name, feature):
    path = tmp_path / f"{name}.toml"
    path.write_text(HEAD.format(feature=feature) + CASES[name])
    spec = load_spec(path)
    messages = _design_verdict(spec)
    outcome, printed = _export(path, tmp_path, capsys)
    if outcome == "spec":
        # nothing to draw (a flat prism): design says so instead of "clean"
        assert check_design(spec).not_checked, printed
        return
    if messages:
        assert outcome == "refused" and printed == messages[:20]
    else:
        assert outcome == "written"
    if feature == 300.0 and not name.startswith("prism"):
        assert messages, "a 300 nm minimum feature must catch the 200 nm teeth / bars"


def test_wafer_plane_refused_where_it_has_no_meaning(tmp_path):
    for text, family in ((MEMBRANE.format(plane=WAFER, freeform="", variables="[]"),
                          "membrane"), (PRISM.format(plane=WAFER), "prism")):
        path = tmp_path / f"{family}.toml"
        path.write_text(HEAD.format(feature=40.0) + text)
        with pytest.raises(SpecError) as err:
            load_spec(path)
        assert err.value.key == "sample.plane"


def test_depth_changing_column_is_refused_by_both(tmp_path, capsys):
    # a solid foot under the voids of a one-step pattern: neither design nor export
    # may call it clean
    path = tmp_path / "probe.toml"
    path.write_text(HEAD.format(feature=40.0) + _grating(1, CROSS, ""))
    spec = load_spec(path)
    lay = get_family("grating").layout(spec.sample, spec.context, 25e-9)
    cells = region.region_cells(spec.sample.freeform, lay)
    rho = np.zeros(cells.shape)
    rho[: cells.shape[0] // 2] = 1.0
    rho[:, 0] = 1.0
    np.save(tmp_path / "foot.npy", rho)
    g = lay.grid
    ox, oz = region.pixel_origin(spec.sample.freeform, lay)
    ff_text = (f'density_file = "foot.npy"\npixel_nm = [{g.dx * 1e9!r}, {g.dz * 1e9!r}]\n'
               f"origin_nm = [{ox * 1e9!r}, {oz * 1e9!r}]")
    path = tmp_path / "foot.toml"
    path.write_text(HEAD.format(feature=40.0) + _grating(1, CROSS, ff_text))
    spec = load_spec(path)
    messages = _design_verdict(spec)
    assert any("etch" in m for m in messages)
    outcome, printed = _export(path, tmp_path, capsys)
    assert outcome == "refused" and printed == messages[:20]


def test_membrane_region_not_through_the_film_is_a_finding(tmp_path, capsys):
    # slits are etched through the film: a region over half the film cannot be drawn,
    # and both design and export say so (exit 3), rather than design calling it clean
    text = MEMBRANE.format(plane=CROSS, freeform=FF + "z_nm = [0.0, 50.0]",
                           variables='["density"]')
    path = tmp_path / "half.toml"
    path.write_text(HEAD.format(feature=40.0) + text)
    spec = load_spec(path)
    messages = _design_verdict(spec)
    assert any("region" in m and "span the film" in m for m in messages)
    outcome, printed = _export(path, tmp_path, capsys)
    assert outcome == "refused" and printed == messages[:20]
