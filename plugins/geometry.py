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
from typing import Annotated, Callable, NamedTuple

from pydantic import BaseModel, ConfigDict, Field, field_validator

from lenslane import Change, Flag, Stage, hookimpl
from lenslane.plugins.optics.asworn import best_form, off_axis_record
from lenslane.plugins.optics.front_curve import (
    FRONT_CURVE_METHODS, ROTATION_DISTANCE_MM, FrontCurveMethod, FrontCurveRequest, NoBestForm, front_curve,
    front_curve_method, nearest_stocked_base, register_front_curve_method, stocked_at_least,
)
from lenslane.plugins.optics.outline import (
    DEFAULT_EXPONENT, blank_diameter_from_farthest_mm, decentration, modelled_outline, optical_centre,
)
from lenslane.plugins.optics.power import matrix_of, power_matrix, principal_powers, spherical_equivalent
from lenslane.plugins.optics.prism import resultant_prism
from lenslane.plugins.optics.surfaces import back_surface_power, front_surface_power
from lenslane.plugins.optics.tilt import tilt_obliquity
from lenslane.plugins.optics.thickness import (
    EdgedLens, LensNotMakeable, LensPlacement, OutlineGrid, edged_lens, lens_weight_g, outline_grid,
    place_lens,
)

SURFACES_SOURCE = ("Jalie, The Principles of Ophthalmic Lenses: surface power, exact sag, thick-lens back vertex "
                   "power; Euler's theorem for the toric back")
COMMON_PRACTICE = "Common practice"

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

EXACT_BEST_FORM = "exact_best_form"
EXACT_BEST_FORM_TITLE = (
    "the stocked base whose lens (this surfacing power, its own centre thickness, worn at the frame's tilt) has "
    "the least RMS of the largest meridional error at 20° and 30° of gaze up, down, nasal and temporal, by "
    "real-ray trace with the eye turning about its centre of rotation; errors relative to the lens's own power on "
    "the line of sight")
EXACT_BEST_FORM_SOURCE = ("Spencer & Murty, JOSA 52:672, 1962 (ray trace); Thibos, Wheeler & Horner, Optom Vis Sci "
                          "74:367, 1997 (power vectors); Atchison, Applied Optics 31:3579, 1992 (lens form judged "
                          "off axis)")


def _judged_in_the_stage(request: FrontCurveRequest) -> float:
    # The exact best form judges whole lenses on the lab's stock: only the geometry stage has them.
    raise NoBestForm("the exact best form chooses among the stocked bases' lenses in the geometry stage only")


register_front_curve_method(FrontCurveMethod(EXACT_BEST_FORM, _judged_in_the_stage, EXACT_BEST_FORM_TITLE,
                                             EXACT_BEST_FORM_SOURCE))
Positive = Annotated[float, Field(gt=0)]


def _known_method(value: str) -> str:
    front_curve_method(value)  # raises ValueError naming the known methods
    return value


class FrontCurveBand(BaseModel):
    """A power band with its own front-curve rule or stock: the first band matching the material and power wins."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    materials: list[str] = Field(default_factory=list)
    """The materials the band is for (none listed: every material)."""
    from_d: Annotated[float, Field(ge=-40, le=40)] = -40.0
    """The band's lowest spherical equivalent of the surfacing power (D, included)."""
    to_d: Annotated[float, Field(ge=-40, le=40)] = 40.0
    """The band's highest spherical equivalent (D, excluded)."""
    method: str | None = None
    """The front-curve method in this band (none: the stage's ``front_curve_method``)."""
    base_curves_d: Annotated[list[BaseCurve], Field(min_length=1)] | None = None
    """The bases stocked for this band (none: the material's stock)."""

    @field_validator("method")
    @classmethod
    def _known(cls, value: str | None) -> str | None:
        return value if value is None else _known_method(value)

    def covers(self, material: str, equivalent_d: float) -> bool:
        return (not self.materials or material in self.materials) and self.from_d <= equivalent_d < self.to_d


class HardLimits(BaseModel):
    """What no lab makes (from memory: semi-finished blanks run to about 80–85 mm, and a spectacle lens much
    thicker than about 15 mm or heavier than about 80 g is not surfaced): beyond any, the order is held."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    center_thickness_mm: Positive = 15.0
    edge_thickness_mm: Positive = 15.0
    blank_diameter_mm: Positive = 90.0
    weight_g: Positive = 80.0


class ThinningPrism(BaseModel):
    """The lab's thinning-prism rule for progressives (common practice: yoked base-down prism of about half to
    two-thirds of the add, on plus and high-add lenses)."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    fraction_of_add: Annotated[float, Field(ge=0, le=1)] = 0.5
    """Prism (Δ) per dioptre of add, base down on both lenses alike; 0 switches thinning prism off."""
    plus_from_d: float = 0.0
    """Applied when either lens's vertical meridian is more plus than this (D) ..."""
    add_from_d: Annotated[float, Field(ge=0, le=4)] = 2.5
    """... or the add is at least this (D)."""


