"""The words lenslane uses everywhere, defined once.

The contract, the chain, the stages, the lab and the reports all import these
names from here, so a word cannot drift between two modules. Each kind is a
``Literal`` type (for models and type checkers) and the tuple of its values,
in the order a person reads them.
"""
from __future__ import annotations

from typing import Literal, get_args

#: The eyes a lens is made for, right first as a prescription is written.
Eye = Literal["right", "left"]
EYES: tuple[Eye, ...] = get_args(Eye)

#: Lens designs an order may ask for.
Design = Literal["single_vision", "progressive", "bifocal"]
DESIGNS: tuple[Design, ...] = get_args(Design)

#: How a frame holds the lens.
Mount = Literal["full_rim", "grooved", "drilled"]
MOUNTS: tuple[Mount, ...] = get_args(Mount)

#: How much a flag asks of a person, least first; a ``review`` flag holds the order.
Level = Literal["info", "warning", "review"]
LEVELS: tuple[Level, ...] = get_args(Level)

#: The status of a published result.
Status = Literal["ready", "review"]
STATUSES: tuple[Status, ...] = get_args(Status)

#: How one pass of an input through the engine ends (the audit event that closes it).
Outcome = Literal["published", "rejected", "held", "skipped"]
OUTCOMES: tuple[Outcome, ...] = get_args(Outcome)

#: The one caution: in every result, in ``explain``, in the README, on every page, and where a flag needs it.
CAUTION = (
    "For a licensed eye-care professional to verify before use. lenslane suggests; local codes, "
    "impact-resistance rules and licensed practice prevail."
)

#: What a flag of each level asks of the person who reads it.
WHAT_TO_DECIDE: dict[Level, str] = {
    "review": "held for review: a person decides before the order goes to production",
    "warning": "check before production; the order is not held",
    "info": "for information; no decision is needed unless it surprises you",
}
