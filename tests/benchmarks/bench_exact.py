"""Benchmark: the exact as-worn tilt compensation — its cost per lens, and the engine's throughput with it on.

    make bench
    python tests/benchmarks/bench_exact.py --orders 2000 --lenses 600

0. Accuracy, the measurement behind the default method: single-vision orders over the whole range the tilt
   matters for, made with "martin" and with "exact"; each published lens (its rounded surfacing power, front
   curve and centre thickness) traced as worn, against the prescription carried to the fitting distance.
1. The real-ray trace alone: the as-worn vergence of many lenses in one vectorised call, and of one lens
   per call (the engine's case), per lens.
2. The exact compensation with its geometry coupling, per lens: the tilt stage's own time (from the
   pipeline's timing) over the benchmark mix with ``[stages.tilt] method = "exact"``, divided by the lenses
   it compensated — and the same stage with "martin" for comparison. Aim: 10 ms or less per lens.
3. The engine draining the benchmark mix with "exact" on, against the file-system floor
   (tests/benchmarks/bench_drain.py's method). Aim: within 2× of the floor.

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
from lenslane.plugins.optics.asworn import (  # noqa: E402
    asworn_vergence, coddington_vergence, largest_meridional_error, power_elements, worn_lenses,
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
            worn = worn_lenses([lens["geometry"]["front_curve_d"]],
                               [power_matrix(made["sphere"], made.get("cylinder", 0.0), made.get("axis", 180))],
                               lens["geometry"]["center_thickness_mm"], index, theta, t)
            rows.append((largest_meridional_error(np.array(wanted) - power_elements(coddington_vergence(worn))[0]),
                         lens["geometry"]["center_thickness_mm"], math.degrees(theta)))
    return np.array(rows, dtype=float)


def report_errors(method: str, rows: np.ndarray) -> None:
    error, thick, oblique = rows[:, 0], rows[:, 1] > 4.0, (rows[:, 2] >= 10.0) & (rows[:, 2] <= 20.0)
    both = thick & oblique
    print(f"  {method:6s}: {len(error)} lenses, over 0.12 D {100 * np.mean(error > 0.12):.1f} %, "
          f"p95 {np.percentile(error, 95):.3f} D, worst {error.max():.3f} D; thicker than 4 mm at 10°–20° of "
          f"obliquity: {100 * np.mean(error[both] > 0.12):.1f} % over 0.12 D ({int(both.sum())} lenses)")


def trace_cost(count: int) -> tuple[float, float]:
    """Seconds per lens for the as-worn vergence: all ``count`` lenses in one call, and one lens per call."""
    rng = np.random.default_rng(16)
    front = rng.uniform(1.0, 10.0, count)
    surfacing = np.column_stack([rng.uniform(-8, 8, count), rng.uniform(-1, 1, count), rng.uniform(-8, 8, count)])
    surfacing[:, 2] = surfacing[:, 0] + rng.uniform(-3, 0, count)
    theta = np.radians(rng.uniform(0, 25, count))
    tangential = np.column_stack([np.cos(rng.uniform(0, np.pi, count)), np.ones(count)])
    lenses = worn_lenses(front, surfacing, rng.uniform(1.0, 8.0, count), 1.6, theta, tangential)
    started = time.perf_counter()
    asworn_vergence(lenses)
    batched = (time.perf_counter() - started) / count
    single = min(count, 500)
    started = time.perf_counter()
    for i in range(single):
        asworn_vergence(lenses.take([i]))
    return batched, (time.perf_counter() - started) / single


def stage_cost(orders: list[dict], method: str) -> tuple[float, int, float]:
    """The tilt stage's seconds per compensated lens, the lenses compensated, and the whole chain's seconds."""
    host = start_host(LabConfig(stages={"tilt": {"method": method}}))
    pipeline = Pipeline(host)
    parsed = [read_order(json.dumps(data).encode(), host.settings.materials) for data in orders]
    pipeline.run(*parsed[0])  # warm up
    tilt_seconds, lenses, chain = 0.0, 0, 0.0
    for order, received in parsed:
        outcome = pipeline.run(order, received)
        tilt_seconds += outcome.timings["tilt"]
        chain += sum(outcome.timings.values())
        lenses += sum(1 for c in outcome.result["changes"] if c["stage"] == "tilt")
    return tilt_seconds / max(lenses, 1), lenses, chain


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--orders", type=int, default=2000, help="backlog drained with exact on (default 2000)")
    parser.add_argument("--lenses", type=int, default=600, help="orders of the mix timed in-process (default 600)")
    parser.add_argument("--study", type=int, default=1000, help="orders of the accuracy study (default 1000)")
    parser.add_argument("--keep", action="store_true", help="keep the generated labs")
    args = parser.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")

    batched, single = trace_cost(10000)
    print(f"as-worn trace: {1e6 * batched:.1f} µs per lens with 10 000 lenses in one call, "
          f"{1e3 * single:.2f} ms per lens one at a time")

    rng = random.Random(16)
    study = [study_order(i, rng) for i in range(args.study)]
    print(f"published lenses traced as worn (−12 … +12 D, cylinders to −4 D, pantoscopic 0–20°, face form 0–25°, "
          f"{len(STUDY_MATERIALS)} materials), error against the wanted power:")
    for method in ("martin", "exact"):
        report_errors(method, published_errors(study, method))

    rng = random.Random(20261201)
    orders = [make_order(i, rng) for i in range(args.lenses)]
    for method in ("martin", "exact"):
        per_lens, lenses, chain = stage_cost(orders, method)
        print(f"tilt stage, method {method}: {1e3 * per_lens:.2f} ms per compensated lens ({lenses} lenses), "
              f"the whole chain {1e3 * chain / len(orders):.2f} ms per order")

    workdir = Path(tempfile.mkdtemp(prefix="lenslane-bench-exact-", dir=os.environ.get("BENCH_DIR")))
    row = bench(args.orders, workdir, EXACT)
    if not args.keep:
        shutil.rmtree(workdir, ignore_errors=True)
    print(f"N={row['orders']} with exact on: engine {row['engine_rate']:.0f} orders/s ({row['engine_s']:.1f} s), "
          f"floor {row['floor_rate']:.0f} orders/s, ratio {row['ratio']:.2f} (aim ≤ 2), published {row['published']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