class GeometryParams(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    front_curve_method: str = "vogel"
    """How to choose the front curve when the order requests none: "vogel", "tscherning", "exact_best_form" or a
    method another plugin registers."""
    rotation_distance_mm: Annotated[float, Field(gt=10, le=40)] = ROTATION_DISTANCE_MM
    """Lens to the eye's centre of rotation, for the best forms and the exact tilt's off-axis errors (mm)."""
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
    front_curve_bands: list[FrontCurveBand] = Field(default_factory=list)
    """Power bands with their own rule or stock, per material; the first that matches is used."""
    back_concave_margin_d: Annotated[float, Field(ge=0, le=6)] = 0.50
    """The back surface must be concave by at least this in every meridian (D; from memory)."""
    matched_front_max_difference_d: Annotated[float, Field(ge=0, le=14)] = 2.0
    """One base serves both eyes when one within this of each eye's own curve makes both lenses; otherwise the
    fronts differ by at most this (D; common practice)."""
    hard_limits: HardLimits = HardLimits()
    """Centre and edge thickness, blank and weight past which no lab makes the lens: the order is held."""
    bifocal_centre_above_segment_mm: Annotated[float, Field(ge=0, le=15)] = 4.0
    """Without fit.<eye>.height_mm, a bifocal's distance centre sits this far above the segment top (mm; from memory)."""
    progressive_prism_reference_below_fitting_cross_mm: Annotated[float, Field(ge=0, le=10)] = 4.0
    """A progressive's prism reference point (its optical centre here) lies this far below the fitting cross (mm)."""
    thinning_prism: ThinningPrism = ThinningPrism()
    """The lab's thinning-prism rule for progressives."""

    @field_validator("front_curve_method")
    @classmethod
    def _known(cls, value: str) -> str:
        return _known_method(value)

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
        "progressive: the optical centre is the prism reference point, below the fitting cross by the lab's "
        "setting; thinning prism by the lab's rule",
    ),
    "bifocal": (
        "bifocal: the distance power is taken over the whole lens; the segment's added power and ledge "
        "are not modelled",
        "bifocal: the distance optical centre is at the pupil (fit height), or above the segment top by the "
        "lab's setting when the order gives no height",
    ),
}


#: The geometry model's assumptions, between the outline's own sentence and the design's.
GEOMETRY_ASSUMPTIONS: tuple[str, ...] = (
    "spherical front and toric back, exact sags, both vertices at the optical centre",
    "optical centre at the monocular PD and the design's reference height (half the box height when none is given)",
    "prescribed prism as a plane wedge through the optical centre, thicker toward the base",
)

# How each geometry value is worked out, and from which source, for the geometry change's record.
_CENTRE_THICKNESS_METHOD = ("least centre thickness meeting the binding minimum ({binding}); "
                            "back surface F2 = Fv − F1/(1 − (t/n)F1) per principal meridian")
_EDGES_METHOD = ("thickness along the outline: centre − exact front sag + exact back sag "
                 "(toric back by Euler's theorem) + prism wedge")
_WEIGHT_METHOD = ("thickness integrated over the outline area (polar trapezoid over about 120 of the radii × 6-point "
                  "Gauss–Legendre; centre thickness and prism wedge over every sector exactly) × density")
_OPTICAL_CENTRE_METHOD = "decentration (A + DBL)/2 − PD toward the nose, the design's reference height − B/2 up"
_THINNING_METHOD = "yoked base-down prism, the lab's fraction × the larger add"
_ASSUMPTIONS_METHOD = "statement of the geometry model"
_BLANK_SOURCE = "Dispensing texts, e.g. Brooks & Borish, System for Ophthalmic Dispensing"
_WEIGHT_SOURCE = "Jalie, The Principles of Ophthalmic Lenses (weight = volume × density)"
_OPTICAL_CENTRE_SOURCE = "ISO 8624 (boxing system); design reference points: common practice, from memory"
_MATCHED = " One base serves both eyes (common practice: matched fronts, for looks and equal magnification)."


class _LaterTexts(NamedTuple):
    """The ``method`` text (``"<value>: <method>; …"``) and the sources of the values after the front curve and
    the centre thickness: the same for both eyes of an order."""

    methods: str
    sources: tuple[str, ...]


