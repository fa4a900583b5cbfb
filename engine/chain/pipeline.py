"""Runs the lab's chain over one validated order and builds the result.

The pipeline is the only place a result value is set. Each stage proposes
changes and flags; the pipeline checks each change against what the stage may
write, applies it, and records it in ``changes`` with the value before and
after. So nothing reaches a result without a record, by construction.
"""
from __future__ import annotations

import copy
import time
from dataclasses import dataclass, field
from typing import Any

from lenslane import __version__
from lenslane.chain.host import Host
from lenslane.contract.models import CAUTION, RESULT_FORMAT, LensOrder
from lenslane.contract.precision import present
from lenslane.chain.stage import _ATOMS, LEVELS, Change, Flag, OrderView, copy_value

#: Bound on each stage's may-write memo, so a plugin writing ever-new fields cannot grow it without end.
_WRITABLE_LIMIT = 4096


class StageFailure(Exception):
    """A stage raised, proposed something malformed, or wrote outside its fields."""

    def __init__(self, stage: str, message: str):
        super().__init__(f"stage {stage!r} failed: {message}")
        self.stage = stage
        self.message = message


@dataclass
class Outcome:
    """One order's result document plus what the engine measured on the way."""

    result: dict[str, Any]
    timings: dict[str, float] = field(default_factory=dict)


class Pipeline:
    def __init__(self, host: Host):
        self.host = host
        self.run_stage = host.hook.lenslane_run_stage
        self.result_ready = host.hook.lenslane_result_ready
        self.stage_names = [link.stage.name for link in host.chain]
        self.engine_info = {
            "version": __version__,
            "config_sha256": host.config_sha256,
            "stages": self.stage_names,
        }
        # Per stage: whether it may write a field, decided once per field (see _apply).
        self._writable: dict[str, dict[str, tuple[str, ...] | None]] = {}

    def run(self, order: LensOrder, received: dict[str, Any]) -> Outcome:
        """Run every enabled stage in order; raise :class:`StageFailure` on any fault.

        ``received`` is the order as parsed from its file; it is echoed in the
        result unchanged.
        """
        eyes = [e for e in ("right", "left") if getattr(order.rx, e) is not None]
        # ``state`` holds the lenses at full precision, ``shown`` the same tree rounded (present()), kept in
        # step by _apply: each value is rounded once, when it is set, for its record and for the result.
        state: dict[str, Any] = {"lenses": {eye: {} for eye in eyes}}
        shown: dict[str, Any] = {eye: {} for eye in eyes}
        changes: list[dict[str, Any]] = []
        flags: list[dict[str, Any]] = []
        timings: dict[str, float] = {}
        view = OrderView(order, state, self.host.settings)
        clock = time.perf_counter
        for link in self.host.chain:
            stage = link.stage
            started = clock()
            writable = self._writable.get(stage.name)
            if writable is None:
                writable = self._writable[stage.name] = {}
            try:
                proposals = self.run_stage(stage=stage, view=view, params=link.params)
            except StageFailure:
                raise
            except Exception as exc:  # a plugin fault fails the order, never the engine
                raise StageFailure(stage.name, f"{type(exc).__name__}: {exc}") from exc
            for proposal in proposals or ():
                if type(proposal) is Change or isinstance(proposal, Change):
                    changes.append(self._apply(stage, proposal, state, shown, eyes, writable))
                elif isinstance(proposal, Flag):
                    flags.append(_flag_record(stage.name, proposal, eyes))
                else:
                    raise StageFailure(stage.name, f"proposed {proposal!r}, which is neither a Change nor a Flag")
            timings[stage.name] = clock() - started

        status = "review" if any(f["level"] == "review" for f in flags) else "ready"
        result = {
            "format": RESULT_FORMAT,
            "order_id": order.order_id,
            "status": status,
            "order": received,
            "lenses": shown,
            "flags": flags,
            "changes": changes,
            "engine": self.engine_info,
            "caution": CAUTION,
        }
        if self.result_ready.get_hookimpls():
            self.result_ready(order_id=order.order_id, result=copy.deepcopy(result))
        return Outcome(result, timings)

    @staticmethod
    def _apply(stage, change: Change, state: dict[str, Any], shown: dict[str, Any], eyes: list[str],
               writable: dict[str, tuple[str, ...] | None] | None = None) -> dict[str, Any]:
        """Apply one change to ``state`` and its rounded twin ``shown``; return its record.

        ``writable`` remembers, for this stage, each field it wrote as its split
        path (None: it may not write it).
        """
        path = change.field
        # What a stage may do with a field depends on the two names only: checked once, remembered.
        parts = writable.get(path, False) if writable is not None else False
        if parts is False:
            parts = tuple(path.split(".")) if stage.may_write(path) else None
            if writable is not None and len(writable) < _WRITABLE_LIMIT:
                writable[path] = parts
        if parts is None:
            allowed = ", ".join(stage.writes) or "nothing"
            raise StageFailure(stage.name, f"may not write {path!r} (it may write: {allowed})")
        if parts[0] != "lenses" or len(parts) < 3 or parts[1] not in eyes:
            raise StageFailure(stage.name, f"{path!r} is not a field of an eye being made ({', '.join(eyes)})")
        node = state["lenses"][parts[1]]  # made for every eye at the start; no change can replace it
        shown = shown[parts[1]]
        for part in parts[2:-1]:
            node = node.setdefault(part, {})
            if type(node) is not dict and not isinstance(node, dict):
                raise StageFailure(stage.name, f"{path!r} goes through a value that is not an object")
            # A rounded object may be an earlier record's "after": replaced by a copy, never changed.
            shown[part] = shown = dict(shown.get(part, {}))
        key = parts[-1]
        value = change.value
        if type(value) not in _ATOMS:
            value = copy_value(value)
        node[key] = value
        before = shown.get(key)
        shown[key] = after = present(value, key)
        inputs = change.inputs
        return {
            "stage": stage.name,
            "field": path,
            "before": before,
            "after": after,
            "reason": change.reason,
            "method": change.method,
            "source": change.source,
            # Inputs are kept at full precision: they are what the method computed with.
            "inputs": copy_value(inputs if type(inputs) is dict else dict(inputs)),
        }


def _flag_record(stage: str, flag: Flag, eyes: list[str]) -> dict[str, Any]:
    if flag.level not in LEVELS:
        raise StageFailure(stage, f"flag {flag.code!r} has level {flag.level!r}, not one of {', '.join(LEVELS)}")
    if flag.eye is not None and flag.eye not in eyes:
        raise StageFailure(stage, f"flag {flag.code!r} names eye {flag.eye!r}, which is not being made")
    record = {"code": flag.code, "level": flag.level, "eye": flag.eye, "message": flag.message, "stage": stage}
    if flag.values:
        values = flag.values
        record["values"] = present(values if type(values) is dict else dict(values))
    return record
