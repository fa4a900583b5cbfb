"""The contract as code: pydantic models of ``lens-order/1`` and ``lens-order-result/1``.

Strict types (no string-to-number coercion), unknown fields rejected, NaN and
infinities rejected, every range of the contract enforced, and the cross-field
rules checked. The material check needs the lab's table: pass it as
``context={"materials": {...}}`` to ``model_validate``.
"""
from __future__ import annotations

import re
from datetime import datetime
from typing import Annotated, Any, Literal, get_args

from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationInfo, field_validator, model_validator

from lenslane.vocabulary import EYES, Design, Eye, Level, Mount, Status

ORDER_ID_PATTERN = r"^[A-Za-z0-9_-][A-Za-z0-9._-]{0,63}$"
ORDER_ID_RE = re.compile(ORDER_ID_PATTERN)
_RFC3339 = re.compile(
    r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})$"
)

ORDER_FORMAT = "lens-order/1"
RESULT_FORMAT = "lens-order-result/1"


#: Prism components per eye and their sum (Δ): more is no spectacle lens a lab grinds (common practice: a
#: prescription writes one or two components, a horizontal and a vertical; large prism is split between the eyes).
MAX_PRISM_COMPONENTS = 4
MAX_TOTAL_PRISM_DELTA = 20.0


