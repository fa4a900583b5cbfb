"""Benchmark: the exact as-worn tilt compensation — its cost per lens, and the engine's throughput with it on.

    make bench
    python tests/benchmarks/bench_exact.py --orders 2000 --lenses 600

0. Accuracy, the measurement behind the default method: single-vision orders over the whole range the tilt
   matters for, made with "martin" and with "exact"; each published lens (its rounded surfacing power, front
   curve and centre thickness) traced as worn, against the prescription carried to the fitting distance.
1. The optics alone, one lens per call (the engine's case): the as-worn power on the line of sight, one
   off-axis pencil, the closed-form surfacing power, and the eight gazes of the off-axis errors.
2. The exact compensation with its geometry coupling, per lens: the tilt stage's own time (from the
   pipeline's timing) over the benchmark mix with ``[stages.tilt] method = "exact"``, divided by the lenses
   it compensated, and how much of it is the geometry stage's own front choices with their centre thicknesses
   that the coupling asks for (one per pair and round, and the order's outline once); the same stage with
   "martin" for comparison. Aim: 10 ms or less per lens.
3. The engine draining the benchmark mix with "exact" on and with "martin", each against the file-system
   floor (tests/benchmarks/bench_drain.py's method), and what "exact" adds per order. Aim: within 2× of the
   floor.

Never part of the test suite's pass/fail.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import platform
import random
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))

from lenslane.chain.host import start_host  # noqa: E402
from lenslane.chain.pipeline import Pipeline  # noqa: E402
from lenslane.config import LabConfig  # noqa: E402
from lenslane.contract.intake import read_order  # noqa: E402
import lenslane.plugins.tilt as tilt_stage  # noqa: E402
from lenslane.plugins.optics.asworn import (  # noqa: E402
    asworn_power, gaze_errors, largest_meridional_error, no_roll_axes, pencil_vergence, surfacing_for, worn_lens,
)
from lenslane.plugins.optics.power import power_matrix  # noqa: E402
from lenslane.plugins.optics.tilt import tilt_obliquity  # noqa: E402
from lenslane.plugins.optics.vertex import vertex_move  # noqa: E402
from tests.benchmarks.bench_drain import bench  # noqa: E402
from tests.benchmarks.orders import make_order  # noqa: E402

EXACT = {'# method = "martin"': 'method = "exact"'}
STUDY_MATERIALS = ["resin-1.50", "polycarbonate-1.59", "resin-1.67", "resin-1.74"]


def study_order(index: int, rng: random.Random) -> dict:
    """An invented single-vision order over the whole range the tilt matters for (practice and wearer codes only)."""
    rx = {}
    for eye in ("right", "left"):
        rx[eye] = {"sphere": round(rng.uniform(-12.0, 12.0) * 4) / 4}
        if rng.random() < 0.7:
            rx[eye].update(cylinder=-round(rng.uniform(0.25, 4.0) * 4) / 4, axis=rng.randint(1, 180))
    return {
        "format": "lens-order/1", "order_id": f"STUDY-{index:06d}", "account": "study-practice",
        "rx": {**rx, "vertex_mm": 12.0}, "lens": {"design": "single_vision", "material": rng.choice(STUDY_MATERIALS)},
        "frame": {"box_width_mm": rng.choice([48.0, 52.0, 56.0]), "box_height_mm": rng.choice([32.0, 38.0]),
                  "bridge_mm": 18.0},
        "fit": {"right": {"pd_mm": 31.0}, "left": {"pd_mm": 31.0}, "vertex_mm": round(rng.uniform(10.0, 16.0), 1),
                "pantoscopic_deg": round(rng.uniform(0.0, 20.0), 1), "face_form_deg": round(rng.uniform(0.0, 25.0), 1)},
    }


def published_errors(orders: list[dict], method: str) -> np.ndarray:
    """Per published lens: the largest meridional error (D) of its traced as-worn power against the wanted power.

    The lens is the one the result publishes (surfacing power to 0.01 D and 1°, front curve, centre thickness to
    0.1 mm), worn at the order's vertex distance and tilt; the wanted power is the prescription carried from
    the refraction to the fitting distance.
    """
    host = start_host(LabConfig(stages={"tilt": {"method": method}}))
    pipeline = Pipeline(host)
    rows = []
    for data in orders:
        order, received = read_order(json.dumps(data).encode(), host.settings.materials)
        result = pipeline.run(order, received).result
        index = host.settings.materials[data["lens"]["material"]].index
        for eye, lens in result["lenses"].items():
            if "geometry" not in lens:
                continue
            fit = data["fit"]
            theta, t = tilt_obliquity(fit["pantoscopic_deg"], fit["face_form_deg"], eye)
            rx, made = lens["rx"], lens["surfacing"]
            wanted = vertex_move(power_matrix(rx["sphere"], rx.get("cylinder", 0.0), rx.get("axis", 180)),
                                 12.0, fit["vertex_mm"])
            worn = worn_lens(lens["geometry"]["front_curve_d"],
                             power_matrix(made["sphere"], made.get("cylinder", 0.0), made.get("axis", 180)),
                             lens["geometry"]["center_thickness_mm"], index, theta, t)
            rows.append((largest_meridional_error(np.array(wanted) - np.array(asworn_power(worn))),
                         lens["geometry"]["center_thickness_mm"], math.degrees(theta)))
    return np.array(rows, dtype=float)


def report_errors(method: str, rows: np.ndarray) -> None:
    error, thick, oblique = rows[:, 0], rows[:, 1] > 4.0, (rows[:, 2] >= 10.0) & (rows[:, 2] <= 20.0)
    both = thick & oblique
    print(f"  {method:6s}: {len(error)} lenses, over 0.12 D {100 * np.mean(error > 0.12):.1f} %, "
          f"p95 {np.percentile(error, 95):.3f} D, worst {error.max():.3f} D; thicker than 4 mm at 10°–20° of "
          f"obliquity: {100 * np.mean(error[both] > 0.12):.1f} % over 0.12 D ({int(both.sum())} lenses)")


def optics_cost(count: int) -> dict[str, float]:
    """Seconds per call, one lens per call, over ``count`` random lenses: each optics step of the exact method."""
    rng = np.random.default_rng(16)
    cases = []
    for _ in range(count):
        sphere = rng.uniform(-8, 8)
        surfacing = power_matrix(sphere, -rng.uniform(0, 3), rng.uniform(0, 180))
        theta, t = math.radians(rng.uniform(0, 25)), (math.cos(rng.uniform(0, math.pi)), 1.0)
        front, thickness = rng.uniform(1.0, 10.0), rng.uniform(1.0, 8.0)
        cases.append((front, surfacing, thickness, 1.6, theta, t, worn_lens(front, surfacing, thickness, 1.6, theta, t)))
    gaze = (0.0, -math.sin(math.radians(30.0)), math.cos(math.radians(30.0)))
    on_sphere = (0.0, 27.0 * math.sin(math.radians(30.0)), 27.0 - 27.0 * math.cos(math.radians(30.0)))
    turned = no_roll_axes(gaze)[:2]
    steps = {
        "as-worn power on the line of sight": lambda c: asworn_power(c[6]),
        "one pencil at 30° of gaze": lambda c: pencil_vergence(c[6], on_sphere, gaze, turned),
        "closed-form surfacing power": lambda c: surfacing_for(c[1], c[0], c[2], c[3], c[4], c[5]),
        "off-axis errors (8 gazes)": lambda c: gaze_errors(c[6], c[1], "right"),
    }
    costs = {}
    for name, step in steps.items():
        started = time.perf_counter()
        for case in cases:
            step(case)
        costs[name] = (time.perf_counter() - started) / count
    return costs


def stage_cost(orders: list[dict], method: str) -> dict[str, float]:
    """The tilt stage's seconds per compensated lens and its part in the geometry stage's calls, the lenses
    compensated, and the whole chain's seconds per order."""
    host = start_host(LabConfig(stages={"tilt": {"method": method}}))
    pipeline = Pipeline(host)
    parsed = [read_order(json.dumps(data).encode(), host.settings.materials) for data in orders]
    pipeline.run(*parsed[0])  # warm up
    geometry = {"seconds": 0.0, "calls": 0}
    original = tilt_stage.lens_planner

    def timed(function, counted):
        def call(*args, **kwargs):
            started = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                geometry["seconds"] += time.perf_counter() - started
                geometry["calls"] += counted
        return call

    def timed_planner(*args, **kwargs):  # the outline, once per order, and each front choice with its thicknesses
        return timed(timed(original, 0)(*args, **kwargs), 1)

    tilt_seconds, lenses, chain = 0.0, 0, 0.0
    try:  # the coupling's calls into the geometry stage, timed where the tilt stage makes them
        tilt_stage.lens_planner = timed_planner
        for order, received in parsed:
            outcome = pipeline.run(order, received)
            tilt_seconds += outcome.timings["tilt"]
            chain += sum(outcome.timings.values())
            lenses += sum(1 for c in outcome.result["changes"] if c["stage"] == "tilt")
    finally:
        tilt_stage.lens_planner = original
    lenses = max(lenses, 1)
    return {"per_lens": tilt_seconds / lenses, "geometry_per_lens": geometry["seconds"] / lenses,
            "geometry_calls_per_lens": geometry["calls"] / lenses, "lenses": lenses, "chain_per_order": chain / len(orders),
            "tilt_per_order": tilt_seconds / len(orders)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--orders", type=int, default=2000, help="backlog drained with exact on (default 2000)")
    parser.add_argument("--lenses", type=int, default=600, help="orders of the mix timed in-process (default 600)")
    parser.add_argument("--study", type=int, default=1000, help="orders of the accuracy study (default 1000)")
    parser.add_argument("--keep", action="store_true", help="keep the generated labs")
    args = parser.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")

    print(f"load: {os.getloadavg()[0]:.2f} {os.getloadavg()[1]:.2f} {os.getloadavg()[2]:.2f} (1, 5, 15 min)")
    for name, seconds in optics_cost(2000).items():
        print(f"optics, one lens per call: {name} {1e6 * seconds:.0f} µs")

    rng = random.Random(16)
    study = [study_order(i, rng) for i in range(args.study)]
    print(f"published lenses traced as worn (−12 … +12 D, cylinders to −4 D, pantoscopic 0–20°, face form 0–25°, "
          f"{len(STUDY_MATERIALS)} materials), error against the wanted power:")
    for method in ("martin", "exact"):
        report_errors(method, published_errors(study, method))

    rng = random.Random(20261201)
    orders = [make_order(i, rng) for i in range(args.lenses)]
    costs = {method: stage_cost(orders, method) for method in ("martin", "exact")}
    for method, cost in costs.items():
        print(f"tilt stage, method {method}: {1e3 * cost['per_lens']:.2f} ms per compensated lens "
              f"({cost['lenses']} lenses), {1e3 * cost['tilt_per_order']:.2f} ms per order; the whole chain "
              f"{1e3 * cost['chain_per_order']:.2f} ms per order")
    exact = costs["exact"]
    print(f"  of the exact method's {1e3 * exact['per_lens']:.2f} ms per lens, {1e3 * exact['geometry_per_lens']:.2f} ms "
          f"are {exact['geometry_calls_per_lens']:.2f} calls into the geometry stage's front choice with its "
          f"thicknesses, {1e3 * (exact['per_lens'] - exact['geometry_per_lens']):.2f} ms the optics and the record")

    workdir = Path(tempfile.mkdtemp(prefix="lenslane-bench-exact-", dir=os.environ.get("BENCH_DIR")))
    try:
        rows = {"exact": bench(args.orders, workdir / "exact", EXACT), "martin": bench(args.orders, workdir / "martin")}
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)
    for method, row in rows.items():
        print(f"N={row['orders']} with {method}: engine {row['engine_rate']:.0f} orders/s ({row['engine_s']:.1f} s), "
              f"floor {row['floor_rate']:.0f} orders/s, ratio {row['ratio']:.2f} (aim ≤ 2), published {row['published']}")
    added = (rows["exact"]["engine_s"] - rows["martin"]["engine_s"]) / args.orders
    print(f"exact adds {1e3 * added:.2f} ms per order to the drain, {added / (rows['exact']['floor_s'] / args.orders):.2f}× "
          f"the floor's time per order; load {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
