"""Realistic generated orders for the benchmark: a mix of designs, powers, tilts and outlines.

Invented data of the benchmark's own scenario: practice codes and wearer codes only.
"""
from __future__ import annotations

import json
import math
import random
from pathlib import Path

MATERIALS = ["resin-1.50", "urethane-1.53", "polycarbonate-1.59", "resin-1.60", "resin-1.67", "resin-1.74"]


def _quarter(rng: random.Random, low: float, high: float) -> float:
    return round(rng.uniform(low, high) * 4) / 4


def _outline(rng: random.Random, width: float, height: float, count: int) -> list[float]:
    a, b, n = width / 2, height / 2, rng.uniform(2.5, 5.0)
    steps = [i * 2 * math.pi / count for i in range(count)]
    return [round((abs(math.cos(t) / a) ** n + abs(math.sin(t) / b) ** n) ** (-1 / n), 2) for t in steps]


def make_order(index: int, rng: random.Random) -> dict:
    design = rng.choices(["single_vision", "progressive", "bifocal"], [6, 3, 1])[0]
    width, height, bridge = rng.choice([48.0, 50.0, 52.0, 54.0]), rng.choice([32.0, 36.0, 40.0]), rng.choice([16.0, 18.0, 20.0])
    rx = {}
    base_sphere = _quarter(rng, -6.0, 4.0)
    for eye in ("right", "left"):
        eye_rx = {"sphere": base_sphere + _quarter(rng, -0.5, 0.5)}
        if rng.random() < 0.7:
            eye_rx["cylinder"] = _quarter(rng, -2.5, -0.25) * rng.choice([1, 1, 1, -1])
            eye_rx["axis"] = rng.randint(1, 180)
        if design != "single_vision":
            eye_rx["add"] = _quarter(rng, 0.75, 3.0)
        if rng.random() < 0.1:
            eye_rx["prism"] = [{"amount": _quarter(rng, 0.25, 2.0), "base": rng.choice(["in", "out", "up", "down"])}]
        rx[eye] = eye_rx
    if rng.random() < 0.5:
        rx["vertex_mm"] = 12.0
    fit = {eye: {"pd_mm": round(rng.uniform(29.0, 34.0), 1), "height_mm": round(height / 2 + rng.uniform(0, 4), 1)}
           for eye in ("right", "left")}
    if design == "bifocal":  # the segment top, 4 mm under the distance centre (no draw: the other orders stay the same)
        for eye in ("right", "left"):
            fit[eye]["segment_height_mm"] = round(fit[eye]["height_mm"] - 4.0, 1)
    if rng.random() < 0.6:
        fit["vertex_mm"] = round(rng.uniform(10.0, 15.0), 1)
        fit["pantoscopic_deg"] = round(rng.uniform(4.0, 12.0), 1)
        fit["face_form_deg"] = round(rng.uniform(0.0, 10.0), 1)
    frame = {"box_width_mm": width, "box_height_mm": height, "bridge_mm": bridge}
    if rng.random() < 0.4:
        frame["outline_mm"] = _outline(rng, width, height, rng.choice([72, 100, 360]))
    elif index % 3 == 0:  # an effective diameter instead, as practices often send (no draw: the others stay the same)
        frame["effective_diameter_mm"] = round(0.93 * math.hypot(width, height), 1)
    return {
        "format": "lens-order/1", "order_id": f"BENCH-{index:06d}", "placed_at": "2026-11-30T08:00:00Z",
        "account": f"bench-practice-{index % 7:02d}", "wearer": {"ref": f"BW-{index:06d}", "birth_year": rng.randint(1940, 2004)},
        "rx": rx, "lens": {"design": design, "material": rng.choice(MATERIALS)}, "frame": frame, "fit": fit,
    }


def write_orders(folder: Path, count: int, seed: int = 20261201) -> None:
    rng = random.Random(seed)
    folder.mkdir(parents=True, exist_ok=True)
    for index in range(count):
        (folder / f"order-{index:06d}.json").write_text(json.dumps(make_order(index, rng)))
