"""Stage ``vertex``: the surfacing power for the vertex distance at which the lens is worn.

The prescription holds at the vertex distance of the refraction (the order's
``rx.vertex_mm``, else the lab's default, recorded as an assumption). When the
order gives the fitted frame's vertex distance, the surfacing power becomes
``F_w = F (I − d F)⁻¹``, d = (refraction − fitting) / 1000 m, so that the lens
gives the prescribed power at the eye. Whatever happens, the result says what
was and was not applied, and why.
"""
from __future__ import annotations

from typing import Annotated

from pydantic import Field

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.compensation import (
    CompensationParams, no_surfacing, not_applied, power_dict, propose, trade_notation,
)
from lenslane.plugins.optics.power import matrix_of, principal_powers
from lenslane.plugins.optics.vertex import vertex_change_m, vertex_move

METHOD = "vertex distance compensation on the power matrix, F_w = F (I − d F)⁻¹"
SOURCE = ("Vergence transfer F' = F / (1 − d F), e.g. Jalie, The Principles of Ophthalmic Lenses; "
          "matrix form: Harris, power-matrix papers, Optometry and Vision Science")


class VertexParams(CompensationParams):
    """``[stages.vertex]``."""

    default_refraction_vertex_mm: Annotated[float, Field(ge=0, le=25)] = 12.0
    """The refraction vertex distance assumed when the order gives no ``rx.vertex_mm``."""
    vertex_matters_from_d: Annotated[float, Field(gt=0)] = 4.0
    """Without a fitting vertex distance, a lens with a meridian this strong is told (info)."""


def _missing_fit(view, params: VertexParams):
    """Info when the order lacks a vertex distance its design or its power normally needs."""
    design = view.order.lens.design
    reasons = []
    if design in params.fit_expected_for:
        reasons.append(f"a {design.replace('_', '-')} lens is normally made for the measured vertex distance")
    strongest = 0.0
    for eye in view.eyes:
        power = view.get(f"lenses.{eye}.surfacing")
        if power is not None:
            larger, smaller, _ = principal_powers(matrix_of(power))
            strongest = max(strongest, abs(larger), abs(smaller))
    if strongest >= params.vertex_matters_from_d:
        reasons.append(f"at {strongest:.2f} D in a meridian the vertex distance changes the power at the eye")
    if reasons:
        yield Flag(
            "fit-vertex-missing", "info",
            "The order gives no fitting vertex distance although " + " and ".join(reasons)
            + ": ask the practice for it unless the frame sits at the refraction distance.",
            None, {"design": design, "strongest_meridian_d": round(strongest, 4)},
        )


def _refraction_vertex(view, params: VertexParams) -> tuple[float, str | None]:
    """The refraction vertex distance and, when it is the lab's default, the assumption made."""
    given = view.order.rx.vertex_mm
    if given is not None:
        return given, None
    default = params.default_refraction_vertex_mm
    return default, f"refraction vertex distance {default:.1f} mm: the lab's default, the order gives none"


def run(view, params: VertexParams):
    fitting = view.order.fit.vertex_mm
    if params.policy == "never":
        yield not_applied("vertex", "The lab's vertex policy is 'never': the surfacing power is not compensated "
                                    "for vertex distance.", values={"policy": "never"})
        return
    if fitting is None:
        yield not_applied("vertex", "The order gives no fitting vertex distance (fit.vertex_mm), so the surfacing "
                                    "power is not compensated for vertex distance.")
        yield from _missing_fit(view, params)
        return
    refraction, assumption = _refraction_vertex(view, params)
    origin = "the lab's default, the order gives none" if assumption else "as the order gives it"
    if refraction == fitting:
        yield not_applied("vertex", f"The lens is worn at the refraction vertex distance, {fitting:.1f} mm "
                                    f"({origin}): no compensation is needed.",
                          values={"refraction_vertex_mm": refraction, "fitting_vertex_mm": fitting})
        return
    inputs = {
        "refraction_vertex_mm": refraction,
        "refraction_vertex_from": "lab default" if assumption else "order",
        "fitting_vertex_mm": fitting,
        "d_m": vertex_change_m(refraction, fitting),
        "policy": params.policy,
        "assumptions": [assumption] if assumption else [],
    }
    form = view.settings.cylinder_form
    described = f"Vertex compensation from {refraction:.1f} mm ({origin}) to {fitting:.1f} mm"
    for eye in view.eyes:
        before = view.get(f"lenses.{eye}.surfacing")
        if before is None:
            yield no_surfacing("vertex", eye)
            continue
        try:
            moved = vertex_move(matrix_of(before), refraction, fitting)
        except ValueError as exc:
            yield not_applied("vertex", f"Vertex compensation is impossible: {exc}; check the prescription and "
                                        "the vertex distances.", eye, level="review")
            continue
        after = power_dict(moved, before, form)
        reason = (
            f"Worn at {fitting:.1f} mm instead of the {refraction:.1f} mm of the refraction ({origin}), the lens "
            f"is made {trade_notation(before)} → {trade_notation(after)} so that its power at the eye stays "
            "as prescribed."
        )
        yield from propose(
            "vertex", eye, before, after, params, reason=reason, method=METHOD, source=SOURCE,
            inputs={**inputs, "eye": eye}, described=described,
        )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="vertex", run=run, writes=("lenses.*.surfacing",), params=VertexParams,
        description="surfacing power for the fitted vertex distance (F_w = F (I − dF)⁻¹)",
    )]
