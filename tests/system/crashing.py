"""Test-only: a lenslane process that crashes right after a step it reports.

    python -m tests.system.crashing LAB STEP[:N] [NAME...]
    python -m tests.system.crashing --command STEP[:N] LENSLANE_ARGS...

The first form runs ``lenslane watch LAB --once`` in this process (or, given
NAMEs, takes exactly those inbox entries in that order as renamed in, and
commits them as one batch). The second runs any lenslane command line
(``watch LAB``, ``decide LAB ORDER approve …``) with every lab folder it opens
reporting to the same callback. Either way the callback ends the process
abruptly (``os._exit``: no clean-up, no flushing, as a crash) right after the
N-th time (default the first) STEP completes. The steps are
:data:`lenslane.lab.folder.STEPS` (an order's way) and ``DECISION_STEPS``.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Callable

from lenslane import cli
from lenslane.chain.host import start_host
from lenslane.config import load_config
from lenslane.lab.folder import DECISION_STEPS, STEPS, Lab
from lenslane.watch.daemon import run

CRASH_EXIT_CODE = 86


def crash_after(spec: str) -> Callable[[str], None]:
    """A step callback that ends the process after the N-th time STEP completes (``spec`` is ``STEP[:N]``)."""
    step, _, count = spec.partition(":")
    if step not in STEPS + DECISION_STEPS:
        raise ValueError(f"{spec!r}: the step must be one of {', '.join(STEPS + DECISION_STEPS)}")
    wanted, seen = int(count or 1), [0]

    def on_step(done: str) -> None:
        if done == step:
            seen[0] += 1
            if seen[0] >= wanted:
                os._exit(CRASH_EXIT_CODE)

    return on_step


def run_command(spec: str, args: list[str]) -> int:
    """A lenslane command line whose lab folders (every :class:`Lab` it makes) crash after ``spec``."""
    crash, make = crash_after(spec), Lab.__init__

    def with_crash(self, *args, on_step=None, **kwargs):  # this process only: it ends at the crash anyway
        make(self, *args, on_step=crash, **kwargs)

    Lab.__init__ = with_crash
    return cli.main(args)


def main(argv: list[str]) -> int:
    if argv[0] == "--command":
        return run_command(argv[1], argv[2:])
    root, spec, take = Path(argv[0]), argv[1], argv[2:]
    host = start_host(load_config(root))
    if not take:
        return run(root, host, once=True, on_step=crash_after(spec))
    lab = Lab(root, host, on_step=crash_after(spec))
    lab.recover()
    for name in take:
        lab.consider(name, moved=True)
    lab.commit()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
