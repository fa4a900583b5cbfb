"""The plugin host: finds the stages, validates their parameters, builds the chain.

Built-in stages are ordinary plugin modules listed in :data:`BUILTIN_PLUGINS`
and registered exactly as external ones, which come through the entry-point
group ``lenslane.plugins``. All of this happens once, at start; nothing here
runs per order.
"""
from __future__ import annotations

import importlib
import sys
from dataclasses import dataclass, field
from typing import Any

import pluggy
from pydantic import BaseModel, ValidationError

from lenslane import __version__
from lenslane.chain import hookspecs
from lenslane.config import ConfigError, LabConfig, LabSettings, Material, config_sha256, format_errors
from lenslane.chain.stage import Stage

ENTRY_POINT_GROUP = "lenslane.plugins"

#: The built-in plugins, registered under these names (the names ``engine.blocked`` uses).
BUILTIN_PLUGINS: tuple[tuple[str, str], ...] = (
    ("core", "lenslane.chain.core"),
    ("materials", "lenslane.plugins.materials"),
    ("validate", "lenslane.plugins.validate"),
    ("normalize", "lenslane.plugins.normalize"),
    ("prism", "lenslane.plugins.prism"),
    ("vertex", "lenslane.plugins.vertex"),
    ("tilt", "lenslane.plugins.tilt"),
    ("generator", "lenslane.plugins.generator"),
    ("geometry", "lenslane.plugins.geometry"),
    ("safety", "lenslane.plugins.safety"),
)


@dataclass(frozen=True)
class StageInfo:
    stage: Stage
    plugin: str
    origin: str  # "built-in" or the distribution that provides it
    version: str


@dataclass(frozen=True)
class ChainLink:
    stage: Stage
    params: BaseModel | None


@dataclass
class Host:
    """Everything the pipeline needs, resolved once at start."""

    config: LabConfig
    plugin_manager: pluggy.PluginManager
    stages: dict[str, StageInfo]
    chain: list[ChainLink]
    disabled: list[str]
    settings: LabSettings
    config_sha256: str
    effective_config: dict[str, Any] = field(repr=False, default_factory=dict)

    @property
    def hook(self):
        return self.plugin_manager.hook


def _new_plugin_manager(blocked: list[str]) -> pluggy.PluginManager:
    pm = pluggy.PluginManager(hookspecs.PROJECT)
    pm.add_hookspecs(hookspecs)
    for name in blocked:
        pm.set_blocked(name)
    return pm


def _register_builtins(pm: pluggy.PluginManager) -> None:
    for name, module_name in BUILTIN_PLUGINS:
        if pm.is_blocked(name):
            continue
        module = importlib.import_module(module_name)
        pm.register(module, name=name)


def _origin_of(pm: pluggy.PluginManager, plugin: object) -> tuple[str, str]:
    for candidate, dist in pm.list_plugin_distinfo():
        if candidate is plugin:
            return dist.project_name, dist.version
    return "built-in", __version__


