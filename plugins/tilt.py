"""Stage ``tilt``: the surfacing power for the pantoscopic tilt and face form at which the lens is worn.

A tilted lens acts along the line of sight as ``k Sᵀ F S`` (Martin's formula on
the power matrix). When the order gives a pantoscopic or face-form angle, the
surfacing power becomes the exact inverse ``F = S⁻ᵀ F_w S⁻¹ / k`` of the wanted
power ``F_w`` (the surfacing power so far, after vertex compensation), with the
lens index from the order or the lab's material table. A lab that lowers
optical centres for pantoscopic tilt instead leaves such designs out of
``apply_to``. Whatever happens, the result says what was and was not applied,
and why.
"""
from __future__ import annotations

import math

from typing import Literal, NamedTuple

import numpy as np
from pydantic import Field, model_serializer

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.compensation import (
    CompensationParams, Design, matrix_of, no_surfacing, not_applied, power_dict, propose, trade_notation,
)
from lenslane.contract.precision import present
from lenslane.plugins.geometry import GeometryParams, made_lens
from lenslane.plugins.optics.asworn import (
    coddington_vergence, exact_compensation, gaze_errors, largest_meridional_error, off_axis_record, power_elements,
    worn_lenses,
)
from lenslane.plugins.optics.power import PowerMatrix
from lenslane.plugins.optics.raytrace import RayMissedSurface
from lenslane.plugins.optics.thickness import LensNotMakeable
from lenslane.plugins.optics.tilt import compensate_tilt, martin_factor, tangential_meridian_deg, tilt_obliquity

METHOD = ("exact inverse of Martin's tilt formula on the power matrix, F = S⁻ᵀ F_w S⁻¹ / k, "
          "k = 1 + sin²θ/(2n), S = I + (sec θ − 1) t tᵀ, cos θ = cos p · cos w")
SOURCE = ("Martin's formula, as given in Jalie, The Principles of Ophthalmic Lenses, and Brooks & Borish, "
          "System for Ophthalmic Dispensing; power-matrix generalisation: Harris, Optom Vis Sci 2002; "
          "Keating, Optom Vis Sci 1995")

ALL_DESIGNS: list[Design] = ["single_vision", "progressive", "bifocal"]
#: The solve is repeated at most this often when the solved power makes the geometry choose another front curve.
_FRONT_ROUNDS = 4


EXACT_METHOD = ("the surfacing power whose lens, traced with real rays (vector Snell's law through the spherical "
                "front and toric back at the centre thickness the lens geometry gives it), tilted by θ about the "
                "axis perpendicular to t with cos θ = cos p · cos w, has an as-worn vergence at the back-vertex "
                "plane equal to the wanted power; Newton's method on the surfacing power matrix, the thickness "
                "re-derived at each step")
EXACT_SOURCE = ("Spencer & Murty, \"General ray-tracing procedure\", JOSA 52:672, 1962; Kneisly, JOSA 54:229, "
                "1964 (wavefront curvature about the chief ray); Jalie, The Principles of Ophthalmic Lenses "
                "(thickness); Thibos, Wheeler & Horner, Optom Vis Sci 74:367, 1997 (off-axis errors)")


class TiltParams(CompensationParams):
    """``[stages.tilt]``."""

    apply_to: list[Design] = Field(default_factory=lambda: list(ALL_DESIGNS))
    """The designs whose surfacing power is compensated for tilt."""
    method: Literal["martin", "exact"] = "martin"
    """"martin": the inverse of Martin's thin-lens formula; "exact": the lens whose real-ray traced
    as-worn power equals the wanted power, solved together with its centre thickness."""

    @model_serializer(mode="wrap")
    def _effective(self, handler):
        # The default method is left out of the effective config, so the config hash (and with it every
        # result) of a lab that does not choose "exact" stays what it was before the method existed.
        data = handler(self)
        if data.get("method") == "martin":
            del data["method"]
        return data


class _Exact(NamedTuple):
    """The exact compensation of one lens: its power matrix and what its change record adds."""

    matrix: PowerMatrix
    inputs: dict


