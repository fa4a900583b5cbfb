"""Stage ``geometry``: front curve, centre thickness, edges, blank size and weight per lens.

Works on ``lenses.<eye>.surfacing`` as the stages before it left it, so the
lens is shaped for the power that will be produced. The model is the
contract's straightforward one (see :mod:`lenslane.plugins.optics.thickness`): a
spherical front of true power at the lens index, a toric back solved from the
thick-lens back vertex power per principal meridian, exact sags, the optical
centre at the monocular PD and fitting height, prescribed prism as a wedge.
Every value is proposed as its own change, with the method that made it.
"""
from __future__ import annotations

import math
from functools import lru_cache
from typing import Annotated, NamedTuple

from pydantic import BaseModel, ConfigDict, Field, field_validator

from lenslane import Change, Flag, Stage, hookimpl
from lenslane.plugins.optics.front_curve import (
    FRONT_CURVE_METHODS, ROTATION_DISTANCE_MM, NoBestForm, front_curve, front_curve_method, nearest_stocked_base,
)
from lenslane.plugins.optics.asworn import best_form, off_axis_record
from lenslane.plugins.optics.outline import DEFAULT_EXPONENT, decentration, modelled_outline, optical_centre
from lenslane.plugins.optics.power import power_matrix, spherical_equivalent
from lenslane.plugins.optics.tilt import tilt_obliquity
from lenslane.plugins.optics.thickness import (
    EdgedLens, LensNotMakeable, LensRequest, LensShape, OutlineGrid, edged_lenses, lens_weight_g, outline_grid,
)

SURFACES_SOURCE = ("Jalie, The Principles of Ophthalmic Lenses: surface power, exact sag, thick-lens back vertex "
                   "power; Euler's theorem for the toric back")
COMMON_PRACTICE = "Common practice"
EXACT_BEST_FORM = "exact_best_form"
EXACT_BEST_FORM_METHOD = ("the stocked base whose lens (this surfacing power, its own centre thickness, worn at the "
                          "frame's tilt) has the least RMS of the largest meridional error at 20° and 30° of gaze up, "
                          "down, nasal and temporal, by real-ray trace with the eye turning about its centre of "
                          "rotation; errors relative to the lens's own power on the line of sight")
EXACT_BEST_FORM_SOURCE = ("Spencer & Murty, JOSA 52:672, 1962 (ray trace); Thibos, Wheeler & Horner, Optom Vis Sci "
                          "74:367, 1997 (power vectors); Atchison, Applied Optics 31:3579, 1992 (lens form judged "
                          "off axis)")

Thickness = Annotated[float, Field(gt=0, le=10)]


