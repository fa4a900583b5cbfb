"""Stage ``prism``: the resultant prescribed prism per eye, base direction 0–360°."""
from __future__ import annotations

from lenslane import Change, Stage, hookimpl
from lenslane.plugins.optics.prism import resultant_prism

SOURCE = "Vector resultant P = √(H² + V²), base atan2(V, H) in the ISO 8429 notation"


def run(view, params):
    for eye in view.eyes:
        components = getattr(view.order.rx, eye).prism or []
        pairs = [(c.amount, c.base) for c in components]
        prism = resultant_prism(pairs, eye)
        if not pairs:
            reason = "No prism is prescribed for this eye."
        elif len(pairs) == 1:
            reason = "The prescribed prism is written as an amount and a base direction in degrees."
        else:
            reason = f"The {len(pairs)} prescribed prism components are combined into one resultant prism."
        yield Change(
            f"lenses.{eye}.prism", {"amount": prism.amount, "base_deg": prism.base_deg},
            reason, "resultant prism by vector addition", SOURCE,
            {"components": [{"amount": a, "base": b} for a, b in pairs], "eye": eye},
        )


@hookimpl
def lenslane_stages():
    return [Stage(name="prism", run=run, writes=("lenses.*.prism",),
                  description="resultant prescribed prism per eye")]
