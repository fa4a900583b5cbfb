"""lenslane engine: the host that runs a lab's chain of stages over lens orders.

Nothing optical lives here. A plugin author needs only::

    from lenslane import hookimpl, Stage, Change, Flag

``HOOK_API_VERSION`` (major, minor) says which hooks this engine offers: the
minor grows when a hook or an argument is added, the major when one changes or
goes. ``lenslane.testing`` has the helpers to test a plugin.
"""
from lenslane.chain.hookspecs import HOOK_API_VERSION, hookimpl, hookspec
from lenslane.chain.stage import Change, Flag, OrderView, Proposal, Stage

__version__ = "0.1.0"

__all__ = ["HOOK_API_VERSION", "hookimpl", "hookspec", "Stage", "Change", "Flag", "OrderView", "Proposal",
           "__version__"]
