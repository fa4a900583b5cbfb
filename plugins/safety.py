"""Stage ``safety`` (last in the chain): what a careful lab stops or warns on. Flags only.

Every flag says what was found, gives the numbers in ``values`` and says what a
person should decide. A ``review`` flag holds the order. Thresholds are the
stage's parameters (``[stages.safety]``); the defaults are the trade's usual
ones (common practice unless a source is named).

Which power each check reads: lens checks (high power, high cylinder,
chromatic aberration) read ``surfacing``, the power that will be made; the
wearer's binocular checks (anisometropia, vertical imbalance) read the
normalised ``rx``, which is what acts at the eye once compensation has done its
work.
"""
from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.optics.power import matrix_of, principal_powers, spherical_equivalent
from lenslane.plugins.optics.prentice import (
    READING_DEPTH_MM, prentice_prism, transverse_chromatic_aberration, vertical_imbalance,
)
from lenslane.vocabulary import CAUTION, Mount

DROP_BALL = ("21 CFR 801.410: in the US every glass dress lens must be hardened and pass the drop-ball test "
             "(a 5/8-inch steel ball dropped from 50 inches)")

Positive = Annotated[float, Field(gt=0)]


class SafetyParams(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    high_power_d: Positive = 8.0
    """A principal meridian of the surfacing power beyond ±this (D): warning."""
    high_cylinder_d: Positive = 4.0
    """A cylinder of this size or more (D): warning."""
    large_prism_delta: Positive = 5.0
    """A resultant prescribed prism over this per eye (Δ): warning."""
    anisometropia_d: Positive = 2.0
    """Spherical equivalents differing by this or more (D): warning."""
    reading_depth_mm: Positive = READING_DEPTH_MM
    """How far below the distance centres the eyes read (mm), for the vertical imbalance."""
    vertical_imbalance_delta: Positive = 1.5
    """Vertical imbalance at the reading level over this (Δ): warning, consider slab-off."""
    minor_age_years: Annotated[int, Field(ge=1, le=30)] = 18
    """Wearers younger than this need impact-resistant lenses."""
    impact_resistant_materials: list[str] = Field(default_factory=lambda: ["polycarbonate-1.59", "urethane-1.53"])
    """Materials the lab counts as impact resistant."""
    glass_materials: list[str] = Field(default_factory=lambda: ["glass-1.52"])
    """Materials that are glass (hardening and drop-ball testing)."""
    max_edge_mm: dict[Mount, Positive] = Field(
        default_factory=lambda: {"full_rim": 8.0, "grooved": 6.0, "drilled": 5.0})
    """The thickest edge each mount holds (mm): warning beyond."""
    cosmetic_edge_mm: Positive = 6.0
    """The thickest edge most wearers accept for looks (mm): info beyond."""
    max_blank_diameter_mm: Positive = 80.0
    """The largest blank the lab stocks (mm): review beyond."""
    chromatic_distance_mm: Positive = 10.0
    """How far from the optical centre the chromatic aberration is judged (mm)."""
    chromatic_limit_delta: Positive = 0.15
    """Transverse chromatic aberration over this (Δ): warning."""


def _order_year(order) -> int:
    if order.placed_at:
        return int(order.placed_at[:4])
    return datetime.now(timezone.utc).year


def _power_checks(view, params: SafetyParams, eye: str):
    surfacing = view.get(f"lenses.{eye}.surfacing") or view.get(f"lenses.{eye}.rx")
    if surfacing is None:
        return
    matrix = matrix_of(surfacing)
    larger, smaller, larger_direction = principal_powers(matrix)
    strongest = smaller if abs(smaller) > abs(larger) else larger  # max(..., key=abs): the first on a tie
    if abs(strongest) > params.high_power_d:
        yield Flag(
            "power-very-high", "warning",
            f"A principal meridian is {strongest:+.2f} D, beyond ±{params.high_power_d:.2f} D: confirm the "
            "prescription with the practice and consider a high-index, aspheric or lenticular design.",
            eye, {"meridian_power_d": strongest, "limit_d": params.high_power_d},
        )
    cylinder = abs(larger - smaller)
    if cylinder >= params.high_cylinder_d:
        yield Flag(
            "cylinder-high", "warning",
            f"The cylinder is {cylinder:.2f} D (limit {params.high_cylinder_d:.2f} D): confirm the axis and "
            "power with the practice; the axis tolerance is tight and fitting must be exact.",
            eye, {"cylinder_d": cylinder, "limit_d": params.high_cylinder_d},
        )
    material = view.material()
    # Judged along the stronger principal meridian, where the prism 10 mm out is largest.
    along = math.radians(larger_direction + (0.0 if abs(larger) >= abs(smaller) else 90.0))
    distance = params.chromatic_distance_mm
    prism = prentice_prism(matrix, distance * math.cos(along), distance * math.sin(along)).amount
    chromatic = transverse_chromatic_aberration(prism, material.abbe)
    if chromatic > params.chromatic_limit_delta:
        yield Flag(
            "chromatic-aberration", "warning",
            f"{prism:.2f}Δ of prism {distance:.0f} mm from the optical centre over Abbe number {material.abbe:g} "
            f"gives {chromatic:.2f}Δ of transverse chromatic aberration (limit {params.chromatic_limit_delta:.2f}Δ): "
            "the wearer may see colour fringes off-centre; consider a material with a higher Abbe number.",
            eye, {"prism_delta": prism, "abbe": material.abbe, "tca_delta": chromatic,
                  "distance_mm": distance, "limit_delta": params.chromatic_limit_delta},
        )


def _prism_check(view, params: SafetyParams, eye: str):
    prism = view.get(f"lenses.{eye}.prism")
    if prism and prism["amount"] > params.large_prism_delta:
        yield Flag(
            "prism-large", "warning",
            f"The prescribed prism is {prism['amount']:.2f}Δ base {prism['base_deg']:.0f}° (limit "
            f"{params.large_prism_delta:.2f}Δ): confirm it with the practice; consider splitting it between "
            "the eyes, and check the blank and edge thickness.",
            eye, {"prism_delta": prism["amount"], "base_deg": prism["base_deg"], "limit_delta": params.large_prism_delta},
        )


def _pair_checks(view, params: SafetyParams):
    if len(view.eyes) < 2:
        return
    right, left = view.get("lenses.right.rx"), view.get("lenses.left.rx")
    if right is None or left is None:
        return
    right_se = spherical_equivalent(right["sphere"], right.get("cylinder", 0.0))
    left_se = spherical_equivalent(left["sphere"], left.get("cylinder", 0.0))
    difference = abs(right_se - left_se)
    if difference >= params.anisometropia_d:
        yield Flag(
            "anisometropia", "warning",
            f"The spherical equivalents differ by {difference:.2f} D (right {right_se:+.2f}, left {left_se:+.2f}; "
            f"limit {params.anisometropia_d:.2f} D): confirm the prescription; the wearer may notice unequal image "
            "sizes and vertical prism off-centre — the practice may consider matched base curves or contact lenses.",
            None, {"right_se_d": right_se, "left_se_d": left_se, "difference_d": difference,
                   "limit_d": params.anisometropia_d},
        )
    right_matrix, left_matrix = matrix_of(right), matrix_of(left)
    depth = params.reading_depth_mm
    imbalance = vertical_imbalance(right_matrix, left_matrix, depth)
    if imbalance > params.vertical_imbalance_delta:
        more_minus = "right" if right_matrix.yy < left_matrix.yy else "left"
        if view.order.lens.design == "single_vision":
            remedy = (f"consider separate reading spectacles, or slab-off (bicentric grinding) on the {more_minus} "
                      "lens, which is more minus vertically")
        else:
            remedy = (f"consider slab-off (bicentric grinding) of about {imbalance:.1f}Δ on the {more_minus} lens, "
                      "which is more minus vertically")
        yield Flag(
            "vertical-imbalance", "warning",
            f"At the reading level, {depth:.0f} mm below the distance centres, the lenses differ by {imbalance:.2f}Δ "
            f"of vertical prism (Prentice's rule; limit {params.vertical_imbalance_delta:.2f}Δ): {remedy}. "
            "The practice decides.",
            None, {"imbalance_delta": imbalance, "depth_mm": depth, "right_vertical_d": right_matrix.yy,
                   "left_vertical_d": left_matrix.yy, "limit_delta": params.vertical_imbalance_delta,
                   "slab_off_eye": more_minus},
        )


def _impact_checks(view, params: SafetyParams):
    order = view.order
    material = order.lens.material
    glass = material in params.glass_materials
    resistant = material in params.impact_resistant_materials
    birth_year = order.wearer.birth_year if order.wearer else None
    if birth_year is not None and not resistant:
        year = _order_year(order)
        age = year - birth_year
        if 0 <= age < params.minor_age_years:  # a birth year after the order's is validate's to flag
            yield Flag(
                "impact-resistance-minor", "review" if glass else "warning",
                f"The wearer, born {birth_year}, is about {age} in {year} (under {params.minor_age_years}) and the "
                f"lens is {material}, not an impact-resistant material: confirm with the practice, or change to "
                f"{' or '.join(params.impact_resistant_materials)}. {CAUTION}",
                None, {"birth_year": birth_year, "age_years": age, "year": year, "material": material,
                       "minor_age_years": params.minor_age_years},
            )
    mount = order.frame.mount
    if mount in ("drilled", "grooved") and not resistant:
        yield Flag(
            "impact-resistance-mount", "review" if glass else "warning",
            f"A {mount} mount holds the lens by its edge or holes, where {material} can chip or crack: "
            f"an impact-resistant material ({', '.join(params.impact_resistant_materials)}) is advised; "
            f"confirm the material with the practice. {CAUTION}",
            None, {"mount": mount, "material": material},
        )
    if glass:
        yield Flag(
            "glass-hardening", "warning",
            f"The lens is glass ({material}): it must be hardened (heat or chemical tempering) and tested — {DROP_BALL}. "
            f"Follow local rules where they differ. {CAUTION}",
            None, {"material": material, "regulation": "21 CFR 801.410"},
        )


def _geometry_checks(view, params: SafetyParams, eye: str):
    # The two numbers it judges, not a copy of the whole geometry.
    edge, blank = view.get(f"lenses.{eye}.geometry.edge_max_mm"), view.get(f"lenses.{eye}.geometry.blank_min_diameter_mm")
    if edge is None or blank is None:
        return
    mount = view.order.frame.mount
    mount_limit = params.max_edge_mm.get(mount)
    if mount_limit is not None and edge > mount_limit:
        yield Flag(
            "edge-too-thick-for-mount", "warning",
            f"The thickest edge is {edge:.2f} mm, more than a {mount.replace('_', ' ')} mount holds well "
            f"({mount_limit:.1f} mm): consider a higher index, a smaller or rounder frame, or another mount.",
            eye, {"edge_max_mm": edge, "limit_mm": mount_limit, "mount": mount},
        )
    elif edge > params.cosmetic_edge_mm:
        yield Flag(
            "edge-thick-cosmetic", "info",
            f"The thickest edge is {edge:.2f} mm, over the cosmetic limit of {params.cosmetic_edge_mm:.1f} mm: "
            "the practice may offer a higher index or edge polishing.",
            eye, {"edge_max_mm": edge, "limit_mm": params.cosmetic_edge_mm},
        )
    if blank > params.max_blank_diameter_mm:
        yield Flag(
            "blank-too-large", "review",
            f"The lens needs a blank of at least {blank:.1f} mm, larger than the lab stocks "
            f"({params.max_blank_diameter_mm:.1f} mm): check the PD and the frame with the practice, choose a "
            "smaller frame, or order a special blank.",
            eye, {"blank_min_diameter_mm": blank, "max_blank_diameter_mm": params.max_blank_diameter_mm},
        )


def run(view, params: SafetyParams):
    for eye in view.eyes:
        yield from _power_checks(view, params, eye)
        yield from _prism_check(view, params, eye)
        yield from _geometry_checks(view, params, eye)
    yield from _pair_checks(view, params)
    yield from _impact_checks(view, params)


@hookimpl
def lenslane_stages():
    return [Stage(name="safety", run=run, params=SafetyParams,
                  description="safety flags: high powers, prism, anisometropia, imbalance, impact, edges, blank, chromatism")]
