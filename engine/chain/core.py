"""The engine's own hook implementations (registered as the built-in plugin ``core``)."""
from __future__ import annotations

from lenslane.chain.hookspecs import hookimpl


@hookimpl(trylast=True)
def lenslane_run_stage(stage, view, params):
    """Run the stage: the innermost implementation every wrapper goes around."""
    return list(stage.run(view, params) or ())
