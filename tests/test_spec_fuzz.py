"""Property-based checks of every command's input readers (hypothesis).

Random bytes, random and mutated TOML documents and random option values go through
the readers the commands use (spec files; ``[optimize]`` for design, ``[layout]`` for
export, ``--vary`` for sweep, the options of beam).  Property: each input ends in a
valid result or in one :class:`~designer.errors.VelomatchError` (a SpecError for spec
content) whose message is a single line — never another exception.  Common practice
(fuzzing a parser's error path), no source.  Bounded: fixed example counts, no deadline.
"""

import copy
import math
import tomllib
from pathlib import Path

import pytest
import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from designer.errors import SpecError, UsageError, VelomatchError
from designer.spec import load_spec, parse_spec

SETTINGS = dict(deadline=None, derandomize=True, suppress_health_check=list(HealthCheck),
                database=None)

BASES = {
    "film": """\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
peak_field_V_per_m = 1.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
pattern = "slits"
period_nm = 400.0
slit_widths_nm = [100.0]
slit_centers_nm = [200.0]
[path]
x_nm = 0.0
[solver]
grid_step_nm = 10.0
[fabrication]
min_feature_nm = 50.0
[optimize]
variables = { thickness_nm = [40.0, 150.0] }
iterations = 10
[layout]
line_length_um = 10.0
""",
    "grating": """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 2000.0
fluence_mJ_per_cm2 = 1.0
duration_fs = 100.0
[sample]
family = "grating"
material = { n = 1.45, k = 0.001 }
period_nm = "phase-matched"
order = 1
duty_cycle = 0.5
tooth_height_nm = 330.0
substrate = true
[path]
offset_nm = 50.0
length_um = 20.0
electron_spot_nm = 10.0
[spectrum]
zlp_fwhm_eV = 0.6
[optimize]
objective = "structure_factor"
variables = ["tooth_height_nm", "duty_cycle"]
""",
    "prism": """\
[beam]
voltage_kV = 120.0
[laser]
wavelength_nm = 800.0
angle_deg = "phase-matched"
from = "below"
peak_intensity_W_per_cm2 = 4.0e5
duration_fs = 250.0
[sample]
family = "prism"
material = "silicon_nitride"
layers = [{ material = { eps = [2.0, 0.1] }, thickness_nm = 20.0 }]
[path]
offset_nm = 30.0
length_um = 10.0
""",
}
RAWS = {name: tomllib.loads(text) for name, text in BASES.items()}

# values of every kind a TOML document can hold, extremes included
scalars = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**30, 10**30),
    st.booleans(), st.text(max_size=12),
    st.sampled_from([0, -1, 1e-300, 1e300, 0.5, "phase-matched", "none", "fdfd", "slits",
                     "silicon", "gold", "above", "nk.csv", "/dev/zero", ""]))
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=3)),
    max_leaves=8)


def _paths(node, prefix=()):
    """Every (path, value) of a raw tree; lists indexed by int."""
    out = []
    items = node.items() if isinstance(node, dict) else enumerate(node) \
        if isinstance(node, list) else ()
    for key, value in items:
        out.append((prefix + (key,), value))
        out.extend(_paths(value, prefix + (key,)))
    return out


@st.composite
def mutated(draw):
    """A base spec with 1-3 random edits: set a value, delete a key, add a key."""
    name = draw(st.sampled_from(sorted(RAWS)))
    raw = copy.deepcopy(RAWS[name])
    for _ in range(draw(st.integers(1, 3))):
        paths = _paths(raw)
        if not paths:
            break
        path, _ = draw(st.sampled_from(paths))
        parent = raw
        for key in path[:-1]:
            parent = parent[key]
        action = draw(st.sampled_from(["set", "set", "delete", "add"]))
        if action == "set":
            parent[path[-1]] = draw(values)
        elif action == "delete":
            del parent[path[-1]]
        elif isinstance(parent, dict):
            parent[draw(st.text(min_size=1, max_size=10))] = draw(values)
    return raw


def _one_error_line(exc: VelomatchError) -> None:
    text = str(exc)
    assert text and "\n" not in text, text
    assert len(text) < 2000


def _read(raw, source="<fuzz>", base_dir=None):
    """What evaluate/spectrum/sweep/compare (the spec), design (``[optimize]``) and
    export (``[layout]``) read from one spec tree."""
    from designer.design import parse_optimize
    from designer.export import parse_layout

    spec = parse_spec(raw, source=source, base_dir=base_dir)
    for step in (lambda: parse_optimize(spec),
                 lambda: parse_layout(spec.layout, spec.source)):
        try:
            step()
        except VelomatchError as exc:
            _one_error_line(exc)
    return spec


@settings(max_examples=120, **SETTINGS)
@given(mutated())
def test_mutated_specs_parse_or_give_one_spec_error(raw):
    try:
        _read(raw)
    except SpecError as exc:
        _one_error_line(exc)


@settings(max_examples=40, **SETTINGS)
@given(st.binary(max_size=300) | st.text(max_size=300).map(str.encode))
def test_random_bytes_as_a_spec_file(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("fuzz") / "spec.toml"
    path.write_bytes(data)
    try:
        load_spec(path)
    except SpecError as exc:
        _one_error_line(exc)


@settings(max_examples=40, **SETTINGS)
@given(mutated(), st.integers(0, 10_000), st.binary(max_size=8))
def test_damaged_toml_text(tmp_path_factory, raw, cut, junk):
    """A valid document's text cut, spliced with junk bytes, or nested deeply."""
    text = tomli_w.dumps(_finite(raw)).encode()
    cut = cut % (len(text) + 1)
    path = tmp_path_factory.mktemp("fuzz") / "spec.toml"
    path.write_bytes(text[:cut] + junk + text[cut:])
    try:
        load_spec(path)
    except SpecError as exc:
        _one_error_line(exc)


def _finite(node):
    # tomli_w writes nan/inf, but keep the splice test about structure, not values
    if isinstance(node, dict):
        return {k: _finite(v) for k, v in node.items()}
    if isinstance(node, list):
        return [_finite(v) for v in node]
    if isinstance(node, float) and not math.isfinite(node):
        return 0.0
    return node


@settings(max_examples=40, **SETTINGS)
@given(st.text(max_size=40), st.text(max_size=40))
def test_sweep_vary_options(a, b):
    from designer.sweep import plan_sweep

    for vary in ([a], [a, b], ["laser.angle_deg=" + a], ["sample.thickness_nm=1:" + b]):
        try:
            plan_sweep(RAWS["film"], vary, check=True)
        except (SpecError, UsageError) as exc:
            _one_error_line(exc)


option = st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                   st.sampled_from([0.0, -1.0, 1e-300, 1e300, 1e-30]))


@settings(max_examples=40, **SETTINGS)
@given(option, option, st.integers(-5, 5), st.lists(option, max_size=3))
def test_beam_options(voltage, wavelength, order, indices):
    from types import SimpleNamespace

    from designer.commands import run_beam

    args = SimpleNamespace(voltage_kV=voltage, wavelength_nm=wavelength, order=order,
                           index=indices, json=True)
    try:
        run_beam(args)
    except UsageError as exc:
        _one_error_line(exc)


@pytest.mark.parametrize("name", sorted(BASES))
def test_bases_are_valid(name):
    """The fuzzing starts from valid specs (else it tests nothing but the error path)."""
    _read(RAWS[name], base_dir=Path("."))