def _later_texts(blank_method: str, thinning: bool) -> _LaterTexts:
    values = [  # each value: its method, its source
        ("edge_min_mm", _EDGES_METHOD, SURFACES_SOURCE),
        ("edge_max_mm", _EDGES_METHOD, SURFACES_SOURCE),
        ("blank_min_diameter_mm", blank_method, _BLANK_SOURCE),
        ("weight_g", _WEIGHT_METHOD, _WEIGHT_SOURCE),
        ("optical_centre_mm", _OPTICAL_CENTRE_METHOD, _OPTICAL_CENTRE_SOURCE),
        ("assumptions", _ASSUMPTIONS_METHOD, COMMON_PRACTICE),
    ]
    if thinning:
        values.append(("thinning_prism", _THINNING_METHOD, COMMON_PRACTICE))
    return _LaterTexts("; ".join(f"{name}: {method}" for name, method, _ in values),
                       tuple(source for _, _, source in values))


def _record_texts(front_method: str, front_source: str, binding: str, later: _LaterTexts) -> tuple[str, str]:
    """The geometry change's ``method`` (``"<value>: <method>; …"``) and ``source`` (each source once): the front
    curve's and the centre thickness's, then the later values'."""
    return (f"front_curve_d: {front_method}; "
            f"center_thickness_mm: {_CENTRE_THICKNESS_METHOD.format(binding=binding)}; {later.methods}",
            "; ".join(dict.fromkeys((front_source, SURFACES_SOURCE, *later.sources))))


class _Shared(NamedTuple):
    """What both lenses of an order share: the outline, the material, its minimums, the fixed texts."""

    grid: OutlineGrid
    material_key: str
    material: object
    minimums: ThicknessMinimums
    min_edge: float
    assumptions: tuple[str, ...]
    blank_method: str


def _shared(view, params, outline: tuple[OutlineGrid, str]) -> _Shared:
    order = view.order
    grid, outline_note = outline
    material_key = order.lens.material
    minimums = params.minimum_thickness.get(material_key, params.other_minimum_thickness)
    return _Shared(
        grid, material_key, view.material(), minimums, minimums.edge_for(order.frame.mount),
        (outline_note, *GEOMETRY_ASSUMPTIONS, *DESIGN_ASSUMPTIONS.get(order.lens.design, ())),
        f"twice the farthest outline point from the optical centre plus {params.blank_allowance_mm:.1f} mm",
    )


def _outline(view, params):
    """The right lens's outline (an :func:`outline_grid`) and a sentence on where it comes from."""
    frame = view.order.frame
    if frame.outline_mm is not None:
        return outline_grid(frame.outline_mm), f"outline from the order ({len(frame.outline_mm)} radii about the box centre)"
    box_width_mm, box_height_mm = frame.box_width_mm, frame.box_height_mm
    effective_diameter_mm = frame.effective_diameter_mm
    shape = modelled_outline(box_width_mm, box_height_mm, effective_diameter_mm, params.outline_exponent_without_ed)
    if effective_diameter_mm is None:
        basis = f"the lab's exponent m = {shape.exponent:g}, as the order gives no effective diameter"
    else:
        basis = f"m = {shape.exponent:.2f} fitted so that twice the longest radius is the ED {effective_diameter_mm:.1f} mm"
    return outline_grid(shape.radii_mm, shape.directions), (
        f"outline modelled as the superellipse |x/(A/2)|^m + |y/(B/2)|^m = 1 with A {box_width_mm:.1f} mm, "
        f"B {box_height_mm:.1f} mm and {basis}"
    )


# --------------------------------------------------------------------------
# Where the optical centre sits, per design
# --------------------------------------------------------------------------


def centre_height(order, eye: str, params: GeometryParams) -> tuple[float, dict]:
    """The optical centre's height above the box bottom (mm) for the order's design, and how it was found.

    Single vision: the fit height (the optical centre). Progressive: the prism
    reference point, the lab's distance below the fitting cross. Bifocal: the
    distance centre at the pupil — the fit height, or the lab's distance above
    the segment top when the order gives none (common practice, from memory).
    """
    design, box_height = order.lens.design, order.frame.box_height_mm
    fit = getattr(order.fit, eye)
    given = fit.height_mm
    if design == "bifocal" and given is None:
        above = params.bifocal_centre_above_segment_mm
        return fit.segment_height_mm + above, {
            "reference": "distance centre above the segment top (the lab's setting)",
            "segment_height_mm": fit.segment_height_mm, "above_segment_mm": above}
    height = box_height / 2.0 if given is None else given
    inputs = {"height_mm": given, "box_height_mm": box_height}
    if design == "progressive":
        below = params.progressive_prism_reference_below_fitting_cross_mm
        return height - below, {**inputs, "reference": "prism reference point below the fitting cross",
                                "below_fitting_cross_mm": below}
    if design == "bifocal":
        return height, {**inputs, "reference": "distance centre at the pupil (fit height)",
                        "segment_height_mm": fit.segment_height_mm}
    return height, {**inputs, "reference": "optical centre at the fit height"}