class ThicknessMinimums(BaseModel):
    """A material's minimum thicknesses, mm: the centre (minus, plano and mixed lenses) and the edge per mount."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    center_mm: Thickness
    edge_full_rim_mm: Thickness = 1.0
    edge_grooved_mm: Thickness = 1.5
    edge_drilled_mm: Thickness = 2.0

    def edge_for(self, mount: str) -> float:
        return getattr(self, f"edge_{mount}_mm")


# Common practice, from memory (DOMAIN.md): the lab's config is meant to replace them.
DEFAULT_MINIMUMS: dict[str, ThicknessMinimums] = {
    "resin-1.50": ThicknessMinimums(center_mm=2.0),
    "urethane-1.53": ThicknessMinimums(center_mm=1.0),
    "polycarbonate-1.59": ThicknessMinimums(center_mm=1.0),
    "resin-1.60": ThicknessMinimums(center_mm=1.2),
    "resin-1.67": ThicknessMinimums(center_mm=1.3),
    "resin-1.74": ThicknessMinimums(center_mm=1.5),
    "glass-1.52": ThicknessMinimums(center_mm=2.0),
}
OTHER_MINIMUMS = ThicknessMinimums(center_mm=2.0)

# Stocked semi-finished base curves, true power at the lens index (an invented, plausible stock).
_LOW_INDEX_BASES = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0]
_HIGH_INDEX_BASES = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]
DEFAULT_BASES: dict[str, list[float]] = {
    "resin-1.50": _LOW_INDEX_BASES,
    "urethane-1.53": _LOW_INDEX_BASES,
    "polycarbonate-1.59": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0],
    "resin-1.60": _HIGH_INDEX_BASES,
    "resin-1.67": _HIGH_INDEX_BASES,
    "resin-1.74": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
    "glass-1.52": _LOW_INDEX_BASES,
}

#: A requested front curve within this of a stocked base counts as stocked (D).
STOCK_MATCH_D = 0.005

BaseCurve = Annotated[float, Field(ge=0, le=14)]


class GeometryParams(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    front_curve_method: str = "vogel"
    """How to choose the front curve when the order requests none: "vogel", "tscherning", or "exact_best_form"
    (the stocked base whose lens, traced with real rays, has the least error at 20° and 30° of gaze)."""
    rotation_distance_mm: Annotated[float, Field(gt=10, le=40)] = ROTATION_DISTANCE_MM
    """Lens to the eye's centre of rotation, for the best form (mm)."""
    base_curves_d: dict[str, Annotated[list[BaseCurve], Field(min_length=1)]] = Field(
        default_factory=lambda: {k: list(v) for k, v in DEFAULT_BASES.items()})
    """Stocked base curves per material (true power at the lens index, D); merged over the defaults."""
    other_base_curves_d: Annotated[list[BaseCurve], Field(min_length=1)] = Field(
        default_factory=lambda: list(_LOW_INDEX_BASES))
    """Stocked base curves for a material the table does not name."""
    minimum_thickness: dict[str, ThicknessMinimums] = Field(default_factory=lambda: dict(DEFAULT_MINIMUMS))
    """Minimum centre and edge thicknesses per material (mm); merged over the defaults."""
    other_minimum_thickness: ThicknessMinimums = OTHER_MINIMUMS
    """Minimums for a material the table does not name."""
    blank_allowance_mm: Annotated[float, Field(ge=0, le=10)] = 2.0
    """Added to twice the farthest outline point from the optical centre (mm)."""
    outline_exponent_without_ed: Annotated[float, Field(ge=2, le=60)] = DEFAULT_EXPONENT
    """Superellipse exponent of the modelled outline when the order gives neither outline nor ED."""

    @field_validator("front_curve_method")
    @classmethod
    def _known_method(cls, value: str) -> str:
        if value != EXACT_BEST_FORM:
            front_curve_method(value)  # raises ValueError naming the known methods
        return value

    @field_validator("base_curves_d")
    @classmethod
    def _merge_bases(cls, value: dict[str, list[float]]) -> dict[str, list[float]]:
        return {**{k: list(v) for k, v in DEFAULT_BASES.items()}, **value}

    @field_validator("minimum_thickness")
    @classmethod
    def _merge_minimums(cls, value: dict[str, ThicknessMinimums]) -> dict[str, ThicknessMinimums]:
        return {**DEFAULT_MINIMUMS, **value}


DESIGN_ASSUMPTIONS: dict[str, tuple[str, ...]] = {
    "single_vision": (),
    "progressive": (
        "progressive: the distance power is taken over the whole lens; the power progression toward the add "
        "is not modelled, so the lower part may differ by a few tenths of a millimetre",
        "progressive: the optical centre is taken at the fitting point (monocular PD and fitting height); "
        "no prism-reference offset and no thinning prism unless prescribed",
    ),
    "bifocal": (
        "bifocal: the distance power is taken over the whole lens; the segment's added power and ledge "
        "are not modelled",
        "bifocal: the distance optical centre is taken at the fitting height",
    ),
}


#: The geometry model's assumptions, between the outline's own sentence and the design's.
GEOMETRY_ASSUMPTIONS: tuple[str, ...] = (
    "spherical front and toric back, exact sags, both vertices at the optical centre",
    "optical centre at the monocular PD and the fitting height (half the box height when none is given)",
    "prescribed prism as a plane wedge through the optical centre, thicker toward the base",
)

# How each geometry value is worked out, and from which source, for the geometry change's record.
_CENTRE_THICKNESS_METHOD = ("least centre thickness meeting the binding minimum ({binding}); "
                            "back surface F2 = Fv − F1/(1 − (t/n)F1) per principal meridian")
_EDGES_METHOD = ("thickness along the outline: centre − exact front sag + exact back sag "
                 "(toric back by Euler's theorem) + prism wedge")
