"""Pictures of one lens, drawn to scale from a result's own numbers, as SVG.

Per eye: the outline in its frame box with the optical centre (and the
fitting cross or the segment top); a thickness map over the outline; cross-
sections along the horizontal and vertical meridians through the optical
centre; and, for a compensated lens, the prescription beside the surfacing
power as power crosses.

Every length is in millimetres: a picture's SVG user unit is one millimetre,
so the drawings are to scale (a 10 mm scale bar is on each), and they stay
readable printed in black and white — surfaces, edges and bands differ by line
style, hatching and labels, never by colour alone.

The thickness is not copied from anywhere: it is worked out again from the
result's surfacing power, front curve, centre thickness, prism and index with
the same published optics functions the geometry stage uses
(:mod:`lenslane.plugins.optics`), on the outline the order gives (or the
modelled one, :func:`~lenslane.plugins.optics.outline.modelled_outline`).
"""
from __future__ import annotations

import math
from html import escape
from typing import Any, NamedTuple

import numpy as np

from lenslane.plugins.optics.outline import DEFAULT_EXPONENT, modelled_outline, outline_extent, outline_points
from lenslane.plugins.optics.power import PowerMatrix, matrix_of, principal_powers
from lenslane.plugins.optics.prism import resultant_prism
from lenslane.plugins.optics.surfaces import sag_mm, surface_curvature_per_mm
from lenslane.plugins.optics.thickness import LensShape, thickness_mm
from lenslane.report.notation import number, power_text

#: Step of the thickness map's grid, mm.
GRID_MM = 1.0
#: Points along each cross-section.
SECTION_POINTS = 241
#: Text height in the pictures, mm (the SVG user unit).
TEXT_MM = 2.4
_MARGIN_MM = 4.0
#: Thickness-map bands, lightest (thinnest) to darkest: grey levels that print in black and white.
_BAND_GREYS = ("#f4f4f4", "#dcdcdc", "#c4c4c4", "#acacac", "#949494", "#7c7c7c", "#646464", "#4c4c4c")
_STEPS_MM = (0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 2.5, 5.0)


class Picture(NamedTuple):
    """One drawing: a title, a sentence saying what it shows, and the SVG text."""

    title: str
    caption: str
    svg: str


class LensModel(NamedTuple):
    """One eye's lens as the pictures draw it, every length in mm (front view, x to the observer's right, y up).

    ``outline_mm``: the outline's points about the box centre; ``centre_mm``:
    the optical centre about the box centre (for a progressive, the prism
    reference point); ``fitting_cross_mm``: a progressive's fitting cross, at
    the order's fitting height; ``edge_mm``: the thickness at each
    outline point; ``thinnest`` / ``thickest``: the index of the thinnest and
    thickest outline point; ``outline_source``: where the outline comes from.
    """

    eye: str
    design: str
    outline_mm: np.ndarray
    outline_source: str
    box_width_mm: float
    box_height_mm: float
    centre_mm: tuple[float, float]
    fitting_cross_mm: tuple[float, float] | None
    segment_top_mm: float | None
    shape: LensShape
    center_thickness_mm: float
    edge_mm: np.ndarray
    thinnest: int
    thickest: int
    blank_diameter_mm: float | None
    surfacing: dict[str, Any]

    def thickness_at(self, points_about_box_centre) -> np.ndarray:
        """The thickness (mm) at points given about the box centre (NaN where a surface does not reach)."""
        points = np.asarray(points_about_box_centre, dtype=float).reshape(-1, 2) - np.asarray(self.centre_mm)
        return thickness_mm(points, self.shape, self.center_thickness_mm)

    def front_sag_at(self, distance_from_centre_mm) -> np.ndarray:
        """The front surface's sag (mm) at distances from the optical centre (the front vertex is there)."""
        curvature = surface_curvature_per_mm(self.shape.front_d, self.shape.index, "front")
        return np.asarray(sag_mm(curvature, np.asarray(distance_from_centre_mm, dtype=float)))


class Section(NamedTuple):
    """A cross-section along one meridian through the optical centre.

    ``along_mm``: signed distance from the optical centre along the meridian;
    ``front_mm`` / ``back_mm``: depth of the front and back surface behind the
    plane of the front vertex (toward the eye).
    """

    name: str
    along_mm: np.ndarray
    front_mm: np.ndarray
    back_mm: np.ndarray
    ends: tuple[str, str]


def _index_of(result: dict[str, Any], eye: str) -> float:
    """The index the geometry stage used for this eye (its change record's inputs), else the order's."""
    for change in reversed(result.get("changes") or []):
        if change.get("field") == f"lenses.{eye}.geometry":
            index = (change.get("inputs") or {}).get("index")
            if index is not None:
                return float(index)
    index = (result.get("order") or {}).get("lens", {}).get("index")
    if index is None:
        raise ValueError(f"the result does not say which refractive index the {eye} lens has")
    return float(index)