def thinning_prism(view, params: GeometryParams, surfacings: dict) -> float:
    """The yoked base-down thinning prism (Δ) of a progressive pair by the lab's rule; 0 when it does not apply.

    ``surfacings``: the pair's surfacing powers (eye → power, None for a lens not made).
    """
    rule = params.thinning_prism
    order = view.order
    if order.lens.design != "progressive" or rule.fraction_of_add == 0.0:
        return 0.0
    adds = [getattr(order.rx, eye).add or 0.0 for eye in view.eyes]
    verticals = [matrix_of(surfacing).yy for surfacing in surfacings.values() if surfacing is not None]
    if max(adds) >= rule.add_from_d or any(vertical > rule.plus_from_d for vertical in verticals):
        return rule.fraction_of_add * max(adds)
    return 0.0


# --------------------------------------------------------------------------
# One eye's lens, and whether a front curve makes it
# --------------------------------------------------------------------------


class _Eye(NamedTuple):
    """One eye's lens apart from its front curve: power, centre, prism, the stock and rule that apply, and the
    lens placed on the order's outline, for every front curve it is tried on."""

    eye: str
    sphere: float
    cylinder: float
    axis: float
    matrix: object
    offset: object
    centre: tuple[float, float]
    centre_inputs: dict
    prism_delta: float
    prism_base_deg: float
    stock: list[float]
    method: str
    band: int | None
    placement: LensPlacement


def _prepare(view, eye, surfacing: dict, params: GeometryParams, thinning: float, shared: _Shared) -> _Eye:
    """One eye's lens apart from its front curve, placed on the order's outline."""
    order = view.order
    frame, fit = order.frame, getattr(order.fit, eye)
    sphere, cylinder, axis = surfacing["sphere"], surfacing.get("cylinder", 0.0), surfacing.get("axis", 180)
    height, centre_inputs = centre_height(order, eye, params)
    offset = decentration(frame.box_width_mm, frame.bridge_mm, frame.box_height_mm, fit.pd_mm, height)
    prescribed = view.get(f"lenses.{eye}.prism") or {}
    components = [(float(prescribed.get("amount", 0.0)), float(prescribed.get("base_deg", 0.0)))]
    if thinning:
        components.append((thinning, 270.0))
    prism = resultant_prism(components, eye)
    material = order.lens.material
    equivalent = spherical_equivalent(sphere, cylinder)
    band = next((number for number, band in enumerate(params.front_curve_bands)
                 if band.covers(material, equivalent)), None)
    chosen = None if band is None else params.front_curve_bands[band]
    stock = (chosen.base_curves_d if chosen and chosen.base_curves_d
             else params.base_curves_d.get(material, params.other_base_curves_d))
    method = chosen.method if chosen and chosen.method else params.front_curve_method
    matrix, centre = power_matrix(sphere, cylinder, axis), optical_centre(eye, offset)
    placement = place_lens(shared.grid, eye, centre, matrix, shared.material.index, prism.amount, prism.base_deg)
    return _Eye(eye, sphere, cylinder, axis, matrix, offset, centre, centre_inputs, prism.amount, prism.base_deg,
                list(stock), method, band, placement)


class _Trial(NamedTuple):
    """A front curve tried on one eye's lens: the solution, the back's flattest meridian, what is wrong."""

    front_d: float
    solved: EdgedLens | LensNotMakeable
    back_flattest_d: float | None
    problems: tuple[str, ...]
    concave: bool


def _try(shared: _Shared, lens: _Eye, front_d: float, params: GeometryParams) -> _Trial:
    """Solve the lens on a front curve and judge it: a concave back by the margin, within the hard limits."""
    placement = lens.placement
    try:
        solved = edged_lens(placement, front_d, shared.minimums.center_mm, shared.min_edge)
    except LensNotMakeable as exc:
        return _Trial(front_d, exc, None, (str(exc),), False)
    # The toric back's flattest meridian is its larger principal power's: F₂ = Fv − F₁/(1 − (t/n)F₁) per meridian.
    flattest = back_surface_power(front_d, placement.larger_d, solved.center_mm, shared.material.index)
    problems = []
    concave = flattest <= -params.back_concave_margin_d
    if not concave:
        problems.append(f"the back surface would be {flattest:+.2f} D in its flattest meridian, not concave by the "
                        f"lab's margin of {params.back_concave_margin_d:.2f} D")
    limits = params.hard_limits
    if solved.center_mm > limits.center_thickness_mm:
        problems.append(f"the centre would be {solved.center_mm:.1f} mm thick (limit {limits.center_thickness_mm:.1f} mm)")
    if solved.edge_max_mm > limits.edge_thickness_mm:
        problems.append(f"the edge would be {solved.edge_max_mm:.1f} mm thick (limit {limits.edge_thickness_mm:.1f} mm)")
    return _Trial(front_d, solved, flattest, tuple(problems), concave)


