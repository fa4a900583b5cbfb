"""The plugin host: finds the plugins, checks their hooks, validates their settings, builds the chain.

Built-in stages are ordinary plugin modules listed in :data:`BUILTIN_PLUGINS`
and registered exactly as external ones, which come through the entry-point
group ``lenslane.plugins``. All of this happens once, at start; nothing here
runs per order. Whatever goes wrong names the plugin, its distribution and
its entry point, and stops the engine before it touches an order.
"""
from __future__ import annotations

import importlib
import os
import sys
from dataclasses import dataclass, field
from importlib import metadata
from typing import Any

import pluggy
from pydantic import BaseModel, ValidationError

from lenslane import __version__
from lenslane.chain import hookspecs
from lenslane.chain.stage import Stage
from lenslane.config import ConfigError, LabConfig, LabSettings, Material, config_sha256, format_errors
from lenslane.vocabulary import EYES

ENTRY_POINT_GROUP = "lenslane.plugins"
#: The engine's own distribution: the one the built-in plugins come with.
ENGINE_DISTRIBUTION = "lenslane"
#: Set (to anything but "" or "0") to load only the built-in plugins, and of the installed ones only those
#: named in LENSLANE_PLUGINS (comma-separated entry-point names). The engine's own tests set it, so an
#: installed plugin changes none of them.
NO_AUTOLOAD_VARIABLE = "LENSLANE_DISABLE_PLUGIN_AUTOLOAD"
PLUGINS_VARIABLE = "LENSLANE_PLUGINS"

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

#: The hooks called for each order (the others are called once, at start).
PER_ORDER_HOOKS = ("lenslane_run_stage", "lenslane_result_ready")


class PluginError(ConfigError):
    """A plugin cannot be loaded, or breaks the hook contract; the message names it and its entry point."""


@dataclass(frozen=True)
class PluginInfo:
    """Where one registered plugin comes from."""

    name: str  # the name ``engine.blocked`` and ``[plugins.<name>]`` use
    distribution: str  # "lenslane" for a built-in
    version: str
    builtin: bool = False
    entry_point: str | None = None  # "name = module" for an installed plugin
    hooks: tuple[str, ...] = ()

    def __str__(self) -> str:
        where = f"entry point {self.entry_point!r}, " if self.entry_point else ""
        return f"plugin {self.name!r} ({where}{self.distribution} {self.version})"


@dataclass(frozen=True)
class StageInfo:
    stage: Stage
    plugin: PluginInfo

    @property
    def origin(self) -> str:
        """``built-in``, or the distribution that provides the stage."""
        return "built-in" if self.plugin.builtin else self.plugin.distribution

    @property
    def version(self) -> str:
        return self.plugin.version


@dataclass(frozen=True)
class ChainLink:
    stage: Stage
    params: BaseModel | None
    plugin: PluginInfo


@dataclass
class Host:
    """Everything the pipeline needs, resolved once at start."""

    config: LabConfig
    plugin_manager: pluggy.PluginManager
    plugins: dict[str, PluginInfo]
    stages: dict[str, StageInfo]
    chain: list[ChainLink]
    disabled: list[str]
    settings: LabSettings
    config_sha256: str
    effective_config: dict[str, Any] = field(repr=False, default_factory=dict)

    @property
    def hook(self) -> Any:
        return self.plugin_manager.hook

    @property
    def provenance(self) -> dict[str, Any]:
        """Who makes the results: the engine's version, the config, each stage's distribution and version.

        The published audit record carries these keys as they are; a result
        carries them in its ``engine`` block (the version as ``version``).
        """
        return {
            "engine_version": __version__,
            "config_sha256": self.config_sha256,
            "stages": [link.stage.name for link in self.chain],
            "chain": [{"stage": link.stage.name, "plugin": link.plugin.name,
                       "distribution": link.plugin.distribution, "version": link.plugin.version}
                      for link in self.chain],
            # Plugins that take part in every order without a stage of their own (wrappers, observers).
            "hooks": [{"plugin": info.name, "distribution": info.distribution, "version": info.version,
                       "hooks": [h for h in info.hooks if h in PER_ORDER_HOOKS]}
                      for info in self.plugins.values()
                      if info.name != "core" and set(info.hooks) & set(PER_ORDER_HOOKS)],
        }


