"""The default lens-material table (handbook values, from memory; the lab's config may change them).

Index n_d, Abbe number V_d, density in g/cm³. A lab overrides or adds entries in
the ``[materials]`` table of its ``lenslane.toml``.
"""
from __future__ import annotations

from lenslane import hookimpl

DEFAULT_MATERIALS: dict[str, dict[str, float]] = {
    "resin-1.50": {"index": 1.498, "abbe": 58, "density": 1.32},
    "urethane-1.53": {"index": 1.530, "abbe": 45, "density": 1.11},
    "polycarbonate-1.59": {"index": 1.586, "abbe": 30, "density": 1.20},
    "resin-1.60": {"index": 1.600, "abbe": 42, "density": 1.30},
    "resin-1.67": {"index": 1.665, "abbe": 32, "density": 1.35},
    "resin-1.74": {"index": 1.740, "abbe": 33, "density": 1.46},
    "glass-1.52": {"index": 1.523, "abbe": 59, "density": 2.54},
}


@hookimpl
def lenslane_materials():
    return DEFAULT_MATERIALS