class _Choice(NamedTuple):
    """One eye's front curve: the trial that made it, how it was chosen, its inputs and flags."""

    trial: _Trial
    method: str
    source: str
    inputs: dict
    flags: list
    sentence: str


def _own_choice(view, shared: _Shared, lens: _Eye, params: GeometryParams) -> _Choice:
    """The eye's own front curve: the rule's curve snapped to the stock, steeper while the lens cannot be made."""
    requested = view.order.lens.front_curve_d
    index, stock, material = shared.material.index, lens.stock, shared.material_key
    inputs = {"material": material, "stocked_d": list(stock), "band": lens.band}
    flags = []
    if requested is not None:
        nearest = nearest_stocked_base(requested, stock)
        if abs(nearest - requested) > STOCK_MATCH_D:
            flags.append(Flag(
                "front-curve-not-stocked", "warning",
                f"The practice asks for a {requested:.2f} D front curve, which the lab does not stock in "
                f"{material} (nearest {nearest:.2f} D): order the blank, or agree the nearest stocked base "
                "with the practice.",
                lens.eye, {"requested_d": requested, "nearest_stocked_d": nearest, "stocked_d": list(stock)},
            ))
        return _Choice(_try(shared, lens, requested, params), "front curve requested by the practice", "The order",
                       {**inputs, "requested_d": requested}, flags, "")
    fit = view.order.fit
    request = FrontCurveRequest(lens.sphere, lens.cylinder, lens.axis, index, params.rotation_distance_mm, lens.eye,
                                fit.vertex_mm, fit.pantoscopic_deg, fit.face_form_deg)
    method = front_curve_method(lens.method)
    try:
        if method.name == EXACT_BEST_FORM:
            return _exact_best_form(view, shared, lens, params, inputs)
        wanted = front_curve(method.name, request)
    except NoBestForm as exc:
        flags.append(Flag(
            "front-curve-no-best-form", "info",
            f"{exc}; Vogel's rule is used instead. A person may choose an aspheric design for this power.",
            lens.eye, {"spherical_equivalent_d": spherical_equivalent(lens.sphere, lens.cylinder), "index": index},
        ))
        method = FRONT_CURVE_METHODS["vogel"]
        wanted = front_curve(method.name, request)
    inputs.update(spherical_equivalent_d=spherical_equivalent(lens.sphere, lens.cylinder), computed_d=wanted)
    if method.name != "vogel":
        inputs.update(index=index, rotation_distance_mm=params.rotation_distance_mm)
    nearest = nearest_stocked_base(wanted, stock)
    first = trial = _try(shared, lens, nearest, params)
    sentence = ""
    if not first.concave:
        # A technician's first answer to a back that is not concave: a steeper stocked base.
        for base in stocked_at_least(nearest + 1e-6, stock):
            trial = _try(shared, lens, base, params)
            if not trial.problems:
                break
        if not trial.problems:
            sentence = (f" The nearest stocked base, {nearest:.2f} D, leaves {first.problems[0]}; the next steeper "
                        f"stocked base that makes the lens is used.")
            inputs["nearest_stocked_d"] = nearest
    return _Choice(trial, f"{method.title}, snapped to the nearest stocked base", method.source, inputs, flags,
                   sentence)


