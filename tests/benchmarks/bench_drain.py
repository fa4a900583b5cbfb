"""Benchmark: the engine draining a backlog against the bare file-system floor.

    make bench                     # 4 000 orders
    python tests/benchmarks/bench_drain.py --orders 1000 20000   # memory flatness

For each N: generate N orders, drain them with ``lenslane watch LAB --once``,
then run the floor (tests/benchmarks/floor.py) on the same files in a second
lab, and print orders per second for both, the ratio engine/floor, the
per-stage time shares from the pipeline's own timing, and the engine's peak RSS.
Never part of the test suite's pass/fail.

It also prints what each side's time an order is made of — CPU, and the
rest, mostly waiting for the disk — and the file system's fsync latency
(a new small file, as the floor writes one): the floor waits for two fsyncs
an order, the engine's group commit for one flush a batch, so the ratio
depends on that latency, and the line says at which latency the floor would
take half the engine's time.

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
import resource
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


def children_cpu_s() -> float:
    """CPU seconds (user and system) of this process's children waited for so far."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def fsync_ms(folder: Path, samples: int = 200) -> float:
    """The median time (ms) to fsync a new 60-byte file in ``folder``, as the floor does for each result."""
    times = []
    for number in range(samples):
        path = folder / f"fsync-probe-{number}"
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            os.write(fd, b"x" * 60)
            started = time.perf_counter()
            os.fsync(fd)
            times.append(time.perf_counter() - started)
        finally:
            os.close(fd)
        path.unlink()
    return 1000 * statistics.median(times)


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
    cpu = [children_cpu_s()]
    before_s, _, _ = floor(floor_labs[0])
    cpu.append(children_cpu_s())
    engine_s, engine_rss, out = timed([*lenslane, "watch", str(engine_lab), "--once", "--stats"])
    cpu.append(children_cpu_s())
    after_s, floor_rss, _ = floor(floor_labs[1])
    cpu.append(children_cpu_s())
    fsync_latency_ms = fsync_ms(workdir)
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
            "engine_cpu_s": cpu[2] - cpu[1], "floor_cpu_s": (cpu[1] - cpu[0] + cpu[3] - cpu[2]) / 2,
            "fsync_ms": fsync_latency_ms, "load": (load_before, load_after)}


def report(row: dict) -> None:
    """Print one round: both rates, the ratio, memory, the load, and each stage's share of the chain."""
    print(f"N={row['orders']}: engine {row['engine_rate']:.0f} orders/s ({row['engine_s']:.1f} s), "
          f"floor {row['floor_rate']:.0f} orders/s ({row['floor_before_s']:.1f} s before, "
          f"{row['floor_after_s']:.1f} s after), "
          f"ratio {row['ratio']:.2f}, engine peak RSS {row['engine_peak_rss_mb']:.0f} MB "
          f"(floor {row['floor_peak_rss_mb']:.0f} MB), published {row['published']}; "
          f"load average {row['load'][0]:.2f} before, {row['load'][1]:.2f} after (other work on the machine "
          "moves every figure)")
    per_order = lambda seconds: 1000 * seconds / row["orders"]  # noqa: E731
    engine_ms, floor_ms = per_order(row["engine_s"]), per_order(row["floor_s"])
    engine_cpu_ms, floor_cpu_ms = per_order(row["engine_cpu_s"]), per_order(row["floor_cpu_s"])
    # The floor without its two fsyncs an order, and the fsync latency at which it would take half the engine's
    # time (the engine's own waits, one flush for a batch of orders, are left out: they hardly grow with it).
    floor_besides_ms = floor_ms - 2 * row["fsync_ms"]
    even_ms = (engine_ms / 2 - floor_besides_ms) / 2
    print(f"  an order: engine {engine_ms:.2f} ms ({engine_cpu_ms:.2f} CPU, {engine_ms - engine_cpu_ms:.2f} the rest), "
          f"floor {floor_ms:.2f} ms ({floor_cpu_ms:.2f} CPU, {floor_ms - floor_cpu_ms:.2f} the rest); fsync of a "
          f"small new file here {row['fsync_ms']:.2f} ms (median); the floor would take half the engine's time "
          f"at an fsync of {even_ms:.2f} ms")
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
