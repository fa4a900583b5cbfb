"""An independent reference for the compensation tests: real rays through a singlet, traced by rayoptics.

Test-only. The lens is built in rayoptics' sequential model (surfaces, gaps, a
constant-index medium) and tilted with its coordinate breaks (a 'decenter'
before the front surface, the 'reverse' of it after the back surface), so that
object and image space share one frame: x to the observer's right, y up, z along
the line of sight toward the eye.

The power the eye meets is measured from real rays alone: collimated rays are
traced at small offsets about the chief ray, and the vergence matrix at a plane
perpendicular to the exit chief ray is ``V = −(∂u/∂q)(∂y/∂q)⁻¹`` (u the
transverse direction tangents of the exit rays, y their transverse positions
on that plane, q the entrance offsets), by central differences. This is the
definition of the dioptric power of an astigmatic pencil, so it needs no
formula of the engine.
"""
from __future__ import annotations

import math

import numpy as np
from rayoptics.elem.profiles import YToroid
from rayoptics.elem.surface import DecenterData
from rayoptics.optical.opticalmodel import OpticalModel
from rayoptics.raytr.opticalspec import FieldSpec, PupilSpec, WvlSpec
from rayoptics.raytr.trace import trace

WAVELENGTH_NM = 587.6


def _two_surfaces(front_radius_mm: float, back_radius_mm: float, thickness_mm: float, index: float,
                  object_distance_mm: float, back_gap_mm: float) -> OpticalModel:
    """Two spherical surfaces in air, the front the stop; rays start on the object plane."""
    opm = OpticalModel()
    opm.radius_mode = True
    sm, osp = opm["seq_model"], opm["optical_spec"]
    osp["pupil"] = PupilSpec(osp, key=["object", "epd"], value=2.0)
    osp["fov"] = FieldSpec(osp, key=["object", "angle"], flds=[0.0])
    osp["wvls"] = WvlSpec([(WAVELENGTH_NM, 1.0)], ref_wl=0)
    sm.gaps[0].thi = object_distance_mm
    sm.add_surface([front_radius_mm, thickness_mm, index])
    sm.set_stop()
    sm.add_surface([back_radius_mm, back_gap_mm])
    return opm


def singlet(front_radius_mm: float, back_radius_mm: float, thickness_mm: float, index: float, *,
            tilt_about_x_deg: float = 0.0, tilt_about_y_deg: float = 0.0,
            front_cross_radius_mm: float | None = None, toric_rotation_deg: float = 0.0,
            object_distance_mm: float = 1e10, back_gap_mm: float = 50.0) -> OpticalModel:
    """A lens in air; optionally tilted as a whole, optionally with a toric front surface.

    ``front_cross_radius_mm`` makes the front a toroid (radius ``front_radius_mm``
    in its y section, ``front_cross_radius_mm`` in its x section), turned by
    ``toric_rotation_deg`` about the line of sight. A radius of 0 is a plane.
    """
    opm = _two_surfaces(front_radius_mm, back_radius_mm, thickness_mm, index, object_distance_mm, back_gap_mm)
    front, back = opm["seq_model"].ifcs[1], opm["seq_model"].ifcs[2]
    if front_cross_radius_mm is not None:
        front.profile = YToroid(r=front_radius_mm, rR=front_cross_radius_mm)
    if tilt_about_x_deg or tilt_about_y_deg:
        # Euler angles in rayoptics' 'rxyz' order: the lens is turned about its own
        # normal first (gamma), then tilted; the back surface returns to the untilted frame.
        angles = {"alpha": tilt_about_x_deg, "beta": tilt_about_y_deg, "gamma": toric_rotation_deg}
        front.decenter = DecenterData("decenter", **angles)
        back.decenter = DecenterData("reverse", **angles)
    elif toric_rotation_deg:
        front.decenter = DecenterData("dec and return", gamma=toric_rotation_deg)
    opm["seq_model"].do_apertures = False
    opm.update_model()
    return opm


def _exit_line(opm: OpticalModel, x: float, y: float,
               direction: tuple[float, float, float] = (0.0, 0.0, 1.0)) -> tuple[np.ndarray, np.ndarray]:
    """Where a ray starting at (x, y) on the object plane with the given direction leaves the back surface.

    In the lens's frame: the front surface's plane (before any decentration or tilt) at z = 0, x and y as on
    the object plane.
    """
    sm = opm["seq_model"]
    ray, _, _ = trace(sm, np.array([x, y, 0.0]), np.asarray(direction, dtype=float), WAVELENGTH_NM)
    image_point, direction = np.asarray(ray[-1][0]), np.asarray(ray[-1][1])
    # rayoptics gives the last segment in the image surface's own coordinates: into the front surface's frame
    # (its global transform), then back through the front's decentration.
    turn, shift = sm.gbl_tfrms[-1]
    image_point, direction = turn @ image_point + shift, turn @ direction
    decenter = sm.ifcs[1].decenter
    if decenter is not None:
        image_point, direction = decenter.rot_mat @ image_point + decenter.dec, decenter.rot_mat @ direction
    # The last segment runs straight from the back surface to the image plane: step back along it.
    return image_point - ray[-2][2] * direction, direction


