"""Every hook a lenslane plugin can implement.

Hooks are called with keyword arguments only, so a hook can gain arguments
later without breaking plugins that do not ask for them. A plugin writes::

    from lenslane import hookimpl

Each hook below is documented once, with its exact signature, the types and
units of its arguments, what to return and a runnable example; ``DEVELOPERS.md``
walks through them. ``tests/chain/test_hooks.py`` fails when a hook lacks either.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Any, Iterable, Mapping

import pluggy

if TYPE_CHECKING:  # pragma: no cover
    from lenslane.chain.stage import OrderView, Proposal, Stage

PROJECT = "lenslane"
hookspec = pluggy.HookspecMarker(PROJECT)
hookimpl = pluggy.HookimplMarker(PROJECT)

#: The version of the hook API: (major, minor). The minor grows when a hook or an argument is added
#: (a plugin written for an older minor keeps working); the major grows when a hook changes or goes.
#: A plugin checks it with ``lenslane.HOOK_API_VERSION >= (1, 0)`` or ``[0] == 1``.
HOOK_API_VERSION: tuple[int, int] = (1, 0)


# --------------------------------------------------------------------------
# Registration: called once at start, never per order
# --------------------------------------------------------------------------


@hookspec
def lenslane_stages() -> "Iterable[Stage] | None":
    """Contribute stages to the lab's chain.

    Called once when the engine starts. Return the :class:`lenslane.Stage`
    objects this plugin provides. A stage runs only if its name is in the lab
    config's ``engine.chain`` and it is not disabled (``[stages.<name>]
    enabled = false``).

    Returns
    -------
    iterable of Stage
        Each with a unique ``name``, its ``run`` function, the result fields it
        ``writes`` and, optionally, a pydantic ``params`` model.

    Example
    -------
    >>> from lenslane import hookimpl, Stage, Flag
    >>> def run(view, params):
    ...     if view.order.frame.box_width_mm > 60:
    ...         yield Flag("wide-frame", "info", "Box width over 60 mm.")
    >>> @hookimpl
    ... def lenslane_stages():
    ...     return [Stage(name="wide_frame", run=run)]
    """


@hookspec
def lenslane_materials() -> "Mapping[str, Mapping[str, float]] | None":
    """Contribute lens materials to the lab's material table.

    Called once at start. Return a mapping of material key to
    ``{"index": n_d, "abbe": V_d, "density": g/cm³}``. Entries in the lab
    config's ``[materials]`` table take precedence over a plugin's, and a
    plugin's over the built-in defaults.

    Example
    -------
    >>> @hookimpl
    ... def lenslane_materials():
    ...     return {"trivex-1.53": {"index": 1.532, "abbe": 45, "density": 1.11}}
    """


@hookspec
def lenslane_configure(settings: "dict[str, Any]") -> None:
    """Receive this plugin's ``[plugins.<name>]`` table from the lab config.

    Called once at start, for every registered plugin that implements it, with
    its own table (an empty dict when the config has none), whether or not its
    stages are in the chain. Validate the table and keep what the plugin's
    other hooks need; raise ``ValueError`` (a pydantic ``ValidationError`` is
    one) to refuse it: the engine stops before any order, naming the key. A
    ``[plugins.<name>]`` table for a plugin that does not implement this hook
    stops the engine too. Stages take their settings from ``[stages.<name>]``
    (``Stage.params``) instead.

    Parameters
    ----------
    settings : dict
        The plugin's ``[plugins.<name>]`` table, as TOML gives it.

    Example
    -------
    >>> from pydantic import BaseModel, ConfigDict
    >>> class Settings(BaseModel):
    ...     model_config = ConfigDict(extra="forbid")
    ...     queue: str = "held-orders"
    >>> SETTINGS = {}
    >>> @hookimpl
    ... def lenslane_configure(settings):
    ...     SETTINGS["current"] = Settings.model_validate(settings)
    """


# --------------------------------------------------------------------------
# Per order: around each stage
# --------------------------------------------------------------------------


@hookspec(firstresult=True)
def lenslane_run_stage(stage: "Stage", view: "OrderView", params: Any) -> "list[Proposal] | None":
    """Run one stage of the chain for one order and return its proposals.

    The engine's own implementation calls ``stage.run(view, params)`` and
    returns its proposals as a list. Implement it as a wrapper
    (``@hookimpl(wrapper=True)``) for cross-cutting work such as timing,
    tracing or metrics; the wrapper must return what ``yield`` gave it.

    Parameters
    ----------
    stage : Stage
        The stage being run.
    view : OrderView
        The read-only view of the order and of the result so far.
    params : pydantic model instance or None
        The stage's validated ``[stages.<name>]`` parameters.

    Returns
    -------
    list of Change | Flag
        The stage's proposals, in the order the pipeline is to apply them.

    Example
    -------
    >>> import time
    >>> @hookimpl(wrapper=True)
    ... def lenslane_run_stage(stage, view, params):
    ...     started = time.perf_counter()
    ...     proposals = yield
    ...     print(stage.name, time.perf_counter() - started)
    ...     return proposals
    """


@hookspec
def lenslane_result_ready(order_id: str, result: Mapping[str, Any]) -> None:
    """Observe a finished result before it is published.

    Called once per order that produced a valid result, after the last stage
    and before the result is written; each plugin's implementation on its own,
    so a failure names that plugin. The result is read-only: it is the exact
    ``lens-order-result/1`` document that will be published. Use it to feed a
    lab's own systems; anything the hook wants recorded must instead be a
    stage's :class:`lenslane.Change`. An exception here fails the order.

    It is the one hook with side effects, so ``lenslane preview`` does not call
    it; an order redone after a crash calls it again (at least once, not
    exactly once: make what it does idempotent, keyed by the order id).

    Parameters
    ----------
    order_id : str
        The validated order id.
    result : mapping
        The ``lens-order-result/1`` document.

    Example
    -------
    >>> @hookimpl
    ... def lenslane_result_ready(order_id, result):
    ...     print(order_id, result["status"])
    """
