"""Benchmark: the engine draining a backlog against the bare file-system floor.

    make bench                     # 4 000 orders
    python tests/benchmarks/bench_drain.py --orders 1000 20000   # memory flatness

For each N: generate N orders, drain them with ``lenslane watch LAB --once``,
then run the floor (tests/benchmarks/floor.py) on the same files in a second
lab, and print orders per second for both, the ratio engine/floor, the
per-stage time shares from the pipeline's own timing, and the engine's peak RSS.
Never part of the test suite's pass/fail.

The floor also runs once before the engine, on a third copy, and the ratio is
taken against the mean of the two floor runs: the cost of creating a file drifts
on some file systems (ext4 without a journal, for one, skips inodes deleted in
the last one to six minutes, so every file created soon after a large deletion
costs more), and a floor measured on both sides of the engine sees the same
drift the engine does.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))

from tests.benchmarks.orders import write_orders  # noqa: E402


def timed(argv: list[str]) -> tuple[float, float, str]:
    """Run a command; its wall time (s), its peak RSS (MB) and what it printed."""
    started = time.perf_counter()
    child = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    out = child.stdout.read().decode()
    _, status, usage = os.wait4(child.pid, 0)
    elapsed = time.perf_counter() - started
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"{' '.join(argv)} exited {os.waitstatus_to_exitcode(status)}")
    return elapsed, usage.ru_maxrss / 1024.0, out


def bench(count: int, workdir: Path, settings: dict[str, str] | None = None) -> dict:
    """Drain ``count`` orders; ``settings`` replaces lines of the lab's config (a commented default by its setting)."""
    source = workdir / f"orders-{count}"
    write_orders(source, count)
    engine_lab = workdir / f"engine-{count}"
    floor_labs = [workdir / f"floor-before-{count}", workdir / f"floor-after-{count}"]
    lenslane = [sys.executable, "-m", "lenslane.cli"]
    subprocess.run([*lenslane, "init", str(engine_lab)], check=True, stdout=subprocess.DEVNULL)
    config = engine_lab / "lenslane.toml"
    for line, setting in (settings or {}).items():
        text = config.read_text(encoding="utf-8")
        if line not in text:
            raise SystemExit(f"the lab config has no line {line!r} to replace")
        config.write_text(text.replace(line, setting, 1), encoding="utf-8")
    for lab in floor_labs:
        (lab / "inbox").mkdir(parents=True)
    for name in os.listdir(source):
        for lab in (engine_lab, *floor_labs):
            shutil.copy(source / name, lab / "inbox" / name)

    floor = lambda lab: timed([sys.executable, str(HERE / "floor.py"), str(lab)])  # noqa: E731
    load_before = os.getloadavg()[0]
    before_s, _, _ = floor(floor_labs[0])
    engine_s, engine_rss, out = timed([*lenslane, "watch", str(engine_lab), "--once", "--stats"])
    after_s, floor_rss, _ = floor(floor_labs[1])
    load_after = os.getloadavg()[0]
    floor_s = (before_s + after_s) / 2
    published = len(os.listdir(engine_lab / "outbox"))
    stats = {}
    for line in out.splitlines():
        if line.startswith("{") and '"stage_seconds"' in line:
            stats = json.loads(line)
    return {"orders": count, "published": published, "engine_s": engine_s, "floor_s": floor_s,
            "floor_before_s": before_s, "floor_after_s": after_s,
            "engine_rate": count / engine_s, "floor_rate": count / floor_s, "ratio": engine_s / floor_s,
            "engine_peak_rss_mb": engine_rss, "floor_peak_rss_mb": floor_rss, "stats": stats,
            "load": (load_before, load_after)}


def report(row: dict) -> None:
    """Print one round: both rates, the ratio, memory, the load, and each stage's share of the chain."""
    print(f"N={row['orders']}: engine {row['engine_rate']:.0f} orders/s ({row['engine_s']:.1f} s), "
          f"floor {row['floor_rate']:.0f} orders/s ({row['floor_before_s']:.1f} s before, "
          f"{row['floor_after_s']:.1f} s after), "
          f"ratio {row['ratio']:.2f}, engine peak RSS {row['engine_peak_rss_mb']:.0f} MB "
          f"(floor {row['floor_peak_rss_mb']:.0f} MB), published {row['published']}; "
          f"load average {row['load'][0]:.2f} before, {row['load'][1]:.2f} after (other work on the machine "
          "moves every figure)")
    stage_seconds = row["stats"].get("stage_seconds", {})
    chain = sum(stage_seconds.values())
    if chain:
        shares = ", ".join(f"{name} {100 * s / chain:.0f}%" for name, s in stage_seconds.items())
        print(f"  the chain took {chain:.1f} s; per stage: {shares}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--orders", type=int, nargs="+", default=[4000], help="backlog sizes (default 4000)")
    parser.add_argument("--rounds", type=int, default=3, help="rounds per size, each on fresh copies (default 3)")
    parser.add_argument("--keep", action="store_true", help="keep the generated labs")
    args = parser.parse_args()
    workdir = Path(tempfile.mkdtemp(prefix="lenslane-bench-", dir=os.environ.get("BENCH_DIR")))
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, {workdir}")
    try:
        for count in args.orders:
            ratios = []
            for round_number in range(args.rounds):
                row = bench(count, workdir / f"round-{round_number}")
                report(row)
                ratios.append(row["ratio"])
            if len(ratios) > 1:
                print(f"N={count}: median ratio of {len(ratios)} rounds {statistics.median(ratios):.2f} "
                      f"(each: {', '.join(f'{ratio:.2f}' for ratio in ratios)})")
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
