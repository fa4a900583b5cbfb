"""lenslane engine: the host that runs a lab's chain of stages over lens orders.

Nothing optical lives here. A plugin author needs only::

    from lenslane import hookimpl, Stage, Change, Flag
"""
from lenslane.chain.hookspecs import hookimpl, hookspec
from lenslane.chain.stage import Change, Flag, OrderView, Stage

__version__ = "0.1.0"

__all__ = ["hookimpl", "hookspec", "Stage", "Change", "Flag", "OrderView", "__version__"]
