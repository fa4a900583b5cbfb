"""Stage ``validate``: what the schema cannot see — plausibility of the fit and the frame.

Every check raises a flag with its numbers and what a person should decide; the
stage changes nothing.
"""
from __future__ import annotations

from datetime import datetime, timezone
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.optics.outline import (
    decentration as inward_decentration, optical_centre, outline_extent, outline_points, vertical_extent_at,
)
from lenslane.plugins.optics.power import is_on_step

Level = Literal["warning", "review"]


class ValidateParams(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    pd_asymmetry_mm: Annotated[float, Field(gt=0)] = 4.0
    """Right and left monocular PDs differing by more than this are queried (info)."""
    max_decentration_mm: Annotated[float, Field(gt=0)] = 8.0
    """Inward decentration per eye beyond this needs a large blank: warning."""
    max_outward_decentration_mm: Annotated[float, Field(gt=0)] = 3.0
    """A monocular PD wider than half the frame PD by more than this: warning."""
    min_fitting_height_progressive_mm: Annotated[float, Field(gt=0)] = 14.0
    """Below this a progressive corridor does not fit under the fitting cross: review."""
    min_fitting_height_bifocal_mm: Annotated[float, Field(gt=0)] = 10.0
    """Below this, a bifocal segment has no room: review."""
    outline_box_tolerance_mm: Annotated[float, Field(gt=0)] = 1.0
    """The outline's box may differ from the stated A, B and ED by this much."""
    prescription_step_d: Annotated[float, Field(ge=0.01, le=0.25)] = 0.25
    """Sphere, cylinder and add are written in steps of this (D); 0.125 (written 0.12) where labs allow eighths."""
    off_step_level: Level = "review"
    """A prescription value off the step: a typing slip or an unusual prescription, for a person to confirm."""
    add_on_single_vision_level: Level = "review"
    """An add on a single-vision order (a reading lens meant? a multifocal?), for a person to ask."""
    index_tolerance: Annotated[float, Field(ge=0, le=0.2)] = 0.01
    """lens.index may differ from the material's index by this much (1.59 written for 1.586)."""


def _fit_checks(view, params: ValidateParams):
    order = view.order
    frame = order.frame
    pds = {}
    # The outline's points (the right lens's view), worked out once for every height placed on it.
    points = outline_points(frame.outline_mm) if frame.outline_mm is not None else None
    for eye in view.eyes:
        fit = getattr(order.fit, eye)
        pds[eye] = fit.pd_mm
        decentration = inward_decentration(frame.box_width_mm, frame.bridge_mm, frame.box_height_mm, fit.pd_mm).inward_mm
        half_frame_pd = decentration + fit.pd_mm
        if decentration > params.max_decentration_mm:
            yield Flag(
                "decentration-large", "warning",
                f"The optical centre is {decentration:.1f} mm inward of the box centre (limit "
                f"{params.max_decentration_mm:.1f} mm): check the PD and that a blank is large enough.",
                eye, {"decentration_mm": decentration, "limit_mm": params.max_decentration_mm,
                      "pd_mm": fit.pd_mm, "frame_pd_mm": 2 * half_frame_pd},
            )
        elif -decentration > params.max_outward_decentration_mm:
            yield Flag(
                "decentration-outward", "warning",
                f"The monocular PD {fit.pd_mm:.1f} mm is {-decentration:.1f} mm wider than half the frame PD "
                f"{half_frame_pd:.1f} mm: confirm the PD or the frame.",
                eye, {"decentration_mm": decentration, "pd_mm": fit.pd_mm, "frame_pd_mm": 2 * half_frame_pd},
            )
        heights = [(name, value) for name, value in (("fitting height", fit.height_mm),
                                                     ("segment height", fit.segment_height_mm)) if value is not None]
        span = _lens_span(view, eye, points) if heights else None
        outside = [flag for name, value in heights if (flag := _outside_lens(view, eye, name, value, span)) is not None]
        yield from outside
        if outside:
            continue
        # The lowest point of the near part: the segment top for a bifocal, the fitting cross for a progressive.
        design = order.lens.design
        height = fit.segment_height_mm if design == "bifocal" else fit.height_mm
        minimum = {"progressive": params.min_fitting_height_progressive_mm,
                   "bifocal": params.min_fitting_height_bifocal_mm}.get(design)
        if height is not None and minimum is not None and height < minimum:
            point = "segment top" if design == "bifocal" else "fitting point"
            yield Flag(
                "fitting-height-low", "review",
                f"A {design} lens needs at least {minimum:.1f} mm below the {point}; "
                f"this height is {height:.1f} mm: choose a deeper frame or another design.",
                eye, {"height_mm": height, "minimum_mm": minimum},
            )
    if len(pds) == 2 and abs(pds["right"] - pds["left"]) > params.pd_asymmetry_mm:
        yield Flag(
            "pd-asymmetry", "info",
            f"The monocular PDs differ by {abs(pds['right'] - pds['left']):.1f} mm "
            f"(right {pds['right']:.1f}, left {pds['left']:.1f}): confirm they were measured from the bridge centre.",
            None, {"right_pd_mm": pds["right"], "left_pd_mm": pds["left"]},
        )


def _lens_span(view, eye: str, points) -> tuple[float, float, str]:
    """How far the lens reaches up and down at the pupil's position (mm above the box bottom), and in what words.

    ``points`` are the outline's (the right lens's view: the left is its mirror), or None when the order has none.
    """
    frame, fit = view.order.frame, getattr(view.order.fit, eye)
    if points is None:
        return 0.0, frame.box_height_mm, f"the box height of {frame.box_height_mm:.1f} mm"
    # On the outline, along the vertical through the pupil.
    offset = inward_decentration(frame.box_width_mm, frame.bridge_mm, frame.box_height_mm, fit.pd_mm)
    extent = vertical_extent_at(points, optical_centre("right", offset)[0])
    low, high = (0.0, 0.0) if extent is None else (extent[0] + frame.box_height_mm / 2.0,
                                                     extent[1] + frame.box_height_mm / 2.0)
    return low, high, f"the lens outline, {low:.1f}–{high:.1f} mm above the box bottom below the pupil"


def _outside_lens(view, eye: str, name: str, height: float, span: tuple[float, float, str]) -> Flag | None:
    """A review flag when a height above the box bottom falls outside the lens at the pupil's position."""
    frame = view.order.frame
    low, high, where = span
    if low < height < high:
        return None
    code = "segment-height-outside-lens" if name == "segment height" else "fitting-height-outside-lens"
    return Flag(
        code, "review",
        f"The {name} {height:.1f} mm is outside {where}: the order cannot be made as written; ask the practice "
        f"for the {name}.",
        eye, {"height_mm": height, "lens_bottom_mm": low, "lens_top_mm": high, "box_height_mm": frame.box_height_mm},
    )


def _prescription_checks(view, params: ValidateParams):
    """Values off the prescription step, an add on a single-vision order, an index against the material."""
    order = view.order
    step = 0.125 if abs(params.prescription_step_d - 0.12) < 1e-9 else params.prescription_step_d
    for eye in view.eyes:
        eye_rx = getattr(order.rx, eye)
        off = {name: value for name, value in (("sphere", eye_rx.sphere), ("cylinder", eye_rx.cylinder),
                                               ("add", eye_rx.add)) if value is not None and not is_on_step(value, step)}
        if off:
            written = ", ".join(f"{name} {value:+.2f}" for name, value in off.items())
            yield Flag(
                "rx-off-step", params.off_step_level,
                f"The prescription's {written} D is not on the {params.prescription_step_d:.2f} D step prescriptions "
                "are written in: confirm the value with the practice (a slip of the pen, or an intended value).",
                eye, {**off, "step_d": params.prescription_step_d},
            )
        if order.lens.design == "single_vision" and eye_rx.add is not None:
            yield Flag(
                "add-on-single-vision", params.add_on_single_vision_level,
                f"A single-vision lens is ordered with an add of {eye_rx.add:+.2f} D, which only a multifocal uses: "
                "the lens is made for the distance prescription without it. Ask the practice whether reading "
                "lenses (sphere plus add) or a multifocal design was meant.",
                eye, {"add": eye_rx.add, "design": order.lens.design},
            )
    index = order.lens.index
    material = view.settings.materials[order.lens.material]
    if index is not None and abs(index - material.index) > params.index_tolerance:
        yield Flag(
            "index-contradicts-material", "review",
            f"The order gives index {index:.3f} for {order.lens.material}, whose index is {material.index:.3f} "
            f"(tolerance {params.index_tolerance:.3f}): the lens would be shaped at one index and weighed at the "
            "other material's density. Ask the practice which material is meant.",
            None, {"index": index, "material": order.lens.material, "material_index": material.index,
                   "tolerance": params.index_tolerance},
        )


def _wearer_checks(view):
    """A birth year after the order's year (the year it was placed, or this year when it gives no date)."""
    order = view.order
    birth_year = order.wearer.birth_year if order.wearer else None
    if birth_year is None:
        return
    year = int(order.placed_at[:4]) if order.placed_at else datetime.now(timezone.utc).year
    if birth_year > year:
        yield Flag(
            "birth-year-after-order", "review",
            f"The wearer's birth year {birth_year} is after the order's year {year}: the age-based checks cannot be "
            "made; ask the practice for the birth year.",
            None, {"birth_year": birth_year, "order_year": year},
        )


def _frame_checks(view, params: ValidateParams):
    frame = view.order.frame
    tolerance = params.outline_box_tolerance_mm
    diagonal_floor = max(frame.box_width_mm, frame.box_height_mm)
    if frame.effective_diameter_mm is not None and frame.effective_diameter_mm < diagonal_floor - tolerance:
        yield Flag(
            "effective-diameter-small", "review",
            f"The effective diameter {frame.effective_diameter_mm:.1f} mm is smaller than the box "
            f"({frame.box_width_mm:.1f} × {frame.box_height_mm:.1f} mm), which no outline allows: check the frame data.",
            None, {"effective_diameter_mm": frame.effective_diameter_mm,
                   "box_width_mm": frame.box_width_mm, "box_height_mm": frame.box_height_mm},
        )
    if frame.outline_mm is None:
        return
    extent = outline_extent(frame.outline_mm)
    stated = {"box_width_mm": (frame.box_width_mm, extent.width_mm),
              "box_height_mm": (frame.box_height_mm, extent.height_mm)}
    if frame.effective_diameter_mm is not None:
        stated["effective_diameter_mm"] = (frame.effective_diameter_mm, extent.effective_diameter_mm)
    for name, (given, traced) in stated.items():
        if abs(given - traced) > tolerance:
            yield Flag(
                "outline-box-mismatch", "review",
                f"The outline gives {name.removesuffix('_mm').replace('_', ' ')} {traced:.1f} mm but the order says "
                f"{given:.1f} mm (tolerance {tolerance:.1f} mm): the outline and the box sizes describe different "
                "lenses; ask the practice which is right.",
                None, {"field": f"frame.{name}", "stated_mm": given, "outline_mm": traced, "tolerance_mm": tolerance},
            )


def run(view, params: ValidateParams):
    yield from _prescription_checks(view, params)
    yield from _wearer_checks(view)
    yield from _fit_checks(view, params)
    yield from _frame_checks(view, params)


@hookimpl
def lenslane_stages():
    return [Stage(name="validate", run=run, params=ValidateParams,
                  description="plausibility of the prescription, the wearer, PDs, fitting heights and frame data")]