def installed_to_load() -> set[str] | None:
    """The installed plugins to load, by entry-point name or as ``name=module`` (only the entry point of that name
    that loads that module), or None for all (see :data:`NO_AUTOLOAD_VARIABLE`)."""
    if os.environ.get(NO_AUTOLOAD_VARIABLE, "") in ("", "0"):
        return None
    return {name.strip() for name in os.environ.get(PLUGINS_VARIABLE, "").split(",") if name.strip()}


def start_host(config: LabConfig, trace: bool | None = None, plugins: dict[str, object] | None = None,
               installed: bool | None = None) -> Host:
    """Load every plugin, check the hooks, validate every settings table, build the chain.

    ``plugins`` registers further plugin objects by name, beside the built-in
    and installed ones (for a program that embeds the engine, and for tests).
    ``installed`` says whether the plugins installed through entry points are
    loaded: True all, False none, None (the default) all unless
    :data:`NO_AUTOLOAD_VARIABLE` is set.

    Raises
    ------
    ConfigError
        A stage or plugin named in the config does not exist, a name is used
        twice, or settings are invalid (with the key path).
    PluginError
        A plugin cannot be loaded, implements a hook that does not exist, or a
        start-up hook raised (naming the plugin and its entry point).
    """
    blocked = config.engine.blocked
    if "core" in blocked:
        raise ConfigError("engine.blocked: 'core' runs every stage and cannot be blocked")
    pm = pluggy.PluginManager(hookspecs.PROJECT)
    pm.add_hookspecs(hookspecs)
    for name in blocked:
        pm.set_blocked(name)
    infos: dict[str, PluginInfo] = {}
    known = [name for name, _ in BUILTIN_PLUGINS]
    for name, module_name in BUILTIN_PLUGINS:
        if name not in blocked:
            _register(pm, infos, importlib.import_module(module_name),
                      PluginInfo(name, ENGINE_DISTRIBUTION, __version__, builtin=True))
    wanted = installed_to_load() if installed is None else (None if installed else set())
    known += _load_installed(pm, infos, blocked, wanted)
    for name, plugin in (plugins or {}).items():
        known.append(name)
        if name not in blocked:
            _register(pm, infos, plugin, _embedded_info(name))
    _check_blocked(blocked, known)
    _check_hooks(pm, infos)
    if trace if trace is not None else config.engine.trace_hooks:
        enable_tracing(pm)

    stages = _collect_stages(pm, infos)
    materials = _collect_materials(pm, infos)
    materials.update(config.materials)
    _configure_plugins(pm, infos, config)
    params = {name: _stage_params(stages, name, table) for name, table in config.stages.items()}

    chain: list[ChainLink] = []
    disabled: list[str] = []
    effective_stages: dict[str, Any] = {}
    chosen: dict[str, BaseModel | None] = {}
    for position, name in enumerate(config.engine.chain):
        if name in effective_stages:
            raise ConfigError(f"engine.chain[{position}]: stage {name!r} is listed twice")
        if name not in stages:
            hint = " (it is blocked in engine.blocked)" if name in blocked else ""
            raise ConfigError(f"engine.chain[{position}]: no such stage {name!r}{hint}")
        enabled, stage_params = params.get(name) or _stage_params(stages, name, {})
        chosen[name] = stage_params
        effective_stages[name] = {"enabled": enabled,
                                  **(stage_params.model_dump(mode="json") if stage_params else {})}
        if enabled:
            chain.append(ChainLink(stages[name].stage, stage_params, stages[name].plugin))
        else:
            disabled.append(name)

    effective = config.model_dump(mode="json")
    effective["stages"] = effective_stages
    effective["materials"] = {k: v.model_dump() for k, v in sorted(materials.items())}
    return Host(
        config=config,
        plugin_manager=pm,
        plugins=infos,
        stages=stages,
        chain=chain,
        disabled=disabled,
        settings=LabSettings(cylinder_form=config.engine.cylinder_form, materials=materials,
                             stage_params=chosen),
        config_sha256=config_sha256(effective),
        effective_config=effective,
    )


# --------------------------------------------------------------------------
# Loading and checking the plugins
# --------------------------------------------------------------------------


