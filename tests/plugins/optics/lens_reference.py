"""Test-only references for the lens-geometry tests, built on rayoptics (an independent optics library).

``thick_lens`` builds a spherical singlet in rayoptics' sequential model from
radii, thickness and index, so its paraxial back focal length can be compared
with the engine's back vertex power; ``seidel_astigmatism`` gives
the third-order (Seidel) astigmatism sum of a thin lens with the stop at the
eye's centre of rotation, the quantity Tscherning's ellipse sets to zero.
"""
from __future__ import annotations

from rayoptics.optical.opticalmodel import OpticalModel
from rayoptics.parax.thirdorder import compute_third_order
from rayoptics.raytr.opticalspec import FieldSpec, PupilSpec, WvlSpec


def _model(field_deg: float = 0.0) -> OpticalModel:
    opm = OpticalModel()
    opm.radius_mode = True
    osp = opm["optical_spec"]
    osp["pupil"] = PupilSpec(osp, key=["object", "epd"], value=4.0)
    osp["fov"] = FieldSpec(osp, key=["object", "angle"], flds=[0.0, field_deg] if field_deg else [0.0])
    osp["wvls"] = WvlSpec([("d", 1.0)], ref_wl=0)
    opm["seq_model"].gaps[0].thi = 1e10
    return opm


def radius_for_rayoptics(radius_mm: float) -> float:
    """rayoptics writes a plane as radius 0."""
    return 0.0 if radius_mm in (float("inf"), float("-inf")) else radius_mm


def thick_lens(front_radius_mm: float, back_radius_mm: float, thickness_mm: float, index: float) -> OpticalModel:
    """A singlet in air. Radii in rayoptics' sign convention (positive: centre to the right, toward the eye)."""
    opm = _model()
    sm = opm["seq_model"]
    sm.add_surface([radius_for_rayoptics(front_radius_mm), thickness_mm, index])
    sm.set_stop()
    sm.add_surface([radius_for_rayoptics(back_radius_mm), 100.0])
    opm.update_model()
    return opm


def paraxial_back_vertex_power(opm: OpticalModel) -> float:
    """1000 / back focal length (mm) from rayoptics' first-order data: the back vertex power in D."""
    return 1000.0 / opm["analysis_results"]["parax_data"].fod.bfl


def seidel_astigmatism(front_d: float, lens_power_d: float, index: float, rotation_distance_mm: float = 27.0) -> float:
    """The Seidel astigmatism sum S-III of a near-thin lens with the stop at the eye's centre of rotation."""
    opm = _model(field_deg=10.0)
    sm = opm["seq_model"]
    back_d = lens_power_d - front_d
    front_r = 1000.0 * (index - 1.0) / front_d if front_d else 0.0
    back_r = 1000.0 * (1.0 - index) / back_d if back_d else 0.0
    sm.add_surface([front_r, 0.01, index])
    sm.add_surface([back_r, rotation_distance_mm])
    sm.add_surface([0.0, 50.0])  # the eye's centre of rotation acts as the stop
    sm.set_stop()
    opm.update_model()
    return float(compute_third_order(opm).loc["sum", "S-III"])
