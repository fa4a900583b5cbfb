"""Helpers for testing a lenslane plugin: one order through a chain, or a whole temporary lab.

::

    from lenslane.testing import run_chain, sample_order

    def test_my_stage_flags_a_wide_frame():
        order = sample_order(frame={"box_width_mm": 62.0})
        run = run_chain(order, ["normalize", "wide_frame"], stages={"wide_frame": {"limit_mm": 60.0}})
        assert [f["code"] for f in run.flags(stage="wide_frame")] == ["wide-frame"]

Both start the engine exactly as a lab does: the built-in plugins, every
installed plugin (your package, once ``pip install -e .``), and any plugin
objects you pass in ``plugins``; the config is validated as at start. With
pytest, the fixtures ``lenslane_order`` and ``lenslane_lab`` come from the
plugin :mod:`lenslane.testing.fixtures`, registered through pytest's
``pytest11`` entry point: no import is needed.
"""
from __future__ import annotations

import copy
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from lenslane.audit.index import level_index
from lenslane.audit.log import iter_records, unpack
from lenslane.chain.host import Host, start_host
from lenslane.chain.pipeline import Pipeline
from lenslane.config import CONFIG_NAME, LabConfig
from lenslane.contract.intake import read_order
from lenslane.report import order_story, render_text

__all__ = ["ChainRun", "TemporaryLab", "host_for", "run_chain", "sample_order"]

#: A valid, mild single-vision order of an invented practice (a wearer by code, never a name).
SAMPLE_ORDER: dict[str, Any] = {
    "format": "lens-order/1",
    "order_id": "TEST-0001",
    "account": "test-practice",
    "rx": {"right": {"sphere": -1.00, "cylinder": -0.50, "axis": 90}, "left": {"sphere": -1.25}},
    "lens": {"design": "single_vision", "material": "resin-1.50"},
    "frame": {"box_width_mm": 52.0, "box_height_mm": 38.0, "bridge_mm": 18.0},
    "fit": {"right": {"pd_mm": 32.0}, "left": {"pd_mm": 32.0}},
}


def sample_order(**sections: Any) -> dict[str, Any]:
    """A fresh copy of :data:`SAMPLE_ORDER`, each given section's keys updated (``frame={"mount": "drilled"}``).

    A section given as ``None`` is removed; a top-level value that is not a
    dict (``order_id="X-1"``) replaces the order's.
    """
    order = copy.deepcopy(SAMPLE_ORDER)
    for key, value in sections.items():
        if value is None:
            order.pop(key, None)
        elif isinstance(value, dict) and isinstance(order.get(key), dict):
            order[key].update(copy.deepcopy(value))
        else:
            order[key] = copy.deepcopy(value)
    return order


def host_for(chain: list[str] | None = None, stages: dict[str, dict[str, Any]] | None = None,
             plugins: dict[str, object] | None = None, config: dict[str, Any] | None = None,
             installed: bool | None = None) -> Host:
    """An engine host as a lab's start makes it: ``chain`` (default: the default chain), ``[stages.*]`` tables.

    ``config`` gives any further sections of ``lenslane.toml`` as a dict;
    ``installed=False`` loads only the built-in plugins and those in ``plugins``;
    by default every installed plugin is loaded, unless ``LENSLANE_DISABLE_PLUGIN_AUTOLOAD``
    limits them to those named in ``LENSLANE_PLUGINS``.
    Raises :class:`lenslane.config.ConfigError` as the engine's start would.
    """
    settings = dict(config or {})
    if chain is not None:
        settings["engine"] = {**settings.get("engine", {}), "chain": list(chain)}
    if stages:
        settings["stages"] = {**settings.get("stages", {}), **stages}
    return start_host(LabConfig.model_validate(settings), plugins=plugins, installed=installed)