def _exact(view, eye: str, before: dict, martin: PowerMatrix, theta: float, tangential, index: float,
           form: str) -> _Exact:
    """Solve the surfacing power, the front curve and the thickness the geometry stage will give it, together.

    The front curve is the geometry stage's choice for the surfacing power; the
    power is solved for that front (the thickness re-derived at every step),
    and again if the solved power makes the geometry stage choose another
    front, until the front it chooses is the one solved for.
    Raises :class:`LensNotMakeable` when no lens can be made.
    """
    geometry = view.settings.stage_params.get("geometry")
    wanted = matrix_of(before)
    surfacing, front, solved = martin, None, None
    for _ in range(_FRONT_ROUNDS):
        chosen, _ = made_lens(view, eye, power_dict(surfacing, before, form), geometry)
        if chosen == front:
            break
        front = chosen

        def thickness_of(candidates, front=front):
            return [made_lens(view, eye, power_dict(PowerMatrix(*c), before, form), geometry, front)[1]
                    for c in candidates]

        solved = exact_compensation([wanted], front, index, theta, tangential, thickness_of)
        surfacing = PowerMatrix(*(float(v) for v in solved.surfacing[0]))
    else:
        raise LensNotMakeable(f"the solved power keeps changing the front curve the lab would choose "
                              f"({_FRONT_ROUNDS} rounds)")
    after = power_dict(surfacing, before, form)
    centre = float(solved.center_mm[0])
    published = present(after, "surfacing")
    lenses = worn_lenses([front], [surfacing], centre, index, theta, tangential)
    as_published = worn_lenses([front], [matrix_of(published)], centre, index, theta, tangential)
    published_residual = float(largest_meridional_error(
        np.array(wanted) - power_elements(coddington_vergence(as_published))[0]))
    rotation = (geometry or GeometryParams()).rotation_distance_mm
    errors = gaze_errors(lenses, [wanted], [eye], rotation)
    return _Exact(surfacing, {
        "method": "exact",
        "martin_surfacing": power_dict(martin, before, form),
        "asworn_residual_d": float(solved.residual_d[0]),
        "published_asworn_residual_d": published_residual,
        "newton_steps": solved.steps,
        "front_curve_d": front,
        "center_thickness_mm": centre,
        "rotation_distance_mm": rotation,
        "off_axis": off_axis_record(errors),
    })


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
    if design not in params.apply_to:
        yield not_applied(
            "tilt",
            f"The lab's tilt policy does not compensate {design.replace('_', '-')} lenses (apply_to: "
            f"{', '.join(params.apply_to) or 'none'}), so the surfacing power is not changed for the tilt "
            "of the frame.",
            values={"design": design, "apply_to": list(params.apply_to)},
        )
        return
    yield from _missing_fit(view, params, pantoscopic, face_form)
    assumptions = [f"{name} 0° (not given)" for name, value in
                   (("pantoscopic tilt", pantoscopic), ("face form", face_form)) if value is None]
    pantoscopic, face_form = pantoscopic or 0.0, face_form or 0.0
    if pantoscopic == 0.0 and face_form == 0.0:
        yield not_applied("tilt", "The pantoscopic tilt and face form are 0°: the lens is not tilted and needs no "
                                  "compensation.", values={"pantoscopic_deg": 0.0, "face_form_deg": 0.0})
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
        martin = compensate_tilt(matrix_of(before), theta, tangential, index)
        method, source, exact = METHOD, SOURCE, None
        if params.method == "exact":
            try:
                exact = _exact(view, eye, before, martin, theta, tangential, index, form)
                method, source = EXACT_METHOD, EXACT_SOURCE
            except (LensNotMakeable, RayMissedSurface) as exc:
                yield Flag("tilt-exact-not-possible", "warning",
                           f"The exact tilt compensation needs the lens's shape, and no lens can be made for this "
                           f"power and frame ({exc}); Martin's formula is used instead.", eye, {})
        after = power_dict(martin if exact is None else exact.matrix, before, form)
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
        if exact is not None:
            inputs.update(exact.inputs)
            reason = reason[:-1] + (
                f", traced with real rays through its front of {exact.inputs['front_curve_d']:.2f} D and centre "
                f"thickness of {exact.inputs['center_thickness_mm']:.1f} mm (Martin's thin-lens formula would "
                f"give {trade_notation(exact.inputs['martin_surfacing'])}).")
        yield from propose(
            "tilt", eye, before, after, params, reason=reason, method=method, source=source, inputs=inputs,
            described=f"Tilt compensation for {angles} (obliquity {obliquity_deg:.1f}°)",
        )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="tilt", run=run, writes=("lenses.*.surfacing",), params=TiltParams,
        description="surfacing power for pantoscopic tilt and face form (inverse of Martin's formula)",
    )]