def lens_model(result: dict[str, Any], eye: str, exponent_without_ed: float = DEFAULT_EXPONENT) -> LensModel | None:
    """One eye's lens from a ``lens-order-result/1`` (None when the result has no geometry for that eye).

    Parameters
    ----------
    result : dict
        The published result (its ``order`` and ``lenses``).
    eye : {"right", "left"}
    exponent_without_ed : float
        The lab's superellipse exponent for an order with neither an outline
        nor an ED (``stages.geometry.outline_exponent_without_ed``).
    """
    lens = (result.get("lenses") or {}).get(eye) or {}
    geometry, surfacing = lens.get("geometry"), lens.get("surfacing")
    if not geometry or not surfacing:
        return None
    order = result.get("order") or {}
    frame = order.get("frame") or {}
    width, height = float(frame["box_width_mm"]), float(frame["box_height_mm"])
    if frame.get("outline_mm"):
        radii = [float(r) for r in frame["outline_mm"]]
        source = f"the order's outline ({len(radii)} radii)"
    else:
        ed = frame.get("effective_diameter_mm")
        modelled = modelled_outline(width, height, ed, exponent_without_ed)
        radii = list(modelled.radii_mm)
        source = (f"outline modelled from A {number(width, 1)} mm, B {number(height, 1)} mm"
                  + (f" and ED {number(ed, 1)} mm" if ed is not None else f", exponent {exponent_without_ed:g}"))
    extent = outline_extent(radii)
    # The wedge is the prescribed prism and any thinning prism the geometry added, as one resultant.
    prism = resultant_prism([(float(p.get("amount") or 0.0), float(p.get("base_deg") or 0.0))
                             for p in (lens.get("prism") or {}, geometry.get("thinning_prism") or {})], eye)
    shape = LensShape(float(geometry["front_curve_d"]), matrix_of(surfacing), _index_of(result, eye), prism.amount,
                      prism.base_deg)
    centre = tuple(float(v) for v in geometry.get("optical_centre_mm") or (0.0, 0.0))
    outline = outline_points(radii, eye)
    center_thickness = float(geometry["center_thickness_mm"])
    edge = thickness_mm(outline - np.asarray(centre), shape, center_thickness)
    fit = ((order.get("fit") or {}).get(eye) or {})
    segment = fit.get("segment_height_mm")
    design = (order.get("lens") or {}).get("design", "")
    fitting_cross = None
    if design == "progressive":
        fitting_height = fit.get("height_mm")
        fitting_cross = (centre[0], 0.0 if fitting_height is None else float(fitting_height) - height / 2.0)
    return LensModel(
        eye, design, outline, source, extent.width_mm, extent.height_mm, centre, fitting_cross,
        None if segment is None else float(segment) - height / 2.0, shape, center_thickness, edge,
        int(np.nanargmin(edge)), int(np.nanargmax(edge)), geometry.get("blank_min_diameter_mm"), surfacing)


# --------------------------------------------------------------------------
# Small SVG helpers (one user unit = 1 mm; SVG's y points down, the lens's up)
# --------------------------------------------------------------------------


def _f(value: float) -> str:
    return f"{value:.2f}".rstrip("0").rstrip(".")


def _text(x: float, y: float, text: str, anchor: str = "start", size: float = TEXT_MM, weight: str = "normal",
          css: str = "") -> str:
    halo = ' paint-order="stroke" stroke="#fff" stroke-width="0.6"'
    return (f'<text x="{_f(x)}" y="{_f(y)}" font-size="{_f(size)}" text-anchor="{anchor}" font-weight="{weight}"'
            f'{halo} class="{css}">{escape(text)}</text>')


def _polyline(points, closed: bool = False, style: str = "", fill: str = "none") -> str:
    path = " ".join(f"{_f(x)},{_f(y)}" for x, y in points)
    tag = "polygon" if closed else "polyline"
    return f'<{tag} points="{path}" fill="{fill}" {style}/>'


def _svg(view: tuple[float, float, float, float], body: list[str], label: str) -> str:
    x, y, w, h = view
    return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="{_f(x)} {_f(y)} {_f(w)} {_f(h)}" '
            f'width="{_f(w * 3.2)}" height="{_f(h * 3.2)}" role="img" aria-label="{escape(label)}" '
            f'font-family="sans-serif" class="lens-picture">' + "".join(body) + "</svg>")


def _scale_bar(x: float, y: float) -> str:
    """A 10 mm bar with end ticks, labelled."""
    return (f'<g class="scale-bar" stroke="#000" stroke-width="0.3">'
            f'<line x1="{_f(x)}" y1="{_f(y)}" x2="{_f(x + 10)}" y2="{_f(y)}"/>'
            f'<line x1="{_f(x)}" y1="{_f(y - 1)}" x2="{_f(x)}" y2="{_f(y + 1)}"/>'
            f'<line x1="{_f(x + 10)}" y1="{_f(y - 1)}" x2="{_f(x + 10)}" y2="{_f(y + 1)}"/></g>'
            + _text(x + 5, y - 1.4, "10 mm", "middle", css="scale-label"))


