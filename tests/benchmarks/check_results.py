"""Results before and after a change of the engine, compared by hash on the benchmark's mix of orders.

    python tests/benchmarks/check_results.py [--before COMMIT] [--count N]

The "before" is computed by the code of COMMIT itself (default HEAD: the
working tree's change against the last commit): it is checked out into a temporary
git worktree, installed into a temporary folder (``pip install --no-deps
--target``, using this environment's dependencies) and run in a child process.
The "after" is the working tree, installed the same way. Both run the same
orders (``orders.py``, the benchmark's seed) through the default chain and
print one sha256 per order; the script exits 1 naming the orders whose
results differ.

Before hashing, both sides drop what a change may add on purpose:

- the ``engine`` block keeps only ``version`` and ``stages`` (the chain's
  distributions and versions are new, and the config's fingerprint covers the
  new ``[plugins.*]`` section, empty by default);
- the cautions of the older wordings inside flag messages read as the one
  caution of the vocabulary module.
"""
from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
BASELINE = "HEAD"

#: Run inside the child: prints "<order_id> <sha256>" per order of the benchmark's mix.
CHILD = r'''
import hashlib, json, random, sys
sys.path.insert(0, sys.argv[2])
from orders import make_order
from lenslane.config import LabConfig
from lenslane.chain.host import start_host
from lenslane.contract.intake import read_order
from lenslane.chain.pipeline import Pipeline, StageFailure

CAUTION = sys.argv[3]
OLDER_CAUTIONS = json.loads(sys.argv[4])
host = start_host(LabConfig())
pipeline = Pipeline(host)
rng = random.Random(20261201)
for index in range(int(sys.argv[1])):
    data = make_order(index, rng)
    order, parsed = read_order(json.dumps(data).encode(), host.settings.materials)
    try:
        result = pipeline.run(order, parsed).result
    except StageFailure as exc:
        told = "rejected " + exc.message
    else:
        result["engine"] = {k: result["engine"][k] for k in ("version", "stages")}
        for flag in result["flags"]:
            for older in OLDER_CAUTIONS:
                flag["message"] = flag["message"].replace(older, CAUTION)
        told = json.dumps(result, sort_keys=True, ensure_ascii=False)
    print(data["order_id"], hashlib.sha256(told.encode()).hexdigest())
'''

#: The cautions stages wrote inside flag messages before the vocabulary module gave them one wording.
OLDER_CAUTIONS = [
    "Results are for a licensed eye-care professional to verify; local codes and licensed practice prevail.",
    "Results are for a licensed professional to verify; local codes and licensed practice prevail.",
]


def install(source: Path, target: Path) -> None:
    # From a copy: a build/ folder left in the source by an earlier build could bring files since deleted.
    copy = target.with_name(target.name + "-source")
    shutil.copytree(source, copy, ignore=shutil.ignore_patterns(".venv", ".git", "build", "*.egg-info", "__pycache__"))
    source = copy
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
                    "--target", str(target), str(source)], check=True, cwd=target.parent)


def hashes(site: Path, count: int, caution: str) -> list[str]:
    import json

    env = dict(os.environ, PYTHONPATH=str(site), LENSLANE_DISABLE_PLUGIN_AUTOLOAD="1")
    ran = subprocess.run([sys.executable, "-c", CHILD, str(count), str(REPO / "tests" / "benchmarks"), caution,
                          json.dumps(OLDER_CAUTIONS)],
                         env=env, capture_output=True, text=True, check=True, cwd=site.parent)
    return ran.stdout.splitlines()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--before", default=BASELINE, help="the commit whose results are the reference")
    parser.add_argument("--count", type=int, default=4000, help="how many orders of the mix")
    args = parser.parse_args(argv)

    from lenslane.vocabulary import CAUTION

    with tempfile.TemporaryDirectory(prefix="lenslane-check-") as temp:
        temp_path = Path(temp)
        worktree = temp_path / "before"
        subprocess.run(["git", "-C", str(REPO), "worktree", "add", "--detach", "--quiet", str(worktree), args.before],
                       check=True)
        try:
            install(worktree, temp_path / "before-site")
            install(REPO, temp_path / "after-site")
            before = hashes(temp_path / "before-site", args.count, CAUTION)
            after = hashes(temp_path / "after-site", args.count, CAUTION)
        finally:
            subprocess.run(["git", "-C", str(REPO), "worktree", "remove", "--force", str(worktree)], check=False)
    if len(before) != args.count or len(after) != args.count:
        print(f"expected {args.count} hashes, got {len(before)} before and {len(after)} after", file=sys.stderr)
        return 1
    differ = [old.split()[0] for old, new in zip(before, after) if old != new]
    if differ:
        print(f"{len(differ)} of {args.count} results differ from {args.before}'s: {', '.join(differ[:20])}"
              + (" …" if len(differ) > 20 else ""))
        return 1
    print(f"{args.count} results identical to {args.before}'s (sha256 per result)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
