"""Stage ``edger_limits``: what this lab's edger can cut, and where each lens is edged.

A lab-specific rule, written only against the engine's public API
(``from lenslane import hookimpl, Stage, Change, Flag``). For each lens it writes
``lenses.<eye>.lab.edging`` — the edger, the bevel, the blank the edger must
take, and whether the lens is edged in house — and flags a frame the edger
cannot handle. It changes no power and no geometry: it may write only the
field it declares in ``Stage.writes``.

Where the ``geometry`` stage ran before it, its blank size and thickest edge
are used; otherwise the blank is estimated from the boxing data.
"""
from __future__ import annotations

import math
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Change, Flag, Stage, hookimpl
from lenslane.vocabulary import CAUTION

__version__ = "1.0.0"

LAB_LIMITS = "The lab's own equipment limits ([stages.edger_limits] in lenslane.toml)"
BLANK_RULE = "Common practice: minimum blank size = effective diameter + 2 × decentration + allowance"
BEVELS = {"full_rim": "v-bevel", "grooved": "groove", "drilled": "flat edge, drilled"}


class EdgerLimits(BaseModel):
    """``[stages.edger_limits]``: the limits of the lab's edger."""

    model_config = ConfigDict(extra="forbid", strict=True)

    edger: Annotated[str, Field(min_length=1, max_length=64)] = "edger-1"
    """The lab's name for the machine, written into each lens's routing."""
    min_box_height_mm: Annotated[float, Field(gt=0, le=100)] = 24.0
    """The shallowest lens the holding block can clamp (boxing B)."""
    max_blank_diameter_mm: Annotated[float, Field(gt=0, le=120)] = 80.0
    """The largest blank the edging chamber takes."""
    max_edge_thickness_mm: Annotated[float, Field(gt=0, le=30)] = 10.0
    """The thickest edge the wheel can bevel (checked when ``geometry`` ran)."""
    drills: bool = False
    """Whether the edger has a drilling unit for drilled (rimless) mounts."""
    max_face_form_deg: Annotated[float, Field(ge=0, le=45)] = 20.0
    """Beyond this wrap the edger's bevel cannot follow the frame."""
    blank_allowance_mm: Annotated[float, Field(ge=0, le=10)] = 2.0
    """Added to the estimated blank when ``geometry`` did not run before this stage."""


def effective_diameter_mm(frame) -> float:
    """The frame's ED: as given, else twice the outline's longest radius, else the box diagonal.

    The box diagonal bounds any outline that fits in the box, so the estimate
    errs towards the larger blank.
    """
    if frame.effective_diameter_mm is not None:
        return frame.effective_diameter_mm
    if frame.outline_mm:
        return 2.0 * max(frame.outline_mm)
    return math.hypot(frame.box_width_mm, frame.box_height_mm)


def estimated_blank_mm(effective_diameter: float, decentration_mm: float, allowance_mm: float) -> float:
    """Minimum blank size, mm: ED + 2 × |decentration| + allowance (common practice).

    Examples
    --------
    >>> estimated_blank_mm(55.5, 3.5, 2.0)
    64.5
    """
    return effective_diameter + 2.0 * abs(decentration_mm) + allowance_mm


def _frame_flags(view, params: EdgerLimits):
    order = view.order
    frame = order.frame
    if frame.box_height_mm < params.min_box_height_mm:
        yield Flag(
            "edger-lens-too-shallow", "review",
            f"The lens is {frame.box_height_mm:.1f} mm high; the {params.edger} block needs at least "
            f"{params.min_box_height_mm:.1f} mm: edge it by hand or send it out, or choose a deeper frame. {CAUTION}",
            None, {"box_height_mm": frame.box_height_mm, "min_box_height_mm": params.min_box_height_mm},
        )
    if frame.mount == "drilled" and not params.drills:
        yield Flag(
            "edger-no-drilling", "review",
            f"The frame is drilled (rimless) and the {params.edger} has no drilling unit: "
            f"send the lenses out for drilling, or confirm another mount. {CAUTION}",
            None, {"mount": frame.mount},
        )
    wrap = order.fit.face_form_deg
    if wrap is not None and wrap > params.max_face_form_deg:
        yield Flag(
            "edger-wrap-bevel", "warning",
            f"The frame wraps {wrap:.1f}° and the {params.edger} bevels up to {params.max_face_form_deg:.1f}°: "
            "check the bevel position on the first lens before the second is cut.",
            None, {"face_form_deg": wrap, "max_face_form_deg": params.max_face_form_deg},
        )


def _blank_mm(view, eye: str, params: EdgerLimits) -> tuple[float, str]:
    computed = view.get(f"lenses.{eye}.geometry.blank_min_diameter_mm")
    if computed is not None:
        return computed, "geometry"
    frame = view.order.frame
    decentration = (frame.box_width_mm + frame.bridge_mm) / 2.0 - getattr(view.order.fit, eye).pd_mm
    return estimated_blank_mm(effective_diameter_mm(frame), decentration, params.blank_allowance_mm), "estimate"


def _eye_flags(view, eye: str, blank_mm: float, params: EdgerLimits):
    if blank_mm > params.max_blank_diameter_mm:
        yield Flag(
            "edger-blank-too-large", "review",
            f"The lens needs a {blank_mm:.1f} mm blank; the {params.edger} chamber takes at most "
            f"{params.max_blank_diameter_mm:.1f} mm: send it out for edging. {CAUTION}",
            eye, {"blank_mm": blank_mm, "max_blank_diameter_mm": params.max_blank_diameter_mm},
        )
    edge = view.get(f"lenses.{eye}.geometry.edge_max_mm")
    if edge is not None and edge > params.max_edge_thickness_mm:
        yield Flag(
            "edger-edge-too-thick", "review",
            f"The thickest edge is {edge:.1f} mm; the {params.edger} wheel bevels up to "
            f"{params.max_edge_thickness_mm:.1f} mm: send it out, or choose a higher index or a smaller frame. "
            + CAUTION,
            eye, {"edge_max_mm": edge, "max_edge_thickness_mm": params.max_edge_thickness_mm},
        )


def run(view, params: EdgerLimits):
    frame_flags = list(_frame_flags(view, params))
    yield from frame_flags
    held = any(flag.level == "review" for flag in frame_flags)
    for eye in view.eyes:
        blank_mm, blank_from = _blank_mm(view, eye, params)
        eye_flags = list(_eye_flags(view, eye, blank_mm, params))
        yield from eye_flags
        in_house = not held and not any(flag.level == "review" for flag in eye_flags)
        bevel = BEVELS[view.order.frame.mount]
        routing = {"edger": params.edger, "bevel": bevel, "blank_mm": blank_mm, "in_house": in_house}
        where = f"on the {params.edger} with a {bevel}" if in_house else "outside this lab's edger (see the flags)"
        yield Change(
            f"lenses.{eye}.lab.edging", routing,
            f"The lens is edged {where}.",
            "lab edger capability check" + (" with the estimated blank size" if blank_from == "estimate" else ""),
            LAB_LIMITS + ("; " + BLANK_RULE if blank_from == "estimate" else ""),
            {"box_height_mm": view.order.frame.box_height_mm, "blank_mm": blank_mm, "blank_from": blank_from,
             "mount": view.order.frame.mount, "max_blank_diameter_mm": params.max_blank_diameter_mm,
             "min_box_height_mm": params.min_box_height_mm},
        )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="edger_limits", run=run, writes=("lenses.*.lab.edging",), params=EdgerLimits,
        description="this lab's edger: flags frames it cannot handle, routes each lens",
    )]
