"""The README's table of the order's fields says what the order's JSON Schema says: every field, whether it is
required, and what it may hold. The table is compared with the schema, so neither can change alone."""
from __future__ import annotations

from typing import Any

from lenslane.contract.models import LensOrder
from tests.conftest import REPO

EYES = {"right", "left"}


def _number(value: float) -> str:
    text = f"{value:g}"
    return text.replace("-", "−")


def _bounds(spec: dict[str, Any]) -> str:
    low = (f"> {_number(spec['exclusiveMinimum'])}" if "exclusiveMinimum" in spec
           else _number(spec["minimum"]) if "minimum" in spec else None)
    high = _number(spec["maximum"]) if "maximum" in spec else None
    if low is None and high is None:
        return ""
    if low is None:
        return f" ≤ {high}"
    if high is None:
        return f" {low}"
    return f" {low} … {high}" if not low.startswith(">") else f" {low}, ≤ {high}"


def value_text(spec: dict[str, Any], defs: dict[str, Any]) -> str:
    """What a field may hold, in words, from its JSON Schema."""
    choices = [part for part in spec.get("anyOf", [spec]) if part.get("type") != "null"]
    texts = []
    for part in choices:
        if "const" in part:
            texts.append(f"`{part['const']}`")
        elif "enum" in part:
            texts.append(", ".join(f"`{item}`" for item in part["enum"]))
        elif part.get("type") in ("number", "integer"):
            texts.append(f"{part['type']}{_bounds(part)}")
        elif part.get("type") == "string":
            if "pattern" in part:
                texts.append(f"text matching `{part['pattern']}`")
            elif "maxLength" in part:
                texts.append(f"text of {part.get('minLength', 0)}–{part['maxLength']} characters")
            else:
                texts.append("text")
        elif part.get("type") == "array":
            items = part["items"]
            what = "components" if "$ref" in items else f"numbers{_bounds(items)}"
            count = (f"{part['minItems']}–{part['maxItems']}" if "minItems" in part else f"at most {part['maxItems']}")
            texts.append(f"list of {count} {what}")
        elif "$ref" in part:
            texts.append("object")
    text = ", or ".join(texts)
    if spec.get("default") is not None:
        text += f"; default `{spec['default']}`"
    return text


def schema_rows() -> list[tuple[str, str, str]]:
    """(field, required, what it may hold) for every field of ``lens-order/1``, as the schema gives them."""
    schema = LensOrder.model_json_schema()
    defs = schema["$defs"]
    rows: list[tuple[str, str, str]] = []

    def walk(node: dict[str, Any], prefix: str) -> None:
        required = set(node.get("required", []))
        for name, spec in node["properties"].items():
            path = f"{prefix}<eye>" if name in EYES else f"{prefix}{name}"
            if name == "left":  # the same as right
                continue
            rows.append((path, "yes" if name in required else "no", value_text(spec, defs)))
            for part in spec.get("anyOf", [spec]):
                target = part.get("$ref") or part.get("items", {}).get("$ref")
                if target:
                    walk(defs[target.rsplit("/", 1)[1]], f"{path}[]." if "items" in part else f"{path}.")

    walk(schema, "")
    return rows


def readme_rows() -> list[tuple[str, str, str]]:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    table = text.split("<!-- order fields -->", 2)[1]
    rows = []
    for line in table.splitlines():
        cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0].startswith("`"):
            rows.append((cells[0].strip("`"), cells[1], cells[2]))
    return rows


def test_the_readme_table_of_order_fields_is_the_schema():
    assert readme_rows() == schema_rows()


def test_the_walk_reads_ranges_as_the_schema_states_them():
    rows = dict((field, value) for field, _, value in schema_rows())
    assert rows["rx.<eye>.sphere"] == "number −30 … 30"
    assert rows["frame.box_width_mm"] == "number > 0, ≤ 100"
    assert rows["frame.outline_mm"] == "list of 36–1000 numbers > 0, ≤ 70"
    assert rows["rx.<eye>.prism[].base"] == "`in`, `out`, `up`, `down`, or number 0 … 360"
    assert ("fit.<eye>.pd_mm", "yes", "number 20 … 42") in schema_rows()
