"""Sample families: typed parameters -> permittivity on the FDFD grid, differentiably.

``get_family(name)`` returns a module with the family API:

    parse(reader, ctx) -> Params          to_table(params) -> dict
    variables(params) -> {key: (value, lo, hi)}   (spec units)
    replace(params, values) -> Params     laser_angle(params, ctx) -> rad
    layout(params, ctx, grid_step_m) -> SimulationLayout
    permittivity(params, layout, values=None, density=None) -> (eps_x, eps_z)
                                          (JAX-traceable in values and density)
    layer_stack(params, ctx) -> LayerStack | None
    polygons(params, ctx, layout) -> [Polygon]
    check_path(params, ctx) -> None (SpecError if the electron would hit material)
    features(params) -> [designer.fabrication.Feature]
    draw(ax, params, ctx, layout, **options)   (options: drawing.draw_sample)

Families: ``grating``, ``membrane``, ``prism`` (see their modules).  Grating and
membrane take a free-form density region ``[sample.freeform]`` (designer.families.region;
``params.freeform``); ``density`` is then the projected density of the region cells,
and those families also offer ``freeform_start(params, layout)`` (the spec's density)
and ``freeform_density(params, layout)`` (the binarized pattern that is evaluated).
"""

from __future__ import annotations

from designer.families import grating, membrane, prism
from designer.families.base import (
    Feature,
    LayerStack,
    MaterialRef,
    PathGeometry,
    Polygon,
    SampleContext,
    SimulationLayout,
)

_FAMILIES = {"grating": grating, "membrane": membrane, "prism": prism}
FAMILY_NAMES = tuple(_FAMILIES)

__all__ = ["FAMILY_NAMES", "Feature", "LayerStack", "MaterialRef", "PathGeometry", "Polygon",
           "SampleContext", "SimulationLayout", "get_family"]


def get_family(name: str):
    """The family module called ``name`` (one of FAMILY_NAMES)."""
    try:
        return _FAMILIES[name]
    except KeyError:
        raise ValueError(f"unknown sample family {name!r}; known: "
                         + ", ".join(FAMILY_NAMES)) from None
