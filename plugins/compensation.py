"""What the ``vertex`` and ``tilt`` stages share: policies, the trade notation, the tolerance flags.

A compensation changes the power the lab surfaces; the practice checks the
finished lens against the prescription on a lensmeter. So each applied
compensation is compared, meridian by meridian, with the ANSI Z80.1
tolerance: within it the change is told (info), beyond it the practice must
hear of it (warning), and a large change holds the order for a person (review).
"""
from __future__ import annotations

from typing import Annotated, Any, Literal, Mapping, NamedTuple

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Change, Flag
from lenslane.report.notation import number, power_text
from lenslane.plugins.optics.power import PowerMatrix, matrix_of, sphero_cylinder
from lenslane.plugins.optics.tolerance import MeridianChange, axis_shift_deg, axis_tolerance, principal_meridian_changes
from lenslane.vocabulary import CAUTION, Design

Policy = Literal["always", "above_tolerance", "never"]


class CompensationParams(BaseModel):
    """Keys both compensation stages accept in their ``[stages.<name>]`` table."""

    model_config = ConfigDict(extra="forbid", strict=True)

    policy: Policy = "always"
    """"always": whenever the order has the measurements; "above_tolerance": only when the
    change exceeds the ANSI Z80.1 tolerance in a meridian or the axis; "never"."""
    review_above_d: Annotated[float, Field(gt=0)] = 0.50
    """A change larger than this in any principal meridian holds the order for review."""
    tolerance_scale: Annotated[float, Field(gt=0, le=10)] = 1.0
    """The Z80.1 tolerances are multiplied by this before comparing (1.0 = the standard)."""
    fit_expected_for: list[Design] = Field(default_factory=lambda: ["progressive"])
    """Designs normally made for the measured fit: missing measurements are told (info)."""


# --------------------------------------------------------------------------
# Powers: dicts of the result, matrices of the optics, words of the trade
# --------------------------------------------------------------------------


def power_dict(matrix: PowerMatrix, before: Mapping[str, Any], form: str) -> dict[str, Any]:
    """A matrix as a result power dict in the lab's form, full precision, ``add`` kept from ``before``.

    A result with no cylinder keeps the axis of ``before`` (any axis is right).
    """
    written = sphero_cylinder(matrix, form, axis_if_spherical=before.get("axis", 180.0))
    power = {"sphere": written.sphere, "cylinder": written.cylinder, "axis": written.axis}
    if "add" in before:
        power["add"] = before["add"]
    return power


def trade_notation(power: Mapping[str, Any]) -> str:
    """A surfacing power as written on an order, without its add: ``−4.25 −1.25 × 170``."""
    return power_text(power, add=False)


# --------------------------------------------------------------------------
# The change against ANSI Z80.1
# --------------------------------------------------------------------------


class Assessment(NamedTuple):
    """A compensation compared with the Z80.1 tolerances."""

    meridians: tuple[MeridianChange, MeridianChange]
    axis_shift_deg: float | None
    axis_tolerance_deg: float | None
    largest_change: float
    beyond: bool
    large: bool


def assess(before: Mapping[str, Any], after: Mapping[str, Any], params: CompensationParams) -> Assessment:
    """Compare the power after a compensation with the power before it.

    The principal meridians of the lens before are compared with the scaled
    sphere-meridian tolerance; the axis, when both lenses have a cylinder the
    table covers, with the axis tolerance of the cylinder before. A meridian
    change alone misses a turned axis, which a lensmeter sees.
    """
    meridians = principal_meridian_changes(matrix_of(before), matrix_of(after))
    first, second = meridians
    scale = params.tolerance_scale
    beyond = abs(first.change) > scale * first.tolerance or abs(second.change) > scale * second.tolerance
    shift = tolerance = None
    tolerance_before = axis_tolerance(before.get("cylinder", 0.0))
    if tolerance_before is not None and axis_tolerance(after.get("cylinder", 0.0)) is not None:
        shift, tolerance = axis_shift_deg(before["axis"], after["axis"]), tolerance_before
        beyond = beyond or abs(shift) > scale * tolerance
    largest = max(abs(first.change), abs(second.change))
    return Assessment(meridians, shift, tolerance, largest, beyond, largest > params.review_above_d)


def _shown(value: float, decimals: int) -> float:
    return round(value, decimals) + 0.0  # no negative zero: a change of −0.00001 D reads 0.0, not −0.0


