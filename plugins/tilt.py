"""Stage ``tilt``: the surfacing power for the pantoscopic tilt and face form at which the lens is worn.

A tilted lens acts along the line of sight as ``k Sᵀ F S`` (Martin's formula on
the power matrix). When the order gives a pantoscopic or face-form angle, the
surfacing power becomes the exact inverse ``F = S⁻ᵀ F_w S⁻¹ / k`` of the wanted
power ``F_w`` (the surfacing power so far, after vertex compensation), with the
lens index from the order or the lab's material table. With ``method = "exact"``
the surfacing power is instead the one whose lens, traced with real rays
through its front curve, toric back and centre thickness (the geometry stage's
own for that power), is worn as the wanted power
(:mod:`lenslane.plugins.optics.asworn`); where no lens can be made for it,
Martin's formula is used with a warning. Pantoscopic tilt and face form are
compensated for the designs the lab lists for each: a lab that lowers
single-vision optical centres for pantoscopic tilt leaves single vision out of
``pantoscopic_apply_to`` and may still compensate its face form. Whatever
happens, the result says what was and was not applied, and why.
"""
from __future__ import annotations

import math
from typing import Literal, NamedTuple

from pydantic import Field, model_serializer

from lenslane import Flag, Stage, hookimpl
from lenslane.plugins.compensation import (
    CompensationParams, Design, no_surfacing, not_applied, power_dict, propose, trade_notation,
)
from lenslane.contract.precision import present
from lenslane.plugins.geometry import GeometryParams, PlannedLens, lens_planner
from lenslane.plugins.optics.asworn import (
    ExactLens, NotSettled, asworn_power, exact_compensation, gaze_errors, largest_meridional_error, off_axis_record,
    worn_lens,
)
from lenslane.plugins.optics.power import PowerMatrix, matrix_of
from lenslane.plugins.optics.raytrace import RayMissedSurface
from lenslane.plugins.optics.thickness import LensNotMakeable
from lenslane.plugins.optics.tilt import compensate_tilt, martin_factor, tangential_meridian_deg, tilt_obliquity
from lenslane.vocabulary import DESIGNS

METHOD = ("exact inverse of Martin's tilt formula on the power matrix, F = S⁻ᵀ F_w S⁻¹ / k, "
          "k = 1 + sin²θ/(2n), S = I + (sec θ − 1) t tᵀ, cos θ = cos p · cos w")
SOURCE = ("Martin's formula, as given in Jalie, The Principles of Ophthalmic Lenses, and Brooks & Borish, "
          "System for Ophthalmic Dispensing; power-matrix generalisation: Harris, Optom Vis Sci 2002; "
          "Keating, Optom Vis Sci 1995")

EXACT_METHOD = ("the surfacing power whose lens, traced with real rays (vector Snell's law through the spherical "
                "front and toric back at the centre thickness the lens geometry gives it), tilted by θ about the "
                "axis perpendicular to t with cos θ = cos p · cos w, has an as-worn vergence at the back-vertex "
                "plane equal to the wanted power; the pencil carried along the traced chief ray by the generalised "
                "Coddington equations, the surfacing power in closed form for each centre thickness tried and the "
                "thickness re-derived for it until the two agree")
EXACT_SOURCE = ("Spencer & Murty, \"General ray-tracing procedure\", JOSA 52:672, 1962; Kneisly, JOSA 54:229, "
                "1964 (wavefront curvature about the chief ray); Jalie, The Principles of Ophthalmic Lenses "
                "(thickness); Thibos, Wheeler & Horner, Optom Vis Sci 74:367, 1997 (off-axis errors)")

ALL_DESIGNS: list[Design] = list(DESIGNS)


class TiltParams(CompensationParams):
    """``[stages.tilt]``."""

    pantoscopic_apply_to: list[Design] = Field(default_factory=lambda: list(ALL_DESIGNS))
    """The designs whose surfacing power is compensated for pantoscopic tilt."""
    face_form_apply_to: list[Design] = Field(default_factory=lambda: list(ALL_DESIGNS))
    """The designs whose surfacing power is compensated for face form."""
    method: Literal["martin", "exact"] = "martin"
    """"martin": the inverse of Martin's thin-lens formula; "exact": the lens whose real-ray traced
    as-worn power equals the wanted power, solved together with its front curve and centre thickness."""

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