def _marker(x: float, y: float, kind: str) -> str:
    """Shapes that tell markers apart without colour: a crossed circle (optical centre), a filled square (thickest),
    an open square (thinnest), a large upright cross (fitting cross), a small diagonal cross (box centre)."""
    if kind == "centre":
        return (f'<g stroke="#000" stroke-width="0.35" fill="#fff"><circle cx="{_f(x)}" cy="{_f(y)}" r="1.3"/>'
                f'<line x1="{_f(x - 1.8)}" y1="{_f(y)}" x2="{_f(x + 1.8)}" y2="{_f(y)}"/>'
                f'<line x1="{_f(x)}" y1="{_f(y - 1.8)}" x2="{_f(x)}" y2="{_f(y + 1.8)}"/></g>')
    if kind == "thickest":
        return f'<rect x="{_f(x - 1)}" y="{_f(y - 1)}" width="2" height="2" fill="#000"/>'
    if kind == "thinnest":
        return (f'<rect x="{_f(x - 1)}" y="{_f(y - 1)}" width="2" height="2" fill="#fff" stroke="#000" '
                f'stroke-width="0.35"/>')
    if kind == "fitting":  # a large upright cross
        return (f'<g stroke="#000" stroke-width="0.45"><line x1="{_f(x - 3)}" y1="{_f(y)}" x2="{_f(x + 3)}" '
                f'y2="{_f(y)}"/><line x1="{_f(x)}" y1="{_f(y - 3)}" x2="{_f(x)}" y2="{_f(y + 3)}"/></g>')
    # the box centre: a small diagonal cross
    return (f'<g stroke="#000" stroke-width="0.3"><line x1="{_f(x - 1.2)}" y1="{_f(y - 1.2)}" x2="{_f(x + 1.2)}" '
            f'y2="{_f(y + 1.2)}"/><line x1="{_f(x - 1.2)}" y1="{_f(y + 1.2)}" x2="{_f(x + 1.2)}" y2="{_f(y - 1.2)}"/></g>')


def _nose_sign(eye: str) -> float:
    """Seen from the front the nose lies toward +x for the right lens and −x for the left (ISO 8429)."""
    return 1.0 if eye == "right" else -1.0


def _outline_svg_points(model: LensModel) -> list[tuple[float, float]]:
    return [(float(x), -float(y)) for x, y in model.outline_mm]


def _side_labels(model: LensModel, top: float) -> list[str]:
    half = model.box_width_mm / 2.0
    nose = _nose_sign(model.eye)
    return [_text(nose * half, top, "nasal", "end" if nose > 0 else "start", css="side"),
            _text(-nose * half, top, "temporal", "start" if nose > 0 else "end", css="side")]


# --------------------------------------------------------------------------
# The outline in its frame box
# --------------------------------------------------------------------------