_WEIGHT_METHOD = ("thickness integrated over the outline area (polar trapezoid over about 120 of the radii × 6-point "
                  "Gauss–Legendre; centre thickness and prism wedge over every sector exactly) × density")
_OPTICAL_CENTRE_METHOD = "decentration (A + DBL)/2 − PD toward the nose, height − B/2 up"
_ASSUMPTIONS_METHOD = "statement of the geometry model"
_BLANK_SOURCE = "Dispensing texts, e.g. Brooks & Borish, System for Ophthalmic Dispensing"
_WEIGHT_SOURCE = "Jalie, The Principles of Ophthalmic Lenses (weight = volume × density)"
_OPTICAL_CENTRE_SOURCE = "ISO 8624 (boxing system)"


@lru_cache(maxsize=64)
def _record_texts(front_method: str, front_source: str, binding: str, blank_method: str) -> tuple[str, str]:
    """The geometry change's ``method`` (``"<value>: <method>; …"``) and ``source`` (each source once).

    Only the front curve's method and source, the binding minimum and the
    blank's allowance vary, over a handful of values, so the texts are kept
    once made.
    """
    values = (  # each value: its method, its source
        ("front_curve_d", front_method, front_source),
        ("center_thickness_mm", _CENTRE_THICKNESS_METHOD.format(binding=binding), SURFACES_SOURCE),
        ("edge_min_mm", _EDGES_METHOD, SURFACES_SOURCE),
        ("edge_max_mm", _EDGES_METHOD, SURFACES_SOURCE),
        ("blank_min_diameter_mm", blank_method, _BLANK_SOURCE),
        ("weight_g", _WEIGHT_METHOD, _WEIGHT_SOURCE),
        ("optical_centre_mm", _OPTICAL_CENTRE_METHOD, _OPTICAL_CENTRE_SOURCE),
        ("assumptions", _ASSUMPTIONS_METHOD, COMMON_PRACTICE),
    )
    return ("; ".join(f"{name}: {method}" for name, method, _ in values),
            "; ".join(dict.fromkeys(source for _, _, source in values)))


class FrontCurveChoice(NamedTuple):
    """The chosen front curve (D), how and from what it was chosen, and any flags it raised."""

    curve_d: float
    method: str
    source: str
    inputs: dict
    flags: list


class _Shared(NamedTuple):
    """What both lenses of an order share: the outline, the material, its minimums and stock, the fixed texts.

    Worked out once per order, so that each eye's lens only adds what is its own.
    """

    grid: OutlineGrid
    material_key: str
    material: object
    minimums: ThicknessMinimums
    min_edge: float
    stocked: list[float]
    assumptions: tuple[str, ...]
    blank_method: str


def _shared(view, params, outline: tuple[OutlineGrid, str]) -> _Shared:
    order = view.order
    frame = order.frame
    grid, outline_note = outline
    material_key = order.lens.material
    minimums = params.minimum_thickness.get(material_key, params.other_minimum_thickness)
    return _Shared(
        grid, material_key, view.material(), minimums, minimums.edge_for(frame.mount),
        params.base_curves_d.get(material_key, params.other_base_curves_d),
        (outline_note, *GEOMETRY_ASSUMPTIONS, *DESIGN_ASSUMPTIONS.get(order.lens.design, ())),
        f"twice the farthest outline point from the optical centre plus {params.blank_allowance_mm:.1f} mm",
    )