def _register(pm: pluggy.PluginManager, infos: dict[str, PluginInfo], plugin: object, info: PluginInfo) -> None:
    try:
        pm.register(plugin, name=info.name)
    except (pluggy.PluginValidationError, ValueError) as exc:
        raise PluginError(f"{info}: cannot be registered: {exc}") from None
    hooks = tuple(sorted(caller.name for caller in pm.get_hookcallers(plugin) or ()))
    infos[info.name] = PluginInfo(info.name, info.distribution, info.version, info.builtin, info.entry_point, hooks)


def _load_installed(pm: pluggy.PluginManager, infos: dict[str, PluginInfo], blocked: list[str],
                    wanted: set[str] | None) -> list[str]:
    """Register every installed plugin that is wanted (None: all) and not blocked; returns all their names."""
    names = []
    for entry_point in metadata.entry_points(group=ENTRY_POINT_GROUP):
        names.append(entry_point.name)
        if entry_point.name in blocked or (
                wanted is not None and not {entry_point.name, f"{entry_point.name}={entry_point.value}"} & wanted):
            continue  # not even imported
        dist = entry_point.dist
        info = PluginInfo(entry_point.name, dist.metadata["Name"] if dist else "unknown distribution",
                          dist.version if dist else "unknown version",
                          entry_point=f"{entry_point.name} = {entry_point.value}")
        if info.name in infos:
            raise PluginError(f"{info}: the name {info.name!r} is already taken by {infos[info.name]}")
        try:
            plugin = entry_point.load()
        except Exception as exc:
            raise PluginError(f"{info}: cannot be loaded: {type(exc).__name__}: {exc}") from None
        _register(pm, infos, plugin, info)
    return names


def _embedded_info(name: str) -> PluginInfo:
    """A plugin object handed to :func:`start_host` by the program that embeds the engine (or a test)."""
    return PluginInfo(name, "unpackaged", "unversioned")


def _check_blocked(blocked: list[str], known: list[str]) -> None:
    for position, name in enumerate(blocked):
        if name not in known:
            raise ConfigError(f"engine.blocked[{position}]: no plugin is named {name!r} (plugins: "
                              f"{', '.join(sorted(set(known)))}; a stage is left out by leaving it out "
                              "of engine.chain)")


def _check_hooks(pm: pluggy.PluginManager, infos: dict[str, PluginInfo]) -> None:
    """A hook the engine does not know (a misspelt name) stops the start, naming the plugin's entry point."""
    for name, caller in vars(pm.hook).items():
        if name.startswith("_") or caller.has_spec():
            continue
        for impl in caller.get_hookimpls():
            if not impl.optionalhook:
                known = ", ".join(sorted(n for n in vars(pm.hook) if not n.startswith("_")
                                         and getattr(pm.hook, n).has_spec()))
                raise PluginError(f"{infos[impl.plugin_name]}: implements {name!r}, which is not a lenslane "
                                  f"hook (the hooks: {known})")


def _call_start_hook(impl: pluggy.HookImpl, infos: dict[str, PluginInfo], hook: str) -> Any:
    """Call one plugin's implementation of a start-up hook, so a failure names that plugin."""
    try:
        return impl.function()
    except Exception as exc:
        raise PluginError(f"{infos[impl.plugin_name]}: {hook} raised {type(exc).__name__}: {exc}") from None


def _collect_stages(pm: pluggy.PluginManager, infos: dict[str, PluginInfo]) -> dict[str, StageInfo]:
    stages: dict[str, StageInfo] = {}
    for impl in pm.hook.lenslane_stages.get_hookimpls():
        info = infos[impl.plugin_name]
        for stage in _call_start_hook(impl, infos, "lenslane_stages") or ():
            if not isinstance(stage, Stage):
                raise PluginError(f"{info}: lenslane_stages returned {stage!r}, not a Stage")
            outside = [pattern for pattern in stage.writes if not _is_lens_field(pattern)]
            if outside:
                raise PluginError(f"{info}: stage {stage.name!r} declares it writes {outside[0]!r}; a stage writes "
                                  "only fields of the lenses, lenses.<right, left or *>.<field>…")
            if stage.name in stages:
                raise ConfigError(f"stage {stage.name!r} is provided by both {stages[stage.name].plugin.name!r} "
                                  f"and {info.name!r}")
            stages[stage.name] = StageInfo(stage, info)
    return stages