def outline_picture(model: LensModel) -> Picture:
    """The outline, its box (A × B), the box centre, the optical centre and, where there is one, the fitting cross or the segment top."""
    half_w, half_h = model.box_width_mm / 2.0, model.box_height_mm / 2.0
    cx, cy = model.centre_mm
    reach = max(half_w, half_h)
    if model.blank_diameter_mm:
        reach = max(reach, model.blank_diameter_mm / 2.0 + max(abs(cx), abs(cy)))
    left, top = -reach - _MARGIN_MM, -reach - _MARGIN_MM - 4
    width, height = 2 * (reach + _MARGIN_MM), 2 * (reach + _MARGIN_MM) + 12
    body = [f'<rect x="{_f(-half_w)}" y="{_f(-half_h)}" width="{_f(2 * half_w)}" height="{_f(2 * half_h)}" '
            f'fill="none" stroke="#000" stroke-width="0.25" stroke-dasharray="1.5 1"/>',
            _polyline(_outline_svg_points(model), True, 'stroke="#000" stroke-width="0.6"'),
            _marker(0.0, 0.0, "box"), _text(-0.8, -1.0, "box centre", "end", css="label")]
    body.append(f'<g stroke="#000" stroke-width="0.2" stroke-dasharray="0.4 0.8">'
                f'<line x1="{_f(left)}" y1="{_f(-cy)}" x2="{_f(left + width)}" y2="{_f(-cy)}"/>'
                f'<line x1="{_f(cx)}" y1="{_f(top)}" x2="{_f(cx)}" y2="{_f(top + height - 12)}"/></g>')
    if model.blank_diameter_mm:
        radius = model.blank_diameter_mm / 2.0
        body.append(f'<circle cx="{_f(cx)}" cy="{_f(-cy)}" r="{_f(radius)}" fill="none" stroke="#000" '
                    f'stroke-width="0.25" stroke-dasharray="3 1 0.5 1"/>')
        body.append(_text(cx, -cy - radius - 1.0, f"smallest blank ⌀ {number(model.blank_diameter_mm, 1)} mm",
                          "middle", css="label"))
    if model.segment_top_mm is not None:
        y = -model.segment_top_mm
        body.append(f'<line x1="{_f(-half_w)}" y1="{_f(y)}" x2="{_f(half_w)}" y2="{_f(y)}" stroke="#000" '
                    f'stroke-width="0.45" stroke-dasharray="2.5 0.8 0.6 0.8"/>')
        body.append(_text(0.0, y + 3.2, f"segment top {number(model.segment_top_mm + half_h, 1)} mm above the "
                                        "box bottom", "middle", css="label"))
    # Labels of the centres run toward the middle of the lens, away from the near (nasal) edge.
    side, anchor = (-1.0, "end") if cx >= 0 else (1.0, "start")
    if model.fitting_cross_mm is not None and model.fitting_cross_mm != model.centre_mm:
        fx, fy = model.fitting_cross_mm
        body += [_marker(fx, -fy, "fitting"),
                 _text(fx + side * 2.8, -fy - 1.8, f"fitting cross, height {number(fy + half_h, 1)} mm", anchor,
                       css="label")]
        centre_name = "optical centre (prism reference point)"
    else:
        centre_name = "fitting cross (optical centre)" if model.design == "progressive" else "optical centre"
    body += [_marker(cx, -cy, "centre"), _text(cx + side * 2.6, -cy + 4.4, centre_name, anchor, css="label")]
    inward = _nose_sign(model.eye) * cx
    body += _side_labels(model, -half_h - 1.2)
    body.append(_text(0.0, half_h + 4.0, f"A {number(model.box_width_mm, 1)} mm × B {number(model.box_height_mm, 1)} mm",
                      "middle", css="label"))
    body.append(_text(0.0, half_h + 7.2, f"optical centre {number(abs(inward), 1)} mm {'in' if inward >= 0 else 'out'}, "
                                         f"{number(abs(cy), 1)} mm {'up' if cy >= 0 else 'down'} from the box centre",
                      "middle", css="label"))
    body.append(_scale_bar(left + 2, top + height - 3))
    caption = (f"{model.eye.capitalize()} lens seen from the front, to scale: outline ({model.outline_source}, "
               f"solid), box A × B (dashed), smallest blank about the optical centre (dash-dot), the meridians "
               f"through the optical centre (dotted).")
    return Picture("Outline in the frame", caption, _svg((left, top, width, height), body, caption))


# --------------------------------------------------------------------------
# The thickness map
# --------------------------------------------------------------------------


def contour_step_mm(low: float, high: float) -> float:
    """A round step giving three to eight contour lines between ``low`` and ``high`` (mm)."""
    span = max(high - low, 1e-6)
    for step in _STEPS_MM:
        if span / step <= 8:
            return step
    return _STEPS_MM[-1]


def contour_segments(values: np.ndarray, xs: np.ndarray, ys: np.ndarray, level: float) -> list[tuple]:
    """Line segments where a gridded field crosses ``level`` (marching squares, linear interpolation).

    ``values[j, i]`` is the field at ``(xs[i], ys[j])``; cells touching a NaN
    draw nothing. Returns ``[((x1, y1), (x2, y2)), …]``.

    References
    ----------
    Lorensen & Cline, "Marching cubes", SIGGRAPH 1987 (its two-dimensional case).
    """
    above = values >= level
    corners = (above[:-1, :-1].astype(int) | above[:-1, 1:] << 1 | above[1:, 1:] << 2 | above[1:, :-1] << 3)
    finite = np.isfinite(values)
    usable = finite[:-1, :-1] & finite[:-1, 1:] & finite[1:, 1:] & finite[1:, :-1]
    segments = []
    for j, i in zip(*np.nonzero(usable & (corners != 0) & (corners != 15))):
        square = ((xs[i], ys[j], values[j, i]), (xs[i + 1], ys[j], values[j, i + 1]),
                  (xs[i + 1], ys[j + 1], values[j + 1, i + 1]), (xs[i], ys[j + 1], values[j + 1, i]))
        crossings = []
        for a, b in ((0, 1), (1, 2), (2, 3), (3, 0)):
            (xa, ya, va), (xb, yb, vb) = square[a], square[b]
            if (va >= level) != (vb >= level):
                t = (level - va) / (vb - va)
                crossings.append((xa + t * (xb - xa), ya + t * (yb - ya)))
        # Two crossings, or four at a saddle: pair them in order around the cell.
        segments += [(crossings[k], crossings[k + 1]) for k in range(0, len(crossings) - 1, 2)]
    return segments


