"""The order page: the story as ``explain`` tells it, laid out for reading, with the lens pictures.

One renderer serves both ``lenslane explain LAB ORDER_ID --html FILE`` (one
self-contained file: styles and SVG inline, no external link) and the order
page of ``lenslane serve``. Everything shown comes from the lab folder: the
story from the audit log, the lens pictures from the log's final lens and the
order as received (the published result file, or else the archived input,
each only when its sha256 is the one the log recorded).
"""
from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup

from lenslane import __version__
from lenslane.contract.models import ORDER_ID_RE
from lenslane.decide.model import ACTION_DONE
from lenslane.plugins.optics.outline import DEFAULT_EXPONENT
from lenslane.report.notation import geometry_text, inputs_text, number, value_text
from lenslane.report.pictures import eye_pictures
from lenslane.report.story import configurations, order_story
from lenslane.report.text import OUTCOME_MEANINGS, REFUSED_ON_READING, UNFINISHED
from lenslane.vocabulary import CAUTION, EYES, WHAT_TO_DECIDE

#: What an order is once a person's decision came after its last processing.
DECIDED = {**ACTION_DONE, "discard": "new version discarded"}

templates = Environment(loader=PackageLoader("lenslane.web", "templates"), autoescape=select_autoescape(default=True),
                        trim_blocks=True, lstrip_blocks=True)
templates.globals.update(caution=CAUTION, version=__version__, outcome_meanings=OUTCOME_MEANINGS,
                         refused_on_reading=REFUSED_ON_READING, unfinished=UNFINISHED)


def valid_order_id(order_id: str) -> bool:
    """Whether the text is an order id the contract allows (so it can never name a path outside the lab)."""
    return bool(ORDER_ID_RE.fullmatch(order_id))


def inside_lab(lab_root: Path, relative: str | None) -> Path | None:
    """``lab_root / relative`` when it stays inside the lab folder once resolved; None otherwise."""
    if not relative:
        return None
    root = Path(lab_root).resolve()
    path = (root / relative).resolve()
    return path if path.is_relative_to(root) and path != root else None


def _read_verified(lab_root: Path, relative: str | None, sha256: str | None) -> dict[str, Any] | None:
    """A JSON file of the lab whose bytes still have the sha256 the log recorded; None otherwise."""
    path = inside_lab(lab_root, relative)
    if path is None or not sha256:
        return None
    try:
        data = path.read_bytes()
    except OSError:
        return None
    if hashlib.sha256(data).hexdigest() != sha256:
        return None
    try:
        return json.loads(data)
    except ValueError:
        return None


def outline_exponent(config: dict[str, Any] | None) -> float:
    """The superellipse exponent for orders with neither outline nor ED in a configuration as the log recorded it
    (the one in force when the order ran, not the lab's file now); the default when it gives none."""
    from lenslane.plugins.geometry import GeometryParams

    try:
        settings = ((config or {}).get("stages") or {}).get("geometry") or {}
        return GeometryParams.model_validate(settings).outline_exponent_without_ed
    except (ValueError, AttributeError):
        return DEFAULT_EXPONENT


def _order_as_received(lab_root: Path, processing: dict[str, Any]) -> tuple[dict[str, Any] | None, str]:
    """The order of one processing, and where it was read from (or why it could not be)."""
    outcome, received = processing["outcome"], processing.get("received") or {}
    result = _read_verified(lab_root, outcome.get("result"), outcome.get("result_sha256"))
    if result and isinstance(result.get("order"), dict):
        return result["order"], f"the published result {outcome['result']}"
    order = _read_verified(lab_root, outcome.get("input"), received.get("sha256"))
    if order:
        return order, f"the input as received, {outcome['input']}"
    return None, ("neither the published result nor the input as received is in the lab with the content the "
                  "audit log recorded, so the lens is not drawn")


def _order_facts(order: dict[str, Any] | None) -> list[tuple[str, str]]:
    """The lens, frame and fit the order asked for, in a few labelled lines."""
    if not order:
        return []
    lens, frame, fit = order.get("lens") or {}, order.get("frame") or {}, order.get("fit") or {}
    facts = [("lens", ", ".join(str(v).replace("_", " ") for v in (lens.get("design"), lens.get("material")) if v))]
    if frame:
        facts.append(("frame", f"A {number(frame.get('box_width_mm', 0), 1)} × B {number(frame.get('box_height_mm', 0), 1)}"
                               f" mm, bridge {number(frame.get('bridge_mm', 0), 1)} mm, "
                               f"{str(frame.get('mount') or 'full_rim').replace('_', ' ')}"
                               + (", outline sent" if frame.get("outline_mm") else "")))
    per_eye = [f"{eye} PD {number(fit[eye]['pd_mm'], 1)} mm"
               + (f", height {number(fit[eye]['height_mm'], 1)} mm" if fit[eye].get("height_mm") is not None else "")
               + (f", segment {number(fit[eye]['segment_height_mm'], 1)} mm" if fit[eye].get("segment_height_mm") else "")
               for eye in EYES if isinstance(fit.get(eye), dict) and "pd_mm" in fit[eye]]
    worn = [f"{label} {_told(key, fit[key], {})}" for key, label in
            (("vertex_mm", "vertex"), ("pantoscopic_deg", "pantoscopic tilt"), ("face_form_deg", "face form"))
            if fit.get(key) is not None]
    if per_eye or worn:
        facts.append(("fit", "; ".join(per_eye + worn)))
    return facts