def _exact_best_form(view, shared: _Shared, lens: _Eye, params: GeometryParams, inputs: dict) -> _Choice:
    """Among the stocked bases that make the lens (a concave back, within the hard limits), the one whose lens has
    the least off-axis error by real-ray trace; :class:`NoBestForm` when no base makes it (Vogel's rule then
    stands in, as for any method without a best form)."""
    fit = view.order.fit
    theta, tangential = tilt_obliquity(fit.pantoscopic_deg or 0.0, fit.face_form_deg or 0.0, lens.eye)
    trials: dict[float, _Trial] = {}

    def thickness_of(base: float) -> float:
        trial = trials[base] = _try(shared, lens, base, params)
        if trial.problems:
            raise LensNotMakeable(trial.problems[0])
        return trial.solved.center_mm

    try:
        best = best_form(lens.matrix, shared.material.index, theta, tangential, lens.eye, lens.stock, thickness_of,
                         params.rotation_distance_mm)
    except ValueError as exc:  # no stocked base makes the lens: there is no lens to judge
        raise NoBestForm(f"the exact best form has no lens to judge: {exc}") from None
    chosen = best.bases_d.index(best.base_d)
    inputs = {**inputs, "index": shared.material.index, "rotation_distance_mm": params.rotation_distance_mm,
              "obliquity_deg": math.degrees(theta),
              "candidates": [{"base_d": base, "score_d": score if math.isfinite(score) else None,
                              "center_thickness_mm": centre_mm}
                             for base, score, centre_mm in zip(best.bases_d, best.score_d, best.center_mm)],
              "off_axis": off_axis_record(best.errors[chosen])}
    return _Choice(trials[best.base_d], EXACT_BEST_FORM_TITLE, EXACT_BEST_FORM_SOURCE, inputs, [], "")


def _matched(shared: _Shared, lenses: list[_Eye], choices: list[_Choice], params: GeometryParams) -> list[_Choice]:
    """Both eyes on one base where one serves both; else fronts at most the lab's difference apart."""
    fronts = [choice.trial.front_d for choice in choices]
    if fronts[0] == fronts[1]:
        return [choice._replace(sentence=choice.sentence + _MATCHED) for choice in choices]
    own = {lens.eye: front for lens, front in zip(lenses, fronts)}
    limit = params.matched_front_max_difference_d
    # The powers allow one base when a stocked base within the lab's difference of each eye's own curve makes
    # both lenses; the nearest to both is tried first, the flatter on a tie.
    first, second = fronts

    def farther(base: float) -> float:  # the base's distance from the farther of the two eyes' own curves
        return max(abs(base - first), abs(base - second))

    common = [b for b in set(lenses[0].stock) & set(lenses[1].stock) if farther(b) <= limit]
    low, high = min(fronts), max(fronts)
    for base in sorted(common, key=lambda b: (farther(b), b)):
        # An eye whose own choice is this base has its lens solved on it already.
        trials = [choice.trial if choice.trial.front_d == base else _try(shared, lens, base, params)
                  for lens, choice in zip(lenses, choices)]
        if not any(trial.problems for trial in trials):
            own_text = ", ".join(f"{eye} {front:.2f} D" for eye, front in own.items())
            return [choice._replace(
                trial=trial, method=choice.method + "; one base for both eyes, the stocked base nearest to both "
                                                    "eyes' own curves that makes both lenses",
                inputs={**choice.inputs, "own_choice_d": own, "matched": "same base"},
                sentence=choice.sentence + f" Each eye alone would take {own_text}; {base:.2f} D serves both "
                                           "(common practice: matched fronts, for looks and equal magnification).")
                for choice, trial in zip(choices, trials)]
    if high - low <= limit:
        return [choice._replace(inputs={**choice.inputs, "own_choice_d": own, "matched": "no common base makes "
                                        "both lenses; within the lab's difference"}) for choice in choices]
    flatter = fronts.index(low)
    lens, choice = lenses[flatter], choices[flatter]
    for base in stocked_at_least(high - limit, lens.stock):
        trial = _try(shared, lens, base, params)
        if not trial.problems:
            moved = list(choices)
            moved[flatter] = choice._replace(
                trial=trial, method=choice.method + f"; steepened to within {limit:.2f} D of the other eye",
                inputs={**choice.inputs, "own_choice_d": own, "matched": f"within {limit:.2f} D"},
                sentence=choice.sentence + f" Alone it would take {low:.2f} D; the fronts of a pair stay within "
                                           f"{limit:.2f} D of each other (common practice), so {base:.2f} D.")
            return moved
    flag = Flag(
        "front-curves-unmatched", "review",
        f"The two lenses need fronts {high - low:.2f} D apart ({', '.join(f'{e} {f:.2f} D' for e, f in own.items())}), "
        f"more than the lab's {limit:.2f} D, and no stocked base brings them closer: the pair will look and magnify "
        "differently; a person decides the curves with the practice (matched bases, another index or design).",
        None, {"own_choice_d": own, "max_difference_d": limit},
    )
    return [choices[0]._replace(flags=choices[0].flags + [flag]), choices[1]]