def _inside(model: LensModel, x: float, y: float) -> bool:
    """Whether a point (mm about the box centre) lies inside the outline, which is star-shaped about the box centre."""
    angles = np.arctan2(model.outline_mm[:, 1], model.outline_mm[:, 0])
    radii = np.hypot(model.outline_mm[:, 0], model.outline_mm[:, 1])
    order = np.argsort(angles)
    reach = np.interp(math.atan2(y, x), angles[order], radii[order], period=2 * math.pi)
    return math.hypot(x, y) < reach - 1.0


def _label_segment(segments: list[tuple], model: LensModel) -> tuple:
    """The segment inside the outline nearest the line straight down from the optical centre: the labels line up there."""
    cx, cy = model.centre_mm
    inside = [s for s in segments if _inside(model, (s[0][0] + s[1][0]) / 2, (s[0][1] + s[1][1]) / 2)]
    segments = inside or segments

    def off_the_line(segment):
        (ax, ay), (bx, by) = segment
        x, y = (ax + bx) / 2 - cx, (ay + by) / 2 - cy
        return math.atan2(abs(x), -y)  # 0 straight below the centre, π straight above

    return min(segments, key=off_the_line)


def thickness_map_picture(model: LensModel, prefix: str) -> Picture:
    """Grey bands and labelled contour lines of the thickness over the outline, the centre and the thinnest and thickest edge."""
    xs_outline, ys_outline = model.outline_mm[:, 0], model.outline_mm[:, 1]
    xs = np.arange(xs_outline.min() - GRID_MM, xs_outline.max() + 2 * GRID_MM, GRID_MM)
    ys = np.arange(ys_outline.min() - GRID_MM, ys_outline.max() + 2 * GRID_MM, GRID_MM)
    gx, gy = np.meshgrid(xs, ys)
    field = model.thickness_at(np.column_stack((gx.ravel(), gy.ravel()))).reshape(gx.shape)
    edge = model.edge_mm
    low = min(model.center_thickness_mm, float(edge[model.thinnest]))
    high = max(model.center_thickness_mm, float(edge[model.thickest]))
    step = contour_step_mm(low, high)
    levels = [step * k for k in range(math.ceil(low / step), math.floor(high / step) + 1)]
    # A level within a quarter step of either end would make a band too thin to read.
    levels = [level for level in levels if low + step / 4 < level < high - step / 4] or [round((low + high) / 2.0, 2)]
    bands = np.searchsorted(np.asarray(levels), field)  # band k lies between levels[k-1] and levels[k]
    clip = f"{prefix}-clip"
    body = [f'<defs><clipPath id="{clip}">{_polyline(_outline_svg_points(model), True)}</clipPath></defs>',
            f'<g clip-path="url(#{clip})" shape-rendering="crispEdges">']
    for j, y in enumerate(ys):
        row, start = bands[j], 0
        for i in range(1, len(xs) + 1):  # one rectangle per run of equal band in the row
            if i == len(xs) or row[i] != row[start]:
                grey = _BAND_GREYS[min(int(row[start]), len(_BAND_GREYS) - 1)]
                body.append(f'<rect x="{_f(xs[start] - GRID_MM / 2)}" y="{_f(-y - GRID_MM / 2)}" '
                            f'width="{_f((i - start) * GRID_MM)}" height="{_f(GRID_MM)}" fill="{grey}"/>')
                start = i
    body.append("</g>")
    for level in levels:
        segments = contour_segments(field, xs, ys, level)
        if not segments:
            continue
        path = "".join(f"M{_f(a[0])} {_f(-a[1])}L{_f(b[0])} {_f(-b[1])}" for a, b in segments)
        body.append(f'<path d="{path}" fill="none" stroke="#000" stroke-width="0.22" clip-path="url(#{clip})"/>')
        (ax, ay), (bx, by) = _label_segment(segments, model)
        body.append(_text((ax + bx) / 2, -(ay + by) / 2 + 0.8, f"{number(level, 2).rstrip('0').rstrip('.')}",
                          "middle", 2.0, css="contour-label"))
    body.append(_polyline(_outline_svg_points(model), True, 'stroke="#000" stroke-width="0.6"'))
    cx, cy = model.centre_mm
    marks = (("centre", cx, cy, model.center_thickness_mm, "centre"),
             ("thinnest", *model.outline_mm[model.thinnest], float(edge[model.thinnest]), "thinnest edge"),
             ("thickest", *model.outline_mm[model.thickest], float(edge[model.thickest]), "thickest edge"))
    for kind, x, y, value, name in marks:
        body.append(_marker(x, -y, kind))
        away = 1.0 if x <= cx or kind == "centre" else -1.0
        body.append(_text(x + away * 2.4, -y - 1.6, f"{name} {number(value, 1)} mm", "start" if away > 0 else "end",
                          weight="bold", css=f"mark-{kind}"))
    top = float(-ys_outline.max()) - _MARGIN_MM - 3
    body += _side_labels(model, top + 3)
    left = float(xs_outline.min()) - _MARGIN_MM - 14
    right = float(xs_outline.max()) + _MARGIN_MM + 14
    bottom = float(-ys_outline.min()) + _MARGIN_MM + 4 + 4.2 * (len(levels) + 1) / 2
    # The legend: each band's grey beside its range in mm.
    edges_mm = [low, *levels, high]
    for k in range(len(edges_mm) - 1):
        column, line = k % 2, k // 2
        x0 = left + 2 + column * (right - left) / 2
        y0 = float(-ys_outline.min()) + _MARGIN_MM + 2 + 4.2 * line
        body.append(f'<rect x="{_f(x0)}" y="{_f(y0)}" width="5" height="3" fill="{_BAND_GREYS[min(k, 7)]}" '
                    f'stroke="#000" stroke-width="0.2"/>')
        body.append(_text(x0 + 6, y0 + 2.5, f"{number(edges_mm[k], 1)}–{number(edges_mm[k + 1], 1)} mm",
                          css="legend"))
    body.append(_scale_bar(right - 14, top + 4))
    caption = (f"{model.eye.capitalize()} lens from the front: thickness in mm (contour lines every "
               f"{number(step, 2).rstrip('0').rstrip('.')} mm, darker is thicker), worked out from the result's "
               f"surfacing power {power_text(model.surfacing, add=False)}, front curve "
               f"{number(model.shape.front_d, 2, sign=True)} D, centre thickness {number(model.center_thickness_mm, 1)} mm "
               f"and index {model.shape.index:g}; open square thinnest edge, filled square thickest edge.")
    return Picture("Thickness", caption, _svg((left, top, right - left, bottom - top + 2), body, caption))


