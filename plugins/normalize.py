"""Stage ``normalize``: the prescription in the lab's cylinder form, axis 1–180.

Writes ``lenses.<eye>.rx`` (the prescription as received, only normalised) and
the same power as the starting ``lenses.<eye>.surfacing``, which the
compensation stages then change.
"""
from __future__ import annotations

from lenslane import Change, Stage, hookimpl
from lenslane.plugins.optics.power import in_form

SOURCE = "Transposition rule, (S, C, α) → (S + C, −C, α ± 90°); e.g. Jalie, The Principles of Ophthalmic Lenses"


def normalized_power(eye_rx, form: str) -> dict:
    """The prescription of one eye as a power dict in the lab's cylinder form."""
    axis = eye_rx.axis if eye_rx.axis not in (None, 0) else 180
    written = in_form(eye_rx.sphere, eye_rx.cylinder, axis, form)
    power = {"sphere": written.sphere, "cylinder": written.cylinder, "axis": written.axis}
    if eye_rx.add is not None:
        power["add"] = eye_rx.add
    return power


def run(view, params):
    form = view.settings.cylinder_form
    for eye in view.eyes:
        eye_rx = getattr(view.order.rx, eye)
        power = normalized_power(eye_rx, form)
        transposed = (eye_rx.cylinder > 0 and form == "minus") or (eye_rx.cylinder < 0 and form == "plus")
        if transposed:
            reason = f"The prescription was written in the other cylinder form and is transposed to the lab's {form}-cylinder form."
            method = "transposition"
        else:
            reason = f"The prescription is taken as received, in the lab's {form}-cylinder form with the axis in 1–180°."
            method = "normalisation (axis 0 written as 180)"
        inputs = {"sphere": eye_rx.sphere, "cylinder": eye_rx.cylinder, "axis": eye_rx.axis, "form": form}
        yield Change(f"lenses.{eye}.rx", power, reason, method, SOURCE, inputs)
        surfacing = dict(power)
        reason = "The surfacing power starts as the normalised prescription; compensation stages may change it."
        if view.order.lens.design == "single_vision" and surfacing.pop("add", None) is not None:
            # An add belongs to multifocal designs only (common practice): validate flags the order.
            reason += " A single-vision lens has no near part, so the prescription's add is not carried into it."
        yield Change(f"lenses.{eye}.surfacing", surfacing, reason, "copy of the normalised prescription",
                     "Common practice")


@hookimpl
def lenslane_stages():
    return [Stage(
        name="normalize", run=run, writes=("lenses.*.rx", "lenses.*.surfacing"),
        description="prescription in the lab's cylinder form, axis 1–180; starting surfacing power",
    )]