class _Strict(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", frozen=True, allow_inf_nan=False)




class PrismComponent(_Strict):
    """One prism component as prescribed: an amount and a base direction."""

    amount: Annotated[float, Field(gt=0, le=15, description="prism dioptres (Δ)")]
    base: Annotated[
        Literal["in", "out", "up", "down"] | Annotated[float, Field(ge=0, le=360)],
        Field(description="in/out/up/down, or degrees 0–360 in the standard axis notation"),
    ]


class EyeRx(_Strict):
    """The prescription for one eye, as refracted."""

    sphere: Annotated[float, Field(ge=-30, le=30, description="D")]
    cylinder: Annotated[float, Field(ge=-12, le=12, description="D, either sign")] = 0.0
    axis: Annotated[int, Field(ge=0, le=180, description="whole degrees; 0 means 180")] | None = None
    add: Annotated[float, Field(ge=0.5, le=4.0, description="D")] | None = None
    prism: Annotated[
        list[PrismComponent],
        Field(max_length=MAX_PRISM_COMPONENTS,
              description=f"at most {MAX_PRISM_COMPONENTS} components, together at most {MAX_TOTAL_PRISM_DELTA:g}Δ"),
    ] | None = None

    @model_validator(mode="after")
    def _axis_with_cylinder(self) -> "EyeRx":
        if self.cylinder != 0 and self.axis is None:
            raise ValueError("axis: required when cylinder is not zero")
        return self

    @model_validator(mode="after")
    def _prism_within_a_lens(self) -> "EyeRx":
        total = sum(component.amount for component in self.prism or ())
        if total > MAX_TOTAL_PRISM_DELTA:
            raise ValueError(f"prism: the components add up to {total:g}Δ, more than the {MAX_TOTAL_PRISM_DELTA:g}Δ "
                             "a ground spectacle lens carries")
        return self


class Rx(_Strict):
    right: EyeRx | None = None
    left: EyeRx | None = None
    vertex_mm: Annotated[float, Field(ge=0, le=25, description="refraction vertex distance, mm")] | None = None

    @model_validator(mode="after")
    def _at_least_one_eye(self) -> "Rx":
        if self.right is None and self.left is None:
            raise ValueError("at least one eye (right or left) is required")
        return self


class Wearer(_Strict):
    ref: Annotated[str, Field(min_length=1, max_length=64, description="a reference, never a name")] | None = None
    birth_year: Annotated[int, Field(ge=1900, le=2100)] | None = None


class Lens(_Strict):
    design: Design
    material: Annotated[str, Field(min_length=1, max_length=64)]
    index: Annotated[float, Field(ge=1.40, le=1.95)] | None = None
    front_curve_d: Annotated[float, Field(ge=0, le=14, description="true power at the lens index, D")] | None = None

    @field_validator("material")
    @classmethod
    def _known_material(cls, value: str, info: ValidationInfo) -> str:
        materials = (info.context or {}).get("materials")
        if materials is not None and value not in materials:
            known = ", ".join(sorted(materials))
            raise ValueError(f"unknown material {value!r} (the lab's table has: {known})")
        return value


class Frame(_Strict):
    box_width_mm: Annotated[float, Field(gt=0, le=100, description="boxing A, mm")]
    box_height_mm: Annotated[float, Field(gt=0, le=100, description="boxing B, mm")]
    bridge_mm: Annotated[float, Field(ge=0, le=60, description="boxing DBL, mm")]
    effective_diameter_mm: Annotated[float, Field(gt=0, le=140, description="ED, mm")] | None = None
    mount: Mount = "full_rim"
    outline_mm: Annotated[
        list[Annotated[float, Field(gt=0, le=70)]],
        Field(min_length=36, max_length=1000, description="radii of the right lens about its box centre, mm"),
    ] | None = None


class FitEye(_Strict):
    pd_mm: Annotated[float, Field(ge=20, le=42, description="monocular distance PD, mm")]
    height_mm: Annotated[float, Field(
        ge=0, le=100, description="above the box bottom, mm: the optical centre (single vision), the fitting cross "
                                  "(progressive), the distance optical centre at the pupil (bifocal)")] | None = None
    segment_height_mm: Annotated[float, Field(
        ge=5, le=40, description="bifocal: the segment top above the box bottom, mm")] | None = None


class Fit(_Strict):
    right: FitEye | None = None
    left: FitEye | None = None
    vertex_mm: Annotated[float, Field(ge=5, le=25, description="fitting vertex distance, mm")] | None = None
    pantoscopic_deg: Annotated[float, Field(ge=-5, le=25)] | None = None
    face_form_deg: Annotated[float, Field(ge=-5, le=35)] | None = None


class LensOrder(_Strict):
    """``lens-order/1``: one order, one file."""

    model_config = ConfigDict(
        strict=True, extra="forbid", frozen=True, allow_inf_nan=False,
        title="lens-order/1",
        json_schema_extra={"$id": "https://lenslane.invalid/schema/lens-order-1.json"},
    )

    format: Literal["lens-order/1"]
    order_id: Annotated[str, Field(pattern=ORDER_ID_PATTERN, description="names the output file")]
    placed_at: Annotated[str, Field(description="RFC 3339 time")] | None = None
    account: Annotated[str, Field(min_length=1, max_length=64)]
    wearer: Wearer | None = None
    rx: Rx
    lens: Lens
    frame: Frame
    fit: Fit

    @field_validator("placed_at")
    @classmethod
    def _rfc3339(cls, value: str | None) -> str | None:
        if value is None:
            return value
        if not _RFC3339.match(value):
            raise ValueError("must be an RFC 3339 time such as 2026-11-30T15:04:05Z")
        try:
            datetime.fromisoformat(value.replace("z", "Z").replace("Z", "+00:00"))
        except ValueError as exc:
            raise ValueError(f"not a valid time: {exc}") from None
        return value

    @model_validator(mode="after")
    def _cross_field_rules(self) -> "LensOrder":
        problems = []
        for eye in EYES:
            eye_rx = getattr(self.rx, eye)
            if eye_rx is None:
                continue
            if self.lens.design in ("progressive", "bifocal") and eye_rx.add is None:
                problems.append(f"rx.{eye}.add: required for a {self.lens.design} lens")
            fit = getattr(self.fit, eye)
            if fit is None:
                problems.append(f"fit.{eye}.pd_mm: required because rx.{eye} is ordered")
            elif self.lens.design == "bifocal" and fit.segment_height_mm is None:
                problems.append(f"fit.{eye}.segment_height_mm: required for a bifocal lens (the segment top "
                                "above the box bottom)")
        if problems:
            raise ValueError("; ".join(problems))
        return self


# --------------------------------------------------------------------------
# The result
# --------------------------------------------------------------------------


class _Out(BaseModel):
    # The engine validates every result before it is published: strictly (a number is a number, never a
    # string that looks like one), NaN and infinities refused. The bounds are what any spectacle lens can
    # be, wider than an order's: they catch a broken stage, not a judgement call.
    # Built when first used, not at every start of the command line.
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, defer_build=True)


class Power(_Out):
    sphere: Annotated[float, Field(ge=-50, le=50, description="D")]
    cylinder: Annotated[float, Field(ge=-20, le=20, description="D")]
    axis: Annotated[int, Field(ge=1, le=180)]
    add: Annotated[float, Field(ge=0, le=6, description="D")] | None = None


class ResultantPrism(_Out):
    amount: Annotated[float, Field(ge=0, le=50, description="Δ")]
    base_deg: Annotated[float, Field(ge=0, lt=360)]


class Geometry(_Out):
    model_config = ConfigDict(extra="allow")

    front_curve_d: Annotated[float, Field(ge=0, le=30, description="D")]
    center_thickness_mm: Annotated[float, Field(ge=0, le=100)]
    edge_min_mm: Annotated[float, Field(ge=0, le=100)]
    edge_max_mm: Annotated[float, Field(ge=0, le=100)]
    blank_min_diameter_mm: Annotated[float, Field(ge=0, le=200)]
    weight_g: Annotated[float, Field(ge=0, le=1000)]