def _choose_front_curve(view, eye, sphere, cylinder, shared: _Shared, params, shape: LensShape,
                        centre) -> FrontCurveChoice:
    stocked, material_key, index = shared.stocked, shared.material_key, shared.material.index
    requested = view.order.lens.front_curve_d
    inputs = {"material": material_key, "stocked_d": list(stocked)}
    flags = []
    if requested is not None:
        nearest = nearest_stocked_base(requested, stocked)
        if abs(nearest - requested) > STOCK_MATCH_D:
            flags.append(Flag(
                "front-curve-not-stocked", "warning",
                f"The practice asks for a {requested:.2f} D front curve, which the lab does not stock in "
                f"{material_key} (nearest {nearest:.2f} D): order the blank, or agree the nearest stocked base "
                "with the practice.",
                eye, {"requested_d": requested, "nearest_stocked_d": nearest, "stocked_d": list(stocked)},
            ))
        return FrontCurveChoice(requested, "front curve requested by the practice", "The order",
                                {**inputs, "requested_d": requested}, flags)
    if params.front_curve_method == EXACT_BEST_FORM:
        best = _exact_best_form(view, eye, shape, centre, shared, params)
        if best is not None:
            return best
        flags.append(Flag(
            "front-curve-no-best-form", "info",
            "No stocked base gives a lens that can be made for this power, so none can be judged off axis; "
            "Vogel's rule is used instead. A person may choose another material or design.",
            eye, {"stocked_d": list(stocked), "index": index},
        ))
        method = FRONT_CURVE_METHODS["vogel"]
    else:
        method = front_curve_method(params.front_curve_method)
    try:
        wanted = front_curve(method.name, sphere, cylinder, index, params.rotation_distance_mm)
    except NoBestForm as exc:
        flags.append(Flag(
            "front-curve-no-best-form", "info",
            f"{exc}; Vogel's rule is used instead. A person may choose an aspheric design for this power.",
            eye, {"spherical_equivalent_d": spherical_equivalent(sphere, cylinder), "index": index},
        ))
        method = FRONT_CURVE_METHODS["vogel"]
        wanted = front_curve(method.name, sphere, cylinder, index, params.rotation_distance_mm)
    inputs["spherical_equivalent_d"] = spherical_equivalent(sphere, cylinder)
    inputs["computed_d"] = wanted
    if method.name == "tscherning":
        inputs["index"] = index
        inputs["rotation_distance_mm"] = params.rotation_distance_mm
    return FrontCurveChoice(nearest_stocked_base(wanted, stocked),
                            f"{method.title}, snapped to the nearest stocked base", method.source, inputs, flags)


def _outline(view, params):
    """The right lens's outline (an :func:`outline_grid`) and a sentence on where it comes from."""
    frame = view.order.frame
    if frame.outline_mm is not None:
        return outline_grid(frame.outline_mm), f"outline from the order ({len(frame.outline_mm)} radii about the box centre)"
    return _modelled(frame.box_width_mm, frame.box_height_mm, frame.effective_diameter_mm,
                     params.outline_exponent_without_ed)


@lru_cache(maxsize=256)
def _modelled(box_width_mm, box_height_mm, effective_diameter_mm, exponent_without_ed):
    # Frames repeat from order to order: the modelled outline's grid and its sentence are kept.
    shape = modelled_outline(box_width_mm, box_height_mm, effective_diameter_mm, exponent_without_ed)
    if effective_diameter_mm is None:
        basis = f"the lab's exponent m = {shape.exponent:g}, as the order gives no effective diameter"
    else:
        basis = f"m = {shape.exponent:.2f} fitted so that twice the longest radius is the ED {effective_diameter_mm:.1f} mm"
    return outline_grid(shape.radii_mm), (
        f"outline modelled as the superellipse |x/(A/2)|^m + |y/(B/2)|^m = 1 with A {box_width_mm:.1f} mm, "
        f"B {box_height_mm:.1f} mm and {basis}"
    )


class _Prepared(NamedTuple):
    """One eye's lens, ready for the thickness solution: what the stage chose and measured before it."""

    sphere: float
    cylinder: float
    axis: float
    choice: FrontCurveChoice
    offset: object
    centre: tuple[float, float]
    shape: LensShape


def _prepare(view, eye, surfacing: dict, shared: _Shared, params, front_d: float | None = None) -> _Prepared:
    """The eye's front curve (chosen, or ``front_d`` when given), optical centre and shape, for its surfacing power."""
    order = view.order
    sphere, cylinder, axis = surfacing["sphere"], surfacing.get("cylinder", 0.0), surfacing.get("axis", 180)
    frame = order.frame
    fit = getattr(order.fit, eye)
    offset = decentration(frame.box_width_mm, frame.bridge_mm, frame.box_height_mm, fit.pd_mm, fit.height_mm)
    centre = optical_centre(eye, offset)
    prism = view.get(f"lenses.{eye}.prism") or {}
    shape = LensShape(0.0 if front_d is None else front_d, power_matrix(sphere, cylinder, axis),
                      shared.material.index, float(prism.get("amount", 0.0)), float(prism.get("base_deg", 0.0)))
    if front_d is None:
        choice = _choose_front_curve(view, eye, sphere, cylinder, shared, params, shape, centre)
        shape = shape._replace(front_d=choice.curve_d)
    else:
        choice = FrontCurveChoice(front_d, "front curve given", "", {}, [])
    return _Prepared(sphere, cylinder, axis, choice, offset, centre, shape)


