"""Stage ``tilt``: the surfacing power for the pantoscopic tilt and face form at which the lens is worn.

A tilted lens acts along the line of sight as ``k Sᵀ F S`` (Martin's formula on
the power matrix). When the order gives a pantoscopic or face-form angle, the
surfacing power becomes the exact inverse ``F = S⁻ᵀ F_w S⁻¹ / k`` of the wanted
power ``F_w`` (the surfacing power so far, after vertex compensation), with the
lens index from the order or the lab's material table. Pantoscopic tilt and
face form are compensated for the designs the lab lists for each: a lab that
lowers single-vision optical centres for pantoscopic tilt leaves single vision
out of ``pantoscopic_apply_to`` and may still compensate its face form. Whatever happens, the result says what was and was not applied,
and why.
"""
from __future__ import annotations

import math

from pydantic import Field

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.compensation import (
    CompensationParams, Design, matrix_of, no_surfacing, not_applied, power_dict, propose, trade_notation,
)
from lenslane.plugins.optics.tilt import compensate_tilt, martin_factor, tangential_meridian_deg, tilt_obliquity

METHOD = ("exact inverse of Martin's tilt formula on the power matrix, F = S⁻ᵀ F_w S⁻¹ / k, "
          "k = 1 + sin²θ/(2n), S = I + (sec θ − 1) t tᵀ, cos θ = cos p · cos w")
SOURCE = ("Martin's formula, as given in Jalie, The Principles of Ophthalmic Lenses, and Brooks & Borish, "
          "System for Ophthalmic Dispensing; power-matrix generalisation: Harris, Optom Vis Sci 2002; "
          "Keating, Optom Vis Sci 1995")

ALL_DESIGNS: list[Design] = ["single_vision", "progressive", "bifocal"]


class TiltParams(CompensationParams):
    """``[stages.tilt]``."""

    pantoscopic_apply_to: list[Design] = Field(default_factory=lambda: list(ALL_DESIGNS))
    """The designs whose surfacing power is compensated for pantoscopic tilt."""
    face_form_apply_to: list[Design] = Field(default_factory=lambda: list(ALL_DESIGNS))
    """The designs whose surfacing power is compensated for face form."""


def _missing_fit(view, params: TiltParams, pantoscopic, face_form):
    design = view.order.lens.design
    missing = [name for name, value in (("pantoscopic tilt", pantoscopic), ("face form", face_form)) if value is None]
    if design in params.fit_expected_for and missing:
        yield Flag(
            "fit-tilt-missing", "info",
            f"A {design.replace('_', '-')} lens is normally made for the measured tilt of the frame; the order "
            f"gives no {' and no '.join(missing)}"
            + (", so no tilt compensation was made" if len(missing) == 2 else ", taken as 0°")
            + ": ask the practice for the measurement.",
            None, {"design": design, "missing": missing},
        )


def _index(view) -> tuple[float, str]:
    lens = view.order.lens
    if lens.index is not None:
        return lens.index, "order (lens.index)"
    return view.material().index, f"material table ({lens.material})"


def run(view, params: TiltParams):
    fit = view.order.fit
    design = view.order.lens.design
    pantoscopic, face_form = fit.pantoscopic_deg, fit.face_form_deg
    if params.policy == "never":
        yield not_applied("tilt", "The lab's tilt policy is 'never': the surfacing power is not compensated for "
                                  "pantoscopic tilt or face form.", values={"policy": "never"})
        return
    if pantoscopic is None and face_form is None:
        yield not_applied("tilt", "The order gives neither a pantoscopic tilt nor a face-form angle, so the "
                                  "surfacing power is not compensated for tilt.")
        yield from _missing_fit(view, params, pantoscopic, face_form)
        return
    left_out = [(name, key, value) for name, key, value, designs in (
        ("pantoscopic tilt", "pantoscopic_apply_to", pantoscopic, params.pantoscopic_apply_to),
        ("face form", "face_form_apply_to", face_form, params.face_form_apply_to)) if design not in designs]
    if len(left_out) == 2:
        yield not_applied(
            "tilt",
            f"The lab's tilt policy compensates {design.replace('_', '-')} lenses neither for pantoscopic tilt "
            f"(pantoscopic_apply_to: {', '.join(params.pantoscopic_apply_to) or 'none'}) nor for face form "
            f"(face_form_apply_to: {', '.join(params.face_form_apply_to) or 'none'}), so the surfacing power is "
            "not changed for the tilt of the frame.",
            values={"design": design, "pantoscopic_apply_to": list(params.pantoscopic_apply_to),
                    "face_form_apply_to": list(params.face_form_apply_to)},
        )
        return
    yield from _missing_fit(view, params, pantoscopic, face_form)
    assumptions = [f"{name} 0° (not given)" for name, value in
                   (("pantoscopic tilt", pantoscopic), ("face form", face_form)) if value is None]
    for name, key, value in left_out:
        if value:
            assumptions.append(f"{name} {value:.1f}° not compensated for {design.replace('_', '-')} lenses "
                               f"(the lab's {key})")
    pantoscopic = 0.0 if "pantoscopic_apply_to" in (key for _, key, _ in left_out) else pantoscopic or 0.0
    face_form = 0.0 if "face_form_apply_to" in (key for _, key, _ in left_out) else face_form or 0.0
    if pantoscopic == 0.0 and face_form == 0.0:
        reason = ("The pantoscopic tilt and face form are 0°: the lens is not tilted and needs no compensation."
                  if not left_out else
                  f"The tilt left to compensate is 0° ({'; '.join(assumptions)}), so the surfacing power is not "
                  "changed for the tilt of the frame.")
        yield not_applied("tilt", reason, values={"pantoscopic_deg": 0.0, "face_form_deg": 0.0,
                                                  "assumptions": assumptions})
        return
    index, index_from = _index(view)
    form = view.settings.cylinder_form
    angles = (f"pantoscopic tilt {pantoscopic:.1f}°, face form {face_form:.1f}°"
              + (f" ({'; '.join(assumptions)})" if assumptions else ""))
    for eye in view.eyes:
        before = view.get(f"lenses.{eye}.surfacing")
        if before is None:
            yield no_surfacing("tilt", eye)
            continue
        theta, tangential = tilt_obliquity(pantoscopic, face_form, eye)
        after = power_dict(compensate_tilt(matrix_of(before), theta, tangential, index), before, form)
        obliquity_deg = math.degrees(theta)
        meridian = tangential_meridian_deg(tangential)
        inputs = {
            "eye": eye,
            "pantoscopic_deg": pantoscopic,
            "face_form_deg": face_form,
            "assumptions": assumptions,
            "index": index,
            "index_from": index_from,
            "obliquity_deg": obliquity_deg,
            "tangential_direction": [tangential[0], tangential[1]],
            "tangential_meridian_deg": meridian,
            "martin_factor": martin_factor(theta, index),
            "policy": params.policy,
        }
        reason = (
            f"Worn with {angles}, the lens meets the line of sight at {obliquity_deg:.1f}° in the "
            f"{meridian:.0f}° meridian (index {index:.3f}), so it is made {trade_notation(before)} → "
            f"{trade_notation(after)} for its tilted effect to equal the wanted power."
        )
        yield from propose(
            "tilt", eye, before, after, params, reason=reason, method=METHOD, source=SOURCE, inputs=inputs,
            described=f"Tilt compensation for {angles} (obliquity {obliquity_deg:.1f}°)",
        )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="tilt", run=run, writes=("lenses.*.surfacing",), params=TiltParams,
        description="surfacing power for pantoscopic tilt and face form (inverse of Martin's formula)",
    )]