def _not_makeable_flag(lens: _Eye, shared: _Shared, trial: _Trial, params: GeometryParams) -> Flag:
    """The review flag of a lens the stock cannot make, with the numbers and what a technician would suggest."""
    values = {"front_curve_d": trial.front_d, "sphere": lens.sphere, "cylinder": lens.cylinder, "axis": lens.axis,
              "material": shared.material_key, "steepest_stocked_d": max(lens.stock),
              "back_flattest_d": trial.back_flattest_d, "margin_d": params.back_concave_margin_d}
    suggestions = []
    if not trial.concave and trial.back_flattest_d is not None:
        larger = principal_powers(lens.matrix)[0]
        needed = front_surface_power(larger, -params.back_concave_margin_d, trial.solved.center_mm,
                                     shared.material.index)
        values["front_needed_d"] = needed
        suggestions.append(f"a steeper base of about {needed:.2f} D (the stock stops at {max(lens.stock):.2f} D)")
    suggestions += ["an aspheric or lenticular design", "another index"]
    return Flag(
        "front-curve-not-makeable", "review",
        f"With a {trial.front_d:.2f} D front in {shared.material_key} "
        f"(surfacing {lens.sphere:+.2f} {lens.cylinder:+.2f} × {lens.axis:.0f}), {trial.problems[0]}: "
        f"the lab's stock cannot make this lens. A technician would consider {', '.join(suggestions)}; "
        "a person decides with the practice.",
        lens.eye, values,
    )


def _beyond_limits(eye: str, solved: EdgedLens, blank: float, weight: float, params: GeometryParams) -> Flag | None:
    """The review flag of a lens past the lab's hard limits (beyond any lab's making), with every number."""
    limits = params.hard_limits
    measured = {"center_thickness_mm": (solved.center_mm, limits.center_thickness_mm),
                "edge_max_mm": (solved.edge_max_mm, limits.edge_thickness_mm),
                "blank_min_diameter_mm": (blank, limits.blank_diameter_mm),
                "weight_g": (weight, limits.weight_g)}
    over = [name for name, (value, limit) in measured.items() if value > limit]
    if not over:
        return None
    words = {"center_thickness_mm": "centre {:.1f} mm (limit {:.1f} mm)", "edge_max_mm": "edge {:.1f} mm (limit {:.1f} mm)",
             "blank_min_diameter_mm": "blank {:.1f} mm (limit {:.1f} mm)", "weight_g": "weight {:.1f} g (limit {:.1f} g)"}
    return Flag(
        "lens-beyond-limits", "review",
        f"No lab makes this lens as ordered: {', '.join(words[name].format(*measured[name]) for name in over)}. "
        "Check the prescription, frame and PD with the practice; a higher index, a smaller frame or a lenticular "
        "design may bring it within reach.",
        eye, {**{name: value for name, (value, _) in measured.items()},
              **{f"max_{name}": limit for name, (_, limit) in measured.items()}, "over": over},
    )


def _eye_geometry(view, params, shared: _Shared, lens: _Eye, choice: _Choice, thinning: float,
                  later: _LaterTexts) -> list:
    """The change that records one eye's geometry (each value with its method, source and inputs), and flags."""
    order = view.order
    frame = order.frame
    solved, front = choice.trial.solved, choice.trial.front_d
    minimums, min_edge, index = shared.minimums, shared.min_edge, shared.material.index
    allowance = params.blank_allowance_mm
    placement = lens.placement
    volume = solved.volume_mm3
    blank = blank_diameter_from_farthest_mm(placement.farthest_mm, allowance)
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
    edges_inputs = {"outline_points": shared.grid.radii.size, "prism_amount": lens.prism_delta,
                    "prism_base_deg": lens.prism_base_deg}
    inputs = {
        "index": index, "material": shared.material_key,
        "front_curve_d": {**choice.inputs, "back_flattest_d": choice.trial.back_flattest_d,
                          "back_concave_margin_d": params.back_concave_margin_d},
        "center_thickness_mm": {"binding": binding, "min_center_mm": minimums.center_mm, "min_edge_mm": min_edge,
                                "mount": frame.mount, "index": index},
        "edge_min_mm": edges_inputs,
        "edge_max_mm": edges_inputs,
        "blank_min_diameter_mm": {"farthest_mm": placement.farthest_mm, "allowance_mm": allowance,
                                  "decentration_in_mm": lens.offset.inward_mm,
                                  "decentration_up_mm": lens.offset.upward_mm},
        "weight_g": {"volume_cm3": volume / 1000.0, "density_g_cm3": shared.material.density},
        "optical_centre_mm": {"pd_mm": getattr(order.fit, lens.eye).pd_mm, **lens.centre_inputs},
        "assumptions": {"design": order.lens.design},
    }
    thinning_text = ""
    if thinning:
        geometry["thinning_prism"] = {"amount": thinning, "base_deg": 270.0}
        inputs["thinning_prism"] = {"fraction_of_add": params.thinning_prism.fraction_of_add,
                                    "add_from_d": params.thinning_prism.add_from_d,
                                    "plus_from_d": params.thinning_prism.plus_from_d}
        thinning_text = f" {thinning:.2f}Δ base-down thinning prism by the lab's rule is ground in."
    proposals: list = [Change(
        f"lenses.{lens.eye}.geometry", geometry,
        f"The lens for this frame: front curve {front:.2f} D, centre thickness {solved.center_mm:.1f} mm "
        f"(the least that meets {binding_text}), edge {solved.edge_min_mm:.1f}–{solved.edge_max_mm:.1f} mm, "
        f"blank at least {blank:.1f} mm, {weight:.1f} g.{choice.sentence}{thinning_text}",
        *_record_texts(choice.method, choice.source, binding, later),
        inputs,
    )]
    if not choice.trial.concave:
        proposals.append(_not_makeable_flag(lens, shared, choice.trial, params))
    beyond = _beyond_limits(lens.eye, solved, blank, weight, params)
    if beyond is not None:
        proposals.append(beyond)
    return proposals