def _centre_thickness(shared: _Shared, eye: str, centre, shape: LensShape) -> float:
    """The solved centre thickness (mm) of one lens; :class:`LensNotMakeable` when there is none."""
    solved = edged_lenses(shared.grid, [LensRequest(eye, centre, shape, shared.minimums.center_mm, shared.min_edge)])[0]
    if isinstance(solved, LensNotMakeable):
        raise solved
    return solved.center_mm


def worn_tilt(view, eye: str):
    """The obliquity and tangential direction at which the order's frame holds this eye's lens (0° when not given)."""
    fit = view.order.fit
    return tilt_obliquity(fit.pantoscopic_deg or 0.0, fit.face_form_deg or 0.0, eye)


def made_lens(view, eye: str, surfacing: dict, params: "GeometryParams | None" = None,
              front_d: float | None = None) -> tuple[float, float]:
    """The front curve (D) and centre thickness (mm) this stage gives the eye's lens for a surfacing power.

    For the stages before this one whose optics depend on the lens's shape (the
    exact tilt compensation): the same choice and the same thickness solution as
    :func:`run`, with ``params`` the lab's ``[stages.geometry]``; ``front_d``
    fixes the front curve instead of choosing it. Raises
    :class:`~lenslane.plugins.optics.thickness.LensNotMakeable`.
    """
    params = params or GeometryParams()
    shared = _shared(view, params, _outline(view, params))
    lens = _prepare(view, eye, surfacing, shared, params, front_d)
    return lens.shape.front_d, _centre_thickness(shared, eye, lens.centre, lens.shape)


def _exact_best_form(view, eye, shape: LensShape, centre, shared: _Shared, params) -> FrontCurveChoice | None:
    """The stocked base whose lens has the least off-axis error by real-ray trace; None when no base makes a lens."""
    index = shared.material.index
    theta, tangential = worn_tilt(view, eye)
    try:
        best = best_form(shape.surfacing, index, theta, tangential, eye, shared.stocked,
                         lambda base: _centre_thickness(shared, eye, centre, shape._replace(front_d=base)),
                         params.rotation_distance_mm)
    except ValueError:
        return None
    chosen = best.bases_d.index(best.base_d)
    inputs = {
        "material": shared.material_key, "stocked_d": list(shared.stocked), "index": index,
        "rotation_distance_mm": params.rotation_distance_mm, "obliquity_deg": math.degrees(theta),
        "candidates": [{"base_d": base, "score_d": float(score) if math.isfinite(score) else None,
                        "center_thickness_mm": float(centre_mm)}
                       for base, score, centre_mm in zip(best.bases_d, best.score_d, best.center_mm)],
        "off_axis": off_axis_record(best.errors, chosen),
    }
    return FrontCurveChoice(best.base_d, EXACT_BEST_FORM_METHOD, EXACT_BEST_FORM_SOURCE, inputs, [])


def _not_makeable(eye, lens: _Prepared, shared: _Shared, reason: LensNotMakeable) -> Flag:
    front = lens.choice.curve_d
    return Flag(
        "lens-not-makeable", "review",
        f"The lens cannot be made as ordered: {reason} (front {front:.2f} D, surfacing {lens.sphere:+.2f} "
        f"{lens.cylinder:+.2f} × {lens.axis:.0f}, {shared.material_key}). Choose another front curve, material, "
        "frame or design with the practice.",
        eye, {"front_curve_d": front, "sphere": lens.sphere, "cylinder": lens.cylinder, "axis": lens.axis},
    )