def _pictures(processing: dict[str, Any], order: dict[str, Any] | None, source: str, exponent: float,
              prefix: str) -> dict[str, Any]:
    """Each eye's pictures, drawn from the log's final lens and the order as received (read from ``source``)."""
    if not processing["lenses"] or not any(lens.get("geometry") for lens in processing["lenses"].values()):
        return {"eyes": {}, "note": "no lens geometry was published for this order, so there is nothing to draw"}
    if order is None:
        return {"eyes": {}, "note": source}
    changes = [{"field": c["field"], "inputs": c["inputs"]} for stage in processing["stages"] for c in stage["changes"]]
    result = {"order": order, "lenses": processing["lenses"], "changes": changes}
    eyes = {}
    for eye in processing["lenses"]:
        try:
            drawn = eye_pictures(result, eye, exponent, prefix)
        except (KeyError, TypeError, ValueError) as exc:  # an older or foreign result without what a picture needs
            return {"eyes": {}, "note": f"the lens could not be drawn: {exc}"}
        eyes[eye] = [{"title": p.title, "caption": p.caption, "svg": Markup(p.svg)} for p in drawn]
    return {"eyes": eyes, "note": f"drawn from the audit log's final lens and the order in {source}"}


def _told(field: str, value: Any, assumptions: dict[str, None]) -> str:
    """A value in the trade's notation; a geometry without its model's assumptions, which are collected."""
    if isinstance(value, dict) and "assumptions" in value:
        assumptions.update(dict.fromkeys(value["assumptions"] or ()))
        return geometry_text({k: v for k, v in value.items() if k != "assumptions"})
    return value_text(field, value)


def _with_texts(processing: dict[str, Any]) -> dict[str, Any]:
    """The processing with every value also in the trade's notation, and the geometry's assumptions listed once.

    The assumptions are the same sentences in every geometry record: told in
    full at every change and in the final lens, they bury the numbers.
    """
    assumptions: dict[str, None] = {}
    stages = [{**stage, "changes": [{**change,
                                     "before_text": _told(change["field"], change.get("before"), assumptions),
                                     "after_text": _told(change["field"], change.get("after"), assumptions),
                                     "inputs_text": inputs_text(change.get("inputs") or {})}
                                    for change in stage["changes"]]}
              for stage in processing["stages"]]
    lenses_text = {eye: {part: _told(part, value, assumptions) for part, value in lens.items()}
                   for eye, lens in processing["lenses"].items()}
    return {**processing, "stages": stages, "lenses_text": lenses_text, "assumptions": list(assumptions),
            "flag_groups": [{"level": level, "decide": WHAT_TO_DECIDE[level], "flags": flags}
                            for level, flags in processing["flags_by_level"].items() if flags]}


def order_page_data(lab_root: Path, order_id: str) -> dict[str, Any]:
    """Everything the order page shows, as plain data: the story, flags by level, the pictures."""
    story = order_story(Path(lab_root), order_id)
    in_force = {c["config_sha256"]: c["config"] for c in configurations(lab_root, story)} if story["found"] else {}
    processings = []
    for count, processing in enumerate(story["processings"], start=1):
        order, source = _order_as_received(lab_root, processing)
        exponent = outline_exponent(in_force.get(processing["engine"].get("config_sha256")))
        processings.append({**_with_texts(processing), "number": count, "order_facts": _order_facts(order),
                            "pictures": _pictures(processing, order, source, exponent, f"p{count}")})
    decisions = story.get("decisions") or []
    last_pass = (processings[-1]["seq"] or [0, 0])[1] if processings else 0
    later = [d for d in decisions if (d.get("seq") or 0) > last_pass]
    return {"order_id": order_id, "lab": str(lab_root), "found": story["found"], "processings": processings,
            "decided": DECIDED.get(later[-1].get("action")) if later else None,
            "latest": processings[-1] if processings else None, "decisions": decisions,
            "made_at": datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")}


def render_order_page(lab_root: Path, order_id: str, standalone: bool = True, **extra: Any) -> str:
    """The order page as one HTML document (``standalone``: for a file, without the server's links and form)."""
    return templates.get_template("order.html").render(page=order_page_data(lab_root, order_id),
                                                       standalone=standalone, **extra)