def _is_lens_field(pattern: str) -> bool:
    """Whether a ``writes`` pattern names fields of the lenses (the only part of a result a stage may write)."""
    parts = pattern.split(".")
    return len(parts) >= 3 and parts[0] == "lenses" and parts[1] in ("*", *EYES) and all(parts[2:])


def _collect_materials(pm: pluggy.PluginManager, infos: dict[str, PluginInfo]) -> dict[str, Material]:
    materials: dict[str, Material] = {}
    # In the order of registration: the built-in table first, so a plugin's entry replaces its namesake.
    for impl in pm.hook.lenslane_materials.get_hookimpls():
        for key, values in (_call_start_hook(impl, infos, "lenslane_materials") or {}).items():
            try:
                materials[key] = Material.model_validate(dict(values))
            except (ValidationError, TypeError, ValueError) as exc:
                problem = format_errors(exc) if isinstance(exc, ValidationError) else str(exc)
                raise PluginError(f"{infos[impl.plugin_name]}: material {key!r}: {problem}") from None
    return materials


def _configure_plugins(pm: pluggy.PluginManager, infos: dict[str, PluginInfo], config: LabConfig) -> None:
    """Hand each plugin its ``[plugins.<name>]`` table (empty when there is none), and check every table."""
    configurable = {impl.plugin_name: impl for impl in pm.hook.lenslane_configure.get_hookimpls()}
    for name in config.plugins:
        if name in config.engine.blocked:
            continue  # a blocked plugin is not loaded, so its table cannot be checked; it is kept for later
        if name not in infos:
            raise ConfigError(f"plugins.{name}: no plugin is named {name!r} (plugins: {', '.join(sorted(infos))})")
        if name not in configurable:
            raise ConfigError(f"plugins.{name}: {infos[name]} takes no settings (it implements no lenslane_configure)")
    for name, impl in configurable.items():
        try:
            table = dict(config.plugins.get(name, {}))
            impl.function(**({"settings": table} if "settings" in impl.argnames else {}))
        except ValueError as exc:  # pydantic's ValidationError is one
            problem = format_errors(exc, prefix=f"plugins.{name}") if isinstance(exc, ValidationError) else (
                f"plugins.{name}: {exc}")
            raise ConfigError(problem) from None
        except Exception as exc:
            raise PluginError(f"{infos[name]}: lenslane_configure raised {type(exc).__name__}: {exc}") from None


def _stage_params(stages: dict[str, StageInfo], name: str, table: dict[str, Any]) -> tuple[bool, BaseModel | None]:
    """A ``[stages.<name>]`` table, checked against the stage's model: ``(enabled, params)``."""
    if name not in stages:
        raise ConfigError(f"stages.{name}: no such stage (known: {', '.join(sorted(stages))})")
    table = dict(table)
    enabled = table.pop("enabled", True)
    if not isinstance(enabled, bool):
        raise ConfigError(f"stages.{name}.enabled: must be true or false")
    stage = stages[name].stage
    if stage.params is None:
        if table:
            raise ConfigError(f"stages.{name}.{next(iter(table))}: stage {name!r} takes no parameters")
        return enabled, None
    try:
        return enabled, stage.params.model_validate(table)
    except ValidationError as exc:
        raise ConfigError(format_errors(exc, prefix=f"stages.{name}")) from None


def enable_tracing(pm: pluggy.PluginManager) -> None:
    """Print every hook call and its result to standard error."""

    def before(hook_name: str, hook_impls: list[pluggy.HookImpl], kwargs: dict[str, Any]) -> None:
        names = ", ".join(impl.plugin_name for impl in hook_impls)
        shown = {k: getattr(v, "name", type(v).__name__) for k, v in kwargs.items()}
        print(f"[hook] {hook_name}({shown}) -> [{names}]", file=sys.stderr)

    def after(outcome: Any, hook_name: str, hook_impls: list[pluggy.HookImpl], kwargs: dict[str, Any]) -> None:
        exc = outcome.exception
        print(f"[hook] {hook_name} {'raised ' + repr(exc) if exc else 'returned'}", file=sys.stderr)

    pm.add_hookcall_monitoring(before, after)