@dataclass
class ChainRun:
    """The result of one order through a chain, with ways to pick out what a stage did."""

    result: dict[str, Any]

    @property
    def status(self) -> str:
        return str(self.result["status"])

    def lens(self, eye: str) -> dict[str, Any]:
        """The published lens of ``eye`` (``rx``, ``surfacing``, …, rounded as the contract says)."""
        return dict(self.result["lenses"][eye])

    def changes(self, stage: str | None = None, field: str | None = None) -> list[dict[str, Any]]:
        """The change records (``stage``, ``field``, ``before``, ``after``, ``reason``, ``method``, …)."""
        return [c for c in self.result["changes"]
                if (stage is None or c["stage"] == stage) and (field is None or c["field"] == field)]

    def flags(self, stage: str | None = None, level: str | None = None, code: str | None = None) -> list[dict[str, Any]]:
        """The flags (``code``, ``level``, ``eye``, ``message``, ``stage``, ``values``)."""
        return [f for f in self.result["flags"] if (stage is None or f["stage"] == stage)
                and (level is None or f["level"] == level) and (code is None or f["code"] == code)]


def run_chain(order: dict[str, Any], chain: list[str] | None = None, stages: dict[str, dict[str, Any]] | None = None,
              plugins: dict[str, object] | None = None, config: dict[str, Any] | None = None,
              installed: bool | None = None) -> ChainRun:
    """Run one order (a dict, as a file would hold it) through a chain; see :func:`host_for`.

    The order is read exactly as the inbox reads it; a refused order raises
    :class:`lenslane.contract.intake.OrderRejected`, a failing stage
    :class:`lenslane.chain.pipeline.StageFailure` (its ``field`` and
    ``message`` are what the rejected order's report would say). No
    ``lenslane_result_ready`` hook runs, as in ``lenslane preview``.
    """
    host = host_for(chain, stages, plugins, config, installed)
    validated, parsed = read_order(json.dumps(order).encode(), host.settings.materials)
    return ChainRun(Pipeline(host, side_effects=False).run(validated, parsed).result)


class TemporaryLab:
    """A real lab folder (``lenslane init``) to drop orders into and process with ``lenslane watch --once``.

    ``config`` is the text of ``lenslane.toml`` (default: the commented
    template). Everything runs in this process, through the command line's own
    functions, with the plugins installed in this environment.
    """

    def __init__(self, root: Path, config: str | None = None):
        from lenslane.cli import main

        self.root = Path(root)
        self._main = main
        if main(["init", str(self.root)]) != 0:
            raise RuntimeError(f"lenslane init {self.root} failed")
        if config is not None:
            (self.root / CONFIG_NAME).write_text(config, encoding="utf-8")

    def drop(self, order: dict[str, Any], name: str | None = None) -> Path:
        """Write ``order`` into the inbox as ``<order_id>.json`` (or ``name``); returns its path."""
        path = self.root / "inbox" / (name or f"{order['order_id']}.json")
        path.write_text(json.dumps(order, indent=1), encoding="utf-8")
        return path

    def process(self) -> int:
        """``lenslane watch LAB --once``: every order in the inbox, to its end; returns the exit code."""
        return self._main(["watch", str(self.root), "--once"])

    def result(self, order_id: str) -> dict[str, Any]:
        """The published ``outbox/<order_id>.json``."""
        return dict(json.loads((self.root / "outbox" / f"{order_id}.json").read_text(encoding="utf-8")))

    def rejection(self, name: str) -> dict[str, Any]:
        """The report of a rejected input file (``rejected/<name>.errors.json``): its ``problems``."""
        return dict(json.loads((self.root / "rejected" / f"{name}.errors.json").read_text(encoding="utf-8")))

    def audit_records(self, order_id: str | None = None) -> list[dict[str, Any]]:
        """The audit log's records, oldest first (of one order when ``order_id`` is given).

        Each pass of an order is one record; its ``changes``, ``flags`` and ``run`` come filled in
        from the log's ``define`` records, as the stages made them.
        """
        with level_index(self.root) as index:
            return [unpack(r, index.body) for r in iter_records(self.root)
                    if order_id is None or r.get("order_id") == order_id]

    def story(self, order_id: str) -> dict[str, Any]:
        """``lenslane explain LAB ORDER_ID --json``: the order's story as data."""
        return order_story(self.root, order_id)

    def explain(self, order_id: str) -> str:
        """``lenslane explain LAB ORDER_ID``: the order's story as text."""
        return render_text(order_story(self.root, order_id))
