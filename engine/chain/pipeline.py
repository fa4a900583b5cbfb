"""Runs the lab's chain over one validated order and builds the result.

The pipeline is the only place a result value is set. Each stage proposes
changes and flags; the pipeline checks each change against what the stage may
write and against JSON's numbers, applies it, and records it in ``changes``
with the value before and after. The finished result is validated against the
result model before anyone sees it. So nothing reaches a result without a
record, and nothing the contract refuses reaches it at all, by construction.
"""
from __future__ import annotations

import copy
import math
import time
import traceback
from dataclasses import dataclass, field
from typing import Any

from pydantic import TypeAdapter, ValidationError

from lenslane.chain import core
from lenslane.chain.host import Host, PluginInfo
from lenslane.chain.stage import Change, Flag, OrderView, Stage
from lenslane.contract.models import RESULT_FORMAT, LensOrder, LensOrderResult, lens_field_checks
from lenslane.contract.precision import NotPlain, plain_copy, present
from lenslane.vocabulary import CAUTION, EYES, LEVELS


class StageFailure(Exception):
    """The chain failed this order: a stage raised, proposed something malformed, wrote outside its
    fields or a value the contract refuses — or a plugin's hook raised.

    ``field`` says where, as a rejected order's reasons name it: ``(stage <name>)``,
    or ``(result)`` when the result breaks the contract with no stage to blame.
    """

    def __init__(self, stage: str | None, message: str, field: str | None = None):
        self.stage = stage
        self.message = message
        self.field = field or f"(stage {stage})"
        super().__init__(f"{self.field}: {message}")


class HookFailure(StageFailure):
    """A plugin's per-order hook raised (or ran past the time limit); it is named with its distribution."""

    def __init__(self, plugin: PluginInfo, hook: str, message: str, stage: str | None = None):
        self.plugin = plugin
        self.hook = hook
        during = f" while stage {stage!r} ran" if stage else ""
        super().__init__(stage, f"{message} ({plugin.distribution} {plugin.version}{during})",
                         f"(plugin {plugin.name}: {hook})")


@dataclass
class Outcome:
    """One order's result document plus what the engine measured on the way."""

    result: dict[str, Any]
    timings: dict[str, float] = field(default_factory=dict)


