"""Stage ``generator``: the surfacing power as the lab's generator makes it.

After every compensation, and before the lens is shaped, a cylinder smaller
than the lab's minimum is dropped (the lens keeps its spherical equivalent) and
the surfacing power is rounded once to the generator's step. Each is a change of
its own, made only when it changes the power.
"""
from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from lenslane import Change, Stage, hookimpl
from lenslane.plugins.optics.power import nearest_step, spherical_equivalent

STEP_SOURCE = "The lab's generator step (lab setting)"
# From memory: cylinders under about 0.06 D are below what a lensmeter reads against the 0.13 D tolerance of
# ANSI Z80.1 and are left out of the surface by labs; the lab sets its own value.
MINIMUM_CYLINDER_SOURCE = ("The lab's minimum cylinder (lab setting; default from memory); spherical equivalent "
                           "SE = S + C/2 kept (common practice)")


class GeneratorParams(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    step_d: Annotated[float, Field(ge=0.01, le=0.25)] = 0.01
    """The generator's power step (D): sphere and cylinder of the surfacing power are rounded to it once."""
    minimum_cylinder_d: Annotated[float, Field(ge=0, le=0.25)] = 0.06
    """A surfacing cylinder smaller than this (D) is dropped, keeping the spherical equivalent; 0 keeps every one."""


def run(view, params: GeneratorParams):
    for eye in view.eyes:
        power = view.get(f"lenses.{eye}.surfacing")
        if power is None:
            continue
        cylinder = power.get("cylinder", 0.0)
        if cylinder and abs(cylinder) < params.minimum_cylinder_d:
            before = dict(power)
            power["sphere"] = spherical_equivalent(power["sphere"], cylinder)
            power["cylinder"] = 0.0
            yield Change(
                f"lenses.{eye}.surfacing", dict(power),
                f"A cylinder of {abs(cylinder):.3f} D is below the lab's minimum of {params.minimum_cylinder_d:.2f} D: "
                "it is left out and the sphere becomes the spherical equivalent.",
                "cylinder below the minimum dropped; sphere = S + C/2", MINIMUM_CYLINDER_SOURCE,
                {"before": before, "minimum_cylinder_d": params.minimum_cylinder_d},
            )
        stepped = {**power, "sphere": nearest_step(power["sphere"], params.step_d),
                   "cylinder": nearest_step(power.get("cylinder", 0.0), params.step_d)}
        if stepped != power:
            yield Change(
                f"lenses.{eye}.surfacing", stepped,
                f"The surfacing power is put on the generator's {params.step_d:.2f} D step, once, after every "
                "compensation.",
                f"sphere and cylinder rounded to the nearest {params.step_d:g} D", STEP_SOURCE,
                {"before": power, "step_d": params.step_d},
            )


@hookimpl
def lenslane_stages():
    return [Stage(
        name="generator", run=run, writes=("lenses.*.surfacing",), params=GeneratorParams,
        description="surfacing power on the generator's step; a cylinder below the lab's minimum dropped",
    )]
