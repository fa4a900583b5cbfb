"""Benchmark: the audit trail of a lab with a long history.

    make bench                                      # 1 000 000 orders of history
    python tests/benchmarks/bench_audit.py --orders 100000

Builds a lab whose audit log holds N orders of the benchmark's mix, written
through the engine's own writer (``AuditLog.append`` in batches of 64, as the
group commit does, with the index kept level and the default 64 MiB
rotation): the stories come from running the real chain on 400 generated
orders, each written again under a new order id, file, claim and digests.
Then it measures, against an empty lab where it says so:

- start-up: ``lenslane watch LAB --once`` on an empty inbox (best of 3), and
  its peak RSS;
- ``explain``: the work of telling one order's story after the process has
  started (index opened, records read, story built), over 50 random orders;
- the web page's search (a part of an order id, a part of a file name) and
  its counts of the day, answered by the index;
- ``audit verify --full`` (MB/s), then a day's records (5 000 orders) appended
  and ``audit verify`` from the point verified before.

Never part of the test suite's pass/fail.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import random
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))

from tests.benchmarks.bench_drain import timed  # noqa: E402
from tests.benchmarks.orders import make_order  # noqa: E402

STORIES = 400
BATCH = 64
DAY = 5000


def stories(host) -> list[tuple[dict, dict]]:
    """(order, result) pairs of the benchmark's mix, run through the real chain."""
    from lenslane.chain.pipeline import Pipeline
    from lenslane.contract.intake import read_order

    rng, pipeline, out = random.Random(20261201), Pipeline(host), []
    for index in range(STORIES):
        order = make_order(index, rng)
        validated, parsed = read_order(json.dumps(order).encode(), host.settings.materials)
        out.append((order, pipeline.run(validated, parsed).result))
    return out


def order_event(number: int, story: tuple[dict, dict], run: dict, at: str) -> dict:
    from lenslane.audit.records import received

    order, result = story
    order_id = f"HIST-{number:07d}"
    name = f"order-{number:07d}.json"
    digest = hashlib.sha256(f"{order_id}:{number}".encode()).hexdigest()
    return {"event": "published", "order_id": order_id,
            "received": received(name, 2000 + number % 1000, digest, at, f"{number}:{number * 7919}",
                                 {**order, "order_id": order_id}),
            "status": result["status"], "result": f"outbox/{order_id}.json",
            "result_sha256": hashlib.sha256(digest.encode()).hexdigest(),
            "content_sha256": hashlib.sha256(order_id.encode()).hexdigest(), "input": f"archive/{name}", "run": run,
            "changes": result["changes"], "flags": result["flags"]}


def build(lab: Path, count: int, start: int = 0, note: str = "") -> float:
    """Append ``count`` orders to the lab's log through AuditLog; returns seconds."""
    from lenslane.audit.records import run_definition, utc_now
    from lenslane.audit.writer import AuditLog
    from lenslane.chain.host import start_host
    from lenslane.config import load_config

    host = start_host(load_config(lab))
    run = run_definition(host.provenance, host.effective_config)
    pool = stories(host)
    audit = host.config.audit
    log = AuditLog(lab / "audit.jsonl", audit.rotate_bytes, audit.rotate_period)
    started = time.perf_counter()
    for first in range(start, start + count, BATCH):
        at = utc_now()
        log.append([order_event(n, pool[n % STORIES], run, at) for n in range(first, min(first + BATCH, start + count))])
        if note and (first - start) % 100_000 < BATCH and first > start:
            print(f"  {note}: {first - start} orders, {time.perf_counter() - started:.0f} s", flush=True)
    log.close()
    return time.perf_counter() - started