def vergence_matrix(opm: OpticalModel, behind_mm: float = 0.0, step_mm: float = 1e-3,
                    start: tuple[float, float] = (0.0, 0.0),
                    direction: tuple[float, float, float] = (0.0, 0.0, 1.0)) -> np.ndarray:
    """The 2×2 vergence matrix (D) of the exit pencil about the chief ray through the lens centre.

    Measured on the plane perpendicular to the exit chief ray, ``behind_mm``
    beyond the chief ray's exit point, in the x (right) / y (up) frame. The
    chief ray starts at ``start`` on the object plane; all rays of the pencil
    travel along ``direction`` (a plane wave).
    ``object_distance_mm`` of the model must be finite and small (rays start
    on the object plane).
    """
    origin, axis = _exit_line(opm, *start, direction)
    incoming = direction
    origin = origin + behind_mm * axis
    across = np.array([1.0, 0.0, 0.0]) - axis[0] * axis
    across /= np.linalg.norm(across)
    up = np.cross(axis, across)

    def transverse(x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
        point, direction = _exit_line(opm, start[0] + x, start[1] + y, incoming)
        along = (origin - point).dot(axis) / direction.dot(axis)
        offset = point + along * direction - origin
        position = np.array([offset.dot(across), offset.dot(up)])
        tangents = np.array([direction.dot(across), direction.dot(up)]) / direction.dot(axis)
        return position, tangents

    d_position = np.zeros((2, 2))
    d_tangent = np.zeros((2, 2))
    for column, (dx, dy) in enumerate(((step_mm, 0.0), (0.0, step_mm))):
        position_plus, tangent_plus = transverse(dx, dy)
        position_minus, tangent_minus = transverse(-dx, -dy)
        d_position[:, column] = (position_plus - position_minus) / (2.0 * step_mm)
        d_tangent[:, column] = (tangent_plus - tangent_minus) / (2.0 * step_mm)
    return -d_tangent @ np.linalg.inv(d_position) * 1000.0


def lens_normal(opm: OpticalModel, step_mm: float = 1e-3) -> np.ndarray:
    """The unit normal of the back surface where the chief ray leaves it, pointing toward the eye (+z).

    From the traced exit points alone: the points of rays at ±step in x and in y
    span the surface's tangent plane at the chief ray (curvature cancels in the
    central differences).
    """
    across = _exit_line(opm, step_mm, 0.0)[0] - _exit_line(opm, -step_mm, 0.0)[0]
    up = _exit_line(opm, 0.0, step_mm)[0] - _exit_line(opm, 0.0, -step_mm)[0]
    normal = np.cross(across, up)
    normal /= np.linalg.norm(normal)
    return normal if normal[2] > 0 else -normal


def turn_about_z(degrees: float) -> np.ndarray:
    """The rotation by an angle (degrees) about the line of sight, counter-clockwise seen facing the wearer."""
    a = math.radians(degrees)
    return np.array([[math.cos(a), -math.sin(a), 0.0], [math.sin(a), math.cos(a), 0.0], [0.0, 0.0, 1.0]])


def worn_singlet(front_radius_mm: float, back_radius_mm: float, back_sweep_radius_mm: float, thickness_mm: float,
                 index: float, rotation: np.ndarray, decenter_mm: tuple[float, float] = (0.0, 0.0),
                 object_distance_mm: float = 10.0, back_gap_mm: float = 50.0) -> OpticalModel:
    """A lens with a spherical front and a toric back (YToroid), posed by a rotation matrix and a decentration.

    ``rotation``'s columns are the lens's own x, y and z axes in the object frame; the back's profile (radius
    ``back_radius_mm``) lies in the lens's y section, swept about an axis parallel to its y at
    ``back_sweep_radius_mm`` (0: a cylinder). The front vertex sits at ``decenter_mm`` (x, y) on the first
    surface's plane; the frame returns after the back surface, so image space is the object frame again.
    """
    from transforms3d.euler import mat2euler

    opm = _two_surfaces(front_radius_mm, back_radius_mm, thickness_mm, index, object_distance_mm, back_gap_mm)
    front, back = opm["seq_model"].ifcs[1], opm["seq_model"].ifcs[2]
    back.profile = YToroid(r=back_radius_mm, rR=back_sweep_radius_mm)
    # rayoptics turns 'rxyz' Euler angles, alpha and beta taken left-handed, into the surface's rotation.
    a, b, g = np.degrees(mat2euler(np.asarray(rotation, dtype=float), axes="rxyz"))
    angles = {"alpha": -a, "beta": -b, "gamma": g}
    front.decenter = DecenterData("decenter", x=decenter_mm[0], y=decenter_mm[1], **angles)
    back.decenter = DecenterData("reverse", x=decenter_mm[0], y=decenter_mm[1], **angles)
    opm["seq_model"].do_apertures = False
    opm.update_model()
    return opm


def chief_exit(opm: OpticalModel, start: tuple[float, float] = (0.0, 0.0),
               direction: tuple[float, float, float] = (0.0, 0.0, 1.0)) -> tuple[np.ndarray, np.ndarray]:
    """Where the ray from ``start`` on the object plane (default along +z) leaves the lens, and its direction."""
    return _exit_line(opm, start[0], start[1], direction)