class Pipeline:
    """The chain of one host, ready to run orders.

    ``side_effects=False`` (``lenslane preview``) runs no hook that acts
    outside the engine: ``lenslane_result_ready`` is not called.
    """

    def __init__(self, host: Host, side_effects: bool = True):
        self.host = host
        self.run_stage = host.hook.lenslane_run_stage
        provenance = host.provenance
        self.engine_info = {"version": provenance["engine_version"],
                            **{k: v for k, v in provenance.items() if k != "engine_version"}}
        pm = host.plugin_manager
        # Each observer on its own, so a failure (or the order's time limit) names its plugin.
        observers = [impl.plugin_name for impl in host.hook.lenslane_result_ready.get_hookimpls()]
        self.result_ready = [
            (host.plugins[name], pm.subset_hook_caller("lenslane_result_ready",
                                                       [p for n, p in pm.list_name_plugin() if n != name and p is not None]))
            for name in observers] if side_effects else []
        # What each field of the contract's lens may hold, to check a value as it is set (before a later stage
        # computes with it: a boolean taken for a number would be published as one).
        self.field_checks = lens_field_checks()
        # The code of each plugin's lenslane_run_stage wrapper, to tell a failing wrapper from its stage.
        self.wrappers = {impl.function.__code__: host.plugins[impl.plugin_name]
                         for impl in self.run_stage.get_hookimpls() if impl.plugin_name != "core"}

    def run(self, order: LensOrder, received: dict[str, Any]) -> Outcome:
        """Run every enabled stage in order; raise :class:`StageFailure` on any fault.

        ``received`` is the order as parsed from its file; it is echoed in the
        result unchanged.
        """
        eyes = [eye for eye in EYES if getattr(order.rx, eye) is not None]
        # ``state`` holds the lenses at full precision, ``shown`` the same tree rounded (present()), kept in
        # step by _apply: each value is rounded once, when it is set, for its record and for the result.
        state: dict[str, Any] = {"lenses": {eye: {} for eye in eyes}}
        shown: dict[str, Any] = {eye: {} for eye in eyes}
        changes: list[dict[str, Any]] = []
        flags: list[dict[str, Any]] = []
        timings: dict[str, float] = {}
        view = OrderView(order, state, self.host.settings)
        for link in self.host.chain:
            stage = link.stage
            started = time.perf_counter()
            try:
                proposals = self.run_stage(stage=stage, view=view, params=link.params)
            except StageFailure:
                raise
            except Exception as exc:  # a plugin fault fails the order, never the engine
                raise self._blame(stage, exc) from exc
            for proposal in proposals or ():
                if isinstance(proposal, Change):
                    changes.append(_apply(stage, proposal, state, shown, eyes, self.field_checks))
                elif isinstance(proposal, Flag):
                    flags.append(_flag_record(stage.name, proposal, eyes))
                else:
                    raise StageFailure(stage.name, f"proposed {proposal!r}, which is neither a Change nor a Flag")
            timings[stage.name] = time.perf_counter() - started

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
        _validate(result)
        for plugin, observe in self.result_ready:
            try:
                observe(order_id=order.order_id, result=copy.deepcopy(result))
            except Exception as exc:
                raise HookFailure(plugin, "lenslane_result_ready", f"{type(exc).__name__}: {exc}") from exc
        return Outcome(result, timings)

    def _blame(self, stage: Stage, exc: Exception) -> StageFailure:
        """The stage, or the ``lenslane_run_stage`` wrapper of another plugin when the fault is the wrapper's.

        The engine's own implementation (``core``) is the one that calls the
        stage: when the exception passed through it, the stage raised;
        otherwise a wrapper raised on its own, and the innermost one is named.
        """
        message = f"{type(exc).__name__}: {exc}"
        codes = [frame.f_code for frame, _ in traceback.walk_tb(exc.__traceback__)]
        if core.lenslane_run_stage.__code__ in codes:
            return StageFailure(stage.name, message)
        wrappers = [self.wrappers[code] for code in codes if code in self.wrappers]
        if wrappers:
            return HookFailure(wrappers[-1], "lenslane_run_stage", message, stage.name)
        return StageFailure(stage.name, message)


def _apply(stage: Stage, change: Change, state: dict[str, Any], shown: dict[str, Any], eyes: list[str],
           checks: dict[tuple[str, ...], TypeAdapter[Any]]) -> dict[str, Any]:
    """Apply one change to ``state`` and its rounded twin ``shown``; return its record."""
    path = change.field
    if not isinstance(path, str) or not stage.may_write(path):
        allowed = ", ".join(stage.writes) or "nothing"
        raise StageFailure(stage.name, f"may not write {path!r} (it may write: {allowed})")
    parts = path.split(".")
    if parts[0] != "lenses" or len(parts) < 3 or parts[1] not in eyes:
        raise StageFailure(stage.name, f"{path!r} is not a field of an eye being made ({', '.join(eyes)})")
    key = parts[-1]
    try:  # each walk copies and checks at once: what is not plain JSON never reaches the result
        after = present(change.value, key)
        value = plain_copy(change.value)
        # Inputs are kept at full precision: they are what the method computed with.
        inputs = plain_copy(change.inputs)
    except NotPlain:
        _check_json(stage.name, path, change.value)  # the slow walk, only now: it says where and what
        _check_json(stage.name, f"{path} (inputs)", change.inputs)
        raise StageFailure(stage.name, f"wrote a value to {path} that is not plain JSON") from None
    check = checks.get(tuple(parts[2:]))
    if check is not None:
        try:
            check.validate_python(after)
        except ValidationError as exc:
            problem = _problem(exc.errors(include_url=False)[0], parts)
            raise StageFailure(stage.name, f"wrote a value the result contract refuses: {problem}") from None
    node = state["lenses"][parts[1]]  # made for every eye at the start; no change can replace it
    shown = shown[parts[1]]
    for part in parts[2:-1]:
        node = node.setdefault(part, {})
        if not isinstance(node, dict):
            raise StageFailure(stage.name, f"{path!r} goes through a value that is not an object")
        # A rounded object may be an earlier record's "after": replaced by a copy, never changed.
        shown[part] = shown = dict(shown.get(part, {}))
    node[key] = value
    before = shown.get(key)
    shown[key] = after
    return {
        "stage": stage.name,
        "field": path,
        "before": before,
        "after": after,
        "reason": change.reason,
        "method": change.method,
        "source": change.source,
        "inputs": inputs,
    }