# --------------------------------------------------------------------------
# Cross-sections
# --------------------------------------------------------------------------


def _chord(model: LensModel, horizontal: bool) -> tuple[float, float]:
    """Where the meridian through the optical centre meets the outline: the two signed distances from the centre."""
    points = model.outline_mm - np.asarray(model.centre_mm)
    across, along = (points[:, 1], points[:, 0]) if horizontal else (points[:, 0], points[:, 1])
    nxt_across, nxt_along = np.roll(across, -1), np.roll(along, -1)
    crossing = (across <= 0) != (nxt_across <= 0)
    t = across[crossing] / (across[crossing] - nxt_across[crossing])
    hits = along[crossing] + t * (nxt_along[crossing] - along[crossing])
    return float(hits.min()), float(hits.max())


def section(model: LensModel, horizontal: bool) -> Section:
    """The lens cut along its horizontal (or vertical) meridian through the optical centre.

    The front's depth is its sag at the distance from the optical centre (the
    front vertex lies there); the back's depth is the front's plus the lens
    thickness at that point, so the back carries the toric curve and the prism
    wedge exactly as :func:`~lenslane.plugins.optics.thickness.thickness_mm` has them.
    """
    start, stop = _chord(model, horizontal)
    along = np.linspace(start, stop, SECTION_POINTS)
    offsets = np.column_stack((along, np.zeros_like(along))) if horizontal else np.column_stack((np.zeros_like(along), along))
    front = model.front_sag_at(np.abs(along))
    back = front + thickness_mm(offsets, model.shape, model.center_thickness_mm)
    if horizontal:
        ends = ("nasal", "temporal") if _nose_sign(model.eye) < 0 else ("temporal", "nasal")
    else:
        ends = ("below", "above")
    return Section("horizontal" if horizontal else "vertical", along, front, back, ends)