def start_host(config: LabConfig, trace: bool | None = None, plugins: dict[str, object] | None = None) -> Host:
    """Load every plugin, check the hooks, validate the chain and its parameters.

    ``plugins`` registers further plugin objects by name, beside the built-in
    and installed ones (for a program that embeds the engine, and for tests).

    Raises
    ------
    ConfigError
        A stage named in the chain or the config does not exist, a name is
        used twice, or a stage's parameters are invalid (with the key path).
    """
    if "core" in config.engine.blocked:
        raise ConfigError("engine.blocked: 'core' runs every stage and cannot be blocked")
    pm = _new_plugin_manager(config.engine.blocked)
    _register_builtins(pm)
    pm.load_setuptools_entrypoints(ENTRY_POINT_GROUP)
    for name, plugin in (plugins or {}).items():
        if not pm.is_blocked(name):
            pm.register(plugin, name=name)
    pm.check_pending()
    if trace if trace is not None else config.engine.trace_hooks:
        enable_tracing(pm)

    stages: dict[str, StageInfo] = {}
    for impl in pm.hook.lenslane_stages.get_hookimpls():
        plugin_name = pm.get_name(impl.plugin) or "?"
        origin, version = _origin_of(pm, impl.plugin)
        for stage in impl.function() or ():
            if not isinstance(stage, Stage):
                raise ConfigError(f"plugin {plugin_name!r}: lenslane_stages returned {stage!r}, not a Stage")
            if stage.name in stages:
                other = stages[stage.name].plugin
                raise ConfigError(f"stage {stage.name!r} is provided by both {other!r} and {plugin_name!r}")
            stages[stage.name] = StageInfo(stage, plugin_name, origin, version)

    materials: dict[str, Material] = {}
    for contributed in reversed(pm.hook.lenslane_materials()):
        for key, values in (contributed or {}).items():
            try:
                materials[key] = Material.model_validate(dict(values))
            except ValidationError as exc:
                raise ConfigError(f"material {key!r} from a plugin: {format_errors(exc)}") from None
    materials.update(config.materials)

    unknown_tables = sorted(set(config.stages) - set(stages))
    if unknown_tables:
        raise ConfigError(f"stages.{unknown_tables[0]}: no such stage (known: {', '.join(sorted(stages))})")

    chain: list[ChainLink] = []
    disabled: list[str] = []
    effective_stages: dict[str, Any] = {}
    seen: set[str] = set()
    for position, name in enumerate(config.engine.chain):
        if name in seen:
            raise ConfigError(f"engine.chain[{position}]: stage {name!r} is listed twice")
        seen.add(name)
        if name not in stages:
            hint = " (it is blocked in engine.blocked)" if name in config.engine.blocked else ""
            raise ConfigError(f"engine.chain[{position}]: no such stage {name!r}{hint}")
        table = dict(config.stages.get(name, {}))
        enabled = table.pop("enabled", True)
        if not isinstance(enabled, bool):
            raise ConfigError(f"stages.{name}.enabled: must be true or false")
        stage = stages[name].stage
        params = _stage_params(stage, table)
        effective_stages[name] = {"enabled": enabled, **(params.model_dump(mode="json") if params else {})}
        if enabled:
            chain.append(ChainLink(stage, params))
        else:
            disabled.append(name)

    effective = config.model_dump(mode="json")
    effective["stages"] = effective_stages
    effective["materials"] = {k: v.model_dump() for k, v in sorted(materials.items())}
    return Host(
        config=config,
        plugin_manager=pm,
        stages=stages,
        chain=chain,
        disabled=disabled,
        settings=LabSettings(cylinder_form=config.engine.cylinder_form, materials=materials),
        config_sha256=config_sha256(effective),
        effective_config=effective,
    )


def _stage_params(stage: Stage, table: dict[str, Any]) -> BaseModel | None:
    if stage.params is None:
        if table:
            raise ConfigError(f"stages.{stage.name}.{next(iter(table))}: stage {stage.name!r} takes no parameters")
        return None
    try:
        return stage.params.model_validate(table)
    except ValidationError as exc:
        raise ConfigError(format_errors(exc, prefix=f"stages.{stage.name}")) from None


def enable_tracing(pm: pluggy.PluginManager) -> None:
    """Print every hook call and its result to standard error."""

    def before(hook_name, hook_impls, kwargs):
        names = ", ".join(pm.get_name(i.plugin) or "?" for i in hook_impls)
        shown = {k: getattr(v, "name", type(v).__name__) for k, v in kwargs.items()}
        print(f"[hook] {hook_name}({shown}) -> [{names}]", file=sys.stderr)

    def after(outcome, hook_name, hook_impls, kwargs):
        exc = outcome.exception
        print(f"[hook] {hook_name} {'raised ' + repr(exc) if exc else 'returned'}", file=sys.stderr)

    pm.add_hookcall_monitoring(before, after)
