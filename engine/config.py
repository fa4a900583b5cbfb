"""The lab's ``lenslane.toml``, validated at start.

A bad config stops the engine before it touches an order, with the key path
and the reason (``ConfigError``). Stage parameters are validated later, by the
plugin host, against each stage's own ``params`` model.
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from importlib import resources
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal, Mapping

from pydantic import BaseModel, ConfigDict, Field, ValidationError

CONFIG_NAME = "lenslane.toml"


def template_text() -> str:
    """The default lab config, shipped inside the package (``lenslane.defaults``)."""
    return resources.files("lenslane.defaults").joinpath(CONFIG_NAME).read_text(encoding="utf-8")

DEFAULT_CHAIN = ["validate", "normalize", "prism", "vertex", "tilt", "generator", "geometry", "safety"]


class ConfigError(Exception):
    """The lab config is unusable; the message names the key path and the reason."""


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)


class EngineSettings(_Section):
    chain: list[str] = Field(default_factory=lambda: list(DEFAULT_CHAIN))
    blocked: list[str] = Field(default_factory=list)
    cylinder_form: Literal["minus", "plus"] = "minus"
    trace_hooks: bool = False


class WatchSettings(_Section):
    quiet_seconds: Annotated[float, Field(ge=0, le=600)] = 0.2
    young_seconds: Annotated[float, Field(ge=0, le=3600)] = 10.0
    rescan_seconds: Annotated[float, Field(gt=0, le=3600)] = 5.0
    max_order_bytes: Annotated[int, Field(ge=1024, le=1 << 30)] = 1 << 20
    observer: Literal["auto", "native", "polling"] = "auto"
    order_time_limit_seconds: Annotated[float, Field(gt=0, le=3600)] = 10.0
    retry_max_seconds: Annotated[float, Field(gt=0, le=3600)] = 60.0


class AuditSettings(_Section):
    rotate_bytes: Annotated[int, Field(ge=0)] = 64 << 20
    rotate_period: Literal["none", "day", "month"] = "none"
    checkpoint_minutes: Annotated[float, Field(gt=0)] = 5.0
    signing_key: str | None = None  # an Ed25519 private key (PEM), relative to the lab folder


class Material(_Section):
    index: Annotated[float, Field(ge=1.40, le=1.95)]
    abbe: Annotated[float, Field(gt=0, le=100)]
    density: Annotated[float, Field(gt=0, le=10, description="g/cm³")]


class LabConfig(_Section):
    engine: EngineSettings = EngineSettings()
    watch: WatchSettings = WatchSettings()
    audit: AuditSettings = AuditSettings()
    materials: dict[str, Material] = Field(default_factory=dict)
    stages: dict[str, dict[str, Any]] = Field(default_factory=dict)
    #: ``[plugins.<name>]``: the settings of a plugin, handed to its ``lenslane_configure`` hook.
    plugins: dict[str, dict[str, Any]] = Field(default_factory=dict)


@dataclass(frozen=True)
class LabSettings:
    """The part of the config every stage may read."""

    cylinder_form: str
    materials: Mapping[str, Material]
    stage_params: Mapping[str, Any] = field(default_factory=dict)
    """Every chained stage's validated parameters, by stage name: a stage whose result depends on another's
    settings (the exact tilt compensation on the lens geometry) reads them here."""


def format_errors(exc: ValidationError, prefix: str = "") -> str:
    lines = []
    for err in exc.errors(include_url=False):
        path = ".".join(str(p) for p in (prefix, *err["loc"]) if p != "")
        lines.append(f"{path or '(top level)'}: {err['msg']}")
    return "; ".join(lines)


def parse_config(text: str, origin: str = CONFIG_NAME) -> LabConfig:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{origin}: not valid TOML: {exc}") from None
    try:
        return LabConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(f"{origin}: {format_errors(exc)}") from None


def load_config(lab: Path | None) -> LabConfig:
    """The config of a lab folder; the built-in defaults when there is none."""
    if lab is None:
        return LabConfig()
    path = Path(lab) / CONFIG_NAME
    if not path.exists():
        return LabConfig()
    return parse_config(path.read_text(encoding="utf-8"), str(path))


def config_sha256(effective: Mapping[str, Any]) -> str:
    """A fingerprint of the effective config (defaults included), not of its comments."""
    canonical = json.dumps(effective, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(canonical.encode()).hexdigest()
