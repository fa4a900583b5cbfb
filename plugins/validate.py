"""Stage ``validate``: what the schema cannot see — plausibility of the fit and the frame.

Every check raises a flag with its numbers and what a person should decide; the
stage changes nothing.
"""
from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.optics.outline import decentration as inward_decentration, outline_extent


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


def _fit_checks(view, params: ValidateParams):
    order = view.order
    frame = order.frame
    pds = {}
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
        height = fit.height_mm
        if height is None:
            continue
        if not 0.0 < height < frame.box_height_mm:
            yield Flag(
                "fitting-height-outside-box", "review",
                f"The fitting height {height:.1f} mm is outside the box height of {frame.box_height_mm:.1f} mm: "
                "the order cannot be made as written; ask the practice for the height.",
                eye, {"height_mm": height, "box_height_mm": frame.box_height_mm},
            )
            continue
        minimum = {"progressive": params.min_fitting_height_progressive_mm,
                   "bifocal": params.min_fitting_height_bifocal_mm}.get(order.lens.design)
        if minimum is not None and height < minimum:
            yield Flag(
                "fitting-height-low", "review",
                f"A {order.lens.design} lens needs at least {minimum:.1f} mm below the fitting point; "
                f"this fitting height is {height:.1f} mm: choose a deeper frame or another design.",
                eye, {"height_mm": height, "minimum_mm": minimum},
            )
    if len(pds) == 2 and abs(pds["right"] - pds["left"]) > params.pd_asymmetry_mm:
        yield Flag(
            "pd-asymmetry", "info",
            f"The monocular PDs differ by {abs(pds['right'] - pds['left']):.1f} mm "
            f"(right {pds['right']:.1f}, left {pds['left']:.1f}): confirm they were measured from the bridge centre.",
            None, {"right_pd_mm": pds["right"], "left_pd_mm": pds["left"]},
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
    yield from _fit_checks(view, params)
    yield from _frame_checks(view, params)


@hookimpl
def lenslane_stages():
    return [Stage(name="validate", run=run, params=ValidateParams,
                  description="plausibility of PDs, fitting heights and frame data")]
