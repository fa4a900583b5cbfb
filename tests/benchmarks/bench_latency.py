"""Drop-to-result latency in live watch: orders renamed into the inbox one at a time.

    python tests/benchmarks/bench_latency.py [--orders 200]

Prints p50, p95 and the worst time from the rename into ``inbox/`` to the
result appearing in ``outbox/`` (or ``review/``). Never part of the test suite's pass/fail.
"""
from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent.parent))

from tests.benchmarks.orders import make_order  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--orders", type=int, default=200)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="lenslane-latency-", dir=os.environ.get("BENCH_DIR")))
    lab = work / "lab"
    try:
        subprocess.run([sys.executable, "-m", "lenslane.cli", "init", str(lab)], check=True, stdout=subprocess.DEVNULL)
        watch = subprocess.Popen([sys.executable, "-m", "lenslane.cli", "watch", str(lab)],
                                 stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        for line in watch.stdout:  # wait until the observer is up
            if '"observer"' in line:
                break
        rng = random.Random(7)
        latencies = []
        for index in range(args.orders):
            order = make_order(index, rng)
            staged = lab / "inbox" / f".{index}.json.part"
            staged.write_text(json.dumps(order))
            # A result is published into outbox/, or into review/ when it waits for a person.
            targets = [lab / folder / f"{order['order_id']}.json" for folder in ("outbox", "review")]
            started = time.perf_counter()
            os.rename(staged, lab / "inbox" / f"{index}.json")
            while not any(target.exists() for target in targets):
                time.sleep(0.0005)
            latencies.append((time.perf_counter() - started) * 1000)
            time.sleep(0.01)
        watch.terminate()
        watch.wait(timeout=10)
        latencies.sort()
        p = lambda q: latencies[min(len(latencies) - 1, int(q * len(latencies)))]  # noqa: E731
        print(f"drop-to-result over {len(latencies)} orders: p50 {p(0.50):.1f} ms, p95 {p(0.95):.1f} ms, "
              f"worst {latencies[-1]:.1f} ms")
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