def _eye_geometry(view, eye, params, shared: _Shared, lens: _Prepared, solved: EdgedLens) -> Change:
    """The change that records one eye's geometry, each value with its method, source and inputs."""
    order = view.order
    frame = order.frame
    fit = getattr(order.fit, eye)
    choice, offset, shape = lens.choice, lens.offset, lens.shape
    minimums, min_edge, index, front = shared.minimums, shared.min_edge, shape.index, choice.curve_d
    allowance = params.blank_allowance_mm
    volume = solved.volume_mm3
    # The rule of blank_diameter_mm, from the distances the solution has already worked out.
    blank = 2.0 * solved.farthest_mm + allowance
    weight = lens_weight_g(volume, shared.material.density)

    binding = solved.binding
    binding_text = (f"the minimum centre thickness {minimums.center_mm:.1f} mm" if binding == "centre"
                    else f"the minimum edge thickness {min_edge:.1f} mm for a {frame.mount.replace('_', ' ')} mount")
    geometry = {
        "front_curve_d": front, "center_thickness_mm": solved.center_mm,
        "edge_min_mm": solved.edge_min_mm, "edge_max_mm": solved.edge_max_mm,
        "blank_min_diameter_mm": blank, "weight_g": weight,
        "optical_centre_mm": list(lens.centre), "assumptions": list(shared.assumptions),
    }
    # One record for the eye's geometry: every value in it, each value's method and source, and the
    # inputs each used — so an auditor reads the lens in one place, and the log stays small. The
    # methods and sources of the values the order does not vary are the module's constants.
    edges_inputs = {"outline_points": shared.grid.radii.size, "prism_amount": shape.prism_delta,
                    "prism_base_deg": shape.prism_base_deg}
    inputs = {
        "index": index, "material": shared.material_key,
        "front_curve_d": choice.inputs,
        "center_thickness_mm": {"binding": binding, "min_center_mm": minimums.center_mm, "min_edge_mm": min_edge,
                                "mount": frame.mount, "index": index},
        "edge_min_mm": edges_inputs,
        "edge_max_mm": edges_inputs,
        "blank_min_diameter_mm": {"farthest_mm": (blank - allowance) / 2.0, "allowance_mm": allowance,
                                  "decentration_in_mm": offset.inward_mm, "decentration_up_mm": offset.upward_mm},
        "weight_g": {"volume_cm3": volume / 1000.0, "density_g_cm3": shared.material.density},
        "optical_centre_mm": {"pd_mm": fit.pd_mm, "height_mm": fit.height_mm},
        "assumptions": {"design": order.lens.design},
    }
    return Change(
        f"lenses.{eye}.geometry", geometry,
        f"The lens for this frame: front curve {front:.2f} D, centre thickness {solved.center_mm:.1f} mm "
        f"(the least that meets {binding_text}), edge {solved.edge_min_mm:.1f}–{solved.edge_max_mm:.1f} mm, "
        f"blank at least {blank:.1f} mm, {weight:.1f} g.",
        *_record_texts(choice.method, choice.source, binding, shared.blank_method),
        inputs,
    )


def run(view, params: GeometryParams):
    outline = _outline(view, params)
    surfacings = [view.get(f"lenses.{eye}.surfacing") for eye in view.eyes]
    if all(surfacing is None for surfacing in surfacings):
        shared = None  # no lens to make, only flags to raise: the material is not looked up
    else:
        shared = _shared(view, params, outline)
    prepared = [None if surfacing is None else _prepare(view, eye, surfacing, shared, params)
                for eye, surfacing in zip(view.eyes, surfacings)]
    # Both lenses of the pair share the outline: their thicknesses are solved together, in one set of arrays.
    requests = [LensRequest(eye, lens.centre, lens.shape, shared.minimums.center_mm, shared.min_edge)
                for eye, lens in zip(view.eyes, prepared) if lens is not None]
    solutions = iter(edged_lenses(shared.grid, requests) if requests else ())
    for eye, lens in zip(view.eyes, prepared):
        if lens is None:
            yield Flag("geometry-no-power", "review",
                       "No surfacing power reached the geometry stage (is normalize in the chain?): "
                       "the lens geometry was not worked out; check the lab's chain.", eye)
            continue
        yield from lens.choice.flags
        solved = next(solutions)
        if isinstance(solved, LensNotMakeable):
            yield _not_makeable(eye, lens, shared, solved)
        else:
            yield _eye_geometry(view, eye, params, shared, lens, solved)


@hookimpl
def lenslane_stages():
    return [Stage(
        name="geometry", run=run, writes=("lenses.*.geometry",), params=GeometryParams,
        description="front curve, centre thickness, edges, blank size and weight per lens",
    )]