EXPLAIN_PROBE = """
import json, random, sys, time, resource
from pathlib import Path
from lenslane.audit.index import Index
from lenslane.report import order_story, render_text as render
lab, count = Path(sys.argv[1]), int(sys.argv[2])
rng = random.Random(7)
times = []
index = Index(lab)
index.catch_up()
for _ in range(50):
    key = f"HIST-{rng.randrange(count):07d}"
    started = time.perf_counter()
    text = render(order_story(lab, key, index=index))
    times.append(time.perf_counter() - started)
    assert "Final lens:" in text
first = time.perf_counter()
fresh = render(order_story(lab, f"order-{count - 1:07d}.json"))
first = time.perf_counter() - first
times.sort()
from lenslane.web.lab_view import counts_today, search
searches = []
for _ in range(20):  # what the web page asks: part of an order id, part of a file name
    number = rng.randrange(count)
    for text in (f"hist-{number:07d}"[:9], f"der-{number:07d}"):
        started = time.perf_counter()
        hits = search(lab, text)
        searches.append(time.perf_counter() - started)
        assert hits, text
searches.sort()
started = time.perf_counter()
counts_today(lab)
counts = time.perf_counter() - started
print(json.dumps({"median_ms": 1000 * times[25], "max_ms": 1000 * times[-1], "by_file_name_ms": 1000 * first,
                  "search_median_ms": 1000 * searches[20], "search_max_ms": 1000 * searches[-1],
                  "counts_ms": 1000 * counts, "rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--orders", type=int, default=1_000_000, help="orders of history (default 1 000 000)")
    parser.add_argument("--keep", action="store_true", help="keep the labs")
    args = parser.parse_args()
    workdir = Path(tempfile.mkdtemp(prefix="lenslane-bench-audit-", dir=os.environ.get("BENCH_DIR")))
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, {workdir}")
    lenslane = [sys.executable, "-m", "lenslane.cli"]
    try:
        empty, big = workdir / "empty", workdir / "history"
        for lab in (empty, big):
            subprocess.run([*lenslane, "init", str(lab)], check=True, stdout=subprocess.DEVNULL)
        seconds = build(big, args.orders, note="built")
        size = sum(p.stat().st_size for p in big.glob("audit*.jsonl"))
        defines = sum(len(line) for p in big.glob("audit*.jsonl") for line in open(p, "rb")
                      if line.startswith(b'{"body":'))  # a define record: the only one with a body
        index_size = (big / "audit.sqlite").stat().st_size
        print(f"history: {args.orders} orders written in {seconds:.0f} s ({args.orders / seconds:.0f} orders/s); "
              f"log {size / 1e6:.0f} MB in {len(list(big.glob('audit*.jsonl')))} files = "
              f"{size / args.orders:.0f} bytes per order ({(size - defines) / args.orders:.0f} in the orders' own "
              f"records, {defines / args.orders:.1f} in define records); index {index_size / 1e6:.0f} MB")

        starts = {}
        for name, lab in (("empty", empty), ("history", big)):
            runs = [timed([*lenslane, "watch", str(lab), "--once"]) for _ in range(3)]
            starts[name] = (min(r[0] for r in runs), max(r[1] for r in runs))
        print(f"start-up (watch --once, empty inbox, best of 3): empty lab {starts['empty'][0]:.2f} s, "
              f"{args.orders} orders {starts['history'][0]:.2f} s (+{starts['history'][0] - starts['empty'][0]:.2f} s); "
              f"peak RSS {starts['empty'][1]:.0f} MB vs {starts['history'][1]:.0f} MB")

        _, rss, out = timed([sys.executable, "-c", EXPLAIN_PROBE, str(big), str(args.orders)])
        probe = json.loads(out)
        print(f"explain after start: median {probe['median_ms']:.1f} ms, worst {probe['max_ms']:.1f} ms of 50 random "
              f"orders; by input file name {probe['by_file_name_ms']:.1f} ms; peak RSS {rss:.0f} MB")
        print(f"web page: search by part of an order id or file name median {probe['search_median_ms']:.1f} ms, worst "
              f"{probe['search_max_ms']:.1f} ms of 40; today's counts {probe['counts_ms']:.0f} ms (every order of "
              "the history was written today)")

        full_s, full_rss, out = timed([*lenslane, "audit", "verify", str(big), "--full"])
        print(f"audit verify --full: {full_s:.1f} s, {size / 1e6 / full_s:.0f} MB/s, peak RSS {full_rss:.0f} MB "
              f"({out.splitlines()[0][:60]}…)")
        build(big, DAY, start=args.orders)
        day_s, _, out = timed([*lenslane, "audit", "verify", str(big)])
        print(f"audit verify after a day ({DAY} orders) more: {day_s:.2f} s ({out.splitlines()[0][:90]}…)")
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