def sections_picture(model: LensModel, prefix: str) -> Picture:
    """Both cross-sections, one above the other, to scale: the front solid, the back dashed, the cut hatched."""
    cuts = [section(model, True), section(model, False)]
    left = min(float(c.along_mm.min()) for c in cuts) - 16
    right = max(float(c.along_mm.max()) for c in cuts) + 16
    hatch = f"{prefix}-hatch"
    body = [f'<defs><pattern id="{hatch}" width="1.2" height="1.2" patternUnits="userSpaceOnUse" '
            f'patternTransform="rotate(45)"><line x1="0" y1="0" x2="0" y2="1.2" stroke="#000" stroke-width="0.25"/>'
            f'</pattern></defs>']
    y = 8.0
    for cut in cuts:
        depth = float(np.nanmax(cut.back_mm)) - min(0.0, float(np.nanmin(cut.front_mm)))
        shift = y - min(0.0, float(np.nanmin(cut.front_mm)))
        front = [(float(a), float(f) + shift) for a, f in zip(cut.along_mm, cut.front_mm)]
        back = [(float(a), float(b) + shift) for a, b in zip(cut.along_mm, cut.back_mm)]
        body.append(_text(left + 1, y - 3.5, f"{cut.name} meridian through the optical centre", weight="bold",
                          css="section-title"))
        body.append(_polyline(front + back[::-1], True, 'stroke="none"', fill=f"url(#{hatch})"))
        body.append(_polyline(front, False, 'stroke="#000" stroke-width="0.45"'))
        body.append(_polyline(back, False, 'stroke="#000" stroke-width="0.45" stroke-dasharray="1.2 0.6"'))
        for x_end, (_, first), (_, last) in ((front[0][0], front[0], back[0]), (front[-1][0], front[-1], back[-1])):
            anchor, dx = ("end", -1.2) if x_end < 0 else ("start", 1.2)
            body.append(_text(x_end + dx, (first + last) / 2 + 0.8, f"{number(last - first, 1)} mm", anchor,
                              css="section-edge"))
        centre_front, centre_back = shift, shift + model.center_thickness_mm
        body.append(f'<line x1="0" y1="{_f(centre_front - 1.5)}" x2="0" y2="{_f(centre_back + 1.5)}" stroke="#000" '
                    f'stroke-width="0.2" stroke-dasharray="0.4 0.6"/>')
        body.append(_text(0.8, centre_back + 3.6, f"centre {number(model.center_thickness_mm, 1)} mm",
                          css="section-centre"))
        body.append(_text(front[0][0], shift + depth + 7.5, f"← {cut.ends[0]}", css="side"))
        body.append(_text(front[-1][0], shift + depth + 7.5, f"{cut.ends[1]} →", "end", css="side"))
        y = shift + depth + 16
    body.append(_text(left + 1, y - 2, f"front {number(model.shape.front_d, 2, sign=True)} D (solid line); back "
                                       f"(dashed) toward the eye, below", css="legend"))
    body.append(_scale_bar(right - 12, y + 2))
    caption = (f"{model.eye.capitalize()} lens cut along the meridians through the optical centre, to scale "
               f"(the same scale across and in depth), seen with the eye below.")
    return Picture("Cross-sections", caption, _svg((left, 0.0, right - left, y + 5), body, caption))


# --------------------------------------------------------------------------
# The prescription beside the surfacing power
# --------------------------------------------------------------------------


def _power_cross(matrix: PowerMatrix, x0: float, title: str, dashed: bool) -> list[str]:
    """A power cross: each principal meridian drawn at its angle (0° to the right, counter-clockwise) with its power."""
    larger, smaller, direction = principal_powers(matrix)
    style = ' stroke-dasharray="1.5 0.8"' if dashed else ""
    body = [_text(x0, -19.5, title, "middle", weight="bold", css="cross-title"),
            f'<circle cx="{_f(x0)}" cy="0" r="14" fill="none" stroke="#000" stroke-width="0.15" '
            f'stroke-dasharray="0.3 0.9"/>']
    for power, angle in ((larger, direction), (smaller, (direction + 90.0) % 180.0)):
        rad = math.radians(angle)
        dx, dy = 14 * math.cos(rad), -14 * math.sin(rad)
        body.append(f'<line x1="{_f(x0 - dx)}" y1="{_f(-dy)}" x2="{_f(x0 + dx)}" y2="{_f(dy)}" stroke="#000" '
                    f'stroke-width="0.5"{style}/>')
        body.append(_text(x0 + 1.18 * dx, 1.18 * dy + 0.8, f"{number(power, 2, sign=True)} @ {angle:.0f}°", "middle",
                          2.1, css="meridian"))
    return body


def powers_picture(rx: dict[str, Any], surfacing: dict[str, Any], eye: str) -> Picture:
    """The prescription's power cross beside the surfacing power's (the power to produce after compensation)."""
    body = (_power_cross(matrix_of(rx), 0.0, "prescription", False)
            + _power_cross(matrix_of(surfacing), 46.0, "surfacing", True))
    body.append(_text(0.0, 22.5, power_text(rx, add=False), "middle", css="power"))
    body.append(_text(46.0, 22.5, power_text(surfacing, add=False), "middle", css="power"))
    caption = (f"{eye.capitalize()} lens: the principal meridians and their powers (D) of the prescription (solid) "
               f"and of the surfacing power (dashed), axes in the standard notation seen from the front.")
    return Picture("Prescription and surfacing power", caption, _svg((-24.0, -24.0, 94.0, 50.0), body, caption))


# --------------------------------------------------------------------------
# Off-axis errors (where the exact tilt method ran)
# --------------------------------------------------------------------------