def _exact_pair(view, befores: dict, martins: dict, tilts: dict, index: float, form: str) -> dict[str, _Exact]:
    """Solve the surfacing powers, the front curves and the thicknesses the geometry stage will give them, together.

    The front curves and centre thicknesses are the geometry stage's own for
    the pair's surfacing powers (matched fronts included), asked once per
    round of the solution for both eyes; the first round starts from its lens
    for Martin's powers. Raises :class:`LensNotMakeable` (no lens can be
    made) or :class:`RayMissedSurface` (a chief ray cannot get through).
    """
    geometry = view.settings.stage_params.get("geometry") or GeometryParams()
    # A lens for Martin's power that no thickness makes starts at the lab's minimum centre thickness.
    minimums = geometry.minimum_thickness.get(view.order.lens.material, geometry.other_minimum_thickness)

    planner = lens_planner(view, geometry)

    def planned(matrices) -> dict[str, PlannedLens]:
        return planner({eye: power_dict(matrix, befores[eye], form) for eye, matrix in matrices.items()})

    def shape(surfacings):
        return {eye: (lens.front_d, _centre_mm(lens)) for eye, lens in planned(surfacings).items()}

    start = {eye: (lens.front_d, _centre_mm(lens, otherwise=minimums.center_mm))
             for eye, lens in planned(martins).items()}
    lenses = {eye: ExactLens(matrix_of(before), index, *tilts[eye]) for eye, before in befores.items()}
    solved = exact_compensation(lenses, shape, start)
    exact = {}
    for eye, before in befores.items():
        theta, tangential = tilts[eye]
        wanted, made = lenses[eye].wanted, solved[eye]
        front, centre, surfacing = made.front_d, made.center_mm, made.surfacing
        published = matrix_of(present(power_dict(surfacing, before, form), "surfacing"))
        published_worn = asworn_power(worn_lens(front, published, centre, index, theta, tangential))
        errors = gaze_errors(worn_lens(front, surfacing, centre, index, theta, tangential), wanted, eye,
                             geometry.rotation_distance_mm)
        exact[eye] = _Exact(surfacing, {
            "method": "exact",
            "martin_surfacing": power_dict(martins[eye], before, form),
            "asworn_residual_d": made.residual_d,
            "published_asworn_residual_d": largest_meridional_error(
                [w - p for w, p in zip(wanted, published_worn)]),
            "solution_rounds": made.rounds,
            "front_curve_d": front,
            "center_thickness_mm": centre,
            "rotation_distance_mm": geometry.rotation_distance_mm,
            "off_axis": off_axis_record(errors),
        })
    return exact


def _centre_mm(lens: PlannedLens, otherwise: float | None = None) -> float:
    """The planned lens's centre thickness; when no thickness makes it, ``otherwise`` if given, else it raises
    :class:`LensNotMakeable`."""
    if not isinstance(lens.solved, LensNotMakeable):
        return lens.solved.center_mm
    if otherwise is None:
        raise lens.solved
    return otherwise


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
    befores = {eye: view.get(f"lenses.{eye}.surfacing") for eye in view.eyes}
    tilts = {eye: tilt_obliquity(pantoscopic, face_form, eye) for eye in view.eyes}
    martins = {eye: compensate_tilt(matrix_of(before), *tilts[eye], index)
               for eye, before in befores.items() if before is not None}
    exact: dict[str, _Exact] = {}
    if params.method == "exact" and martins:
        try:
            exact = _exact_pair(view, {eye: befores[eye] for eye in martins}, martins, tilts, index, form)
        except (LensNotMakeable, RayMissedSurface) as exc:
            yield Flag("tilt-exact-not-possible", "warning",
                       f"The exact tilt compensation needs the lenses' shape, and no lens can be made for these "
                       f"powers and this frame ({exc}); Martin's formula is used instead.", None, {})
        except NotSettled as exc:
            yield Flag("tilt-exact-not-possible", "warning",
                       f"The exact tilt compensation did not settle ({exc}); Martin's formula is used instead.",
                       None, {})
    for eye, before in befores.items():
        if before is None:
            yield no_surfacing("tilt", eye)
            continue
        theta, tangential = tilts[eye]
        method, source = (METHOD, SOURCE) if eye not in exact else (EXACT_METHOD, EXACT_SOURCE)
        after = power_dict(martins[eye] if eye not in exact else exact[eye].matrix, before, form)
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
        if eye in exact:
            inputs.update(exact[eye].inputs)
            reason = reason[:-1] + (
                f", traced with real rays through its front of {exact[eye].inputs['front_curve_d']:.2f} D and "
                f"centre thickness of {exact[eye].inputs['center_thickness_mm']:.1f} mm (Martin's thin-lens "
                f"formula would give {trade_notation(exact[eye].inputs['martin_surfacing'])}).")
        yield from propose(
            "tilt", eye, before, after, params, reason=reason, method=method, source=source, inputs=inputs,
            described=f"Tilt compensation for {angles} (obliquity {obliquity_deg:.1f}°)",
        )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="tilt", run=run, writes=("lenses.*.surfacing",), params=TiltParams,
        description="surfacing power for pantoscopic tilt and face form (inverse of Martin's formula, or exact by "
                    "real-ray trace)",
    )]