class LensResult(_Out):
    model_config = ConfigDict(extra="allow")

    rx: Power
    surfacing: Power
    prism: ResultantPrism | None = None
    geometry: Geometry | None = None


class ResultFlag(_Out):
    code: str
    level: Level
    eye: Eye | None = None
    message: str
    stage: str | None = None
    values: dict[str, Any] = {}


class ChangeRecord(_Out):
    stage: str
    field: str
    before: Any
    after: Any
    reason: str
    method: str
    source: str
    inputs: dict[str, Any] = {}


class ChainEntry(_Out):
    """One stage of the chain and what made it."""

    stage: str
    plugin: str
    distribution: str
    version: str


class HookEntry(_Out):
    """A plugin that takes part in every order through its hooks, without a stage of its own."""

    plugin: str
    distribution: str
    version: str
    hooks: list[str]


class EngineInfo(_Out):
    version: str
    config_sha256: str
    stages: list[str]
    chain: list[ChainEntry] = []
    hooks: list[HookEntry] = []


class Approval(_Out):
    """Who let a result that needed a person go to production (``lenslane decide … approve``)."""

    by: str
    at: str
    note: str
    flags_acknowledged: list[str]


def lens_field_checks() -> dict[tuple[str, ...], TypeAdapter[Any]]:
    """What each field of a result's lens may hold, by its path below ``lenses.<eye>`` (``("surfacing",)``,
    ``("surfacing", "sphere")``…), as the result model says: for checking one value as a stage sets it, before a
    later stage computes with it. Fields the model does not name (a plugin's own) have none."""
    checks: dict[tuple[str, ...], TypeAdapter[Any]] = {}
    strict = ConfigDict(strict=True, allow_inf_nan=False)
    for name, field in LensResult.model_fields.items():
        annotation: Any = field.annotation
        checks[(name,)] = TypeAdapter(annotation)  # a model, with its own strict settings
        model = next(part for part in (annotation, *get_args(annotation)) if isinstance(part, type)
                     and issubclass(part, BaseModel))
        for part_name, part in model.model_fields.items():
            constrained: Any = Annotated[part.annotation, part]
            checks[(name, part_name)] = TypeAdapter(constrained, config=strict)
    return checks


class LensOrderResult(_Out):
    """``lens-order-result/1``: what the engine publishes in ``outbox/<order_id>.json``."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, title="lens-order-result/1")

    format: Literal["lens-order-result/1"]
    order_id: str
    status: Status
    order: dict[str, Any]
    lenses: dict[Eye, LensResult]
    flags: list[ResultFlag]
    changes: list[ChangeRecord]
    engine: EngineInfo
    caution: str
    approved: Approval | None = None
    revision: int | None = Field(default=None, ge=2, description="set on a replaced order's next version")
    supersedes: str | None = Field(default=None, description="sha256 of the result this revision replaces")



_FIELD_PREFIX = re.compile(r"^[a-z_][a-z0-9_]*(\.[a-z0-9_]+)*$")


def error_list(exc: Any) -> list[dict[str, str]]:
    """Turn a pydantic ValidationError into ``[{"field", "message"}]`` with dotted paths.

    Model-level rules name the field they concern at the start of their message
    (``"axis: required when cylinder is not zero"``); that name is appended to
    the location so every problem points at one field.
    """
    problems = []
    for err in exc.errors(include_url=False):
        field = ".".join(str(p) for p in err["loc"] if not _is_union_member(p))
        message = err["msg"].removeprefix("Value error, ")
        if err["type"] == "value_error":
            for part in message.split("; "):
                name, sep, text = part.partition(": ")
                if sep and _FIELD_PREFIX.match(name):
                    problems.append({"field": f"{field}.{name}" if field else name, "message": text})
                else:
                    problems.append({"field": field or "(order)", "message": part})
            continue
        value = err.get("input")
        if err["type"] != "missing" and not isinstance(value, (dict, list)):
            message = f"{message} (got {value!r})"
        problems.append({"field": field or "(order)", "message": message})
    return problems


def _is_union_member(part: Any) -> bool:
    # pydantic names the union member it tried inside the location: drop it.
    return isinstance(part, str) and (part.startswith(("literal[", "constrained-")) or part in ("float", "int", "str"))


def validate_order(data: Any, materials: Any) -> LensOrder:
    """Validate parsed JSON against ``lens-order/1`` and the lab's material table."""
    return LensOrder.model_validate(data, context={"materials": materials})
