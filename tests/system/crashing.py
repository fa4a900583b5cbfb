"""Test-only: ``lenslane watch LAB --once`` that crashes right after a step of the publish sequence.

    python -m tests.system.crashing LAB STEP[:N] [NAME...]

runs the engine in this process, exactly as ``lenslane watch --once`` does
(or, given NAMEs, takes exactly those inbox entries in that order as renamed
in, and commits them as one batch), with a step callback that ends the process abruptly (``os._exit``: no clean-up,
no flushing, as a crash) right after the N-th time (default the first) STEP
completes. The steps are :data:`lenslane.lab.folder.STEPS`.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Callable

from lenslane.chain.host import start_host
from lenslane.config import load_config
from lenslane.lab.folder import STEPS, Lab
from lenslane.watch.daemon import run

CRASH_EXIT_CODE = 86


def crash_after(spec: str) -> Callable[[str], None]:
    """A step callback that ends the process after the N-th time STEP completes (``spec`` is ``STEP[:N]``)."""
    step, _, count = spec.partition(":")
    if step not in STEPS:
        raise ValueError(f"{spec!r}: the step must be one of {', '.join(STEPS)}")
    wanted, seen = int(count or 1), [0]

    def on_step(done: str) -> None:
        if done == step:
            seen[0] += 1
            if seen[0] >= wanted:
                os._exit(CRASH_EXIT_CODE)

    return on_step


def main(argv: list[str]) -> int:
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