def _flag_record(stage: str, flag: Flag, eyes: list[str]) -> dict[str, Any]:
    if flag.level not in LEVELS:
        raise StageFailure(stage, f"flag {flag.code!r} has level {flag.level!r}, not one of {', '.join(LEVELS)}")
    if flag.eye is not None and flag.eye not in eyes:
        raise StageFailure(stage, f"flag {flag.code!r} names eye {flag.eye!r}, which is not being made")
    record: dict[str, Any] = {"code": flag.code, "level": flag.level, "eye": flag.eye, "message": flag.message,
                              "stage": stage}
    if flag.values:
        where = f"flag {flag.code!r} values"
        try:
            record["values"] = present(flag.values)
        except NotPlain:
            _check_json(stage, where, flag.values)
            raise StageFailure(stage, f"wrote a value to {where} that is not plain JSON") from None
    return record


def _check_json(stage: str, where: str, value: Any) -> None:
    """Refuse what JSON cannot carry faithfully: NaN, infinities, non-string keys, objects of other kinds.

    Run only once :func:`present` or :func:`plain_copy` found a value that is not plain JSON: it names where.
    """
    if value is None or isinstance(value, (str, bool, int)):
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise StageFailure(stage, f"wrote {value!r} to {where}: not a finite number")
        return
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                raise StageFailure(stage, f"wrote a key {key!r} to {where}: keys must be strings")
            _check_json(stage, f"{where}.{key}", item)
        return
    if isinstance(value, (list, tuple)):
        for index, item in enumerate(value):
            _check_json(stage, f"{where}[{index}]", item)
        return
    raise StageFailure(stage, f"wrote a {type(value).__name__} to {where}: not a JSON value")


def _validate(result: dict[str, Any]) -> None:
    """Check the result against ``lens-order-result/1``; a fault names the stage that wrote the field."""
    try:
        LensOrderResult.model_validate(result)
    except ValidationError as exc:
        error = exc.errors(include_url=False)[0]
        location = [str(part) for part in error["loc"]]
        problem = _problem(error, [])
        stage = _writer(result, location)
        if stage is None:
            raise StageFailure(None, f"{problem}; no stage of the chain wrote it", "(result)") from None
        raise StageFailure(stage, f"wrote a value the result contract refuses: {problem}") from None


def _writer(result: dict[str, Any], location: list[str]) -> str | None:
    """The stage that last wrote the field at ``location`` (or a field inside it, or around it)."""
    if location[0] in ("flags", "changes") and len(location) > 1:
        return result[location[0]][int(location[1])].get("stage")
    where = ".".join(location)
    for change in reversed(result["changes"]):
        written = change["field"]
        if where == written or where.startswith(written + ".") or written.startswith(where + "."):
            return str(change["stage"])
    return None


def _problem(error: Any, path: list[str]) -> str:
    """One contract error as a rejected order's reasons say it: where (below ``path``), what, and what was there."""
    where = ".".join([*path, *(str(part) for part in error["loc"])])
    return f"{where}: {error['msg']}" + ("" if error["type"] == "missing" else f" (got {error['input']!r})")