def off_axis_picture(off_axis: dict[str, Any], eye: str) -> Picture:
    """The mean power error M and the cylinder error at each gaze angle and direction, seen from the front.

    ``off_axis`` is what the exact tilt method records: ``gaze_angles_deg`` and,
    per direction (``up``, ``down``, ``nasal``, ``temporal``), ``mean_d`` and
    ``cylinder_d`` per angle (errors as power vectors, Thibos, Wheeler & Horner,
    Optom Vis Sci 74:367, 1997); null where the gaze's pencil does not get
    through the lens, drawn as "beyond the lens". One millimetre of the drawing
    is one degree of gaze.
    """
    angles = [float(a) for a in off_axis.get("gaze_angles_deg") or ()]
    reach = max(angles, default=30.0)
    nose = _nose_sign(eye)
    directions = {"up": (0.0, 1.0), "down": (0.0, -1.0), "nasal": (nose, 0.0), "temporal": (-nose, 0.0)}
    body = [_marker(0.0, 0.0, "centre"), _text(1.8, -1.8, "straight ahead", css="label")]
    for angle in angles:
        body.append(f'<circle cx="0" cy="0" r="{_f(angle)}" fill="none" stroke="#000" stroke-width="0.15" '
                    f'stroke-dasharray="0.4 0.8"/>')
        body.append(_text(angle * 0.72 + 0.6, -angle * 0.72, f"{angle:g}°", size=2.0, css="gaze-angle"))
    for name, (dx, dy) in directions.items():
        errors = off_axis.get(name)
        if not isinstance(errors, dict):
            continue
        if dx == 0:
            body.append(_text(0.0, -dy * (reach + 6) + 0.8, name, "middle", weight="bold", css="direction"))
        else:
            body.append(_text(dx * (reach + 2), -6.0, name, "start" if dx > 0 else "end", weight="bold",
                              css="direction"))
        for step, (angle, mean, cylinder) in enumerate(zip(angles, errors.get("mean_d") or (),
                                                           errors.get("cylinder_d") or ())):
            x, y = dx * angle, -dy * angle
            body.append(f'<circle cx="{_f(x)}" cy="{_f(y)}" r="0.8" fill="#fff" stroke="#000" stroke-width="0.3"/>')
            if dx == 0:  # beside the point
                anchor, tx, ty = "start", x + 1.6, y + 0.2
            else:  # the inner angle above the arm, the next below, and so on
                anchor, tx, ty = "middle", x, (y - 3.6) if step % 2 == 0 else (y + 3.2)
            if mean is None or cylinder is None:  # the record's null: the pencil does not get through the lens
                body.append(_text(tx, ty, "beyond", anchor, 2.0, css="mean-error"))
                body.append(_text(tx, ty + 2.3, "the lens", anchor, 2.0, css="cylinder-error"))
                continue
            body.append(_text(tx, ty, f"M {number(mean, 2, sign=True)}", anchor, 2.0, css="mean-error"))
            body.append(_text(tx, ty + 2.3, f"cyl {number(cylinder, 2)}", anchor, 2.0, css="cylinder-error"))
    span = reach + 16
    body.append(_text(-span + 1, span - 1.5, "D; M mean power error, cyl cylinder error", size=2.0, css="legend"))
    caption = (f"{eye.capitalize()} lens, where the exact tilt method ran: the errors the eye meets looking through "
               f"the lens at {', '.join(f'{a:g}°' for a in angles)} of gaze, as the engine recorded them (D), seen "
               f"from the front; one millimetre of the drawing is one degree of gaze.")
    return Picture("Off-axis errors", caption, _svg((-span, -span, 2 * span, 2 * span), body, caption))


def _off_axis_of(result: dict[str, Any], eye: str) -> dict[str, Any] | None:
    """The off-axis errors the exact tilt method recorded for this eye, if it ran."""
    for change in reversed(result.get("changes") or []):
        inputs = change.get("inputs") or {}
        if change.get("field") == f"lenses.{eye}.surfacing" and isinstance(inputs.get("off_axis"), dict):
            return inputs["off_axis"]
    return None


# --------------------------------------------------------------------------
# All of one eye
# --------------------------------------------------------------------------


def eye_pictures(result: dict[str, Any], eye: str, exponent_without_ed: float = DEFAULT_EXPONENT,
                 prefix: str = "pic") -> list[Picture]:
    """Every picture of one eye's lens (empty when the result has no lens geometry for it).

    ``prefix`` keeps the SVG ids (clip paths, hatching) of several pictures on
    one page apart.
    """
    model = lens_model(result, eye, exponent_without_ed)
    lens = (result.get("lenses") or {}).get(eye) or {}
    pictures = []
    if model is not None:
        pictures += [outline_picture(model), thickness_map_picture(model, f"{prefix}-{eye}"),
                     sections_picture(model, f"{prefix}-{eye}")]
    rx, surfacing = lens.get("rx"), lens.get("surfacing")
    if rx and surfacing and matrix_of(rx) != matrix_of(surfacing):
        pictures.append(powers_picture(rx, surfacing, eye))
    off_axis = _off_axis_of(result, eye)
    if off_axis:
        pictures.append(off_axis_picture(off_axis, eye))
    return pictures