def run(view, params: GeometryParams):
    surfacings = {eye: view.get(f"lenses.{eye}.surfacing") for eye in view.eyes}
    for eye, surfacing in surfacings.items():
        if surfacing is None:
            yield Flag("geometry-no-power", "review",
                       "No surfacing power reached the geometry stage (is normalize in the chain?): "
                       "the lens geometry was not worked out; check the lab's chain.", eye)
    if all(surfacing is None for surfacing in surfacings.values()):
        return  # no lens to make, only flags to raise: the material is not looked up
    shared, thinning, lenses, choices = _chosen(view, params, surfacings)
    later = _later_texts(shared.blank_method, bool(thinning))
    for lens, choice in zip(lenses, choices):
        yield from choice.flags
        if isinstance(choice.trial.solved, LensNotMakeable):
            yield _not_makeable(lens, shared, choice.trial)
        else:
            yield from _eye_geometry(view, params, shared, lens, choice, thinning, later)


def _chosen(view, params: GeometryParams, surfacings: dict, shared: _Shared | None = None):
    """The pair's lenses and front curves for these surfacing powers (eye → power, or None for no lens)."""
    if shared is None:
        shared = _shared(view, params, _outline(view, params))
    thinning = thinning_prism(view, params, surfacings)
    lenses = [_prepare(view, eye, surfacing, params, thinning, shared)
              for eye, surfacing in surfacings.items() if surfacing is not None]
    choices = [_own_choice(view, shared, lens, params) for lens in lenses]
    if len(lenses) == 2 and view.order.lens.front_curve_d is None:
        choices = _matched(shared, lenses, choices, params)
    return shared, thinning, lenses, choices


class PlannedLens(NamedTuple):
    """An eye's lens as this stage would make it: its front curve, and its solution on that front (the centre
    thickness) or why no thickness makes it."""

    front_d: float
    solved: EdgedLens | LensNotMakeable


def lens_planner(view, params: GeometryParams) -> Callable[[dict], dict[str, PlannedLens]]:
    """How this stage would make the order's lenses: surfacing powers (eye → power) → each eye's front curve and
    its solution on it.

    For a stage before this one whose optics depend on the lens's shape (the
    exact tilt compensation), which asks for several powers: the same choice
    as :func:`run` — the rule, the stock, a concave back, matched fronts —
    with ``params`` the lab's ``[stages.geometry]``, and the centre thickness
    this stage solves on it. The outline and the material, which do not
    depend on the powers, are worked out once.
    """
    shared = _shared(view, params, _outline(view, params))

    def planned(surfacings: dict) -> dict[str, PlannedLens]:
        _, _, lenses, choices = _chosen(view, params, surfacings, shared)
        return {lens.eye: PlannedLens(choice.trial.front_d, choice.trial.solved)
                for lens, choice in zip(lenses, choices)}
    return planned


def _not_makeable(lens: _Eye, shared: _Shared, trial: _Trial) -> Flag:
    return Flag(
        "lens-not-makeable", "review",
        f"The lens cannot be made as ordered: {trial.solved} (front {trial.front_d:.2f} D, surfacing "
        f"{lens.sphere:+.2f} {lens.cylinder:+.2f} × {lens.axis:.0f}, {shared.material_key}). Choose another front "
        "curve, material, frame or design with the practice.",
        lens.eye, {"front_curve_d": trial.front_d, "sphere": lens.sphere, "cylinder": lens.cylinder,
                   "axis": lens.axis},
    )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="geometry", run=run, writes=("lenses.*.geometry",), params=GeometryParams,
        description="front curve, centre thickness, edges, blank size and weight per lens",
    )]