def assessment_values(assessment: Assessment, params: CompensationParams) -> dict[str, Any]:
    """The numbers of an assessment for a flag's ``values`` (rounded for reading only)."""
    values: dict[str, Any] = {
        "meridians": [
            {"meridian_deg": _shown(m.direction_deg, 1), "before_d": _shown(m.before, 4),
             "after_d": _shown(m.after, 4), "change_d": _shown(m.change, 4),
             "tolerance_d": _shown(params.tolerance_scale * m.tolerance, 4)}
            for m in assessment.meridians
        ],
        "review_above_d": params.review_above_d,
    }
    if assessment.axis_shift_deg is not None:
        values["axis_shift_deg"] = _shown(assessment.axis_shift_deg, 2)
        values["axis_tolerance_deg"] = _shown(params.tolerance_scale * assessment.axis_tolerance_deg, 2)
    return values


def _describe(assessment: Assessment, params: CompensationParams) -> str:
    first, second = assessment.meridians
    text = (f"the {first.direction_deg:.0f}° meridian by {number(first.change, sign=True)} D and the "
            f"{second.direction_deg:.0f}° meridian by {number(second.change, sign=True)} D "
            f"(tolerance ±{params.tolerance_scale * first.tolerance:.2f} / "
            f"±{params.tolerance_scale * second.tolerance:.2f} D)")
    if assessment.axis_shift_deg is not None and round(assessment.axis_shift_deg, 1) != 0.0:
        text += (f" and turns the axis by {abs(assessment.axis_shift_deg):.1f}° "
                 f"(tolerance ±{params.tolerance_scale * assessment.axis_tolerance_deg:.0f}°)")
    return text


def tolerance_flag(stage: str, what: str, eye: str, assessment: Assessment, params: CompensationParams) -> Flag:
    """The flag that tells how large an applied compensation is against ANSI Z80.1."""
    change = f"{what} moves {_describe(assessment, params)}"
    values = assessment_values(assessment, params)
    if assessment.large:
        return Flag(
            f"{stage}-change-large", "review",
            f"The {change}: more than {params.review_above_d:.2f} D in a meridian, so the order is held for a "
            f"person to confirm the fit measurements with the practice before surfacing. {CAUTION}",
            eye, values,
        )
    if assessment.beyond:
        return Flag(
            f"{stage}-beyond-tolerance", "warning",
            f"The {change}, beyond the ANSI Z80.1 tolerance: checked against the prescription on a lensmeter "
            f"the lens will read differently, as intended; tell the practice. {CAUTION}",
            eye, values,
        )
    return Flag(
        f"{stage}-within-tolerance", "info",
        f"The {change}, within the ANSI Z80.1 tolerance.",
        eye, values,
    )


def not_applied(stage: str, reason: str, eye: str | None = None, values: Mapping[str, Any] | None = None,
                level: str = "info") -> Flag:
    """The flag that says a compensation was not applied, and why."""
    return Flag(f"{stage}-not-applied", level, reason, eye, dict(values or {}))


def no_surfacing(stage: str, eye: str) -> Flag:
    """The warning when there is no surfacing power to work on (the normalize stage did not run)."""
    return not_applied(stage, f"There is no surfacing power to compensate (the normalize stage did not run), so "
                              f"{stage} compensation was not made.", eye, level="warning")


def propose(stage: str, eye: str, before: Mapping[str, Any], after: Mapping[str, Any],
            params: CompensationParams, *, reason: str, method: str, source: str,
            inputs: Mapping[str, Any], described: str):
    """The change and its tolerance flag — or, when the lab's policy skips it, the flag that says why.

    ``described`` names the compensation with its numbers, e.g. "Vertex
    compensation from 12.0 mm to 13.5 mm".
    """
    assessment = assess(before, after, params)
    if params.policy == "above_tolerance" and not assessment.beyond:
        yield not_applied(
            stage,
            f"{described} would change {trade_notation(before)} to {trade_notation(after)}, within the ANSI "
            "Z80.1 tolerance, so the lab's 'above_tolerance' policy leaves the surfacing power unchanged.",
            eye, assessment_values(assessment, params),
        )
        return
    yield Change(f"lenses.{eye}.surfacing", dict(after), reason, method, source, dict(inputs))
    yield tolerance_flag(stage, f"{stage} compensation", eye, assessment, params)
