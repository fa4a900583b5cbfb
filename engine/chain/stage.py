"""What a stage is, what it may propose, and the read-only view it works on.

A stage never mutates the order and never writes files. It receives an
:class:`OrderView` and returns (or yields) :class:`Change` and :class:`Flag`
proposals; the pipeline applies the changes in order and records each one.
"""
from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Iterable, Mapping

from lenslane.contract.precision import plain_copy
from lenslane.vocabulary import EYES, Eye, Level

if TYPE_CHECKING:  # pragma: no cover
    from pydantic import BaseModel

    from lenslane.config import LabSettings, Material
    from lenslane.contract.models import LensOrder


@dataclass(frozen=True, slots=True)
class Change:
    """A proposed value for one field of the result.

    Parameters
    ----------
    field : str
        Dotted path in the result, e.g. ``"lenses.right.surfacing"``.
    value : Any
        The new value (JSON-compatible). Powers may carry full precision; the
        pipeline rounds them to the contract's precision at the very end.
    reason : str
        One sentence a person can read: why the value is set or changed.
    method : str
        The method or formula used, by name.
    source : str
        The published source of the method, or "Common practice".
    inputs : dict
        The inputs the method used (distances in mm, angles in degrees, index...).
    """

    field: str
    value: Any
    reason: str
    method: str
    source: str
    inputs: Mapping[str, Any] = dataclasses.field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class Flag:
    """A finding for a person: what was found, the numbers, what to decide.

    ``level`` is ``info``, ``warning`` or ``review``; a ``review`` flag holds the
    order (the result's status becomes ``review``). ``eye`` is ``"right"``,
    ``"left"`` or ``None`` for the pair.
    """

    code: str
    level: Level
    message: str
    eye: Eye | None = None
    values: Mapping[str, Any] = dataclasses.field(default_factory=dict)


Proposal = Change | Flag
RunFunction = Callable[["OrderView", Any], Iterable[Proposal]]


@dataclass(frozen=True)
class Stage:
    """A named step of the chain.

    Parameters
    ----------
    name : str
        The name the lab's config uses (``[stages.<name>]``, ``engine.chain``).
    run : callable
        ``run(view, params) -> iterable of Change | Flag``.
    writes : tuple of str
        Result fields the stage may write, as dotted patterns where ``*`` stands
        for one segment (``"lenses.*.surfacing"``). A change outside them is
        refused and fails the order.
    params : pydantic model class, optional
        The model of the stage's ``[stages.<name>]`` table; its defaults are the
        stage's defaults. ``None`` means the stage takes no parameters.
    description : str
        One line for ``lenslane plugins``.
    """

    name: str
    run: RunFunction
    writes: tuple[str, ...] = ()
    params: type["BaseModel"] | None = None
    description: str = ""
    #: ``writes`` as one regular expression, compiled once when the stage is made (``None``: it writes nothing).
    _writable: re.Pattern[str] | None = dataclasses.field(init=False, repr=False, compare=False, default=None)

    def __post_init__(self) -> None:
        # A "*" is one segment (any text without a dot); a field inside a writable one is writable too.
        patterns = [r"\.".join("[^.]*" if part == "*" else re.escape(part) for part in pattern.split("."))
                    for pattern in self.writes]
        if patterns:
            object.__setattr__(self, "_writable", re.compile(rf"(?:{'|'.join(patterns)})(?:\.|\Z)"))

    def may_write(self, field_path: str) -> bool:
        return self._writable is not None and self._writable.match(field_path) is not None


_MISSING = object()


class OrderView:
    """What a stage sees: the validated order, the current result, the lab's settings.

    Every value returned by :meth:`get` is a copy; changing it changes nothing.
    """

    __slots__ = ("order", "eyes", "settings", "_state", "_material")

    def __init__(self, order: "LensOrder", state: dict[str, Any], settings: "LabSettings"):
        self.order = order
        self.eyes: tuple[Eye, ...] = tuple(e for e in EYES if getattr(order.rx, e) is not None)
        self.settings = settings
        self._state = state
        self._material: "Material | None" = None

    def get(self, field_path: str, default: Any = None) -> Any:
        """The current value of a result field (a copy), or ``default``."""
        node: Any = self._state
        for part in field_path.split("."):
            if type(node) is not dict and not isinstance(node, dict):
                return default
            node = node.get(part, _MISSING)
            if node is _MISSING:
                return default
        return plain_copy(node)

    def material(self) -> "Material":
        """The order's material from the lab's table, with the order's index override applied."""
        # The order and the table are frozen, so the answer is worked out once per order.
        if self._material is None:
            material = self.settings.materials[self.order.lens.material]
            if self.order.lens.index is not None:
                material = material.model_copy(update={"index": self.order.lens.index})
            self._material = material
        return self._material
